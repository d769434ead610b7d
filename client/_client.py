"""The asyncio client of a Midstream server.

::

    async with Client("localhost:50551") as client:
        async with client.feed() as stream:
            await stream.send_words([AddWord(word_id="w1", word=Word(text="uh", speaker="A"))])
            await stream.close()
            async for event in stream:          # Welcome, HypothesisUpdate..., Ended
                ...

Callers that carry many conversations at once (a gateway) can send them over one stream,
one message per flush rather than one per event::

    async with client.feed_many() as mux:
        channel = mux.open()
        mux.send_words(channel, [AddWord(word_id="w1", word=Word(text="uh", speaker="A"))])
        await mux.flush()
        async for channel, event in mux:        # Welcome, updates, Ended, or a refusal error
            ...

A :class:`Client` owns one gRPC channel; open it with ``async with`` (or :meth:`Client.connect`)
and close it with :meth:`Client.close` (idempotent). One client may serve many concurrent
conversations and calls from tasks of the same event loop; it is not thread-safe (use
:class:`midstream.client.SyncClient` from threads or scripts).

Every failed call raises a :class:`midstream.MidstreamError` mapped from its gRPC status in
:mod:`midstream.client._status` (``raise ... from`` the gRPC error); no protobuf type is returned.
"""

from __future__ import annotations

import asyncio
import json
import logging
import random
from collections.abc import AsyncGenerator, AsyncIterator, Iterable, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import Any, Self

import grpc
import grpc.aio
from midstream import (
    AddWord,
    HypothesisUpdate,
    InputError,
    InputEvent,
    MidstreamError,
    ModelInfo,
    ReplaceWord,
    SpeakerHint,
    TimeTick,
    UnavailableError,
    WithdrawWord,
    Word,
)
from midstream.client._results import (
    ConversationSummary,
    Ended,
    Gap,
    Reconnected,
    Revision,
    RevisionHistory,
    ServerEvent,
    Snapshot,
    TaggedTranscript,
    Welcome,
)
from midstream.client._status import RETRYABLE, error_from_rpc, error_from_status, tls_failure
from midstream.wire import convert as _convert
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc

_log = logging.getLogger(__name__)

#: Events one ``FeedMany`` frame may hold: the server's default ``max_events_per_frame``.
DEFAULT_FRAME_EVENTS = 1024


@dataclass(frozen=True, slots=True, kw_only=True)
class RetryPolicy:
    """How a follower reconnects after losing its stream.

    Attempt ``n`` (from 1) waits ``min(max_backoff, initial_backoff * multiplier ** (n - 1))``
    seconds, less a random share of up to ``jitter`` of it (the wait is drawn uniformly from
    ``[(1 - jitter) * w, w]``), so that followers cut off together do not all come back in the
    same instant (the "equal jitter" of exponential backoff, common practice; from memory).
    ``seed`` fixes the random draws (tests); ``None`` seeds from the system. After
    ``max_attempts`` consecutive failures the last error is raised; a message received resets
    the count. Values are common practice, no source.
    """

    max_attempts: int = 5
    initial_backoff: float = 0.2
    max_backoff: float = 5.0
    multiplier: float = 2.0
    jitter: float = 0.5
    seed: int | None = None

    def __post_init__(self) -> None:
        if self.max_attempts < 0 or self.initial_backoff < 0 or self.max_backoff < 0 \
                or self.multiplier < 1 or not 0.0 <= self.jitter <= 1.0:
            raise InputError(f"RetryPolicy: attempts and backoffs must be >= 0, multiplier "
                             f">= 1 and jitter within [0, 1]; got {self!r}")

    def delay(self, attempt: int, rng: random.Random | None = None) -> float:
        """Seconds to wait before attempt ``attempt`` (counted from 1).

        ``rng`` draws the jitter (a :class:`Client` keeps one seeded with ``seed``); without
        one the full, un-jittered wait is returned.
        """
        full = float(min(self.max_backoff, self.initial_backoff * self.multiplier ** (attempt - 1)))
        if rng is None or not self.jitter:
            return full
        return full * (1.0 - self.jitter * rng.random())

    def random_source(self) -> random.Random:
        """A random source for :meth:`delay`, seeded with ``seed``."""
        # Spreads retries in time; nothing secret depends on it.
        return random.Random(self.seed)


