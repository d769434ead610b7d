"""A thin synchronous wrapper over :class:`~midstream.client.Client` for scripts.

Each method runs the asynchronous one to completion on a private event loop in a daemon thread
that lives as long as the wrapper (a gRPC asyncio channel belongs to the loop that made it), so
the caller's own event loop, if any, is never touched. Use one wrapper from one thread at a
time; inside ``async`` code use :class:`~midstream.client.Client` itself.

Examples
--------
::

    with SyncClient("127.0.0.1:50051") as client:
        tagged = client.tag_transcript(events)
        for event in client.follow("call-7"):
            print(event)
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
from collections.abc import AsyncIterator, Coroutine, Iterable, Iterator, Sequence
from types import TracebackType
from typing import Any, Generic, Protocol, Self, TypeVar, cast

from midstream import (
    AddWord,
    InputError,
    InputEvent,
    MidstreamError,
    ModelInfo,
    SpeakerHint,
    TimeTick,
    UnavailableError,
)
from midstream.client._client import (
    DEFAULT_FRAME_EVENTS,
    Client,
    ConversationStream,
    MultiplexedStream,
    RetryPolicy,
)
from midstream.client._results import (
    ConversationSummary,
    RevisionHistory,
    ServerEvent,
    TaggedTranscript,
)

_T = TypeVar("_T")
_Item = TypeVar("_Item")
_Yielded_co = TypeVar("_Yielded_co", covariant=True)
Reply = tuple[int, ServerEvent | MidstreamError]


class _Stream(Protocol[_Yielded_co]):
    """What :class:`_ReadAhead` needs of an async stream of the client."""

    async def __aenter__(self) -> Any: ...
    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None: ...
    def __aiter__(self) -> AsyncIterator[_Yielded_co]: ...
    async def close(self) -> None: ...


#: Replies read ahead of the caller by default (see :meth:`SyncClient.feed_many`).
DEFAULT_BUFFER = 1024
_END = object()  # the reply stream ended normally
_NOTHING = object()  # no reply within the timeout


class SyncClient:
    """Blocking calls to one Midstream server; same parameters as :class:`Client`."""

    def __init__(self, target: str, *, token: str | None = None, tls: bool = False,
                 root_certificates: bytes | None = None, timeout: float = 60.0,
                 retry: RetryPolicy | None = None) -> None:
        self._client = Client(target, token=token, tls=tls, root_certificates=root_certificates,
                              timeout=timeout, retry=retry)
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: threading.Thread | None = None

    def __repr__(self) -> str:
        return f"Sync{self._client!r}"

    def connect(self) -> None:
        """Start the private loop and open the channel."""
        if self._loop is None:
            self._loop = asyncio.new_event_loop()
            self._thread = threading.Thread(target=self._loop.run_forever,
                                            name="midstream-sync-client", daemon=True)
            self._thread.start()
        try:
            self._run(self._client.connect())
        except BaseException:
            # ``with`` never calls __exit__ when __enter__ raises: without this, every failed
            # connect would leave a thread spinning an unclosed loop for the process's life.
            self._stop_loop()
            raise

    def close(self) -> None:
        """Close the channel and the loop. Safe to call twice."""
        if self._loop is None:
            return
        try:
            self._run(self._client.close())
        finally:
            self._stop_loop()

    def _stop_loop(self) -> None:
        loop, thread = self._loop, self._thread
        self._loop = self._thread = None
        if loop is None or thread is None:
            return
        loop.call_soon_threadsafe(loop.stop)
        thread.join()
        loop.close()

    def __enter__(self) -> Self:
        self.connect()
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()

    def _run(self, coroutine: Coroutine[Any, Any, _T]) -> _T:
        if self._loop is None:
            coroutine.close()
            raise UnavailableError(f"{self!r} is not connected: use 'with SyncClient(...)' or "
                                   "call connect() first")
        return asyncio.run_coroutine_threadsafe(coroutine, self._loop).result()

    def tag_transcript(self, events: Iterable[AddWord | SpeakerHint | TimeTick],
                       ) -> TaggedTranscript:
        """See :meth:`Client.tag_transcript`."""
        return self._run(self._client.tag_transcript(list(events)))

    def revisions(self, conversation_id: str) -> RevisionHistory:
        """See :meth:`Client.revisions`."""
        return self._run(self._client.revisions(conversation_id))

    def list_conversations(self) -> tuple[ConversationSummary, ...]:
        """See :meth:`Client.list_conversations`."""
        return self._run(self._client.list_conversations())

    def describe_models(self) -> tuple[ModelInfo, ...]:
        """See :meth:`Client.describe_models`."""
        return self._run(self._client.describe_models())

    def reload_models(self, directory: str) -> tuple[ModelInfo, ...]:
        """See :meth:`Client.reload_models`."""
        return self._run(self._client.reload_models(directory))

    def feed(self, conversation_id: str | None = None, *, resume: bool = False,
                 epoch: int = 0, server_ticks: bool = False,
                 buffer: int = DEFAULT_BUFFER) -> SyncConversation:
        """See :meth:`Client.feed`; use the result with ``with``. ``buffer`` as for
        :meth:`feed_many`."""
        return SyncConversation(self, self._client.feed(
            conversation_id, resume=resume, epoch=epoch, server_ticks=server_ticks), buffer)

    def feed_many(self, *, frame_events: int = DEFAULT_FRAME_EVENTS,
                      buffer: int = DEFAULT_BUFFER) -> SyncMultiplexedStream:
        """See :meth:`Client.feed_many`; use the result with ``with``.

        ``buffer``: replies read ahead of the caller at most; when that many wait unread, the
        stream stops reading and gRPC's flow control holds the server back.
        """
        return SyncMultiplexedStream(self, self._client.feed_many(frame_events=frame_events),
                                     buffer)

    def follow(self, conversation_id: str, *, from_seq: int | None = None, epoch: int = 0,
               ) -> Iterator[ServerEvent]:
        """See :meth:`Client.follow`; blocks between events."""
        events = self._client.follow(conversation_id, from_seq=from_seq, epoch=epoch)

        async def step() -> ServerEvent:
            return await anext(events)

        try:
            while True:
                try:
                    yield self._run(step())
                except StopAsyncIteration:
                    return
        finally:
            if self._loop is not None:
                self._run(events.aclose())


class _ReadAhead(Generic[_Item]):
    """A stream whose replies a task on the wrapper's loop reads ahead into a bounded buffer.

    The subclasses give the blocking methods; this holds the reading: the task puts each reply
    in an ``asyncio.Queue`` of ``buffer`` items and waits when it is full (so gRPC's flow
    control holds the server back), and :meth:`_items` takes them from the caller's thread.
    """

    def __init__(self, owner: SyncClient, stream: _Stream[_Item], buffer: int) -> None:
        if buffer < 1:
            raise InputError(f"buffer must be at least 1, not {buffer}")
        self._owner = owner
        self._stream = stream
        self._buffer = buffer
        self._queue: asyncio.Queue[object] | None = None
        self._reader: asyncio.Task[None] | None = None
        self._getter: asyncio.Future[object] | None = None
        self._ended = False

    def __enter__(self) -> Self:
        self._owner._run(self._start())
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        try:
            if exc is None and not self._ended:
                self._owner._run(self._stream.close())
                for _ in self._items(None):  # until the server ends the stream
                    pass
        finally:
            self._owner._run(self._stop(exc_type, exc, tb))

    async def _start(self) -> None:
        await self._stream.__aenter__()
        self._queue = asyncio.Queue(self._buffer)
        self._reader = asyncio.create_task(self._pump())

    async def _pump(self) -> None:
        assert self._queue is not None
        end: object = _END
        try:
            async for item in self._stream:
                await self._queue.put(item)
        except MidstreamError as exc:
            end = exc
        await self._queue.put(end)

    async def _stop(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                    tb: TracebackType | None) -> None:
        for task in (self._getter, self._reader):
            if task is not None and not task.done():
                task.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await task
        await self._stream.__aexit__(exc_type, exc, tb)

    def _items(self, timeout: float | None) -> Iterator[_Item]:
        while not self._ended:
            item = self._owner._run(self._next(timeout))
            if item is _NOTHING:
                return
            if item is _END:
                self._ended = True
                return
            if isinstance(item, MidstreamError):
                self._ended = True
                raise item
            yield cast(_Item, item)

    async def _next(self, timeout: float | None) -> object:
        # The pending get survives a timeout (it is not cancelled, so no reply is lost in the
        # race between a timeout and an arriving reply); the next call waits on it again.
        if self._queue is None:
            raise UnavailableError("the stream is not open: use 'with'")
        if self._getter is None:
            self._getter = asyncio.ensure_future(self._queue.get())
        done, _ = await asyncio.wait((self._getter,), timeout=timeout)
        if not done:
            return _NOTHING
        item = self._getter.result()
        self._getter = None
        return item


class SyncConversation(_ReadAhead[ServerEvent]):
    """The blocking form of :class:`~midstream.client.ConversationStream`.

    ``with`` opens the conversation and waits for its welcome. Send with :meth:`send_words` and
    friends; read with :meth:`events` (the welcome first, then one update per event that
    changed a hypothesis, then :class:`~midstream.client.Ended`). Events are read ahead into a
    bounded buffer as for :class:`SyncMultiplexedStream`. Leaving the block normally closes the
    conversation and discards events not read; leaving it by an exception cancels the call.
    """

    def __init__(self, owner: SyncClient, stream: ConversationStream, buffer: int) -> None:
        super().__init__(owner, stream, buffer)
        self._conversation = stream

    @property
    def conversation_id(self) -> str:
        """See :attr:`ConversationStream.conversation_id`."""
        return self._conversation.conversation_id

    def send(self, event: InputEvent) -> None:
        """See :meth:`ConversationStream.send`."""
        self._owner._run(self._conversation.send(event))

    def send_words(self, words: Sequence[AddWord]) -> None:
        """See :meth:`ConversationStream.send_words`."""
        self._owner._run(self._conversation.send_words(words))

    def hint(self, speaker: str, *, turn_end: bool = False) -> None:
        """See :meth:`ConversationStream.hint`."""
        self._owner._run(self._conversation.hint(speaker, turn_end=turn_end))

    def tick(self, time: float) -> None:
        """See :meth:`ConversationStream.tick`."""
        self._owner._run(self._conversation.tick(time))

    def close(self) -> None:
        """See :meth:`ConversationStream.close`."""
        self._owner._run(self._conversation.close())

    def events(self, timeout: float | None = None) -> Iterator[ServerEvent]:
        """Events in arrival order, blocking between them.

        Ends when the server ends the stream, or, with ``timeout``, when no event came within
        ``timeout`` seconds (the stream stays open: call again later).
        """
        return self._items(timeout)


class SyncMultiplexedStream(_ReadAhead[Reply]):
    """The blocking form of :class:`~midstream.client.MultiplexedStream`.

    ``with`` opens the call. Queue events with :meth:`open`, :meth:`send`, :meth:`send_words`
    and :meth:`close_channel`, send them with :meth:`flush`, read ``(channel, event)`` pairs
    with :meth:`replies`. A background task on the wrapper's loop reads replies as they come
    into a bounded buffer, so the caller may send for a while before reading; read between
    flushes all the same: once the buffer and the transport's windows are full the server stops
    taking frames and :meth:`flush` blocks until replies are read. Leaving the block normally
    half-closes the call (the server finishes every open channel) and discards the replies not
    read; leaving it by an exception cancels the call.
    """

    def __init__(self, owner: SyncClient, stream: MultiplexedStream, buffer: int) -> None:
        super().__init__(owner, stream, buffer)
        self._many = stream

    # --- queueing (the caller's thread; nothing else touches the queue between flushes) ------

    def open(self, conversation_id: str | None = None, *, resume: bool = False,
             epoch: int = 0) -> int:
        """See :meth:`MultiplexedStream.open`."""
        return self._many.open(conversation_id, resume=resume, epoch=epoch)

    def send(self, channel: int, event: InputEvent) -> None:
        """See :meth:`MultiplexedStream.send`."""
        self._many.send(channel, event)

    def send_words(self, channel: int, words: Sequence[AddWord]) -> None:
        """See :meth:`MultiplexedStream.send_words`."""
        self._many.send_words(channel, words)

    def close_channel(self, channel: int) -> None:
        """See :meth:`MultiplexedStream.close_channel`."""
        self._many.close_channel(channel)

    @property
    def queued(self) -> int:
        """Events queued for the next :meth:`flush`."""
        return self._many.queued

    # --- sending and reading ------------------------------------------------------------------

    def flush(self) -> None:
        """See :meth:`MultiplexedStream.flush`; blocks until the frame is handed to gRPC."""
        self._owner._run(self._many.flush())

    def close(self) -> None:
        """See :meth:`MultiplexedStream.close`."""
        self._owner._run(self._many.close())

    def replies(self, timeout: float | None = None) -> Iterator[Reply]:
        """``(channel, event)`` pairs in arrival order, blocking between them.

        Ends when the server ends the stream, or, with ``timeout``, when no reply came within
        ``timeout`` seconds (the stream stays open: call again later). A failure of the whole
        stream is raised once the replies before it were taken.
        """
        return self._items(timeout)
