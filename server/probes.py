"""The server's inner paths, public for the benchmarks that drive them without the network.

``midstream bench ingest`` and ``midstream bench gc`` hand request frames to one multiplexed
stream in this process (:class:`FramePath`); ``midstream bench redis`` feeds sessions through
:func:`apply_event` with and without a shared log (:func:`open_shared_log`,
:func:`stored_bytes`); ``midstream bench kept`` fills one conversation and weighs what it keeps
against its byte estimate (:func:`measure_kept`). Each drives the very code a serving loop
runs, unchanged, so a benchmark times the served path; none of this is a stable API for
anything else.

Use from one thread; the shared-log helpers from a running event loop. The shared log's
modules (and ``redis``) are imported only when :func:`open_shared_log` or :func:`stored_bytes`
runs, as a server without ``--redis`` never imports them.
"""

from __future__ import annotations

import gc
import tracemalloc
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

from midstream import EndReason, Word
from midstream.server._config import ServerLimits, SharedLogConfig
from midstream.server._ingest import apply_event
from midstream.server._many import ManyStream
from midstream.server._metrics import ServerMetrics
from midstream.server._models import Bundle
from midstream.server._registry import SessionRegistry
from midstream.server._servicer import MidstreamServicer
from midstream.server._session import _Recent
from midstream.wire import midstream_pb2 as pb

if TYPE_CHECKING:
    from midstream.server._journal import SharedLog

__all__ = [
    "FramePath",
    "KeptMemory",
    "ServerMetrics",
    "SessionRegistry",
    "SharedLog",
    "apply_event",
    "measure_kept",
    "open_shared_log",
    "stored_bytes",
]


class FramePath:
    """A servicer in this process and one ``FeedMany`` stream on it, driven frame by frame.

    Frames go through the stream's own frame handler and replies come from its own reply
    queue, exactly as a serving loop runs them, but with no network and no event loop: without
    a shared log the handler never awaits, so one step runs a frame whole. Build one with
    :meth:`open`.
    """

    __slots__ = ("servicer", "stream")

    def __init__(self, servicer: MidstreamServicer, stream: ManyStream) -> None:
        self.servicer = servicer
        self.stream = stream

    @classmethod
    def open(cls, bundle: Bundle, conversations: int) -> FramePath:
        """A servicer for ``bundle`` and one stream with channels 1..``conversations`` open.

        Parameters
        ----------
        bundle : Bundle
            The models (a loaded ``ModelBundle``).
        conversations : int
            Channels to open; the limits allow exactly that many live conversations.
        """
        limits = ServerLimits(max_live_conversations=conversations,
                              max_channels_per_stream=conversations)
        servicer = MidstreamServicer(bundle, limits, ServerMetrics())
        # The frame handler and the reply queue never use the call's context.
        stream = ManyStream(servicer, cast(Any, None))
        path = cls(servicer, stream)
        path.apply(pb.ClientFrame(events=[
            pb.ChannelEvent(channel=c, event=pb.ClientEvent(open=pb.OpenConversation()))
            for c in range(1, conversations + 1)]))
        path.replies()
        return path

    def apply(self, frame: pb.ClientFrame) -> None:
        """Apply one request frame, as one turn of the server's loop does.

        Raises
        ------
        RuntimeError
            The handler awaited (it does only with a shared log, which this path never has).
        """
        step = self.stream._frame(frame)
        try:
            step.send(None)
        except StopIteration:
            return
        step.close()
        raise RuntimeError("the frame handler awaited: this path runs without a shared log")

    @property
    def replies(self) -> Callable[[], list[pb.ServerFrame]]:
        """The stream's reply queue: call it to take the reply frames made so far."""
        return self.stream._frames

    def end_all(self) -> None:
        """End every open conversation (as a closed stream does) and drop the replies."""
        self.stream._end_all(EndReason.CLOSED)
        self.stream._frames()

    def words_counted(self) -> float:
        """The words the server's own counter took in (``midstream_words_total``)."""
        value = self.servicer.metrics.registry.get_sample_value("midstream_words_total")
        return value or 0.0


