"""TagTranscript agrees with streaming; DescribeModels and ReloadModels keep serving on failure."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import grpc
import pytest
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    TEST_LIMITS,
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    running_fixture,
    spoken,
    start_server_fixture,
    words_event,
)


def _final_by_id(messages: list[pb.ServerMessage]) -> tuple[dict[str, pb.WordState],
                                                            dict[str, pb.UtteranceState]]:
    words: dict[str, pb.WordState] = {}
    utterances: dict[str, pb.UtteranceState] = {}
    for message in messages:
        for word in message.update.words:
            words[word.word_id] = word
        for utterance in message.update.utterances:
            utterances[utterance.utterance_id] = utterance
    return words, utterances


async def test_transcript_matches_the_stream_word_for_word(running: Running) -> None:
    texts = ["so", "uh", "we", "we", "went", "to", "um", "to", "the", "the", "shop"]
    spoken_words = [spoken(f"w{i}", t, speaker="AB"[i // 6], start=float(i))
                    for i, t in enumerate(texts)]
    items = [pb.TranscriptItem(word=w) for w in spoken_words[:6]]
    items.append(pb.TranscriptItem(hint=cv.hint_to_wire("A", turn_end=True)))
    items += [pb.TranscriptItem(word=w) for w in spoken_words[6:]]
    reply = await running.stub.TagTranscript(pb.TagTranscriptRequest(items=items))
    events = [open_event(), words_event(*spoken_words[:6]),
              pb.ClientEvent(hint=cv.hint_to_wire("A", turn_end=True))]
    events += [words_event(w) for w in spoken_words[6:]] + [CLOSE]
    streamed_words, streamed_utterances = _final_by_id(
        [m async for m in running.stub.Feed(iter(events))])
    assert [w.word_id for w in reply.words] == [f"w{i}" for i in range(len(texts))]
    assert all(w.final for w in reply.words) and all(u.final for u in reply.utterances)
    assert {w.word_id: w for w in reply.words} == streamed_words
    assert {u.utterance_id: u for u in reply.utterances} == streamed_utterances


async def test_describe_and_failed_reload_keep_the_models(running: Running,
                                                          tmp_path: Path) -> None:
    before = await running.stub.DescribeModels(pb.DescribeModelsRequest())
    # The word model, the function model, then a coarse-function model and the boundary model
    # where they are shipped.
    kinds = [m.kind for m in before.models]
    assert kinds[:2] == ["words", "utterance_functions"]
    assert kinds[2:] in (["boundaries"], ["utterance_functions", "boundaries"])
    assert all(json.loads(m.training_summary_json) for m in before.models)
    assert all(len(m.sha256) == 64 and m.labels for m in before.models)
    (tmp_path / "words.tagger").write_bytes(b"not a model at all")
    cases = [str(tmp_path), str(tmp_path / "missing")]
    for directory in cases:
        with pytest.raises(grpc.aio.AioRpcError) as info:
            await running.stub.ReloadModels(pb.ReloadModelsRequest(directory=directory))
        assert info.value.code() == grpc.StatusCode.FAILED_PRECONDITION
        assert "the ones in service stay" in (info.value.details() or "")
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ReloadModels(pb.ReloadModelsRequest())
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert await running.stub.DescribeModels(pb.DescribeModelsRequest()) == before
    # Still serving conversations with the old models.
    replies = [m async for m in running.stub.Feed(iter([
        open_event(), words_event(spoken("w1", "hello")), CLOSE]))]
    assert replies[-1].ended.reason == pb.END_REASON_CLOSED


async def test_reload_swaps_models_for_new_conversations_only(start_server: ServerFactory,
                                                              models_dir: Path) -> None:
    # The live conversation must outlast the reload: loading three models can take longer than
    # the test limits' 1 s idle timeout on a busy machine.
    running = await start_server(limits=replace(TEST_LIMITS, idle_timeout_s=30.0))
    caller = Caller(running.stub)
    await caller.open()
    await caller.send(words_event(spoken("w1", "well", start=0.0)))
    before = running.server.servicer.bundle
    reply = await running.stub.ReloadModels(pb.ReloadModelsRequest(directory=str(models_dir)))
    assert running.server.servicer.bundle is not before
    assert reply == await running.stub.DescribeModels(pb.DescribeModelsRequest())
    assert {m.name for m in reply.models} == {p.name for p in models_dir.glob("*.tagger")}
    # The live conversation keeps its engine and goes on; a new one runs on the new bundle.
    await caller.send(words_event(spoken("w2", "yes", start=1.0)))
    assert (await caller.close()).reason == pb.END_REASON_CLOSED
    replies = [m async for m in running.stub.Feed(iter([
        open_event(), words_event(spoken("w1", "hello")), CLOSE]))]
    assert replies[-1].ended.reason == pb.END_REASON_CLOSED


async def _final_after(caller: Caller, words: int) -> list[int]:
    """For each of ``words`` words sent one by one, how many words had been sent when it was
    first published final (0: not yet)."""
    final_at = [0] * words
    for sent in range(1, words + 1):
        update = await caller.send(words_event(spoken(f"w{sent}", "so", start=float(sent))))
        for word in update.words:
            index = int(word.word_id[1:]) - 1
            if word.final and not final_at[index]:
                final_at[index] = sent
    return final_at


async def test_decoder_settings_hold_for_live_and_reloaded_models(start_server: ServerFactory,
                                                                  models_dir: Path) -> None:
    # --lag 2 --no-settle: every word is final exactly when the second newer word arrives
    # (DecoderConfig's contract), also on models loaded later by ReloadModels.
    running = await start_server(max_open_words=2, settle=False)
    for reload in (False, True):
        if reload:
            await running.stub.ReloadModels(pb.ReloadModelsRequest(directory=str(models_dir)))
        caller = Caller(running.stub)
        await caller.open()
        assert await _final_after(caller, 5) == [3, 4, 5, 0, 0]
        await caller.close()