def _server_event(message: pb.ServerMessage) -> ServerEvent:
    """The typed form of one server message (raises ``EventError`` for an empty oneof)."""
    body = message.WhichOneof("body")
    if body == "update":
        return _convert.update_from_wire(message.update)
    if body == "welcome":
        return Welcome(conversation_id=message.welcome.conversation_id,
                       next_seq=message.welcome.next_seq, epoch=message.welcome.epoch,
                       events_logged=message.welcome.events_logged)
    if body == "snapshot":
        seq, words, utterances, final = _convert.snapshot_from_wire(message.snapshot)
        return Snapshot(seq=seq, words=words, utterances=utterances, conversation_final=final,
                        epoch=message.snapshot.epoch)
    if body == "gap":
        return Gap(first_missing=message.gap.first_missing, oldest_kept=message.gap.oldest_kept,
                   reason=_convert.gap_reason_from_wire(message.gap.reason))
    if body == "ended":
        return Ended(reason=_convert.end_reason_from_wire(message.ended.reason),
                     last_seq=message.ended.last_seq)
    raise MidstreamError("the server sent a message with no body (a newer protocol?)")


def _model_info(message: pb.ModelDescription) -> ModelInfo:
    try:
        summary = json.loads(message.training_summary_json) if message.training_summary_json else {}
    except json.JSONDecodeError:
        summary = {"unparsed": message.training_summary_json}
    return ModelInfo(kind=message.kind, name=message.name, format_version=message.format_version,
                     labels=tuple(message.labels), sha256=message.sha256,
                     training_summary=summary if isinstance(summary, dict) else {"value": summary})


def _client_event(event: InputEvent) -> pb.ClientEvent:
    if isinstance(event, AddWord):
        words = [_convert.spoken_word_to_wire(event.word_id, event.word)]
        return pb.ClientEvent(words=pb.WordBatch(words=words))
    if isinstance(event, ReplaceWord):
        spoken = _convert.spoken_word_to_wire(event.word_id, event.word)
        return pb.ClientEvent(replace=pb.ReplaceWord(word=spoken))
    if isinstance(event, WithdrawWord):
        return pb.ClientEvent(withdraw=pb.WithdrawWord(word_id=event.word_id))
    if isinstance(event, TimeTick):
        return pb.ClientEvent(tick=_convert.tick_to_wire(event.time))
    return pb.ClientEvent(hint=_convert.hint_to_wire(event.speaker, turn_end=event.turn_end))