def __getattr__(name: str) -> object:
    # The shared log's class on first use only: importing it imports redis.
    if name == "SharedLog":
        from midstream.server._journal import SharedLog  # noqa: PLC0415

        return SharedLog
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def open_shared_log(config: SharedLogConfig, *, models: Callable[[], str]) -> SharedLog:
    """A shared log writer as ``serve --redis`` makes one (not started: ``await log.start()``).

    Parameters
    ----------
    config : SharedLogConfig
        Where the log lives.
    models : Callable[[], str]
        What the log records as the models that wrote it.
    """
    from midstream.server._journal import SharedLog  # noqa: PLC0415

    return SharedLog(config, ServerMetrics().registry, models=models)


async def stored_bytes(url: str, prefix: str, ids: Sequence[str]) -> dict[str, int]:
    """Bytes Redis holds for the conversations ``ids`` (its ``MEMORY USAGE``), by key kind.

    Returns
    -------
    dict[str, int]
        ``updates`` (the update streams), ``events`` (the input event streams) and ``other``
        (the description hashes and snapshots).
    """
    import redis.asyncio as aioredis  # noqa: PLC0415 (a server without --redis never loads it)
    from midstream.server._journal import ConversationKeys  # noqa: PLC0415

    client = aioredis.Redis.from_url(url)
    try:
        updates = events = other = 0
        for conversation_id in ids:
            keys = ConversationKeys.of(prefix, conversation_id)
            updates += await client.memory_usage(keys.updates) or 0
            events += await client.memory_usage(keys.events) or 0
            other += (await client.memory_usage(keys.meta) or 0) + (
                await client.memory_usage(keys.snapshot) or 0)
    finally:
        await client.aclose()
    return {"updates": updates, "events": events, "other": other}


@dataclass(frozen=True, slots=True, kw_only=True)
class KeptMemory:
    """What one conversation filled to its byte limits holds, in bytes (``tracemalloc``).

    Attributes
    ----------
    estimate : int
        What the server counts its kept records as (``kept_bytes``), which the limits bound.
    kept : int
        What those records really take (the memory freed by emptying them).
    rest : int
        The rest of the conversation (its engine and the session).
    largest_update : int
        The largest growth of the estimate by one batch.
    revisions_truncated : bool
        Whether the revision history dropped its oldest entries.
    """

    estimate: int
    kept: int
    rest: int
    largest_update: int
    revisions_truncated: bool


def measure_kept(bundle: Bundle, limits: ServerLimits, batches: int,
                 batch: Callable[[int], list[tuple[str, Word]]], *,
                 warm_up: list[tuple[str, Word]]) -> KeptMemory:
    """Feed one conversation ``batches`` batches and weigh what it keeps against its estimate.

    A warm-up conversation takes ``warm_up`` first, so first-use allocations are not counted.
    Each batch is made while memory is traced, so the words the conversation keeps count in.

    Parameters
    ----------
    bundle : Bundle
        The models.
    limits : ServerLimits
        The byte limits the conversation keeps to.
    batches : int
        How many batches to feed.
    batch : Callable[[int], list[tuple[str, Word]]]
        The n-th batch of ``(word id, word)``, no larger than ``limits.max_words_per_message``.
    warm_up : list[tuple[str, Word]]
        The warm-up conversation's words.
    """
    registry = SessionRegistry(limits, ServerMetrics())
    registry.open("warm-up", bundle).add_words(warm_up, received=0.0)
    gc.collect()
    tracemalloc.start()
    try:
        before, _ = tracemalloc.get_traced_memory()
        session = registry.open("filled", bundle)
        largest_update = 0
        for number in range(batches):
            was = session.kept_bytes
            session.add_words(batch(number), received=0.0)
            largest_update = max(largest_update, session.kept_bytes - was)
        gc.collect()
        filled, _ = tracemalloc.get_traced_memory()
        estimate = session.kept_bytes
        session._replay = _Recent(1)  # emptied in place: what they held
        session._revisions = _Recent(1)
        session._words = OrderedDict()
        session._utterances = OrderedDict()
        gc.collect()
        emptied, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return KeptMemory(estimate=estimate, kept=filled - emptied, rest=emptied - before,
                      largest_update=largest_update,
                      revisions_truncated=session.revisions_truncated)
