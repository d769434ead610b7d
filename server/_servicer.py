"""The ``midstream.v1.Midstream`` service: converts wire messages and drives sessions.

Generated protobuf types stop here: requests are converted to domain types with
``midstream.wire.convert`` and checked by ``midstream.server._limits`` before a session or
engine sees them, and what sessions publish (domain values) is converted on its way out
(``midstream.server._wire``). Every Midstream error an RPC raises is reported through one function
(:func:`midstream.server._status.status_code`).

A ``Feed`` stream is one RPC, so a refused event cannot be answered and then carried on
from: the caller gets every update published up to the bad event, then the error status; the
conversation is finished (all words final) and followers get the final update and ``ended``
with ``END_REASON_REJECTED`` (see ``docs/service.md``).
"""

from __future__ import annotations

import asyncio
import functools
import json
import logging
import time
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn

import grpc
from midstream import (
    EndReason,
    EventError,
    HypothesisDiff,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    Snapshot,
    UnavailableError,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.server._config import ServerLimits
from midstream.server._decode import MalformedMessage
from midstream.server._ingest import apply_event, caller_address, caller_vanished
from midstream.server._limits import SpeakerTimeline, check_id, check_word
from midstream.server._many import ManyStream
from midstream.server._metrics import ServerMetrics
from midstream.server._models import Bundle, load_bundle
from midstream.server._published import PublishedUpdate
from midstream.server._registry import SessionRegistry
from midstream.server._session import Session, message_budget
from midstream.server._status import (
    FieldLimitError,
    InternalError,
    ProtocolStateError,
    status_code,
)
from midstream.server._wire import server_message, update_message
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc

if TYPE_CHECKING:  # imported only with a shared log: redis stays out of the default path
    from midstream.server._journal import SharedLog
    from midstream.server._replica import Replica

_log = logging.getLogger(__name__)

# Items of a TagTranscript request between two returns to the event loop, so one long batch
# does not starve live streams (decodes themselves are never split).
_BATCH_SLICE = 16
# How long and how many in-flight requests a refused ingest call reads before its status.
_DRAIN_S = 0.25
_DRAIN_MESSAGES = 64


class _Timeout:
    """Marker: nothing arrived within the idle timeout."""


class _Stopped:
    """Marker: the conversation was finished by the server (shutdown) while waiting."""


class _Woken:
    """Marker: the server published an update of its own (a server tick) while waiting."""


_TIMEOUT = _Timeout()
_STOPPED = _Stopped()
_WOKEN = _Woken()


class _EventReader:
    """Reads a Feed stream's events until a stop signal or an idle timeout interrupts.

    Every word arrives as one event, so this runs thousands of times a second: rather than a
    wait with a timeout per read (a timer, callbacks and bookkeeping each time), one watchdog
    timer per stream re-arms itself only when it fires, and the stop signal cancels the pending
    read through a callback. :meth:`next` returns the event, ``grpc.aio.EOF``, ``_TIMEOUT``
    or ``_STOPPED``; once :meth:`wakeable` was called, also ``_WOKEN`` after :meth:`wake`
    (the pending read is kept for the next call: a cancelled read could lose an event).
    Use as a context manager (or call :meth:`close`) to drop the timer.
    ``stop`` is shared with other streams (a session's end, the server stopping): the reader
    only adds and removes a callback, never cancels it.
    """

    # One per open stream: no per-instance __dict__.
    __slots__ = ("_carried", "_context", "_idle_timeout_s", "_loop", "_pending", "_reason",
                 "_stop", "_timer", "_waiter", "_waiting_since", "_woken")

    def __init__(self, context: grpc.aio.ServicerContext[pb.ClientEvent, pb.ServerMessage],
                 stop: asyncio.Future[None], idle_timeout_s: float) -> None:
        self._context = context
        self._stop = stop
        self._idle_timeout_s = idle_timeout_s
        self._loop = asyncio.get_running_loop()
        # The caller is idle only while the server waits for its next event: time the server
        # spends on an event (or writing its update) never counts against the caller.
        self._waiting_since = self._loop.time()
        self._pending: asyncio.Future[object] | None = None
        # Only a wakeable reader waits through _waiter (a future more per event): the read a
        # wake left pending, and whether a wake came while no read was pending.
        self._waiter: asyncio.Future[None] | None = None
        self._carried: asyncio.Future[object] | None = None
        self._woken: bool | None = None  # None: not wakeable
        self._reason: object | None = _STOPPED if stop.done() else None
        self._timer = self._loop.call_later(idle_timeout_s, self._check_idle)
        stop.add_done_callback(self._on_stop)

    def __enter__(self) -> _EventReader:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()

    def close(self) -> None:
        self._timer.cancel()
        self._stop.remove_done_callback(self._on_stop)
        if self._carried is not None and not self._carried.done():
            self._carried.cancel()
        self._carried = None

    def wakeable(self) -> None:
        """Let :meth:`wake` interrupt a wait (for a conversation the server ticks)."""
        if self._woken is None:
            self._woken = False

    def wake(self) -> None:
        """Make the pending (or the next) :meth:`next` return ``_WOKEN``; the read goes on."""
        if self._woken is None:
            return
        self._woken = True
        waiter = self._waiter
        if waiter is not None and not waiter.done():
            waiter.set_result(None)

    def _interrupt(self, reason: object) -> None:
        if self._reason is None:
            self._reason = reason
        if self._pending is not None and not self._pending.done():
            self._pending.cancel()

    def _on_stop(self, _: object) -> None:
        self._interrupt(_STOPPED)

    def _check_idle(self) -> None:
        idle_for = self._loop.time() - self._waiting_since
        if idle_for >= self._idle_timeout_s and self._pending is not None:
            self._interrupt(_TIMEOUT)
        else:
            self._timer = self._loop.call_later(
                max(self._idle_timeout_s - idle_for, 0.001), self._check_idle)

    async def next(self) -> object:
        if self._reason is not None:
            return self._reason
        if self._woken:
            self._woken = False
            return _WOKEN
        read: asyncio.Future[object]
        if self._carried is not None:
            # The wait a wake interrupted goes on: the caller has been idle since it began.
            read, self._carried = self._carried, None
        else:
            self._waiting_since = self._loop.time()
            read = asyncio.ensure_future(self._context.read())
        self._pending = read
        try:
            if self._woken is not None and await self._woken_first(read):
                return _WOKEN
            event = await read
        except asyncio.CancelledError:
            task = asyncio.current_task()
            # Our own interruption cancelled the read; a cancellation of this task propagates.
            if self._reason is not None and read.cancelled() and not (
                    task is not None and task.cancelling()):
                return self._reason
            raise
        finally:
            self._pending = None
        return event

    async def _woken_first(self, read: asyncio.Future[object]) -> bool:
        """Wait for ``read`` or a wake; on a wake keep ``read`` for the next call."""
        waiter: asyncio.Future[None] = self._loop.create_future()

        def settle(_: object) -> None:
            if not waiter.done():
                waiter.set_result(None)

        read.add_done_callback(settle)
        self._waiter = waiter
        try:
            await waiter
        except asyncio.CancelledError:
            read.cancel()  # this task was cancelled: the read goes with it, as when awaited
            raise
        finally:
            self._waiter = None
        if read.done():
            return False
        self._woken = False
        self._carried = read
        return True


def _summary(session: Session) -> pb.ConversationSummary:
    return pb.ConversationSummary(
        conversation_id=session.id, speakers=session.timeline.speakers,
        words=session.word_count, last_seq=session.seq, started_at=session.started_at,
        ended=not session.live, epoch=session.epoch,
    )


class MidstreamServicer(pb_grpc.MidstreamServicer):
    """Implements every RPC of the service over one :class:`SessionRegistry`.

    Use from the server's event loop only.
    """

    def __init__(self, bundle: Bundle, limits: ServerLimits, metrics: ServerMetrics, *,
                 load: Callable[[Path], Bundle] = load_bundle,
                 shared: SharedLog | None = None) -> None:
        self.bundle = bundle
        self._load = load  # what ReloadModels loads with (the server's decoder settings)
        self._limits = limits
        self._metrics = metrics
        self.registry = SessionRegistry(limits, metrics,
                                        journal=shared.journal if shared else None)
        # Serves what other replicas ingest (and continues their conversations) from the log.
        self.replica: Replica | None = None
        if shared is not None:
            from midstream.server._replica import Replica  # noqa: PLC0415 - see above
            self.replica = Replica(shared, limits)
            shared.live_session = self._live_session
        self._stopping = False
        self._waiting = 0  # ingest streams without a conversation open
        # One future for every stream waiting on a stop, made on first use (on the loop):
        # a wait task per stream cost about a kilobyte each for the whole conversation.
        self._stop_signal: asyncio.Future[None] | None = None

    def _live_session(self, conversation_id: str) -> Session | None:
        """The live conversation with this id here, if any."""
        try:
            session = self.registry.get(conversation_id)
        except NotFoundError:
            return None
        return session if session.live else None

    @property
    def limits(self) -> ServerLimits:
        return self._limits

    @property
    def metrics(self) -> ServerMetrics:
        return self._metrics

    @property
    def stopping(self) -> bool:
        """Whether :meth:`begin_stopping` was called."""
        return self._stopping

    def enter_waiting(self, *, check: bool = True) -> None:
        """Count an ingest stream that has no conversation open (yet, or any more).

        Such a stream costs the server memory and a slot but does nothing, so their number is
        capped: without it a caller could hold thousands open. ``check=False`` counts a stream
        that is already running (its last channel ended) without refusing it.

        Raises
        ------
        LimitExceededError
            When ``max_streams_without_conversation`` are already waiting.
        """
        limit = self._limits.max_streams_without_conversation
        if check and self._waiting >= limit:
            raise LimitExceededError(
                "max_streams_without_conversation", limit,
                f"{limit} streams have no conversation open; limit "
                f"max_streams_without_conversation is {limit}")
        self._waiting += 1

    def leave_waiting(self) -> None:
        """The stream counted by :meth:`enter_waiting` opened a conversation or ended."""
        self._waiting -= 1

    @property
    def waiting(self) -> int:
        """Ingest streams without a conversation open."""
        return self._waiting

    def begin_stopping(self) -> None:
        """Refuse new conversations and interrupt streams that wait outside one; idempotent."""
        self._stopping = True
        if self._stop_signal is not None and not self._stop_signal.done():
            self._stop_signal.set_result(None)

    def stop_signal(self) -> asyncio.Future[None]:
        """A future done once :meth:`begin_stopping` was called; shared, never cancel it."""
        if self._stop_signal is None:
            self._stop_signal = asyncio.get_running_loop().create_future()
            if self._stopping:
                self._stop_signal.set_result(None)
        return self._stop_signal

    async def _fail(self, context: grpc.aio.ServicerContext[Any, Any],
                    error: MidstreamError) -> NoReturn:
        code = status_code(error)
        self._metrics.errors.labels(code=code.name).inc()
        # The message may quote caller input (an engine's), so it stays below INFO.
        _log.info("RPC refused with %s (%s)", code.name, type(error).__name__)
        _log.debug("refusal detail: %s", error)
        await context.abort(code, str(error))
        raise AssertionError("abort returned")  # pragma: no cover - abort always raises

    async def refuse(self, context: grpc.aio.ServicerContext[Any, Any],
                     error: MidstreamError) -> NoReturn:
        """End a call with the status code of ``error``: counted, logged on one line."""
        await self._fail(context, error)

    @staticmethod
    def log_internal(where: str, error: Exception) -> None:
        """Log a fault by its type only; the detail (which may quote words) at DEBUG."""
        # Only the type at ERROR: an engine's message or traceback may quote words.
        _log.error("internal error in %s (%s)", where, type(error).__name__)
        _log.debug("internal error detail", exc_info=error)

    async def refuse_stream(self, context: grpc.aio.ServicerContext[Any, Any],
                            error: MidstreamError) -> NoReturn:
        """End an ingest call with an error, after briefly reading requests still in flight.

        See :func:`midstream.server._auth.drain_requests` for why (a client-side race).
        """
        try:
            async with asyncio.timeout(_DRAIN_S):
                for _ in range(_DRAIN_MESSAGES):
                    event: object = await context.read()
                    if event is grpc.aio.EOF:
                        break
        except (TimeoutError, grpc.RpcError):
            pass
        await self._fail(context, error)

    # --- Feed ------------------------------------------------------------------------

    def _reader(self, context: grpc.aio.ServicerContext[pb.ClientEvent, pb.ServerMessage],
                stop: asyncio.Future[None]) -> _EventReader:
        return _EventReader(context, stop, self._limits.idle_timeout_s)

    async def Feed(  # noqa: N802 - the generated servicer's name
        self, request_iterator: AsyncIterator[pb.ClientEvent],
        context: grpc.aio.ServicerContext[pb.ClientEvent, pb.ServerMessage],
    ) -> AsyncIterator[pb.ServerMessage | bytes]:
        try:
            self.enter_waiting()
        except LimitExceededError as exc:
            await self.refuse_stream(context, exc)
        try:
            with self._reader(context, self.stop_signal()) as reader:
                first = await reader.next()
        finally:
            self.leave_waiting()
        if isinstance(first, MalformedMessage):
            await self.refuse_stream(context, first.error())
        if not isinstance(first, pb.ClientEvent):
            if first is _STOPPED:
                await self._fail(context, UnavailableError("the server is shutting down"))
            if first is _TIMEOUT:
                await self._fail(context, ProtocolStateError(
                    f"no 'open' event within idle_timeout_s "
                    f"({self._limits.idle_timeout_s} s)"))
            await self._fail(context, ProtocolStateError(
                "the stream ended before its first event, which must be 'open'"))
        if first.WhichOneof("event") != "open":
            await self.refuse_stream(context, ProtocolStateError(
                f"the first event must be 'open', not {first.WhichOneof('event')!r}"))
        if self._stopping:
            await self.refuse_stream(context, UnavailableError("the server is shutting down"))
        if first.open.server_ticks and self.replica is not None:
            await self.refuse_stream(context, ProtocolStateError(
                "open.server_ticks is refused on servers sharing a log (midstream serve "
                "--redis): the server's ticks are not logged input, so the conversation could "
                "not be continued on another replica; send time ticks instead"))
        try:
            session, logged = await self._open(first.open, owner=caller_address(context))
        except MidstreamError as exc:
            await self.refuse_stream(context, exc)
        # From here on the conversation is this call's to end, however the call ends. grpc
        # stops iterating a handler whose caller vanished (it is cancelled while sending, outside
        # this generator) and closes the generator only when it is collected, which a
        # reference cycle can put off indefinitely: the call's own end finishes the
        # conversation, and the try below covers every yield, the welcome included.
        # The stubs name a class where grpc takes any callable of the context.
        context.add_done_callback(
            functools.partial(self._call_ended, session))  # type: ignore[arg-type]
        try:
            yield pb.ServerMessage(welcome=pb.Welcome(
                conversation_id=session.id, next_seq=session.seq + 1, epoch=session.epoch,
                events_logged=logged))
            async for message in self._feed(session, context,
                                                server_ticks=first.open.server_ticks):
                yield message
        finally:
            self._call_ended(session)

    def _call_ended(self, session: Session, _: object = None) -> None:
        """Finish ``session`` as abandoned by its caller unless it has already ended."""
        if session.live:
            self.registry.close(session, EndReason.CALLER_VANISHED)

    async def _open(self, request: pb.OpenConversation, *, owner: str,
                    ) -> tuple[Session, int]:
        """A new conversation, or one continued from the shared log; and the events logged.

        ``owner`` names the caller (its address), as :meth:`SessionRegistry.open` takes it."""
        if request.resume:
            if self.replica is None or not request.conversation_id:
                raise ProtocolStateError(
                    "open.resume continues a conversation by its id on servers that share a "
                    "log (midstream serve --redis)")
            return await self.replica.resume(request.conversation_id, self.registry,
                                             self.bundle, owner=owner, epoch=request.epoch)
        if self.replica is not None and request.conversation_id:
            await self.replica.check_new(request.conversation_id)
        return self.registry.open(request.conversation_id, self.bundle, owner=owner), 0

    async def _shared_only(self, conversation_id: str) -> Replica | None:
        """The replica view when this server shares a log and does not hold the conversation
        (or holds only an ended one whose id another replica has since given to a new one).

        Raises
        ------
        EventError, FieldLimitError
            For an id no conversation can have (as :meth:`_known`).
        """
        if self.replica is None:
            return None
        try:
            session = self._known(conversation_id)
        except NotFoundError:
            return self.replica
        if not session.live and await self.replica.newer_than(conversation_id, session.epoch):
            return self.replica
        # Another replica writes it now: what this one holds is stale.
        return self.replica if session.superseded else None

    async def _feed(
        self, session: Session,
        context: grpc.aio.ServicerContext[pb.ClientEvent, pb.ServerMessage], *,
        server_ticks: bool = False,
    ) -> AsyncIterator[pb.ServerMessage | bytes]:
        # A server stop finishes every session, so waiting on this session's end covers it.
        # The last sequence number the caller was given: a continued conversation's earlier
        # updates went to the caller from the replica that died.
        sent = session.seq
        reader = self._reader(context, session.ended_signal())
        if server_ticks:
            reader.wakeable()
            session.tick_by_server(reader.wake)
        try:
            while True:
                event = await reader.next()
                if event is _WOKEN and session.live:
                    # The server's clock closed an utterance: send it without an event.
                    for item in session.since(sent):
                        sent = item.update.seq
                        yield update_message(item)
                    continue
                if event is _STOPPED or not session.live:
                    # Finished by the server (shutdown): hand over the rest and the end.
                    for message in self._closing(session, sent):
                        yield message
                    return
                if event is grpc.aio.EOF and await caller_vanished(context):
                    self.registry.close(session, EndReason.CALLER_VANISHED)
                    return
                if isinstance(event, _Timeout) or event is grpc.aio.EOF:
                    reason = (EndReason.IDLE_TIMEOUT if isinstance(event, _Timeout)
                              else EndReason.CLOSED)
                    self.registry.close(session, reason)
                    for message in self._closing(session, sent):
                        yield message
                    return
                assert isinstance(event, pb.ClientEvent | MalformedMessage)
                try:
                    closing = apply_event(session, event, time.monotonic(), self._limits)
                except MidstreamError as exc:
                    self.registry.close(session, EndReason.REJECTED)
                    for item in session.since(sent):
                        yield update_message(item)
                    await self.refuse_stream(context, exc)
                except Exception as exc:  # a bug must not leave followers hanging
                    self.log_internal(session.id, exc)
                    self.registry.close(session, EndReason.UNKNOWN)
                    for item in session.since(sent):
                        yield update_message(item)
                    await self._fail(context, InternalError(
                        f"internal error; conversation {session.id} was finished"))
                for item in session.since(sent):
                    sent = item.update.seq
                    yield update_message(item)
                if closing:
                    self.registry.close(session, EndReason.CLOSED)
                    for message in self._closing(session, sent):
                        yield message
                    await self._after_close(context, session)
                    return
        finally:
            reader.close()
            if session.live:
                # Cancelled or the caller went away mid-stream: finalise for the followers.
                self.registry.close(session, EndReason.CALLER_VANISHED)

    def _closing(self, session: Session, sent: int) -> list[pb.ServerMessage | bytes]:
        """What an ended conversation's caller is sent last: the updates after ``sent``, then
        the end."""
        budget = message_budget(self._limits)
        return [*(update_message(item) for item in session.since(sent)),
                *(server_message(item, budget) for item in session.closing_messages[-1:])]

    async def _after_close(self, context: grpc.aio.ServicerContext[pb.ClientEvent,
                                                                  pb.ServerMessage],
                           session: Session) -> None:
        """Wait for the caller's half-close; any further event is refused."""
        with self._reader(context, self.stop_signal()) as reader:
            event = await reader.next()
        if isinstance(event, MalformedMessage):
            await self.refuse_stream(context, event.error())
        if isinstance(event, pb.ClientEvent):
            await self.refuse_stream(context, ProtocolStateError(
                f"event {event.WhichOneof('event')!r} after 'close': conversation "
                f"{session.id} has ended"))

    async def FeedMany(  # noqa: N802
        self, request_iterator: AsyncIterator[pb.ClientFrame],
        context: grpc.aio.ServicerContext[pb.ClientFrame, pb.ServerFrame],
    ) -> AsyncIterator[pb.ServerFrame]:
        async for frame in ManyStream(self, context).run():
            yield frame

    # --- Follow, list, revisions ---------------------------------------------------------

    def _known(self, conversation_id: str) -> Session:
        """A live or kept conversation, its id checked first (no over-long id is echoed back).

        Raises
        ------
        EventError
            For an empty id or one holding a control character.
        FieldLimitError
            For an id over ``max_id_chars``.
        NotFoundError
            When no such conversation is live or kept.
        """
        check_id(conversation_id, "conversation_id", self._limits)
        return self.registry.get(conversation_id)

    async def Follow(  # noqa: N802
        self, request: pb.FollowRequest | MalformedMessage,
        context: grpc.aio.ServicerContext[pb.FollowRequest, pb.ServerMessage],
    ) -> AsyncIterator[pb.ServerMessage | bytes]:
        try:
            if isinstance(request, MalformedMessage):
                raise request.error()
            from_seq = request.from_seq if request.HasField("from_seq") else None
            replica = await self._shared_only(request.conversation_id)
            if replica is None:
                session = self._known(request.conversation_id)
                backlog, follower = session.follow(from_seq, request.epoch)
        except MidstreamError as exc:
            await self._fail(context, exc)
        if replica is not None:
            try:
                async for message in replica.follow(request.conversation_id, from_seq,
                                                    request.epoch, self.stop_signal()):
                    yield message
            except MidstreamError as exc:
                await self._fail(context, exc)
            return
        budget = message_budget(self._limits)
        if follower is None:
            for item in backlog:
                yield server_message(item, budget)
            return
        # The newest sequence number this follower has (it holds those before its from_seq).
        sent = from_seq - 1 if from_seq is not None else 0
        try:
            async for item in follower.messages(backlog):
                if isinstance(item, PublishedUpdate):
                    sent = item.update.seq
                elif isinstance(item, Snapshot):
                    sent = item.seq
                yield server_message(item, budget)
        finally:
            session.unfollow(follower)
        logged = follower.moved
        if logged is None or self.replica is None:
            return
        # Another replica took the conversation over: carry on from the shared log, seamlessly
        # while this follower was sent only what the log holds from here, else told.
        stale = sent > logged
        try:
            async for message in self.replica.follow(
                    session.id, logged + 1 if stale else sent + 1, session.epoch,
                    self.stop_signal(), stale_from=logged + 1 if stale else None):
                yield message
        except MidstreamError as exc:
            await self._fail(context, exc)

    async def ListConversations(  # noqa: N802
        self, request: pb.ListConversationsRequest,
        context: grpc.aio.ServicerContext[pb.ListConversationsRequest,
                                          pb.ListConversationsReply],
    ) -> pb.ListConversationsReply:
        # A conversation another replica took over is listed from the log, not as held here.
        local = [_summary(s) for s in self.registry.sessions() if not s.superseded]
        if self.replica is not None:
            try:
                local += await self.replica.summaries(
                    {(s.conversation_id, s.epoch) for s in local})
            except MidstreamError as exc:
                await self._fail(context, exc)
        return pb.ListConversationsReply(conversations=local)

    async def GetRevisions(  # noqa: N802
        self, request: pb.GetRevisionsRequest,
        context: grpc.aio.ServicerContext[pb.GetRevisionsRequest, pb.GetRevisionsReply],
    ) -> pb.GetRevisionsReply:
        try:
            replica = await self._shared_only(request.conversation_id)
            if replica is not None:
                return await replica.revisions(request.conversation_id)
            session = self._known(request.conversation_id)
        except MidstreamError as exc:
            await self._fail(context, exc)
        kept, truncated = session.revisions()
        revisions: list[pb.Revision] = []
        room = message_budget(self._limits)
        # Newest first, so that when the reply must be cut to fit one message the oldest go.
        for seq, when, state in reversed(kept):
            if isinstance(state, WordHypothesis):
                revision = pb.Revision(seq=seq, server_time=when,
                                       word=cv.word_state_to_wire(state))
            else:
                revision = pb.Revision(seq=seq, server_time=when,
                                       utterance=cv.utterance_state_to_wire(state))
            room -= revision.ByteSize() + 6
            if room < 0:
                truncated = True
                break
            revisions.append(revision)
        revisions.reverse()
        return pb.GetRevisionsReply(conversation_id=session.id, revisions=revisions,
                                    truncated=truncated, epoch=session.epoch)

    # --- batch -----------------------------------------------------------------------------

    async def TagTranscript(  # noqa: N802
        self, request: pb.TagTranscriptRequest,
        context: grpc.aio.ServicerContext[pb.TagTranscriptRequest, pb.TagTranscriptReply],
    ) -> pb.TagTranscriptReply:
        try:
            words, utterances = await self._tag(request)
        except MidstreamError as exc:
            await self._fail(context, exc)
        except Exception as exc:  # report INTERNAL without logging words
            self.log_internal("(transcript)", exc)
            await self._fail(context, InternalError("internal error while tagging"))
        reply = pb.TagTranscriptReply(
            words=[cv.word_state_to_wire(w) for w in words],
            utterances=[cv.utterance_state_to_wire(u) for u in utterances],
        )
        size, limit = reply.ByteSize(), self._limits.max_message_bytes
        if size > limit:
            await self._fail(context, FieldLimitError(
                "max_message_bytes", limit,
                f"the reply would be {size} bytes; limit max_message_bytes is {limit}: "
                "send the transcript in parts"))
        return reply

    async def _tag(self, request: pb.TagTranscriptRequest,
                   ) -> tuple[list[WordHypothesis], list[UtteranceHypothesis]]:
        limit = self._limits.max_transcript_items
        if len(request.items) > limit:
            raise FieldLimitError(
                "max_transcript_items", limit,
                f"the transcript holds {len(request.items)} items; "
                f"limit max_transcript_items is {limit}",
            )
        engine = self.bundle.new_engine()
        timeline = SpeakerTimeline(self._limits)
        words: dict[str, WordHypothesis] = {}
        utterances: dict[str, UtteranceHypothesis] = {}

        def keep(diff: HypothesisDiff) -> None:
            for word in diff.words:
                words[word.word_id] = word
            for utterance in diff.utterances:
                utterances[utterance.utterance_id] = utterance

        for index, item in enumerate(request.items):
            if index and index % _BATCH_SLICE == 0:
                await asyncio.sleep(0)
            kind = item.WhichOneof("item")
            if kind == "word":
                word_id, word = cv.spoken_word_from_wire(item.word)
                check_word(word_id, word, self._limits)
                timeline.check_new_word(word_id, word)
                keep(engine.add_word(word_id, word))
                timeline.record(word)
            elif kind == "hint":
                speaker, turn_end = cv.hint_from_wire(item.hint)
                check_id(speaker, "hint.speaker", self._limits)
                timeline.check_speaker(speaker)
                keep(engine.hint(speaker, turn_end=turn_end))
            elif kind == "tick":
                keep(engine.tick(cv.tick_from_wire(item.tick)))
            else:
                raise EventError("the item is empty: set word, hint or tick")
        keep(engine.finish())
        return list(words.values()), list(utterances.values())

    # --- models ----------------------------------------------------------------------------

    def _describe(self) -> pb.DescribeModelsReply:
        return pb.DescribeModelsReply(models=[
            pb.ModelDescription(
                kind=info.kind, name=info.name, format_version=info.format_version,
                labels=list(info.labels), sha256=info.sha256,
                training_summary_json=json.dumps(dict(info.training_summary), sort_keys=True,
                                                 default=str),
            )
            for info in self.bundle.describe()
        ])

    async def DescribeModels(  # noqa: N802
        self, request: pb.DescribeModelsRequest,
        context: grpc.aio.ServicerContext[pb.DescribeModelsRequest, pb.DescribeModelsReply],
    ) -> pb.DescribeModelsReply:
        return self._describe()

    async def ReloadModels(  # noqa: N802
        self, request: pb.ReloadModelsRequest,
        context: grpc.aio.ServicerContext[pb.ReloadModelsRequest, pb.DescribeModelsReply],
    ) -> pb.DescribeModelsReply:
        try:
            if not request.directory:
                raise EventError("field 'directory' is empty")
            try:
                bundle = await asyncio.to_thread(self._load, Path(request.directory))
            except (InputError, ModelError, NotFoundError) as exc:
                # Whatever went wrong (an InputError: the new models lack the server's
                # conversation setting), the request cannot succeed as the server stands:
                # FAILED_PRECONDITION, and the models in service keep serving.
                raise ModelError(f"models not reloaded, the ones in service stay: {exc}") from exc
        except MidstreamError as exc:
            await self._fail(context, exc)
        # Live sessions keep the engine they were opened with; new ones use this bundle.
        self.bundle = bundle
        _log.info("models reloaded from %s", request.directory)
        return self._describe()
