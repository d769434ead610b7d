"""Feed: the ingest protocol, sequence numbers, final updates and ending."""

from __future__ import annotations

from dataclasses import replace

import grpc
import pytest
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    TEST_LIMITS,
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


async def test_words_in_updates_out_then_final_and_ended(start_server: ServerFactory) -> None:
    # The exact list of replies holds only while no idle timeout intervenes. The server starts
    # its idle clock when an event is read, so its own work on that event and the update's
    # write count towards the caller's idleness; the kit's one-second timeout was reachable on
    # a loaded two-core machine, ending the stream early with fewer updates. Idle ends have
    # their own tests (test_lifecycle).
    running = await start_server(limits=replace(TEST_LIMITS, idle_timeout_s=60.0))
    events = [
        open_event(),
        words_event(spoken("w1", "I", start=0.0), spoken("w2", "i", start=0.3)),
        words_event(spoken("w3", "went", start=0.6)),
        CLOSE,
    ]
    replies = [m async for m in running.stub.Feed(iter(events))]
    kinds = [m.WhichOneof("body") for m in replies]
    assert kinds == ["welcome", "update", "update", "update", "ended"]
    welcome = replies[0].welcome
    assert len(welcome.conversation_id) >= 20 and welcome.next_seq == 1
    updates = [cv.update_from_wire(m.update) for m in replies[1:4]]
    assert [u.seq for u in updates] == [1, 2, 3]
    # One update for the whole two-word batch, holding both new words.
    assert {"w1", "w2"} <= {w.word_id for w in updates[0].diff.words}
    assert "w3" in {w.word_id for w in updates[1].diff.words}
    assert not any(u.conversation_final for u in updates[:2])
    latest = {w.word_id: w for u in updates for w in u.diff.words}
    assert updates[2].conversation_final
    assert sorted(latest) == ["w1", "w2", "w3"] and all(w.final for w in latest.values())
    assert all(u.final for u in updates[2].diff.utterances)
    assert replies[4].ended.reason == pb.END_REASON_CLOSED
    assert replies[4].ended.last_seq == 3


async def test_caller_chosen_id_is_kept_and_cannot_be_reused(running: Running) -> None:
    replies = [m async for m in running.stub.Feed(iter([open_event("call-7"), CLOSE]))]
    assert replies[0].welcome.conversation_id == "call-7"
    with pytest.raises(grpc.aio.AioRpcError) as info:
        _ = [m async for m in running.stub.Feed(iter([open_event("call-7"), CLOSE]))]
    assert info.value.code() == grpc.StatusCode.ALREADY_EXISTS
    assert "call-7" in (info.value.details() or "")
