"""Ingest streams without a conversation are capped and time out.

A ``Feed`` stream before its ``open`` and a ``FeedMany`` stream with no open channel do
nothing but hold a slot: at most ``max_streams_without_conversation`` of them at once, each
ended after ``idle_timeout_s`` (docs/limits.md).
"""

from __future__ import annotations

import asyncio
from typing import Any

import grpc
import pytest
from midstream.server import ServerLimits
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    start_server_fixture,
)

_LIMITS = ServerLimits(max_streams_without_conversation=2, idle_timeout_s=1.0)


async def _until_waiting(running: Running, count: int) -> None:
    async with asyncio.timeout(5):
        while running.server.servicer.waiting != count:
            await asyncio.sleep(0.01)


def _frame(channel: int, event: pb.ClientEvent) -> pb.ClientFrame:
    return pb.ClientFrame(events=[pb.ChannelEvent(channel=channel, event=event)])


async def _status(call: Any) -> tuple[grpc.StatusCode, str]:
    with pytest.raises(grpc.aio.AioRpcError) as info:
        while True:
            await call.read()
    return info.value.code(), info.value.details() or ""


async def test_streams_without_a_conversation_are_capped(start_server: ServerFactory) -> None:
    running = await start_server(limits=_LIMITS)
    silent = running.stub.Feed()  # never sends anything
    idle_many = running.stub.FeedMany()  # opens no channel
    await _until_waiting(running, 2)
    refused = running.stub.Feed()
    await refused.write(open_event())
    assert await _status(refused) == (
        grpc.StatusCode.RESOURCE_EXHAUSTED,
        "2 streams have no conversation open; limit max_streams_without_conversation is 2")
    refused_many = running.stub.FeedMany()
    await refused_many.write(_frame(1, open_event()))
    assert (await _status(refused_many))[0] == grpc.StatusCode.RESOURCE_EXHAUSTED
    # A multiplexed stream that opens a channel no longer waits: room for another stream.
    await idle_many.write(_frame(1, open_event()))
    assert (await idle_many.read()).replies[0].message.HasField("welcome")
    await _until_waiting(running, 1)
    accepted = running.stub.Feed()
    await accepted.write(open_event())
    assert (await accepted.read()).HasField("welcome")
    # ...and waits again once its last channel has ended.
    await idle_many.write(_frame(1, CLOSE))
    await _until_waiting(running, 2)
    accepted.cancel()
    idle_many.cancel()
    silent.cancel()
    await _until_waiting(running, 0)


async def test_streams_without_a_conversation_time_out(start_server: ServerFactory) -> None:
    running = await start_server(limits=_LIMITS)
    silent = running.stub.Feed()
    idle_many = running.stub.FeedMany()
    await _until_waiting(running, 2)
    code, details = await asyncio.wait_for(_status(silent), 10)
    assert code == grpc.StatusCode.INVALID_ARGUMENT
    assert details == "no 'open' event within idle_timeout_s (1.0 s)"
    code, details = await asyncio.wait_for(_status(idle_many), 10)
    assert code == grpc.StatusCode.INVALID_ARGUMENT
    assert details == "no channel was open on this stream for idle_timeout_s (1.0 s)"
    assert running.server.servicer.waiting == 0
