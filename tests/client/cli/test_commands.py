"""Every client command run in-process (``_main.main``) against a real server and real models."""

from __future__ import annotations

import io
import json
import sys
import time
from collections.abc import Iterator
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    CTM_TEXT,
    WEIGHTS,
    Served,
    free_port,
    models_dir_fixture,
    served_fixture,
)
from midstream import DisfluencyLabel, HypothesisUpdate
from midstream.client import AddWord, SyncClient
from midstream.client.cli._demo_script import demo_events
from midstream.client.cli._main import main
from midstream.client.cli._records import read_log
from midstream.client.cli._view import RATES_CAUTION
from midstream.corpora import read_corpus
from midstream.models import ModelBundle
from midstream.models.words._eval import streaming_final_labels

pytestmark = pytest.mark.corpus


@pytest.fixture
def ctm_file(tmp_path: Path) -> Path:
    path = tmp_path / "call7.ctm"
    path.write_text(CTM_TEXT, encoding="utf-8")
    return path


def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_tag_prints_finished_utterances_clean_text_and_rates(
        served: Served, ctm_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = _run(["tag", str(ctm_file), "--server", served.target, "--rates"], capsys)
    assert code == 0, err
    lines = [line for line in out.splitlines() if " | " in line]
    # Every word of the CTM appears once in the utterance lines, in speaker order.
    words = " ".join(line.rsplit(" | ", 1)[1] for line in lines).split()
    assert [w.split("/")[0] for w in words] == [line.split()[4] for line in
                                                CTM_TEXT.splitlines()[1:]]
    assert RATES_CAUTION in out
    assert "midstream subscribe" in err  # tells the user how to follow it

    code, out, _ = _run(["tag", str(ctm_file), "--server", served.target, "--clean"], capsys)
    assert code == 0
    clean = " ".join(line.rsplit(" | ", 1)[1] for line in out.splitlines() if " | " in line)
    assert "repair" in clean.split()


def test_tag_reads_jsonl_from_stdin_and_prints_json_lines(
        served: Served, capsys: pytest.CaptureFixture[str], tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch) -> None:
    events = "\n".join(json.dumps(e) for e in [
        {"speaker": "A", "text": "so", "id": "a1"},
        {"speaker": "A", "text": "um", "id": "a2"},
        {"speaker": "A", "text": "what", "id": "a3"},
        {"kind": "replace", "id": "a3", "speaker": "A", "text": "when"},
        {"speaker": "A", "text": "time", "id": "a4"},
        {"kind": "turn_end", "speaker": "A"},
        {"speaker": "B", "text": "noon", "id": "b1"},
    ]) + "\n"
    monkeypatch.setattr(sys, "stdin", io.StringIO(events))
    code, out, err = _run(["tag", "--server", served.target, "--json", "--rates"], capsys)
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    kinds = [r["type"] for r in records]
    assert kinds[:2] == ["welcome", "update"] and kinds[-2:] == ["ended", "rates"]
    assert records[-1]["caution"] == RATES_CAUTION
    updates = [r for r in records if r["type"] == "update"]
    assert [u["seq"] for u in updates] == list(range(1, len(updates) + 1))
    final = {w["id"]: w for u in updates for w in u["words"]}
    assert set(final) == {"a1", "a2", "a3", "a4", "b1"}
    assert all(w["final"] for w in final.values())

    # The piped output is a log `inspect` reads.
    saved = tmp_path / "piped.jsonl"
    saved.write_text(out, encoding="utf-8")
    code, out, err = _run(["inspect", str(saved)], capsys)
    assert code == 0, err
    assert out.startswith(f"conversation {records[0]['conversation_id']}")
    assert "why final: " in out


def test_bad_input_lines_exit_1_naming_file_line_and_field(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad_ctm = tmp_path / "bad.ctm"
    bad_ctm.write_text("call A 0.1 0.2 fine\ncall A 0.4 long word\n", encoding="utf-8")
    code, _, err = _run(["tag", str(bad_ctm), "--server", served.target], capsys)
    assert code == 1
    assert err.strip() == f"midstream: {bad_ctm}:2: field 'duration': not a number: 'long'"

    bad_jsonl = tmp_path / "bad.jsonl"
    bad_jsonl.write_text('{"speaker": "A", "text": "hi"}\n{"speaker": "A"}\n', encoding="utf-8")
    code, _, err = _run(["replay", str(bad_jsonl), "--server", served.target, "--speed", "0",
                         "--no-progress"], capsys)
    assert code == 1
    assert f"{bad_jsonl}:2: field 'text'" in err and len(err.strip().splitlines()) == 1


def _tick_call(tmp_path: Path, tick: dict[str, object] | None) -> Path:
    """An invented report to a caretaker as JSON Lines word events, with ``tick`` (if any)
    between the tenant's last word and the caretaker's reply."""
    said = ["the", "boiler", "in", "the", "basement", "is", "making", "a", "loud", "noise"]
    lines: list[dict[str, object]] = [
        {"speaker": "tenant", "text": token, "id": f"t{k}", "start": round(0.3 * k, 2),
         "end": round(0.3 * k + 0.2, 2)} for k, token in enumerate(said)]
    if tick is not None:
        lines.append(tick)
    lines.append({"speaker": "caretaker", "text": "okay", "id": "c1", "start": 5.8,
                  "end": 6.1})
    path = tmp_path / "boiler.jsonl"
    path.write_text("".join(json.dumps(line) + "\n" for line in lines), encoding="utf-8")
    return path


def test_a_tick_line_closes_the_utterance_before_the_next_word(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # docs/word-events.md: a tick line says the recogniser's clock reads `time`. Sent at 2.5 s
    # of silence after "noise", it closes the tenant's utterance in an update of its own; the
    # caretaker's word does not close it (the tenant's channel gets no word of its own), so
    # without the tick it stays open until the conversation ends.
    tenant = [f"t{k}" for k in range(10)]

    def closing(path: Path) -> dict[str, Any]:
        code, out, err = _run(["tag", str(path), "--server", served.target, "--json"], capsys)
        assert code == 0, err
        updates = [r for r in map(json.loads, out.splitlines()) if r["type"] == "update"]
        return next(u for u in updates
                    if any(s["words"] == tenant and s["final"] for s in u["utterances"]))

    ticked = closing(_tick_call(tmp_path, {"kind": "tick", "time": 5.2}))
    assert not ticked["final"]
    assert "c1" not in {w["id"] for w in ticked["words"]}  # before the next word was sent
    assert closing(_tick_call(tmp_path, None))["final"]


class _PausingPipe:
    """Standard input that gives its lines at once, then stays open and silent for
    ``pause_s`` seconds before it ends, as a live recogniser's pipe falls silent."""

    def __init__(self, lines: list[str], pause_s: float) -> None:
        self._lines = lines
        self._pause_s = pause_s

    def __iter__(self) -> Iterator[str]:
        yield from self._lines
        time.sleep(self._pause_s)  # the reading thread's wait, not the server's


def test_tag_with_server_ticks_closes_an_utterance_while_the_pipe_is_silent(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    lines = _tick_call(tmp_path, None).read_text(encoding="utf-8").splitlines(keepends=True)
    tenant = [f"t{k}" for k in range(10)]
    closing = {}
    for flag in ("--server-ticks", None):
        # The tenant's words only; the pipe then falls silent past the last silence mark (3 s).
        monkeypatch.setattr(sys, "stdin", _PausingPipe(lines[:10], pause_s=4.5))
        argv = ["tag", "--server", served.target, "--json"]
        code, out, err = _run([*argv, flag] if flag else argv, capsys)
        assert code == 0, err
        updates = [r for r in map(json.loads, out.splitlines()) if r["type"] == "update"]
        closing[flag] = next(u for u in updates if any(
            s["words"] == tenant and s["final"] for s in u["utterances"]))
    # The server's clock closed it during the silence, before the pipe ended ...
    assert not closing["--server-ticks"]["final"]
    # ... where without it only the end of the input does.
    assert closing[None]["final"]


@pytest.mark.parametrize(("tick", "message"), [
    ({"kind": "tick"}, "field 'time': a tick must say what the recogniser's clock reads"),
    ({"kind": "tick", "time": "later"}, "field 'time': must be a number, got str"),
    ({"kind": "tick", "time": -1}, "field 'time': must be at least 0, got -1"),
    ({"kind": "tick", "time": 5, "speaker": "tenant"},
     "field 'speaker': unknown field for a 'tick' event"),
])
def test_a_malformed_tick_line_exits_1_naming_line_and_field(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str],
        tick: dict[str, object], message: str) -> None:
    path = _tick_call(tmp_path, tick)
    for command in (["tag"], ["replay", "--speed", "0", "--no-progress"]):
        code, _, err = _run([*command, str(path), "--server", served.target], capsys)
        assert code == 1
        assert err.strip() == f"midstream: {path}:11: {message}"


def test_an_unreachable_server_exits_3_naming_it(ctm_file: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    target = f"127.0.0.1:{free_port()}"
    code, _, err = _run(["tag", str(ctm_file), "--server", target], capsys)
    assert code == 3
    assert target in err and len(err.strip().splitlines()) == 1


def test_replayed_swda_conversation_ends_on_the_batch_labels_and_reports(
        served: Served, swda_dir: Path, tmp_path: Path, models_dir: Path,
        capsys: pytest.CaptureFixture[str]) -> None:
    # sw4802: the shortest disfluency-annotated SwDA val conversation (737 words).
    log_path, html_path = tmp_path / "sw4802.jsonl", tmp_path / "sw4802.html"
    code, _, err = _run(["replay", str(swda_dir), "--split", "val", "--conversation", "sw4802",
                         "--speed", "0", "--log", str(log_path), "--no-progress",
                         "--server", served.target], capsys)
    assert code == 0, err
    log = read_log(log_path)
    assert log.has_gold and len(log.words) == 737

    # The stream's final labels equal one TagTranscript call over the same words (fragments
    # included: they travel as "s-")...
    (gold,) = [c for c in read_corpus(swda_dir, split="val") if c.id == "sw4802"]
    assert [w.word_id for w in log.words] == [f"w{i}" for i in range(len(gold.words))]
    words = [AddWord(word_id=f"w{i}", word=w) for i, w in enumerate(gold.words)]
    with SyncClient(served.target) as client:
        batch = client.tag_transcript(words)
    streamed: dict[str, DisfluencyLabel] = {}
    for event, _ in log.events:
        for word in getattr(getattr(event, "diff", None), "words", ()):
            streamed[word.word_id] = word.label
    assert streamed == {w.word_id: w.label for w in batch.words}

    # ... and equal the final labels `midstream evaluate` scores for this conversation.
    scored = streaming_final_labels(gold, ModelBundle.load_directory(models_dir).word_model)
    assert [streamed[w.word_id] for w in log.words] == scored

    code, out, err = _run(["inspect", str(log_path), "--html", str(html_path)], capsys)
    assert code == 0, err
    assert "why final:" in out and "accuracy against gold" in out

    page = _Page()
    page.feed(html_path.read_text(encoding="utf-8"))
    # Inline vector plots: the timeline of all 737 words in panels of 40, a legend, the
    # confusion matrix, function accuracy against words seen; no raster images.
    assert page.images == []
    assert page.svgs.count("plot timeline") == 19
    assert page.svgs.count("legend") == 1
    assert page.svgs.count("plot confusion") == page.svgs.count("plot accuracy") == 1
    assert {"Revision timeline", "Confusion matrix", "Words", "Utterances"} <= set(page.headings)
    assert page.tables >= 5

    # Follow the same (ended) conversation from another terminal: the same updates.
    # "--": a server-chosen id may start with a dash.
    code, out, _ = _run(["subscribe", "--from-seq", "1", "--json", "--server", served.target,
                         "--", log.conversation_id], capsys)
    assert code == 0
    followed = [json.loads(line) for line in out.splitlines()]
    logged = [e.seq for e, _ in log.events if isinstance(e, HypothesisUpdate)]
    assert [r["seq"] for r in followed if r["type"] == "update"] == logged
    epoch = followed[0]["epoch"]
    assert epoch > 0 and {r["epoch"] for r in followed if r["type"] == "update"} == {epoch}

    # Resuming with its epoch replays from there; with another epoch it is told, not spliced.
    code, out, _ = _run(["subscribe", "--from-seq", "3", "--epoch", str(epoch), "--json",
                         "--server", served.target, "--", log.conversation_id], capsys)
    assert code == 0
    assert json.loads(out.splitlines()[0])["seq"] == 3
    code, out, _ = _run(["subscribe", "--from-seq", "3", "--epoch", str(epoch + 1), "--json",
                         "--server", served.target, "--", log.conversation_id], capsys)
    assert code == 0
    told = [json.loads(line) for line in out.splitlines()]
    assert [r["type"] for r in told] == ["gap", "snapshot", "ended"]
    assert told[0]["reason"] == "epoch_mismatch" and told[1]["epoch"] == epoch

    # And inspect it live, through GetRevisions.
    code, out, _ = _run(["inspect", f"--conversation={log.conversation_id}",
                         "--server", served.target, "--changed"], capsys)
    assert code == 0
    assert out.startswith(f"conversation {log.conversation_id}")


def test_inspect_needs_exactly_one_source(capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = _run(["inspect"], capsys)
    assert code == 1 and "either a revision log" in err


def test_demo_runs_on_the_default_models(models_dir: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    # The shipped models when they exist (what `midstream demo` loads with no --models);
    # until then the same run on the fixture's real models, so the command is always exercised.
    extra = [] if models_dir == WEIGHTS else ["--models", str(models_dir)]
    code, out, err = _run(["demo", "--no-pause", "--rates", *extra], capsys)
    assert code == 0, err
    words = sum(1 for t in demo_events() if isinstance(t.event, AddWord))
    assert f"{words} words, " in out.splitlines()[-1]
    shown = sum(len(line.rsplit(" | ", 1)[1].split()) for line in out.splitlines()
                if " | " in line)
    assert shown == words  # every word in exactly one finished utterance line
    assert RATES_CAUTION in out
    assert "conversation ended: closed" in out


class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.images: list[str] = []
        self.svgs: list[str] = []
        self.headings: list[str] = []
        self.tables = 0
        self._in_heading = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "img":
            self.images.append(dict(attrs).get("src") or "")
        elif tag == "svg":
            self.svgs.append(dict(attrs).get("class") or "")
        elif tag == "table":
            self.tables += 1
        self._in_heading = tag in ("h1", "h2")

    def handle_endtag(self, tag: str) -> None:
        self._in_heading = False

    def handle_data(self, data: str) -> None:
        if self._in_heading:
            self.headings.append(data.strip())
