"""Cancellation, half-close, idle timeout and graceful shutdown: nobody is left hanging.

Whatever way a Feed stream ends, its conversation is finished (every word final) and each
follower receives the final update and ``ended`` with the reason.
"""

from __future__ import annotations

import asyncio
import time
from typing import Any

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from midstream.server import ServerLimits
from midstream.server._session import Session
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from server_kit import (  # noqa: F401 - fixtures are found by name
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    running_fixture,
    spoken,
    start_server_fixture,
    until_followers,
    words_event,
)

Followed = tuple[Caller, asyncio.Task[list[pb.ServerMessage]]]


async def _watched(running: Running, words: int = 2) -> Followed:
    caller = Caller(running.stub)
    conversation = await caller.open()
    for i in range(words):
        await caller.send(words_event(spoken(f"w{i}", "so", start=float(i), speaker="AB"[i % 2])))
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    await until_followers(running, conversation, 1)
    return caller, follower


def _final_states(messages: list[pb.ServerMessage]) -> dict[str, bool]:
    final: dict[str, bool] = {}
    for message in messages:
        for word in message.update.words:
            final[word.word_id] = word.final
    return final


async def _ended_with(follower: asyncio.Task[list[pb.ServerMessage]], caller: Caller,
                      reason: pb.EndReason, running: Running) -> None:
    seen = await asyncio.wait_for(follower, 5)
    assert seen[-1].ended.reason == reason
    assert seen[-2].update.conversation_final
    assert all(_final_states(seen).values()) and len(_final_states(seen)) >= 2
    assert running.server.servicer.registry.live_count == 0
    listed = await running.stub.ListConversations(pb.ListConversationsRequest())
    assert all(c.ended for c in listed.conversations)


async def test_early_cancel_finishes_the_conversation(running: Running) -> None:
    caller, follower = await _watched(running)
    caller.call.cancel()
    await _ended_with(follower, caller, pb.END_REASON_CALLER_VANISHED, running)


async def test_cancel_with_a_read_pending(running: Running) -> None:
    caller, follower = await _watched(running)
    pending = asyncio.create_task(caller.call.read())
    await asyncio.sleep(0.1)
    assert not pending.done()
    caller.call.cancel()
    with pytest.raises(asyncio.CancelledError):
        await pending
    await _ended_with(follower, caller, pb.END_REASON_CALLER_VANISHED, running)


async def test_half_close_without_close_ends_normally(running: Running) -> None:
    caller, follower = await _watched(running)
    await caller.call.done_writing()
    final = await caller.call.read()
    ended = await caller.call.read()
    assert final.update.conversation_final and ended.ended.reason == pb.END_REASON_CLOSED
    assert await caller.call.code() == grpc.StatusCode.OK
    await _ended_with(follower, caller, pb.END_REASON_CLOSED, running)


async def test_late_cancel_after_ended_changes_nothing(running: Running) -> None:
    caller, follower = await _watched(running)
    ended = await caller.close()
    caller.call.cancel()
    assert ended.reason == pb.END_REASON_CLOSED
    await _ended_with(follower, caller, pb.END_REASON_CLOSED, running)


async def test_silent_caller_times_out(running: Running) -> None:
    # TEST_LIMITS sets a one-second idle timeout.
    caller, follower = await _watched(running)
    final = await asyncio.wait_for(caller.call.read(), 5)
    ended = await caller.call.read()
    assert final.update.conversation_final
    assert ended.ended.reason == pb.END_REASON_IDLE_TIMEOUT
    await _ended_with(follower, caller, pb.END_REASON_IDLE_TIMEOUT, running)


async def test_time_the_server_spends_on_an_event_is_not_the_callers_idleness(
        start_server: ServerFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    # docs/service.md: a conversation times out after no event for idle_timeout_s. A caller who
    # answers at once must not be timed out because the server was slow with its last event.
    running = await start_server(limits=ServerLimits(idle_timeout_s=0.5))
    real = Session.add_words

    def slow(self: Session, *args: Any, **kwargs: Any) -> Any:
        time.sleep(0.8)  # blocks the server's loop longer than the idle timeout
        return real(self, *args, **kwargs)

    caller = Caller(running.stub)
    await caller.open()
    monkeypatch.setattr(Session, "add_words", slow)
    await caller.send(words_event(spoken("w0", "so", start=0.0)))
    monkeypatch.setattr(Session, "add_words", real)
    await asyncio.sleep(0.2)  # the caller thinks a moment: well within the timeout
    await caller.send(words_event(spoken("w1", "we", start=1.0)))
    ended = await caller.close()
    assert ended.reason == pb.END_REASON_CLOSED


async def test_caller_vanishing_with_its_connection(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(idle_timeout_s=1.0))
    own = grpc.aio.insecure_channel(f"127.0.0.1:{running.server.port}")
    caller = Caller(pb_grpc.MidstreamStub(own))  # type: ignore[no-untyped-call]
    conversation = await caller.open()
    await caller.send(words_event(spoken("w0", "so", start=0.0)))
    await caller.send(words_event(spoken("w1", "we", start=1.0, speaker="B")))
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    await until_followers(running, conversation, 1)
    await own.close(grace=None)  # the whole connection goes, mid-stream
    await _ended_with(follower, caller, pb.END_REASON_CALLER_VANISHED, running)


async def test_stop_with_grace_finalises_and_delivers_everything(
    start_server: ServerFactory,
) -> None:
    running = await start_server(limits=ServerLimits(idle_timeout_s=30))
    watched = [await _watched(running, words=3) for _ in range(2)]
    health = health_pb2_grpc.HealthStub(running.channel).Watch(
        health_pb2.HealthCheckRequest(service="midstream.v1.Midstream"))
    assert (await health.read()).status == health_pb2.HealthCheckResponse.SERVING
    stopping = asyncio.create_task(running.server.stop(5))
    assert (await health.read()).status == health_pb2.HealthCheckResponse.NOT_SERVING
    health.cancel()  # an open health watch would hold the stop for the whole grace period
    for caller, follower in watched:
        final = await asyncio.wait_for(caller.call.read(), 5)
        ended = await caller.call.read()
        assert final.update.conversation_final
        assert ended.ended.reason == pb.END_REASON_SERVER_SHUTDOWN
        seen = await asyncio.wait_for(follower, 5)
        assert [m.update for m in seen[:-1]] == [*caller.updates, final.update]
        assert seen[-1].ended.reason == pb.END_REASON_SERVER_SHUTDOWN
        assert all(_final_states(seen).values())
    await asyncio.wait_for(stopping, 10)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ListConversations(pb.ListConversationsRequest())
    assert info.value.code() == grpc.StatusCode.UNAVAILABLE