class Client:
    """A connection to one Midstream server.

    Parameters
    ----------
    target
        ``host:port`` of the server.
    token
        Sent as ``authorization: Bearer <token>`` metadata on every call when given.
    tls
        Use TLS with the system's root certificates (or ``root_certificates``).
    root_certificates
        PEM bytes of the CA to trust instead of the system's.
    timeout
        Seconds a unary call (listing, batch tagging, revisions, models) may take.
    retry
        How :meth:`follow` reconnects after a lost stream.
    """

    def __init__(self, target: str, *, token: str | None = None, tls: bool = False,
                 root_certificates: bytes | None = None, timeout: float = 60.0,
                 retry: RetryPolicy | None = None) -> None:
        self.target = target
        self._token = token
        self._tls = tls
        self._root_certificates = root_certificates
        self._timeout = timeout
        self._retry = retry or RetryPolicy()
        self._backoff_random = self._retry.random_source()
        self._channel: grpc.aio.Channel | None = None
        self._stub: Any = None

    def __repr__(self) -> str:
        state = "open" if self._channel is not None else "closed"
        return f"Client({self.target!r}, tls={self._tls}, {state})"

    # --- lifecycle ----------------------------------------------------------------------------

    async def connect(self) -> None:
        """Open the channel (no network traffic yet: the first call connects)."""
        if self._channel is not None:
            return
        if self._tls:
            credentials = grpc.ssl_channel_credentials(root_certificates=self._root_certificates)
            self._channel = grpc.aio.secure_channel(self.target, credentials)
        else:
            self._channel = grpc.aio.insecure_channel(self.target)
        # The generated stub carries no annotations.
        self._stub = midstream_pb2_grpc.MidstreamStub(self._channel)  # type: ignore[no-untyped-call]

    async def close(self) -> None:
        """Close the channel, cancelling calls still running. Safe to call twice."""
        channel, self._channel, self._stub = self._channel, None, None
        if channel is not None:
            await channel.close()

    async def __aenter__(self) -> Self:
        await self.connect()
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None:
        await self.close()

    def _require_stub(self) -> Any:
        if self._stub is None:
            raise UnavailableError(
                f"client for {self.target} is not connected: use 'async with Client(...)' "
                "or 'await client.connect()' first")
        return self._stub

    def _metadata(self) -> tuple[tuple[str, str], ...]:
        return (("authorization", f"Bearer {self._token}"),) if self._token else ()

    def _error(self, exc: grpc.RpcError, method: str = "") -> MidstreamError:
        return error_from_rpc(exc, target=self.target, method=method)

    # --- streams ------------------------------------------------------------------------------

    def feed(self, conversation_id: str | None = None, *, resume: bool = False,
                 epoch: int = 0, server_ticks: bool = False) -> ConversationStream:
        """A stream that ingests one conversation; use it as an async context manager.

        ``conversation_id`` asks for a caller-chosen id; ``None`` lets the server assign one
        (read it from :attr:`ConversationStream.conversation_id`). ``resume=True`` continues
        conversation ``conversation_id`` whose server died, on servers sharing a Redis log
        (``docs/deploy.md``): the :class:`Welcome`'s ``events_logged`` says how many of your
        events it holds; send the rest. ``epoch`` (the first welcome's) makes sure it is the
        same conversation: when another has taken the id over since, opening raises
        :class:`~midstream.NotFoundError` instead of continuing that one.
        ``server_ticks=True`` lets the server's clock move the conversation's time on while you
        send no word, so an utterance closes after a silence and its update arrives without a
        tick from you (``docs/service.md``; refused by servers sharing a log).
        """
        if resume and not conversation_id:
            raise InputError("resume=True continues a conversation by its id: give it")
        if epoch and not resume:
            raise InputError("epoch names the conversation resume=True continues: add it")
        return ConversationStream(self, conversation_id or "", resume=resume, epoch=epoch,
                                  server_ticks=server_ticks)

    def feed_many(self, *, frame_events: int = DEFAULT_FRAME_EVENTS) -> MultiplexedStream:
        """A stream that ingests many conversations, each on a channel; use ``async with``.

        For callers carrying many conversations at once: events are queued and sent together
        by :meth:`MultiplexedStream.flush`, one message per flush (``docs/service.md``).
        ``frame_events`` caps the events queued between two flushes (the server's
        ``max_events_per_frame``, 1024 unless configured otherwise).
        """
        return MultiplexedStream(self, frame_events=frame_events)

    async def follow(self, conversation_id: str, *, from_seq: int | None = None,
                     epoch: int = 0) -> AsyncGenerator[ServerEvent, None]:
        """Yield a conversation's updates as its ingesting caller sees them, until it ends.

        Without ``from_seq`` the server starts with a :class:`Snapshot` of the current state.
        ``epoch`` is the epoch ``from_seq`` belongs to (from a :class:`Welcome`, an update or a
        snapshot); a position of another epoch (a different conversation that reuses the id,
        say after a server restart), or beyond 1 without one, gets a :class:`Gap`
        (``EPOCH_MISMATCH``) and a :class:`Snapshot` instead. Reconnects carry the epoch of
        the last update seen, so a follower is never spliced into another conversation.
        After a lost connection the follower reconnects with the next seq it has not seen,
        yields :class:`Reconnected`, and the server answers with the missed updates or, when
        they fell out of its buffer, with a :class:`Gap` and a :class:`Snapshot`: a gap is
        never silent. Gives up after the client's :class:`RetryPolicy` and raises the mapped
        error (:class:`midstream.UnavailableError` for a vanished server). A server that never
        answered (not there, wrong address) is not retried: the first error is raised as is.
        """
        stub = self._require_stub()
        next_seq = from_seq
        attempt = 0
        heard = False
        while True:
            request = pb.FollowRequest(conversation_id=conversation_id, epoch=epoch)
            if next_seq is not None:
                request.from_seq = next_seq
            call = stub.Follow(request, metadata=self._metadata())
            try:
                async for message in call:
                    attempt = 0
                    heard = True
                    event = _server_event(message)
                    if isinstance(event, HypothesisUpdate | Snapshot):
                        next_seq, epoch = event.seq + 1, event.epoch
                    yield event
                    if isinstance(event, Ended):
                        return
                # The server closed the stream cleanly without an end notice: it has nothing more.
                return
            except grpc.RpcError as exc:
                code = exc.code() if isinstance(exc, grpc.aio.AioRpcError) else None
                # Retrying is for a stream that was lost. A server never heard from is not
                # there (or refuses us): say so at once rather than "reconnecting" to it. A
                # refused TLS certificate will be refused again.
                details = exc.details() if isinstance(exc, grpc.aio.AioRpcError) else None
                if code not in RETRYABLE or not heard or tls_failure(details):
                    raise self._error(exc) from exc
                if attempt >= self._retry.max_attempts:
                    # Every retryable status maps to UnavailableError.
                    raise UnavailableError(f"{self._error(exc)} (the stream was lost; gave up "
                                           f"after {attempt} reconnect attempts)") from exc
                attempt += 1
                _log.info("follow %s: stream lost (%s); reconnect attempt %d from seq %s",
                          conversation_id, code, attempt, next_seq)
                await asyncio.sleep(self._retry.delay(attempt, self._backoff_random))
                yield Reconnected(from_seq=next_seq, attempt=attempt)
            finally:
                call.cancel()

    # --- unary calls --------------------------------------------------------------------------

    async def tag_transcript(self, events: Iterable[AddWord | SpeakerHint | TimeTick],
                             ) -> TaggedTranscript:
        """Tag a whole transcript in one call; every hypothesis returned is final.

        A :class:`TimeTick` among the events weighs the silence up to its time as on a live
        stream (an utterance it closes stays closed).
        """
        items = []
        for event in events:
            if isinstance(event, AddWord):
                items.append(pb.TranscriptItem(
                    word=_convert.spoken_word_to_wire(event.word_id, event.word)))
            elif isinstance(event, TimeTick):
                items.append(pb.TranscriptItem(tick=_convert.tick_to_wire(event.time)))
            else:
                items.append(pb.TranscriptItem(
                    hint=_convert.hint_to_wire(event.speaker, turn_end=event.turn_end)))
        reply = await self._unary("TagTranscript", pb.TagTranscriptRequest(items=items))
        diff = _convert.diff_from_wire(reply)
        return TaggedTranscript(words=diff.words, utterances=diff.utterances)

    async def revisions(self, conversation_id: str) -> RevisionHistory:
        """Every state each word and utterance of a conversation had, in seq order."""
        reply = await self._unary("GetRevisions",
                                  pb.GetRevisionsRequest(conversation_id=conversation_id))
        revisions = []
        for item in reply.revisions:
            kind = item.WhichOneof("state")
            state = (_convert.word_state_from_wire(item.word) if kind == "word"
                     else _convert.utterance_state_from_wire(item.utterance))
            revisions.append(Revision(seq=item.seq, server_time=item.server_time, state=state))
        return RevisionHistory(conversation_id=reply.conversation_id or conversation_id,
                               revisions=tuple(revisions), truncated=reply.truncated,
                               epoch=reply.epoch)

    async def list_conversations(self) -> tuple[ConversationSummary, ...]:
        """Live and recently ended conversations the server keeps."""
        reply = await self._unary("ListConversations", pb.ListConversationsRequest())
        return tuple(
            ConversationSummary(conversation_id=c.conversation_id, speakers=tuple(c.speakers),
                                words=c.words, last_seq=c.last_seq, started_at=c.started_at,
                                ended=c.ended, epoch=c.epoch)
            for c in reply.conversations)

    async def describe_models(self) -> tuple[ModelInfo, ...]:
        """The models in service."""
        reply = await self._unary("DescribeModels", pb.DescribeModelsRequest())
        return tuple(_model_info(m) for m in reply.models)

    async def reload_models(self, directory: str) -> tuple[ModelInfo, ...]:
        """Load models from ``directory`` *on the server*; live streams keep going.

        Raises :class:`midstream.ModelError` when a model fails to load (the old ones stay).
        """
        reply = await self._unary("ReloadModels", pb.ReloadModelsRequest(directory=directory))
        return tuple(_model_info(m) for m in reply.models)

    async def _unary(self, method: str, request: Any) -> Any:
        stub = self._require_stub()
        try:
            return await getattr(stub, method)(request, timeout=self._timeout,
                                               metadata=self._metadata())
        except grpc.RpcError as exc:
            raise self._error(exc, method) from exc


