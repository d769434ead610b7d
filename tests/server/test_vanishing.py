"""A caller can vanish at any point of a ``Feed`` call and never leave its conversation live.

Live conversations count against ``max_live_conversations``: one that outlives its caller locks
a slot until a restart. These tests vanish at every point the handler waits, first by driving
the handler directly (so each suspension point is reached deterministically), then over real
gRPC with many callers cancelling right after the welcome at once.
"""

from __future__ import annotations

import asyncio
import itertools
import sys
from collections.abc import AsyncIterator, Callable
from typing import Any

import grpc
import pytest
from midstream import EndReason
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._metrics import ServerMetrics
from midstream.server._servicer import MidstreamServicer
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Caller,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    spoken,
    start_server_fixture,
    words_event,
)


class _ScriptedContext:
    """Just enough of a grpc.aio servicer context to drive ``Feed`` from a script.

    Every ``read`` and ``abort`` yields to the event loop first, so the handler is suspended
    at each of them; nothing ever calls the done callbacks (the handler's own cleanup must
    suffice).
    """

    def __init__(self, events: list[pb.ClientEvent]) -> None:
        self._events = list(events)
        self.callbacks: list[Callable[[Any], None]] = []

    async def read(self) -> object:
        await asyncio.sleep(0)
        return self._events.pop(0) if self._events else grpc.aio.EOF

    async def abort(self, code: grpc.StatusCode, details: str) -> None:
        await asyncio.sleep(0)
        raise grpc.aio.AbortError(f"{code.name}: {details}")

    def peer(self) -> str:
        return "ipv4:127.0.0.1:5000"

    def cancelled(self) -> bool:
        return False

    def done(self) -> bool:
        return False

    def add_done_callback(self, callback: Callable[[Any], None]) -> None:
        self.callbacks.append(callback)


_SCRIPT = [open_event("c"), words_event(spoken("w0", "so", start=0.0)),
           words_event(spoken("w1", "uh", start=1.0)), CLOSE]


async def _no_requests() -> AsyncIterator[pb.ClientEvent]:
    # Feed reads through its context; the request iterator is never touched.
    events: tuple[pb.ClientEvent, ...] = ()
    for event in events:
        yield event


_NO_REQUESTS = _no_requests()


async def _consume(messages: AsyncIterator[pb.ServerMessage | bytes], stop_after: int | None,
                   ) -> int:
    seen = 0
    async for _ in messages:
        seen += 1
        if stop_after is not None and seen >= stop_after:
            break
    return seen


@pytest.mark.parametrize("script", [_SCRIPT, _SCRIPT[:3], [open_event("c"), open_event("c")]],
                         ids=["closed", "half-closed", "refused"])
async def test_cancelling_at_every_await_point_ends_the_conversation(
        bundle: ModelBundle, script: list[pb.ClientEvent],
        monkeypatch: pytest.MonkeyPatch) -> None:
    # Telling a cancellation from a half-close waits a moment; no wait makes it one step.
    monkeypatch.setattr("midstream.server._ingest._CANCEL_SETTLE_S", 0.0)
    limits = ServerLimits(idle_timeout_s=5.0)
    servicer = MidstreamServicer(bundle, limits, ServerMetrics())
    # Count how many times the handler yields to the loop on an undisturbed run.
    steps = 0
    for steps in itertools.count(1):
        servicer = MidstreamServicer(bundle, limits, ServerMetrics())
        context = _ScriptedContext(script)
        task = asyncio.ensure_future(_consume(servicer.Feed(
            _NO_REQUESTS, context), None))  # type: ignore[arg-type]
        for _ in range(steps):
            await asyncio.sleep(0)
            if task.done():
                break
        if task.done():
            break
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        # Whatever point it was cancelled at, no conversation is left live.
        assert servicer.registry.live_count == 0, f"leaked when cancelled at step {steps}"
        assert steps < 200, "the handler never finished"
    assert task.exception() is None or isinstance(task.exception(), grpc.aio.AbortError)
    assert steps > 5  # the run really passed several await points
    assert servicer.registry.live_count == 0


