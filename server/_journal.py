"""The shared update log's writing side: every conversation's updates and input events in Redis.

With ``midstream serve --redis URL`` each conversation gets four keys sharing one hash tag (so
Redis Cluster keeps them on one shard; ``ConversationKeys``):

``<prefix>:{<id>}:u``
    A stream of the conversation's updates, entry id ``<seq>-0`` (so a resume point is a
    stream position), fields ``i`` (the conversation's epoch, which tells it apart from another
    conversation using the same id) and ``u`` (a serialised ``Update``); the
    end is entry ``<last seq>-1`` with ``end`` (a serialised ``ServerMessage`` holding
    ``ended``). Trimmed to about ``max_entries`` entries and ``max_age_s`` seconds.
``<prefix>:{<id>}:e``
    A stream of the accepted input events after ``open``, entry id ``<n>-0`` for the n-th, field
    ``e`` (a serialised ``ClientEvent``): what another replica replays to continue the
    conversation. Never trimmed; at most ``max_events`` entries.
``<prefix>:{<id>}:s``
    A serialised ``Snapshot``, written whenever the update stream is trimmed, at a sequence
    number no older than the oldest update left: what a follower whose position was trimmed
    gets after the gap notice.
``<prefix>:{<id>}:m``
    A hash describing the conversation: ``inc`` (its epoch), ``owner`` (the process that
    writes it), counts, speakers, whether it ended and can be continued.

plus one sorted set ``<prefix>:index`` of conversation ids by last write, for the listing, and
each replica's liveness lease and set of owned conversation ids (:mod:`midstream.server._lease`,
which ends the conversations of a lost replica).

Writing never blocks a session: :class:`ConversationJournal` (one per session, called
synchronously from the session's step) only queues, and one writer task sends what is queued
in one pipelined round trip, one script call per conversation (each atomic in Redis, so an
update and the events that made it arrive together or not at all). While Redis is unreachable,
slow or not taking writes for now (``TRANSIENT_REPLIES``: a read-only replica behind the
address, a full Redis, ...) the queue grows up to ``buffer_entries`` and is sent when Redis
takes writes again; past that
bound the buffered entries are dropped, and each affected conversation's next write trims its
stream to after the hole and writes a fresh snapshot, so followers see a gap notice and a
snapshot rather than a silent gap. Such a conversation can no longer be continued elsewhere
(its logged input has a hole). The degraded state is logged once when it begins and once when
it ends, counted in metrics and reported by the health service (``SHARED_LOG_HEALTH``).

Use from the server's event loop only.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import secrets
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Final

import redis.asyncio as aioredis
from midstream import Ended
from midstream.server._config import SharedLogConfig
from midstream.server._published import PublishedUpdate
from midstream.server._session import Session, message_budget
from midstream.server._wire import ended_message, snapshot_message, update_bytes
from midstream.wire import convert as cv
from prometheus_client import CollectorRegistry, Counter, Gauge
from redis.asyncio.cluster import RedisCluster
from redis.exceptions import (
    BusyLoadingError,
    ClusterDownError,
    MasterDownError,
    NoScriptError,
    OutOfMemoryError,
    ReadOnlyError,
    RedisClusterException,
    RedisError,
    ResponseError,
    TryAgainError,
)

if TYPE_CHECKING:
    from midstream.server._lease import Keeper

_log = logging.getLogger(__name__)

#: What an unreachable or failing Redis raises. Besides redis-py's own errors, its cluster
#: client raises ``RedisClusterException``, which is no ``RedisError``: when no node of the
#: cluster answers (``RedisClusterUnreachableError`` in redis-py 8, the base class itself in
#: earlier releases) and when its slot map lacks the slot of a key (``SlotNotCoveredError``,
#: while slots move). The socket's own errors and asyncio's timeout complete it.
OUTAGES: Final = (RedisError, RedisClusterException, OSError, TimeoutError)

#: Error replies that say Redis cannot take writes for now, not that it refuses what was sent:
#: outages, though redis-py raises most of them as ``ResponseError``s (it maps each reply's
#: first word to a class in ``redis/_parsers/base.py``). Writes stay buffered (up to
#: ``buffer_entries``), the log is reported down, and they are retried until Redis takes them.
#:
#: ``READONLY`` (``ReadOnlyError``)
#:     The address now reaches a replica: a Sentinel failover demoted the primary before the
#:     proxy or DNS name moved on.
#: ``MASTERDOWN`` (``MasterDownError``, a ``ClusterDownError``)
#:     A replica whose link to its primary is down with ``replica-serve-stale-data no``: it
#:     answers reads so too.
#: ``LOADING`` (``BusyLoadingError``, a ``ConnectionError``, no ``ResponseError``)
#:     A Redis loading its dataset (after a restart, or as a replica after a full sync).
#: ``OOM`` (``OutOfMemoryError``)
#:     ``maxmemory`` reached under ``noeviction`` (or a ``volatile-*`` policy with nothing to
#:     evict). It need not pass by itself, but the log's keys all expire ``max_age_s`` after
#:     their last write and an operator can raise the limit: as an outage the writes wait in
#:     the bounded buffer and the log is reported down, where as a refusal the conversation's
#:     log would stop for good with health still reporting it up.
#: ``CLUSTERDOWN`` (``ClusterDownError``), ``TRYAGAIN`` (``TryAgainError``)
#:     A Redis Cluster node while it cannot serve a slot: once the cluster has marked a node
#:     failed (every node answers it, for every key, until the slot is served again), and
#:     while a slot moves.
#:
#: The append script's own refusals (``MIDSTREAM_SUPERSEDED`` and the like) arrive as plain
#: ``ResponseError``s (``ERR MIDSTREAM_...``), never as one of these.
TRANSIENT_REPLIES: Final = (ReadOnlyError, MasterDownError, BusyLoadingError, OutOfMemoryError,
                            ClusterDownError, TryAgainError)


def refused(error: BaseException) -> bool:
    """Whether ``error`` is Redis refusing a command (an error reply such as a script's own),
    not Redis being unreachable or unable to take it for now (``TRANSIENT_REPLIES``)."""
    return isinstance(error, ResponseError) and not isinstance(error, TRANSIENT_REPLIES)


#: The health-service name that reports the shared log: SERVING while writes reach Redis,
#: NOT_SERVING while they are buffered (the service itself keeps serving its callers).
SHARED_LOG_HEALTH: Final = "midstream.v1.Midstream/shared-log"

# What one script call carries at most, so one busy conversation cannot make a call that holds
# Redis (single-threaded) for long (common practice, no source).
_UPDATES_PER_CALL = 256
_EVENTS_PER_CALL = 512
# Conversations, and entries in all, written per round trip: a round trip stays well within
# timeout_s even on a busy Redis (common practice, no source).
_CONVERSATIONS_PER_ROUND = 512
_ENTRIES_PER_ROUND = 4096
# Retry delays while Redis is unreachable, seconds.
_RETRY_FIRST_S = 0.05
_RETRY_MAX_S = 1.0
# Updates between two publication times a journal keeps for trimming by age: a sample (seq,
# time) older than max_age_s says every update up to seq is, so trimming at sample granularity
# keeps at most this many updates too many (common practice, no source).
_TIME_EVERY = 16
# Seconds between two updates of a conversation's place in the listing's index (which drops
# conversations not written for max_age_s, so an hour's precision would do; common practice,
# no source).
_INDEX_EVERY_S = 60.0
# Seconds the writer waits after being woken before it writes, so one round trip carries
# what several conversations published meanwhile; what followers on other replicas wait more
# (common practice, no source).
_GATHER_S = 0.005
# Seconds a stop gives the writer even with no grace: ends of conversations finished by the
# stop are worth one round trip.
_STOP_FLUSH_MIN_S = 0.5
# The stream is trimmed once it holds this fraction of max_entries too many, so a snapshot is
# written about every max_entries/4 updates rather than on every write.
_TRIM_SLACK = 4

# Refusals the append script answers with (Redis error replies).
_SUPERSEDED: Final = "MIDSTREAM_SUPERSEDED"
_CONFLICT: Final = "MIDSTREAM_CONFLICT"
_LOST: Final = "MIDSTREAM_LOST"

# KEYS: updates, events, meta, snapshot.
# ARGV: owner, incarnation, ttl_ms, must_exist, n_events, first_event, n_updates, end_id,
# end, snapshot, minid, n_meta, then n_meta field/value pairs, the events, the update pairs
# (seq, bytes). Entries already written (a retry after a timeout whose first try did land) are
# skipped, so sending a batch twice writes it once.
_APPEND: Final = """
local inc = redis.call('HGET', KEYS[3], 'inc')
if inc and inc ~= ARGV[2] then
  if redis.call('HGET', KEYS[3], 'ended') ~= '1' then
    return redis.error_reply('MIDSTREAM_CONFLICT')
  end
  redis.call('DEL', KEYS[1], KEYS[2], KEYS[3], KEYS[4])
  inc = false
end
if not inc and ARGV[4] == '1' then
  return redis.error_reply('MIDSTREAM_LOST')
end
local owner = redis.call('HGET', KEYS[3], 'owner')
if owner and owner ~= ARGV[1] then
  return redis.error_reply('MIDSTREAM_SUPERSEDED')
end
local events_done = tonumber(redis.call('HGET', KEYS[3], 'events') or '0')
local useq = tonumber(redis.call('HGET', KEYS[3], 'useq') or '0')
local n_meta = tonumber(ARGV[12])
local pos = 13 + 2 * n_meta
local first = tonumber(ARGV[6])
local status = 'OK'
local n_events = tonumber(ARGV[5])
if n_events > 0 and first > events_done + 1 then
  -- Redis lost logged events (a failover to a replica that had not received them): the log
  -- can no longer rebuild the conversation, so it stops taking its events.
  status = 'EVENTS_LOST'
  n_events = 0
  pos = pos + tonumber(ARGV[5])
end
for k = 1, n_events do
  local index = first + k - 1
  if index > events_done then
    redis.call('XADD', KEYS[2], index .. '-0', 'e', ARGV[pos])
    events_done = index
  end
  pos = pos + 1
end
for k = 1, tonumber(ARGV[7]) do
  local seq = tonumber(ARGV[pos])
  if seq > useq then
    redis.call('XADD', KEYS[1], ARGV[pos] .. '-0', 'i', ARGV[2], 'u', ARGV[pos + 1])
    useq = seq
  end
  pos = pos + 2
end
if ARGV[10] ~= '' then
  redis.call('SET', KEYS[4], ARGV[10])
end
if ARGV[11] ~= '0' then
  redis.call('XTRIM', KEYS[1], 'MINID', ARGV[11] .. '-0')
end
if ARGV[8] ~= '' and redis.call('HGET', KEYS[3], 'ended') ~= '1' then
  redis.call('XADD', KEYS[1], ARGV[8], 'i', ARGV[2], 'end', ARGV[9])
  redis.call('HSET', KEYS[3], 'ended', '1')
end
local fields = {'inc', ARGV[2], 'owner', ARGV[1], 'events', events_done, 'useq', useq}
for k = 13, 12 + 2 * n_meta do
  fields[#fields + 1] = ARGV[k]
end
redis.call('HSET', KEYS[3], unpack(fields))
if status ~= 'OK' then
  redis.call('HSET', KEYS[3], 'resumable', '0')
end
for k = 1, 4 do
  redis.call('PEXPIRE', KEYS[k], ARGV[3])
end
return status
"""


@dataclass(frozen=True, slots=True)
class ConversationKeys:
    """The Redis keys of one conversation (one hash tag, so one Redis Cluster slot)."""

    updates: str
    events: str
    meta: str
    snapshot: str

    @classmethod
    def of(cls, prefix: str, conversation_id: str) -> ConversationKeys:
        # Ids hold no control characters but may hold braces; every key of one conversation
        # starts with the same text, so its hash tag (up to the first '}') is the same anyway.
        base = f"{prefix}:{{{conversation_id}}}"
        return cls(f"{base}:u", f"{base}:e", f"{base}:m", f"{base}:s")


def index_key(prefix: str) -> str:
    """The sorted set of conversation ids by last write time."""
    return f"{prefix}:index"


def lease_key(prefix: str) -> str:
    """The sorted set of replicas' liveness leases (see :mod:`midstream.server._lease`)."""
    return f"{prefix}:{{leases}}"


def owned_key(prefix: str, owner: str) -> str:
    """The set of ids of the conversations the replica ``owner`` writes (same slot as the
    leases, so one script reaches both)."""
    return f"{prefix}:{{leases}}:{owner}"


def taken_key(prefix: str, owner: str) -> str:
    """The set of ``<incarnation>:<id>`` of conversations other replicas took over from the
    replica ``owner`` (it reads and empties it when it renews its lease)."""
    return f"{prefix}:{{leases}}:{owner}:taken"


def update_entry_id(seq: int) -> str:
    """The stream entry id of the update with sequence number ``seq``."""
    return f"{seq}-0"


def end_entry_id(last_seq: int) -> str:
    """The stream entry id of a conversation's end, after its last update."""
    return f"{last_seq}-1"


class ConversationJournal:
    """What one session queues for the shared log; its methods never block or await.

    Attributes
    ----------
    replaying
        While true nothing is queued (a conversation being rebuilt from the log re-publishes
        what the log already holds).
    resumable
        False once an input event could not be logged (over ``max_events``, or dropped past
        the local buffer): the conversation can then not be continued on another replica.
    """

    __slots__ = (
        "_log", "created", "dead", "dropped", "end", "events", "events_queued",
        "events_written", "first_kept", "generation", "incarnation", "indexed_at", "keys",
        "models", "replaying", "resumable", "session", "times", "updates", "written_seq",
    )

    def __init__(self, log: SharedLog, session: Session, incarnation: str) -> None:
        self._log = log
        self.session = session
        self.keys = ConversationKeys.of(log.config.key_prefix, session.id)
        self.incarnation = incarnation
        self.models = log.models()  # the models this conversation is decoded with
        # Updates as (seq, server time, serialised Update), in sequence order.
        self.updates: list[tuple[int, float, bytes]] = []
        self.events: list[bytes] = []
        self.end: Ended | None = None
        self.events_queued = 0  # events accepted and queued (written or not), in order
        self.events_written = 0
        self.replaying = False
        self.resumable = True
        self.created = False  # the conversation's meta was written at least once
        self.dead = False  # another replica owns the id now: write nothing more
        self.dropped = False  # pending entries were dropped past the buffer
        self.generation = 0  # bumped when pending entries are dropped
        self.first_kept = 1  # the oldest update seq the stream still holds (as written)
        self.written_seq = 0  # the newest update seq written
        self.indexed_at = 0.0  # when the listing's index last had this conversation
        # (seq, server time) of every _TIME_EVERY-th update written, oldest first, for
        # trimming by age: a conversation keeps a few hundred samples, not one per update.
        self.times: deque[tuple[int, float]] = deque()

    def published(self, update: PublishedUpdate) -> None:
        if self.replaying or self.dead:
            return
        self.republished(update)

    def republished(self, update: PublishedUpdate) -> None:
        """Queue an update (one rebuilt from the log that the log does not hold yet, too)."""
        # Serialised now: bytes are what is sent, and hold far less than objects while Redis
        # is away. They are the bytes the caller and followers are sent, made once for all.
        published = update.update
        self.updates.append((published.seq, published.server_time, update_bytes(update)))
        self._log.queued(self, 1)

    def accepted(self, serialised: Callable[[], bytes]) -> None:
        if self.replaying or self.dead or not self.resumable:
            return
        if self.events_queued >= self._log.config.max_events:
            self.resumable = False
            _log.info("conversation %s logged max_events (%d) input events; it can no "
                      "longer be continued on another replica", self.session.id,
                      self._log.config.max_events)
            self._log.queued(self, 0)
            return
        self.events.append(serialised())
        self.events_queued += 1
        self._log.queued(self, 1)

    def ended(self, ended: Ended) -> None:
        if self.dead:
            return
        self.end = ended
        self._log.queued(self, 1)

    @property
    def pending(self) -> int:
        return len(self.updates) + len(self.events) + (self.end is not None)

    def drop_pending(self) -> int:
        """Forget everything queued (past the local buffer); returns how many entries."""
        dropped = len(self.updates) + len(self.events)
        self.updates.clear()
        self.events.clear()
        if dropped:
            self.dropped = True
            self.resumable = False
            self.generation += 1
        return dropped


class _Call:
    """One conversation's share of a round trip, and what to forget once it landed."""

    __slots__ = ("args", "end", "generation", "journal", "minid", "n_events", "n_updates",
                 "times")

    def __init__(self, journal: ConversationJournal) -> None:
        self.journal = journal
        self.generation = journal.generation
        self.args: list[Any] = []
        self.n_events = 0
        self.n_updates = 0
        self.end = False
        self.minid = 0
        self.times: list[tuple[int, float]] = []


class SharedLog:
    """The connection to the shared Redis log and its writer task.

    Parameters
    ----------
    config
        Where Redis is and what it keeps.
    registry
        The server's metrics registry; the log adds its gauges and counters there.
    models
        An identifier of the models in service (their SHA-256s), written with each
        conversation: a conversation is continued only by a replica serving the same models,
        since only they decode it the same.
    on_health
        Called with ``True``/``False`` when writes start or stop reaching Redis.
    """

    def __init__(self, config: SharedLogConfig, registry: CollectorRegistry, *,
                 models: Callable[[], str],
                 on_health: Callable[[bool], None] | None = None) -> None:
        self.config = config
        self.owner = secrets.token_hex(8)  # this process, as the owner of what it writes
        self.models = models
        self._on_health = on_health
        self._client: aioredis.Redis | RedisCluster | None = None
        self._script: Any = None
        self._dirty: dict[ConversationJournal, None] = {}
        self._pending = 0
        self._wake = asyncio.Event()
        self._task: asyncio.Task[None] | None = None
        self._healthy = True
        self._closing = False
        self._told_dropped = False
        # Conversations whose end landed, or that this replica stopped writing (another owns
        # them now): the lease keeper takes them out of this replica's owned set at its next
        # renewal.
        # (A dict as an ordered set: an id opened again before then leaves it.)
        self.disowned: dict[str, None] = {}
        # Claims to undo (see unclaim), by conversation id.
        self.unclaimed: dict[str, tuple[ConversationKeys, str, str, str]] = {}
        # Ids written whose adding to this replica's owned set has not landed yet.
        self._unowned: dict[str, None] = {}
        self._keeper: Keeper | None = None
        # This server's session with a given id (set by the servicer), for taken().
        self.live_session: Callable[[str], Session | None] = lambda _: None
        self._registry = registry
        self.degraded_total = Counter(
            "midstream_shared_log_degraded", "Times writes to the shared log started failing.",
            registry=registry)
        self.dropped_total = Counter(
            "midstream_shared_log_dropped",
            "Entries dropped because the shared log stayed unreachable past the local buffer.",
            registry=registry)
        self.failures_total = Counter(
            "midstream_shared_log_write_failures", "Round trips to the shared log that failed.",
            registry=registry)
        self.pending_gauge = Gauge(
            "midstream_shared_log_pending", "Entries waiting to be written to the shared log.",
            registry=registry)
        self.up_gauge = Gauge(
            "midstream_shared_log_up", "1 while writes reach the shared log, 0 while degraded.",
            registry=registry)
        self.up_gauge.set(1)

    @property
    def client(self) -> aioredis.Redis | RedisCluster:
        if self._client is None:
            raise RuntimeError("the shared log has not been started")
        return self._client

    @property
    def healthy(self) -> bool:
        return self._healthy

    @property
    def pending(self) -> int:
        return self._pending

    async def start(self) -> None:
        """Connect (lazily: an unreachable Redis makes the log degraded, not the start fail)."""
        config = self.config
        # One connection per waiting remote follower, plus the writer's (docs/deploy.md); in a
        # cluster, per node.
        options: dict[str, Any] = {"socket_timeout": config.timeout_s,
                                   "socket_connect_timeout": config.timeout_s,
                                   "decode_responses": False, "max_connections": 4096}
        if config.cluster:
            # Every key of one conversation shares a hash tag, so each script call and each
            # read of a conversation stays on one node; the cluster client routes them.
            self._client = RedisCluster.from_url(config.client_url, **options)
        else:
            self._client = aioredis.Redis.from_url(config.client_url, **options)
        self._script = self._client.register_script(_APPEND)
        try:
            async with asyncio.timeout(config.timeout_s):
                await self._client.ping()
        except OUTAGES as exc:
            self._set_health(False, exc)
        self._task = asyncio.create_task(self._run(), name="shared-log-writer")
        from midstream.server._lease import Keeper  # noqa: PLC0415 - it imports this module

        self._keeper = Keeper(self, self._registry)
        self._keeper.start()

    async def stop(self, grace: float) -> None:
        """Write what is queued (for up to ``grace`` seconds), then disconnect; idempotent."""
        if self._task is None:
            return
        self._closing = True
        self._wake.set()
        deadline = time.monotonic() + max(grace, _STOP_FLUSH_MIN_S)
        while self._dirty and time.monotonic() < deadline and not self._task.done():
            await asyncio.sleep(0.01)
        if self._dirty:
            _log.warning("shared log: %d entries not written at shutdown", self._pending)
        self._task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._task
        self._task = None
        if self._keeper is not None:
            await self._keeper.stop()
        if self._client is not None:
            await self._client.aclose()

    def journal(self, session: Session) -> ConversationJournal:
        """A new journal for a session just opened (the log knows it by its epoch).

        Queued at once, with nothing in it, so that other replicas list the conversation (and
        can follow it) before its first update."""
        journal = ConversationJournal(self, session, str(session.epoch))
        self.queued(journal, 0)
        return journal

    # --- queueing (synchronous) --------------------------------------------------------

    def queued(self, journal: ConversationJournal, entries: int) -> None:
        self._dirty[journal] = None
        self._pending += entries
        if self._pending > self.config.buffer_entries:
            self._overflow()
        self._wake.set()

    def _overflow(self) -> None:
        dropped = 0
        for journal in self._dirty:
            dropped += journal.drop_pending()
        self._pending = sum(j.pending for j in self._dirty)
        self.dropped_total.inc(dropped)
        if not self._told_dropped:  # once until writes catch up, not on every overflow
            self._told_dropped = True
            _log.warning("shared log: buffer full (buffer_entries %d), buffered entries "
                         "dropped; followers of the affected conversations get a gap notice "
                         "(midstream_shared_log_dropped_total counts them)",
                         self.config.buffer_entries)

    # --- writing -----------------------------------------------------------------------

    def _set_health(self, healthy: bool, error: BaseException | None = None) -> None:
        if healthy == self._healthy:
            return
        self._healthy = healthy
        self.up_gauge.set(1 if healthy else 0)
        if healthy:
            _log.warning("shared log reachable again; writing %d buffered entries",
                         self._pending)
        else:
            self.degraded_total.inc()
            _log.warning("shared log unreachable (%s); buffering up to %d entries locally",
                         type(error).__name__ if error else "unknown",
                         self.config.buffer_entries)
        if self._on_health is not None:
            self._on_health(healthy)

    async def _run(self) -> None:
        delay = _RETRY_FIRST_S
        while True:
            if not self._dirty:
                self._wake.clear()
                await self._wake.wait()
                # Gather what the next few milliseconds publish into the same round trip:
                # at a few hundred words a second, rounds of one word each cost more CPU.
                await asyncio.sleep(_GATHER_S)
                continue
            calls = self._build()
            outage: BaseException | None = None
            try:
                async with asyncio.timeout(self.config.timeout_s):
                    results = await self._send(calls)
            except OUTAGES as exc:
                outage = exc
            else:
                for call, result in zip(calls, results, strict=True):
                    if isinstance(result, Exception) and not refused(result):
                        # A connection error mid-pipeline, or a Redis that cannot take
                        # writes for now (TRANSIENT_REPLIES: the call's own reply, not
                        # raised): kept for a retry.
                        outage = result
                    else:
                        self._landed(call, result)
                self.pending_gauge.set(self._pending)
            if outage is not None:
                self.failures_total.inc()
                self._set_health(False, outage)
                await asyncio.sleep(delay)
                delay = min(delay * 2, _RETRY_MAX_S)
                continue
            delay = _RETRY_FIRST_S
            self._set_health(True)
            self._told_dropped = False

    def _build(self) -> list[_Call]:
        calls: list[_Call] = []
        now = time.time()
        entries = 0
        for journal in list(self._dirty)[:_CONVERSATIONS_PER_ROUND]:
            if journal.dead:
                self._forget(journal)
                continue
            call = self._call(journal, now)
            calls.append(call)
            entries += call.n_updates + call.n_events
            if entries >= _ENTRIES_PER_ROUND:
                break
        return calls

    def _call(self, journal: ConversationJournal, now: float) -> _Call:
        config = self.config
        session = journal.session
        call = _Call(journal)
        updates = journal.updates[:_UPDATES_PER_CALL]
        events = journal.events[:_EVENTS_PER_CALL]
        call.n_updates, call.n_events = len(updates), len(events)
        last = updates[-1][0] if updates else journal.written_seq
        # Trim by count and by age; a trim always comes with a fresh snapshot, so the stream
        # never starts after the snapshot's sequence number plus one.
        cut = last - config.max_entries + 1
        if cut - journal.first_kept < config.max_entries // _TRIM_SLACK:
            cut = 0
        horizon = now - config.max_age_s
        for seq, when in journal.times:
            if when >= horizon:
                break
            cut = max(cut, seq + 1)
        if journal.dropped:
            # Entries were dropped: everything before what is sent now goes, so nobody reads
            # across the hole.
            cut = max(cut, updates[0][0] if updates else session.seq + 1)
        snapshot = b""
        if cut > journal.first_kept or journal.dropped:
            snapshot = snapshot_message(session.snapshot(), message_budget(session.limits)
                                        ).snapshot.SerializeToString()
            call.minid = max(cut, 1)
        end = journal.end if len(updates) == len(journal.updates) else None
        call.end = end is not None
        meta = {
            "words": str(session.word_count), "seq": str(session.seq),
            "speakers": "\x1f".join(session.timeline.speakers),
            "resumable": "1" if journal.resumable else "0",
        }
        if not journal.created:
            # What never changes is written with the conversation, not with every update.
            meta.update(started=repr(session.started_at), models=journal.models)
        if end is not None:
            meta["reason"] = str(int(cv.end_reason_to_wire(end.reason)))
        if journal.dropped:
            # The snapshot stands for every update up to the session's newest, written or
            # dropped: readers take the log as that far on (a follower from there is told
            # the gap), and entries up to it are not written again.
            meta["useq"] = str(session.seq)
        args: list[Any] = [
            self.owner, journal.incarnation, int(config.max_age_s * 1000),
            "1" if journal.created else "0", len(events), journal.events_written + 1,
            len(updates), end_entry_id(end.last_seq) if end is not None else "",
            ended_message(end).SerializeToString() if end is not None else b"", snapshot,
            str(call.minid),
            len(meta),
        ]
        for name, value in meta.items():
            args += (name, value)
        args += events
        for seq, when, data in updates:
            args += (seq, data)
            call.times.append((seq, when))
        call.args = args
        return call

    async def _send(self, calls: list[_Call]) -> list[Any]:
        """One pipelined round trip: each call's script, and the listing's index for those
        that need it; the scripts' results, in order."""
        now = time.time()
        # The index forgets conversations not written for max_age_s: refresh well before.
        every = min(_INDEX_EVERY_S, self.config.max_age_s / 4)
        index = {call.journal.session.id: now for call in calls
                 if now - call.journal.indexed_at >= every}
        owned = owned_key(self.config.key_prefix, self.owner)
        # A conversation enters this replica's owned set with its first write (and leaves it
        # once its end landed: _landed), so a lost replica's live conversations can be found.
        started = [call.journal.session.id for call in calls if not call.journal.created]
        for conversation_id in started:
            self.disowned.pop(conversation_id, None)
        # Ids whose adding failed (on a cluster the set's node can be down while the
        # conversation's is up) are added with the next round trip, unless they ended since.
        started += [conversation_id for conversation_id in self._unowned
                    if conversation_id not in self.disowned and conversation_id not in started]
        for _ in range(2):
            async with self.client.pipeline(transaction=False) as pipe:
                # Queued by hand and not registered with the pipeline, which would ask Redis
                # whether it has the script on every round trip; a Redis that lost it
                # (restarted) answers NOSCRIPT, and the script is loaded once and sent again.
                for call in calls:
                    keys = call.journal.keys
                    pipe.evalsha(self._script.sha, 4, keys.updates, keys.events, keys.meta,
                                 keys.snapshot, *call.args)
                if index:
                    pipe.zadd(index_key(self.config.key_prefix), index)
                if started:
                    pipe.sadd(owned, *started)
                results: list[Any] = await pipe.execute(raise_on_error=False)
            if not any(isinstance(r, NoScriptError) for r in results[:len(calls)]):
                break
            await self.client.script_load(_APPEND)
        rest = results[len(calls):]
        if index and not isinstance(rest.pop(0), Exception):
            for call in calls:
                if call.journal.session.id in index:
                    call.journal.indexed_at = now
        if started:
            self._unowned = dict.fromkeys(started) if isinstance(rest[0], Exception) else {}
        return results[:len(calls)]

    def _landed(self, call: _Call, result: Any) -> None:
        journal = call.journal
        if journal.dead:
            return  # taken over while the call was in flight: forgotten, counted already
        if refused(result):
            text = str(result)
            if _LOST in text:
                # Redis lost what it held (restarted without persistence): write the state
                # afresh, as after dropped entries.
                _log.warning("shared log lost conversation %s; rewriting it from a snapshot",
                             journal.session.id)
                journal.created = False
                journal.indexed_at = 0.0
                journal.dropped = True
                journal.resumable = False
                journal.first_kept = 1
                journal.times.clear()
                return
            if _SUPERSEDED in text or _CONFLICT in text:
                _log.warning("conversation %s: %s; this replica stops writing it",
                             journal.session.id,
                             "continued on another replica" if _SUPERSEDED in text
                             else "the id is live on another replica")
            else:
                _log.error("shared log refused a write for conversation %s (%s)",
                           journal.session.id, type(result).__name__)
                _log.debug("shared log refusal detail: %s", result)
            if _SUPERSEDED in text:
                self.superseded(journal)
                return
            journal.dead = True
            self.disowned[journal.session.id] = None
            self._forget(journal)
            return
        journal.created = True
        if result in (b"EVENTS_LOST", "EVENTS_LOST") and journal.resumable:
            _log.warning("shared log lost input events of conversation %s; it can no longer "
                         "be continued on another replica", journal.session.id)
            journal.resumable = False
        if call.generation == journal.generation:
            del journal.updates[:call.n_updates]
            del journal.events[:call.n_events]
            journal.events_written += call.n_events
            self._pending -= call.n_updates + call.n_events
        else:
            journal.events_written = journal.events_queued - len(journal.events)
        journal.dropped = journal.dropped and call.generation != journal.generation
        if call.end:
            journal.end = None
            self._pending -= 1
            self.disowned[journal.session.id] = None
        if call.times:
            journal.written_seq = call.times[-1][0]
        times = journal.times
        for seq, when in call.times:
            if not times or seq - times[-1][0] >= _TIME_EVERY:
                times.append((seq, when))
        if call.minid:
            journal.first_kept = call.minid
            times = journal.times
            while times and times[0][0] < call.minid:
                times.popleft()
        if not journal.pending and not journal.dropped:
            # (A journal whose entries were dropped while this call was in flight stays: its
            # next call writes the snapshot that covers the hole.)
            self._dirty.pop(journal, None)

    def superseded(self, journal: ConversationJournal) -> None:
        """Another replica writes ``journal``'s conversation now: write nothing more of it,
        and hand its followers here over to the log (``Session.moved_away``)."""
        if journal.dead:
            return
        journal.dead = True
        self.disowned[journal.session.id] = None
        self._forget(journal)
        journal.session.moved_away(journal.written_seq)

    def taken(self, conversation_id: str, incarnation: str) -> None:
        """Another replica took over the conversation (continued it, or ended it as this
        replica's after taking this replica for lost): stop writing it here and move its
        followers to the log, without waiting for a write to be refused."""
        session = self.live_session(conversation_id)
        journal = session.journal if session is not None else None
        if isinstance(journal, ConversationJournal) and journal.incarnation == incarnation:
            _log.warning("conversation %s: taken over by another replica; this replica "
                         "stops writing it", conversation_id)
            self.superseded(journal)

    def hold(self, journal: ConversationJournal) -> None:
        """Write nothing of ``journal`` until it is queued again (a conversation being
        rebuilt from the log, not claimed yet: its write would be refused as another's)."""
        self._dirty.pop(journal, None)

    def unclaim(self, keys: ConversationKeys, conversation_id: str, incarnation: str,
                previous: str, token: str) -> None:
        """Have the lease keeper undo a claim whose answer was lost (Redis went away), once
        Redis answers: ``previous`` owns the conversation again unless this replica has
        claimed it since (another ``token``), another did, or it ended."""
        self.unclaimed[conversation_id] = (keys, incarnation, previous, token)

    def _forget(self, journal: ConversationJournal) -> None:
        self._pending -= journal.pending
        journal.drop_pending()
        journal.end = None
        self._dirty.pop(journal, None)