class ConversationStream:
    """One ingesting conversation; obtained from :meth:`Client.feed`.

    ``async with`` opens it and waits for the server's :class:`Welcome` (so
    :attr:`conversation_id` is known before the first word). Send with :meth:`send_words` and
    friends, end with :meth:`close`, and read with ``async for``: the welcome first, then one
    :class:`midstream.HypothesisUpdate` per event that changed a hypothesis, then
    :class:`Ended`. Sending and reading may run in two tasks of one event loop; two tasks must
    not send at once.

    Leaving the ``async with`` block normally closes the conversation and drains the remaining
    updates; leaving it by an exception cancels the call (the server then ends the conversation
    as abandoned by its caller).
    """

    def __init__(self, client: Client, conversation_id: str, *, resume: bool = False,
                 epoch: int = 0, server_ticks: bool = False) -> None:
        self._client = client
        self._requested_id = conversation_id
        self._resume = resume
        self._epoch = epoch
        self._server_ticks = server_ticks
        self._call: Any = None
        self._welcome: Welcome | None = None
        self._welcome_pending = True
        self._closed = False
        self._ended = False

    @property
    def conversation_id(self) -> str:
        """The conversation's id (assigned by the server unless the caller chose one)."""
        if self._welcome is None:
            raise UnavailableError("the conversation is not open yet: use 'async with'")
        return self._welcome.conversation_id

    @property
    def welcome(self) -> Welcome:
        if self._welcome is None:
            raise UnavailableError("the conversation is not open yet: use 'async with'")
        return self._welcome

    async def __aenter__(self) -> Self:
        stub = self._client._require_stub()
        self._call = stub.Feed(metadata=self._client._metadata())
        opening = pb.ClientEvent(open=pb.OpenConversation(conversation_id=self._requested_id,
                                                          resume=self._resume,
                                                          epoch=self._epoch,
                                                          server_ticks=self._server_ticks))
        await self._write(opening)
        first = await self._read()
        if not isinstance(first, Welcome):
            self._call.cancel()
            raise MidstreamError(
                f"server {self._client.target}: expected a welcome, got {type(first).__name__}")
        self._welcome = first
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None:
        if self._call is None:
            return
        if exc is not None:
            self._call.cancel()
            return
        try:
            await self.close()
            async for _ in self:
                pass
        finally:
            self._call.cancel()

    async def send(self, event: InputEvent) -> None:
        """Send one input event (a word, a replacement, a withdrawal, a hint or a tick)."""
        await self._write(_client_event(event))

    async def send_words(self, words: Sequence[AddWord]) -> None:
        """Send new words as one batch, in the order a recogniser gave them."""
        if not words:
            return
        batch = [_convert.spoken_word_to_wire(w.word_id, w.word) for w in words]
        await self._write(pb.ClientEvent(words=pb.WordBatch(words=batch)))

    async def replace_word(self, word_id: str, word: Word) -> None:
        """The recogniser revised word ``word_id``: new text and times."""
        await self.send(ReplaceWord(word_id=word_id, word=word))

    async def withdraw_word(self, word_id: str) -> None:
        """The recogniser withdrew word ``word_id``."""
        await self.send(WithdrawWord(word_id=word_id))

    async def hint(self, speaker: str, *, turn_end: bool = False) -> None:
        """The speaker's utterance (``turn_end``: turn) ended after their last word."""
        await self.send(SpeakerHint(speaker=speaker, turn_end=turn_end))

    async def tick(self, time: float) -> None:
        """The stream's time moved on to ``time`` (seconds, the words' clock) with no word."""
        await self.send(TimeTick(time=time))

    async def close(self) -> None:
        """No more words: ask the server to finalise everything. Idempotent.

        Updates keep arriving on the stream until :class:`Ended`.
        """
        if self._closed or self._call is None:
            return
        self._closed = True
        await self._write(pb.ClientEvent(close=pb.CloseConversation()))
        try:
            await self._call.done_writing()
        except grpc.RpcError as exc:
            raise self._client._error(exc) from exc

    def __aiter__(self) -> AsyncIterator[ServerEvent]:
        return self._events()

    async def _events(self) -> AsyncIterator[ServerEvent]:
        if self._welcome is not None and self._welcome_pending:
            self._welcome_pending = False
            yield self._welcome
        while not self._ended:
            event = await self._read()
            if event is None:
                return
            yield event

    async def _write(self, message: pb.ClientEvent) -> None:
        if self._call is None:
            raise UnavailableError("the conversation is not open yet: use 'async with'")
        try:
            await self._call.write(message)
        except grpc.RpcError as exc:
            raise self._client._error(exc) from exc
        except asyncio.InvalidStateError as exc:
            # grpc.aio raises this when writing to a call the server already finished.
            raise await self._failure() from exc

    async def _read(self) -> ServerEvent | None:
        try:
            message = await self._call.read()
        except grpc.RpcError as exc:
            raise self._client._error(exc) from exc
        if message is grpc.aio.EOF:
            code = await self._call.code()
            if code is not grpc.StatusCode.OK:
                raise await self._failure()
            self._ended = True
            return None
        event = _server_event(message)
        if isinstance(event, Ended):
            self._ended = True
        return event

    async def _failure(self) -> MidstreamError:
        """The mapped error of a call the server already finished with a status."""
        code = await self._call.code()
        details = await self._call.details()
        return error_from_status(code, details, target=self._client.target)


