"""What a session sends its caller and followers: domain values, turned into wire form at the edge.

A session publishes :class:`PublishedUpdate` items and, besides them, the core's
:class:`~midstream.Snapshot`, :class:`~midstream.Gap` and :class:`~midstream.Ended`; its
followers' queues, its replay buffer and its revision history hold these (or records of them),
never protobuf messages. The edge modules (the servicer, the multiplexed stream, the shared log)
convert them when they write to a gRPC stream or to Redis.

One update reaches the caller, every follower and the shared log, so its wire form is made at
most once and shared: the first edge that needs it stores it on the item (:attr:`wire`), and
every later reader takes it from there.
"""

from __future__ import annotations

from typing import Final

from midstream import Ended, Gap, HypothesisUpdate, Snapshot

#: What a queued update costs a follower's queue on top of its record's estimate
#: (``midstream.server._kept``), for the update's objects and, once made, its wire bytes: with
#: both, a usual update (one word) holds about 1.1 KB in all, against about 4 KB estimated
#: (``tracemalloc``, 300 SwDA val words of one conversation, one-off), so the queue's byte bound
#: stays above the real size; ``tests/server/test_memory_bound.py`` checks it. The value is
#: protobuf's arena floor for one message (``mallinfo2``, protobuf 7.36), the allowance a queue
#: of wire messages would need: where a follower lags does not depend on the form queued.
QUEUED_UPDATE_BYTES: Final = 1536


class PublishedUpdate:
    """One published update, shared by its caller, its followers' queues and the shared log.

    ``wire`` is ``None`` until an edge module first needs the update on the wire; it then
    holds the serialised ``ServerMessage`` carrying it, which every other reader reuses. Only
    the edge (``midstream.server._wire``) reads or sets it. Use from the event loop thread only.
    """

    __slots__ = ("update", "wire")

    def __init__(self, update: HypothesisUpdate) -> None:
        self.update = update
        self.wire: bytes | None = None

    def __repr__(self) -> str:
        return f"PublishedUpdate(seq={self.update.seq})"


#: One message of a ``Feed`` or ``Follow`` stream as a session gives it.
Outgoing = PublishedUpdate | Snapshot | Gap | Ended