async def test_dropping_the_handler_at_every_message_ends_the_conversation(
        bundle: ModelBundle) -> None:
    # grpc stops iterating a handler whose caller went away (it is cancelled while sending a
    # message, outside the generator) and closes it only when it is collected: closing it at
    # each message it yields must end the conversation, the welcome included.
    limits = ServerLimits(idle_timeout_s=5.0)
    for stop_after in range(1, 4):  # the welcome, then each update before the final one
        servicer = MidstreamServicer(bundle, limits, ServerMetrics())
        context = _ScriptedContext(_SCRIPT)
        messages = servicer.Feed(_NO_REQUESTS, context)  # type: ignore[arg-type]
        assert await _consume(messages, stop_after) == stop_after
        assert servicer.registry.live_count == 1
        await messages.aclose()  # type: ignore[attr-defined]
        assert servicer.registry.live_count == 0, f"leaked after {stop_after} messages"


async def test_the_end_of_the_call_ends_the_conversation_without_the_handler(
        bundle: ModelBundle) -> None:
    # A handler suspended at a yield that grpc never resumes nor closes (a reference cycle
    # keeps it alive): the end of the call alone must finish the conversation.
    servicer = MidstreamServicer(bundle, ServerLimits(idle_timeout_s=5.0), ServerMetrics())
    context = _ScriptedContext(_SCRIPT)
    messages = servicer.Feed(_NO_REQUESTS, context)  # type: ignore[arg-type]
    assert await _consume(messages, 1) == 1  # the welcome
    assert servicer.registry.live_count == 1 and len(context.callbacks) == 1
    context.callbacks[0](context)  # what grpc does when the call ends, however it ends
    assert servicer.registry.live_count == 0
    session = servicer.registry.get("c")
    assert session.end_reason == EndReason.CALLER_VANISHED
    await messages.aclose()  # type: ignore[attr-defined]


# One process of hit-and-run callers: open, read the welcome, cancel at once. Separate
# processes make the race real: a cancellation that reaches the server while it is still
# sending the welcome (in one process the two sides take turns and it never does).
_HIT_AND_RUN = """
import asyncio, sys, grpc
from midstream.wire import midstream_pb2 as pb, midstream_pb2_grpc as pb_grpc
async def main():
    stub = pb_grpc.MidstreamStub(grpc.aio.insecure_channel(sys.argv[1]))
    opened = 0
    for _ in range(int(sys.argv[2])):
        call = stub.Feed()
        await call.write(pb.ClientEvent(open=pb.OpenConversation()))
        try:
            opened += (await call.read()).HasField("welcome")
        except grpc.aio.AioRpcError as exc:
            assert exc.code() == grpc.StatusCode.RESOURCE_EXHAUSTED, exc
        call.cancel()
    print(opened)
asyncio.run(main())
"""


async def test_many_callers_cancelling_after_the_welcome_leave_nothing_live(
        start_server: ServerFactory) -> None:
    # Before the fix, 4 processes x 50 calls left 33 and 49 conversations live for good (two
    # runs of this scenario).
    limits = ServerLimits(idle_timeout_s=2.0)
    running = await start_server(limits=limits)
    callers = [await asyncio.create_subprocess_exec(
        sys.executable, "-c", _HIT_AND_RUN, f"127.0.0.1:{running.server.port}", "50",
        stdout=asyncio.subprocess.PIPE) for _ in range(4)]
    async with asyncio.timeout(120):
        outputs = [await caller.communicate() for caller in callers]
    assert [caller.returncode for caller in callers] == [0] * 4
    opened = sum(int(out) for out, _ in outputs)
    assert opened > 100  # hundreds of calls really opened a conversation
    registry = running.server.servicer.registry
    # Any conversation still live after the idle timeout (and some) was leaked: nothing
    # reads for it, so nothing would ever end it.
    async with asyncio.timeout(limits.idle_timeout_s * 10):
        while registry.live_count:
            await asyncio.sleep(0.05)
    caller = Caller(running.stub)
    assert await caller.open("fresh")
    await caller.send(words_event(spoken("w0", "so", start=0.0)))
    ended = await caller.close()
    assert ended.reason == pb.END_REASON_CLOSED
