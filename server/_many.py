"""``FeedMany``: many conversations over one stream, one reply frame per request frame.

A caller carrying hundreds of conversations (a media gateway, a recogniser front end) would
otherwise send and receive one gRPC message per word per conversation; gRPC's per-message cost
in Python then bounds a server core long before the engine does. Here a request frame holds the
events of many conversations, each on a caller-numbered *channel*, and the server answers each
frame with one reply frame holding every message it produced (split only to stay within
``max_message_bytes``), so messages per second follow frames, not words.

Every channel follows the ``Feed`` protocol exactly: the same event checks
(:func:`~midstream.server._ingest.apply_event`), the same sessions in the same registry (so
``Follow``, ``ListConversations`` and ``GetRevisions`` see them like any other), the same
replies. What differs is what a refusal ends:

* a refused event on a live channel finishes only that conversation (followers get the final
  update and ``ended`` with ``REJECTED``); the caller gets the updates the event produced, a
  ``ChannelError`` naming the status code and what was wrong, the final update and ``ended``;
* an event the server cannot give to any conversation (a channel never opened, one that has
  ended, an ``open`` over ``max_channels_per_stream``, a channel number of 0) gets a
  ``ChannelError`` and changes nothing;
* a frame over ``max_events_per_frame`` is refused as a whole: the stream ends with
  ``INVALID_ARGUMENT`` after every open conversation was finished (``REJECTED``) and its final
  messages sent.

On servers sharing a log (``serve --redis``), ``open`` is checked as ``Feed`` checks it:
a caller-chosen id live in the log is refused (``ALREADY_EXISTS``; every such id of a frame is
asked about in one round trip), and ``open.resume`` continues a conversation whose replica died
(:meth:`~midstream.server._replica.Replica.resume`: the same claim and replay). The frame's
later events wait for the replay, so a resume holds up the stream's other channels for as long
as its conversation's logged input takes to replay (other streams go on: the replay returns to
the event loop between slices).

Channel numbers are single-use: each ``open`` must use a number above every channel opened
before on the stream. That catches an event for a reused number with one integer of memory
however many conversations a long-lived stream carries.

Idle channels are found by a sweep, not a timer per channel or per word: the stream keeps a clock
that runs only while the server waits for the caller's next frame (time spent on events or
blocked writing replies never counts against the caller, as with ``Feed``), and a channel
whose last event is ``idle_timeout_s`` of that clock behind is finished with ``IDLE_TIMEOUT``.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator
from typing import TYPE_CHECKING, Any, NoReturn, Protocol

import grpc
from midstream import (
    Ended,
    EndReason,
    EventError,
    LimitExceededError,
    MidstreamError,
    UnavailableError,
)
from midstream.server._decode import MalformedMessage
from midstream.server._ingest import apply_event, caller_address, caller_vanished
from midstream.server._session import Session, message_budget
from midstream.server._status import (
    ConflictError,
    FieldLimitError,
    InternalError,
    ProtocolStateError,
    status_code,
)
from midstream.server._wire import ended_message, write_update
from midstream.wire import midstream_pb2 as pb

if TYPE_CHECKING:  # the shared log (and its Redis client) loads only when configured
    from midstream.server._config import ServerLimits
    from midstream.server._metrics import ServerMetrics
    from midstream.server._models import Bundle
    from midstream.server._registry import SessionRegistry
    from midstream.server._replica import Replica

_log = logging.getLogger(__name__)

# Sweeps for idle channels per idle_timeout_s of waiting, and the longest wait between two: a
# channel ends at most about an eighth of the timeout (5 s at most) late.
_SWEEPS_PER_TIMEOUT = 8
_MAX_SWEEP_S = 5.0
# Bytes of framing a reply adds inside its frame (tag and length).
_REPLY_OVERHEAD = 6


class _Channel:
    """One open channel: its session and what its caller was sent."""

    # Hundreds per stream: no per-instance __dict__.
    __slots__ = ("last_event", "number", "sent", "session")

    def __init__(self, number: int, session: Session, now: float) -> None:
        self.number = number
        self.session = session
        self.sent = 0  # the last sequence number the caller was given
        self.last_event = now  # on the stream's waiting clock


class StreamHost(Protocol):
    """What a multiplexed stream needs of the server that runs it: its models, limits, metrics
    and conversations, the shared log if any, the stop signal, the count of streams without a
    conversation, and how to refuse a stream. The servicer is one; a benchmark can be another.
    """

    @property
    def bundle(self) -> Bundle: ...
    @property
    def limits(self) -> ServerLimits: ...
    @property
    def metrics(self) -> ServerMetrics: ...
    @property
    def registry(self) -> SessionRegistry: ...
    @property
    def replica(self) -> Replica | None: ...
    @property
    def stopping(self) -> bool: ...
    def stop_signal(self) -> asyncio.Future[None]: ...
    def enter_waiting(self, *, check: bool = True) -> None: ...
    def leave_waiting(self) -> None: ...
    def log_internal(self, where: str, error: Exception) -> None: ...
    async def refuse_stream(self, context: grpc.aio.ServicerContext[Any, Any],
                            error: MidstreamError) -> NoReturn: ...


class ManyStream:
    """The server side of one ``FeedMany`` call. Use from the server's event loop only."""

    __slots__ = ("_channels", "_context", "_highest", "_out", "_owner", "_servicer", "_waited")

    def __init__(self, servicer: StreamHost,
                 context: grpc.aio.ServicerContext[pb.ClientFrame, pb.ServerFrame]) -> None:
        self._servicer = servicer
        self._context = context
        self._owner = ""  # the caller's address, read when the call runs
        self._channels: dict[int, _Channel] = {}
        self._highest = 0  # the highest channel number opened so far
        # Seconds the server has spent waiting for the caller's next frame: the idle clock.
        self._waited = 0.0
        # The reply frame being filled: replies are added in place (each message is copied
        # once, into the frame).
        self._out = pb.ServerFrame()

    async def run(self) -> AsyncIterator[pb.ServerFrame]:
        """Serve the call: read frames, apply them, yield reply frames, until the stream ends."""
        servicer, context = self._servicer, self._context
        self._owner = caller_address(context)
        limits = servicer.limits
        stop = servicer.stop_signal()
        if stop.done():
            await servicer.refuse_stream(context, UnavailableError("the server is shutting down"))
        # The call's end finishes every open channel even if grpc never resumes nor closes
        # this generator (see MidstreamServicer.Feed).
        # (The stubs name a class where grpc takes any callable of the context.)
        context.add_done_callback(
            lambda _: self._abandon(EndReason.CALLER_VANISHED))  # type: ignore[arg-type]
        loop = asyncio.get_running_loop()
        sweep_every = min(limits.idle_timeout_s / _SWEEPS_PER_TIMEOUT, _MAX_SWEEP_S)
        next_sweep = sweep_every
        read: asyncio.Future[pb.ClientFrame] | None = None
        # A stream with no open channel counts against max_streams_without_conversation and
        # ends after idle_timeout_s of it (on the waiting clock).
        try:
            servicer.enter_waiting()
        except LimitExceededError as exc:
            await servicer.refuse_stream(context, exc)
        waiting, empty_since = True, 0.0
        try:
            while True:
                if read is None:
                    # The stubs say a frame; at the end of the stream it is grpc.aio.EOF.
                    read = asyncio.ensure_future(context.read())
                pending: asyncio.Future[pb.ClientFrame] = read
                timeout = max((next_sweep if self._channels
                               else empty_since + limits.idle_timeout_s) - self._waited, 0.0)
                began = loop.time()
                await asyncio.wait((pending, stop), timeout=timeout,
                                   return_when=asyncio.FIRST_COMPLETED)
                self._waited += loop.time() - began
                if stop.done():
                    # The server is stopping: it finished every session; hand over the rest.
                    self._end_all(EndReason.SERVER_SHUTDOWN)
                    for frame in self._frames():
                        yield frame
                    return
                if pending.done():
                    request: object = pending.result()
                    read = None
                    if request is grpc.aio.EOF:
                        if await caller_vanished(context):
                            self._abandon(EndReason.CALLER_VANISHED)
                            return
                        self._end_all(EndReason.CLOSED)
                        for frame in self._frames():
                            yield frame
                        return
                    try:
                        if isinstance(request, MalformedMessage):
                            # No channel can be told apart in bytes that did not decode.
                            raise request.error()
                        assert isinstance(request, pb.ClientFrame)
                        await self._frame(request)
                    except (FieldLimitError, EventError) as exc:
                        self._end_all(EndReason.REJECTED)
                        for frame in self._frames():
                            yield frame
                        await servicer.refuse_stream(context, exc)
                if self._waited >= next_sweep:
                    self._sweep(limits.idle_timeout_s)
                    next_sweep = self._waited + sweep_every
                for frame in self._frames():
                    yield frame
                if waiting == bool(self._channels):  # a first channel opened, or the last ended
                    waiting = not waiting
                    if waiting:
                        servicer.enter_waiting(check=False)
                        empty_since = self._waited
                    else:
                        servicer.leave_waiting()
                if waiting and self._waited - empty_since >= limits.idle_timeout_s:
                    if read is not None:
                        read.cancel()  # the refusal reads what is in flight itself
                        read = None
                    await servicer.refuse_stream(context, ProtocolStateError(
                        f"no channel was open on this stream for idle_timeout_s "
                        f"({limits.idle_timeout_s} s)"))
        finally:
            if waiting:
                servicer.leave_waiting()
            if read is not None and not read.done():
                read.cancel()
            # Cancelled, or the caller went away mid-stream: finalise for the followers.
            self._abandon(EndReason.CALLER_VANISHED)

    # --- one frame -----------------------------------------------------------------------

    async def _frame(self, frame: pb.ClientFrame) -> None:
        """Apply every event of a frame in order.

        Awaits only on servers sharing a log: once to ask it about every new caller-chosen id
        the frame opens (one round trip), and for each ``open.resume``, whose conversation is
        read from the log and replayed before the frame's later events are applied (so they
        reach it in order). Everything else is applied without awaiting.
        """
        limits = self._servicer.limits
        count, limit = len(frame.events), limits.max_events_per_frame
        if count > limit:
            raise FieldLimitError(
                "max_events_per_frame", limit,
                f"the frame holds {count} events; limit max_events_per_frame is {limit}")
        received = time.monotonic()
        taken = await self._taken_elsewhere(frame)
        for item in frame.events:
            number = item.channel
            channel = self._channels.get(number)
            if channel is not None:
                self._event(channel, item.event, received)
            elif number == 0:
                self._refuse(number, EventError(
                    "field 'channel' is 0 (unset?): channel numbers start at 1"))
            elif item.event.WhichOneof("event") == "open" and item.event.open.server_ticks:
                # One stream serves many conversations in frames the caller paces: it sends
                # the time ticks its frames need itself.
                self._refuse(number, ProtocolStateError(
                    "open.server_ticks is taken on Feed only; send time ticks (tick "
                    "events) in the frames of FeedMany"))
            elif item.event.WhichOneof("event") == "open":
                request = item.event.open
                if request.resume:
                    await self._resume(number, request.conversation_id, request.epoch)
                    # Replaying took a while: the frame's later events arrived no sooner.
                    received = time.monotonic()
                elif request.conversation_id and request.conversation_id in taken:
                    if self._admits(number):
                        self._refuse(number, ConflictError(
                            f"conversation id {request.conversation_id!r} is live in the "
                            "shared log; continue it with open.resume, or choose another id"))
                else:
                    self._open(number, request.conversation_id)
            elif number <= self._highest:
                self._refuse(number, ProtocolStateError(
                    f"channel {number} is not open on this stream: its conversation has ended "
                    f"(or it was never opened); channel numbers are not reused"))
            else:
                self._refuse(number, ProtocolStateError(
                    f"channel {number} is not open: its first event must be 'open', not "
                    f"{item.event.WhichOneof('event')!r}"))

    async def _taken_elsewhere(self, frame: pb.ClientFrame) -> set[str]:
        """The caller-chosen ids the frame opens anew that the shared log holds as live (as
        ``Feed`` refuses them); none without a log."""
        replica = self._servicer.replica
        if replica is None:
            return set()
        wanted = [item.event.open.conversation_id for item in frame.events
                  if item.channel not in self._channels and item.event.WhichOneof("event")
                  == "open" and item.event.open.conversation_id and not item.event.open.resume]
        return await replica.live_in_log(wanted) if wanted else set()

    def _admits(self, number: int) -> bool:
        """Whether channel ``number`` may be opened now; refuses it (and says why) if not."""
        servicer = self._servicer
        limit = servicer.limits.max_channels_per_stream
        if number <= self._highest:
            self._refuse(number, ProtocolStateError(
                f"channel {number} cannot be opened: each 'open' must use a channel number "
                f"above every one opened before on this stream (the highest is "
                f"{self._highest}); channel numbers are not reused"))
            return False
        if len(self._channels) >= limit:
            self._refuse(number, LimitExceededError(
                "max_channels_per_stream", limit,
                f"{limit} channels are open on this stream; limit max_channels_per_stream is "
                f"{limit}"))
            return False
        if servicer.stopping:
            self._refuse(number, UnavailableError("the server is shutting down"))
            return False
        return True

    def _open(self, number: int, conversation_id: str) -> None:
        if not self._admits(number):
            return
        servicer = self._servicer
        try:
            session = servicer.registry.open(conversation_id, servicer.bundle,
                                             owner=self._owner)
        except MidstreamError as exc:
            self._refuse(number, exc)
            return
        self._opened(number, session, 0)

    async def _resume(self, number: int, conversation_id: str, epoch: int) -> None:
        """Continue a conversation from the shared log on channel ``number``, as ``Feed``
        does with ``open.resume``; a refusal goes to the channel."""
        if not self._admits(number):
            return
        servicer = self._servicer
        if servicer.replica is None or not conversation_id:
            self._refuse(number, ProtocolStateError(
                "open.resume continues a conversation by its id on servers that share a log "
                "(midstream serve --redis)"))
            return
        try:
            session, logged = await servicer.replica.resume(
                conversation_id, servicer.registry, servicer.bundle, owner=self._owner,
                epoch=epoch)
        except MidstreamError as exc:
            self._refuse(number, exc)
            return
        # Should the server have begun stopping meanwhile, the stream's next turn ends it
        # like every other channel (welcome, final update, ``ended``).
        self._opened(number, session, logged)

    def _opened(self, number: int, session: Session, logged: int) -> None:
        """Give ``session`` channel ``number`` and queue its welcome."""
        self._highest = number
        channel = self._channels[number] = _Channel(number, session, self._waited)
        self._out.replies.add(channel=number, message=pb.ServerMessage(
            welcome=pb.Welcome(conversation_id=session.id, next_seq=session.seq + 1,
                               epoch=session.epoch, events_logged=logged)))
        channel.sent = session.seq

    def _event(self, channel: _Channel, event: pb.ClientEvent, received: float) -> None:
        """Apply one event to an open channel's conversation, as ``Feed`` would."""
        servicer, session = self._servicer, channel.session
        channel.last_event = self._waited
        try:
            closing = apply_event(session, event, received, servicer.limits)
        except MidstreamError as exc:
            self._flush(channel)
            self._refuse(channel.number, exc)
            self._finish(channel, EndReason.REJECTED)
            return
        except Exception as exc:  # a bug must not leave followers hanging
            servicer.log_internal(session.id, exc)
            self._flush(channel)
            self._refuse(channel.number, InternalError(
                f"internal error; conversation {session.id} was finished"))
            self._finish(channel, EndReason.UNKNOWN)
            return
        if closing:
            self._finish(channel, EndReason.CLOSED)
        else:
            self._flush(channel)

    # --- replies -------------------------------------------------------------------------

    def _flush(self, channel: _Channel) -> None:
        """Queue the channel's updates its caller has not been sent.

        Each is written inside the reply frame (built in place, or parsed from the wire bytes
        a follower or the shared log already made), not built alone and copied in.
        """
        number, add = channel.number, self._out.replies.add
        for item in channel.session.since(channel.sent):
            write_update(item, add(channel=number).message)
            channel.sent = item.update.seq

    def _finish(self, channel: _Channel, reason: EndReason) -> None:
        """End the channel's conversation (if live), queue its last messages, forget it."""
        session = channel.session
        self._servicer.registry.close(session, reason)
        self._flush(channel)
        ended = session.closing_messages[-1]
        assert isinstance(ended, Ended)  # a finished session's last message is its end
        self._out.replies.add(channel=channel.number, message=ended_message(ended))
        del self._channels[channel.number]

    def _refuse(self, number: int, error: MidstreamError) -> None:
        code = status_code(error)
        self._servicer.metrics.errors.labels(code=code.name).inc()
        # The message may quote caller input (an engine's), so it stays below INFO.
        _log.info("event on channel %d refused with %s (%s)", number, code.name,
                  type(error).__name__)
        _log.debug("refusal detail: %s", error)
        self._out.replies.add(channel=number,
                              error=pb.ChannelError(code=code.name, message=str(error)))

    def _end_all(self, reason: EndReason) -> None:
        for channel in list(self._channels.values()):
            self._finish(channel, reason)

    def _abandon(self, reason: EndReason) -> None:
        """Finish every open channel without queueing replies (nobody will read them)."""
        for channel in self._channels.values():
            self._servicer.registry.close(channel.session, reason)
        self._channels.clear()

    def _sweep(self, idle_timeout_s: float) -> None:
        cutoff = self._waited - idle_timeout_s
        for channel in [c for c in self._channels.values() if c.last_event <= cutoff]:
            self._finish(channel, EndReason.IDLE_TIMEOUT)

    def _frames(self) -> list[pb.ServerFrame]:
        """The queued replies as frames, each within the message budget; clears the queue.

        Almost always one frame: only a reply that would exceed the budget (hundreds of big
        batches, or every channel's final update at once) is split, between channel replies.
        """
        out = self._out
        if not out.replies:
            return []
        self._out = pb.ServerFrame()
        budget = message_budget(self._servicer.limits)
        if out.ByteSize() <= budget:
            return [out]
        frames = [pb.ServerFrame()]
        size = 0
        for reply in out.replies:
            cost = reply.ByteSize() + _REPLY_OVERHEAD
            if size + cost > budget and frames[-1].replies:
                frames.append(pb.ServerFrame())
                size = 0
            frames[-1].replies.append(reply)
            size += cost
        return frames
