"""Every published word state carries the word's text and times (issue 28, item 1).

A subscriber on another connection has no recogniser output to join against: what it is told
about a word must name the word. Checked on the caller's ``tag --json`` output, on a follower's
replayed updates and snapshot, and on the server's revision history (``inspect --conversation``).
"""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    CTM_TEXT,
    Served,
    models_dir_fixture,
    served_fixture,
)
from midstream import HypothesisUpdate, Word
from midstream.client import AddWord, Client, Snapshot
from midstream.client.cli._main import main

pytestmark = pytest.mark.corpus



def _ctm_words() -> dict[str, tuple[str, float, float]]:
    """``id -> (text, start, end)`` of CTM_TEXT's words, ids as the CTM reader names them."""
    words: dict[str, tuple[str, float, float]] = {}
    counts: dict[str, int] = {}
    for line in CTM_TEXT.splitlines()[1:]:
        channel, start, duration, text = line.split()[1:5]
        counts[channel] = counts.get(channel, 0) + 1
        words[f"{channel}-{counts[channel]}"] = (text, float(start), float(start) + float(duration))
    return words


_CTM_WORDS = _ctm_words()


async def _follow(target: str, conversation_id: str, *,
                  from_seq: int | None) -> list[object]:
    async with Client(target) as client:
        return [event async for event in client.follow(conversation_id, from_seq=from_seq)]


def test_tag_json_and_a_follower_see_each_words_text_and_times(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ctm = tmp_path / "call7.ctm"
    ctm.write_text(CTM_TEXT, encoding="utf-8")
    assert main(["tag", str(ctm), "--server", served.target, "--json"]) == 0
    records = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    conversation_id = records[0]["conversation_id"]
    states = [w for r in records if r["type"] == "update" for w in r["words"]]
    assert {w["id"] for w in states} == set(_CTM_WORDS)
    for state in states:
        text, start, end = _CTM_WORDS[state["id"]]
        assert (state["text"], state["start"], state["end"]) == (text, start, end)

    # A follower on another connection, from the first update: the same states, words and all.
    followed = asyncio.run(_follow(served.target, conversation_id, from_seq=1))
    updates = [e for e in followed if isinstance(e, HypothesisUpdate)]
    seen = [(w.word_id, w.text, w.start, w.end) for u in updates for w in u.diff.words]
    assert seen == [(w["id"], w["text"], w["start"], w["end"]) for w in states]
    # And one that asks for no position gets a snapshot whose states name their words too.
    snapshot = next(e for e in asyncio.run(_follow(served.target, conversation_id,
                                                   from_seq=None)) if isinstance(e, Snapshot))
    assert {w.word_id: w.text for w in snapshot.words} == {
        k: v[0] for k, v in _CTM_WORDS.items()}

    # The server's revision history shows words, not ids, in `inspect --conversation`.
    assert main(["inspect", "--conversation", conversation_id, "--server", served.target]) == 0
    timeline = capsys.readouterr().out
    assert " repair " in timeline and " book " in timeline


def test_a_replaced_words_new_text_reaches_the_caller(served: Served) -> None:
    async def run() -> list[HypothesisUpdate]:
        async with Client(served.target) as client, client.feed() as stream:
            await stream.send_words([
                AddWord(word_id="a1", word=Word(text="I", speaker="A", start=0.0, end=0.2)),
                AddWord(word_id="a2", word=Word(text="want", speaker="A", start=0.3, end=0.5)),
            ])
            await stream.replace_word("a2", Word(text="went", speaker="A", start=0.3, end=0.6))
            await stream.close()
            return [e async for e in stream if isinstance(e, HypothesisUpdate)]

    updates = asyncio.run(run())
    last = {w.word_id: w for u in updates for w in u.diff.words}
    assert (last["a2"].text, last["a2"].end) == ("went", 0.6)
    assert last["a1"].text == "i"  # as the server tagged it: lower case
    assert any(w.word_id == "a2" and w.text == "want" for u in updates for w in u.diff.words)


def test_a_live_follower_sees_the_callers_word_states(served: Served) -> None:
    words = [AddWord(word_id=f"a{n}", word=Word(text=text, speaker="A", start=0.3 * n,
                                                 end=0.3 * n + 0.25))
             for n, text in enumerate(["so", "uh", "we", "we", "need", "the", "the", "form"])]

    async def run() -> tuple[list[HypothesisUpdate], list[HypothesisUpdate]]:
        async with Client(served.target) as caller, Client(served.target) as other:
            async with caller.feed() as stream:
                follower = asyncio.create_task(_follow_updates(other, stream.conversation_id))
                for word in words:
                    await stream.send_words([word])
                await stream.close()
                mine = [e async for e in stream if isinstance(e, HypothesisUpdate)]
            return mine, await asyncio.wait_for(follower, 30)

    mine, theirs = asyncio.run(run())
    assert [u.diff.words for u in theirs] == [u.diff.words for u in mine]
    texts = {w.word_id: (w.text, w.start) for u in theirs for w in u.diff.words}
    assert texts == {w.word_id: (w.word.text, w.word.start) for w in words}


async def _follow_updates(client: Client, conversation_id: str) -> list[HypothesisUpdate]:
    return [e async for e in client.follow(conversation_id, from_seq=1)
            if isinstance(e, HypothesisUpdate)]