class MultiplexedStream:
    """Many ingesting conversations over one stream; obtained from :meth:`Client.feed_many`.

    ``async with`` starts the call; leaving the block normally half-closes it (the server
    finishes every open channel with ``ended`` ``CLOSED``) and drains the replies nobody read;
    leaving it by an exception cancels the call (its conversations end as abandoned). Queue
    events with the synchronous methods, send them with :meth:`flush`, and read
    ``(channel, event)`` pairs with ``async for`` (from another task if need be). Two tasks must
    not flush at once.
    """

    def __init__(self, client: Client, *, frame_events: int = DEFAULT_FRAME_EVENTS) -> None:
        if frame_events < 1:
            raise InputError(f"frame_events must be at least 1, not {frame_events}")
        self._client = client
        self._frame_events = frame_events
        self._call: Any = None
        self._queued: list[pb.ChannelEvent] = []
        self._next_channel = 1
        self._done_writing = False
        self._finished = False  # the reply stream ended (or failed): nothing left to drain

    async def __aenter__(self) -> Self:
        stub = self._client._require_stub()
        self._call = stub.FeedMany(metadata=self._client._metadata())
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None:
        if self._call is None:
            return
        if exc is not None:
            self._call.cancel()
            return
        try:
            if not self._finished:
                await self.close()
                async for _ in self:
                    pass
        finally:
            self._call.cancel()

    # --- queueing ---------------------------------------------------------------------------

    def _queue(self, channel: int, event: pb.ClientEvent) -> None:
        if self._done_writing:
            raise UnavailableError("the multiplexed stream was closed: no more events")
        if len(self._queued) >= self._frame_events:
            raise InputError(f"{self._frame_events} events are queued (frame_events): flush "
                             "before queueing more")
        self._queued.append(pb.ChannelEvent(channel=channel, event=event))

    def open(self, conversation_id: str | None = None, *, resume: bool = False,
             epoch: int = 0) -> int:
        """Queue the opening of a conversation; return its channel number.

        Its :class:`~midstream.client.Welcome` (or an error) arrives on that channel.
        ``resume`` and ``epoch`` continue a conversation whose server died, as for
        :meth:`Client.feed`; events queued after it on the channel reach the
        conversation once it is rebuilt, so queue only those after the welcome's
        ``events_logged``.
        """
        if resume and not conversation_id:
            raise InputError("resume=True continues a conversation by its id: give it")
        if epoch and not resume:
            raise InputError("epoch names the conversation resume=True continues: add it")
        channel = self._next_channel
        self._queue(channel, pb.ClientEvent(open=pb.OpenConversation(
            conversation_id=conversation_id or "", resume=resume, epoch=epoch)))
        self._next_channel += 1
        return channel

    def send(self, channel: int, event: InputEvent) -> None:
        """Queue one input event (a word, a replacement, a withdrawal, a hint or a tick)."""
        self._queue(channel, _client_event(event))

    def send_words(self, channel: int, words: Sequence[AddWord]) -> None:
        """Queue new words of one channel as one batch, in the order a recogniser gave them."""
        if words:
            batch = [_convert.spoken_word_to_wire(w.word_id, w.word) for w in words]
            self._queue(channel, pb.ClientEvent(words=pb.WordBatch(words=batch)))

    def close_channel(self, channel: int) -> None:
        """Queue the end of one conversation: its final update and ``Ended`` follow."""
        self._queue(channel, pb.ClientEvent(close=pb.CloseConversation()))

    @property
    def queued(self) -> int:
        """Events queued for the next :meth:`flush`."""
        return len(self._queued)

    # --- sending and reading ------------------------------------------------------------------

    async def flush(self) -> None:
        """Send every queued event as one frame (nothing when none is queued)."""
        if not self._queued:
            return
        if self._call is None:
            raise UnavailableError("the multiplexed stream is not open: use 'async with'")
        frame = pb.ClientFrame(events=self._queued)
        self._queued = []
        try:
            await self._call.write(frame)
        except grpc.RpcError as exc:
            raise self._client._error(exc, "FeedMany") from exc
        except asyncio.InvalidStateError as exc:
            # grpc.aio raises this when writing to a call the server already finished.
            raise await self._failure() from exc

    async def close(self) -> None:
        """Flush, then half-close: the server finishes every open channel. Idempotent."""
        if self._done_writing or self._call is None:
            return
        await self.flush()
        self._done_writing = True
        try:
            await self._call.done_writing()
        except grpc.RpcError as exc:
            raise self._client._error(exc, "FeedMany") from exc

    def __aiter__(self) -> AsyncIterator[tuple[int, ServerEvent | MidstreamError]]:
        return self._replies()

    async def _replies(self) -> AsyncIterator[tuple[int, ServerEvent | MidstreamError]]:
        if self._call is None:
            raise UnavailableError("the multiplexed stream is not open: use 'async with'")
        target = self._client.target
        while not self._finished:
            try:
                frame = await self._call.read()
            except grpc.RpcError as exc:
                self._finished = True
                raise self._client._error(exc, "FeedMany") from exc
            if frame is grpc.aio.EOF:
                self._finished = True
                if await self._call.code() is not grpc.StatusCode.OK:
                    raise await self._failure()
                return
            for reply in frame.replies:
                if reply.WhichOneof("body") == "error":
                    code = grpc.StatusCode.__members__.get(reply.error.code,
                                                           grpc.StatusCode.UNKNOWN)
                    yield reply.channel, error_from_status(
                        code, f"channel {reply.channel}: {reply.error.message}",
                        target=target, method="FeedMany")
                else:
                    yield reply.channel, _server_event(reply.message)

    async def _failure(self) -> MidstreamError:
        """The mapped error of a call the server already finished with a status."""
        code = await self._call.code()
        details = await self._call.details()
        return error_from_status(code, details, target=self._client.target,
                                 method="FeedMany")
