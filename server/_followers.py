"""A ``Follow`` stream's bounded queue, filled by its session and drained by the stream.

The queue holds domain values (:mod:`midstream.server._published`); the stream converts them
to wire form as it writes them, sharing each update's wire bytes with every other reader.

A follower whose queue fills is never waited for: its queue is dropped and, when it reads
again, it gets a ``gap`` (``LAGGED``) and a snapshot of the state at that moment, then live
updates. The ingesting caller is therefore never slowed by a follower.

With a shared log, a replica that learns another replica continues the conversation (it was
fenced off as its writer) moves its followers off its now stale copy (:meth:`Follower.move`):
their queue is dropped and :meth:`Follower.messages` stops, and the ``Follow`` handler carries
them on from the shared log.
"""

from __future__ import annotations

import asyncio
import logging
from collections import deque
from collections.abc import AsyncIterator
from typing import TYPE_CHECKING

from midstream import Ended, Gap, GapReason
from midstream.server._published import Outgoing, PublishedUpdate

if TYPE_CHECKING:
    from midstream.server._session import Session

_log = logging.getLogger(__name__)


class Follower:
    """One ``Follow`` stream's bounded queue; filled by the session, drained by the stream."""

    __slots__ = ("_byte_capacity", "_bytes", "_capacity", "_costs", "_lagged_from", "_moved",
                 "_queue", "_session", "_wake")

    def __init__(self, session: Session, capacity: int, byte_capacity: int) -> None:
        self._session = session
        self._capacity = capacity
        self._byte_capacity = byte_capacity
        self._queue: deque[PublishedUpdate | Ended] = deque()
        self._costs: deque[int] = deque()  # parallel to _queue
        self._bytes = 0
        self._wake = asyncio.Event()
        self._lagged_from: int | None = None
        self._moved: int | None = None

    @property
    def moved(self) -> int | None:
        """``None``, or the newest sequence number the shared log got from this replica once
        the conversation moved to another (:meth:`move`)."""
        return self._moved

    def move(self, logged: int) -> None:
        """The conversation is written by another replica now: drop what is queued (stale, or
        in the log) and end :meth:`messages`. ``logged`` is the newest sequence number this
        replica wrote to the log."""
        self._moved = logged
        self._queue.clear()
        self._costs.clear()
        self._bytes = 0
        self._lagged_from = None
        self._wake.set()

    def offer(self, update: PublishedUpdate, seq: int, cost: int) -> None:
        """Queue an update (of ``cost`` estimated bytes), or mark the follower lagged when its
        queue is full (``follower_queue`` messages or ``follower_queue_bytes``)."""
        if self._lagged_from is not None:
            return
        if (len(self._queue) >= self._capacity
                or self._bytes + cost > self._byte_capacity):
            # Drop what is queued: the snapshot sent on catching up replaces all of it.
            head = self._queue[0] if self._queue else None
            first = head.update.seq if isinstance(head, PublishedUpdate) else seq
            self._queue.clear()
            self._costs.clear()
            self._bytes = 0
            self._lagged_from = first
            _log.info("follower of conversation %s lagged at seq %d", self._session.id, first)
        else:
            self._queue.append(update)
            self._costs.append(cost)
            self._bytes += cost
        self._wake.set()

    def push_end(self, ended: Ended) -> None:
        """Queue the conversation's end; never dropped (it is the last message)."""
        self._queue.append(ended)
        self._wake.set()

    async def messages(self, backlog: list[Outgoing]) -> AsyncIterator[Outgoing]:
        """The messages for this follower: ``backlog`` first, then live ones until the end."""
        for message in backlog:
            yield message
            if isinstance(message, Ended):
                return
        while True:
            if self._moved is not None:
                return
            if self._lagged_from is not None:
                # Build both before yielding so that nothing published in between is lost.
                gap = Gap(first_missing=self._lagged_from,
                          oldest_kept=self._session.oldest_kept, reason=GapReason.LAGGED)
                snapshot = self._session.snapshot()
                self._lagged_from = None
                yield gap
                yield snapshot
                continue
            if self._queue:
                message = self._queue.popleft()
                self._bytes -= self._costs.popleft() if self._costs else 0
                yield message
                if isinstance(message, Ended):
                    return
                continue
            self._wake.clear()
            await self._wake.wait()
