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
import threading
from collections.abc import Coroutine, Iterable, Iterator
from types import TracebackType
from typing import Any, Self, TypeVar

from midstream._errors import UnavailableError
from midstream.client._client import Client, RetryPolicy
from midstream.client._results import (
    AddWord,
    ConversationSummary,
    ModelInfo,
    RevisionHistory,
    ServerEvent,
    SpeakerHint,
    TaggedTranscript,
)

_T = TypeVar("_T")


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

    def tag_transcript(self, events: Iterable[AddWord | SpeakerHint]) -> TaggedTranscript:
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

    def follow(self, conversation_id: str, *, from_seq: int | None = None
               ) -> Iterator[ServerEvent]:
        """See :meth:`Client.follow`; blocks between events."""
        events = self._client.follow(conversation_id, from_seq=from_seq)

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
