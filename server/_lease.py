"""Replicas' liveness leases in the shared log, and ending the conversations of a lost replica.

A replica that is killed (SIGKILL, a crash, a lost machine) writes no ends. Unless its callers
continue their conversations elsewhere (``open.resume``), nobody else would end them, and their
followers on other replicas would wait for ever. So every replica holds a lease in Redis, and
the others end a lost replica's conversations once its lease has lapsed and a grace has passed
with nobody continuing them.

Keys, all under one hash tag so that Redis Cluster keeps them (and each script below) on one
slot; the names are in :func:`midstream.server._journal.lease_key` and ``owned_key``:

``<prefix>:{leases}``
    A sorted set of replicas (their owner tokens, :attr:`SharedLog.owner`), each scored by the
    time of its last renewal in milliseconds of Redis's own clock (so replicas' clocks need not
    agree).
``<prefix>:{leases}:<owner>:taken``
    ``<incarnation>:<id>`` of the conversations other replicas took over from that replica
    (continued them, or ended them as a lost replica's): it reads and empties the set with
    each renewal and hands the followers it serves of them over to the log, without waiting
    for one of its writes to be refused.
``<prefix>:{leases}:<owner>``
    The ids of the conversations that replica owns: added in the round trip of a
    conversation's first write (and before a replica claims one to continue it), removed at
    the next renewal after its end was written (or after another replica took it over).

Each replica's :class:`Keeper` renews its lease every ``lease_s / 4`` seconds with one script
call, which also answers which replicas have not renewed for ``lease_s + orphan_grace_s``. For
each such replica (at most :data:`_OWNERS_PER_TICK` per tick) it reads a bounded batch of its
owned ids and ends each conversation that replica still owns with one script call on the
conversation's keys: the script takes the conversation over (sets ``owner``, the fence the
append script already checks, so a replica that was only cut off is refused from then on) and
writes the end (``END_REASON_OWNER_LOST``, after the last logged update) only if the lost
replica still owns it, it has not ended and its newest logged update is the one read. Several
replicas noticing at once therefore write one end: the first script call wins, the others find
another owner. A conversation continued within the grace has another owner and is left alone.
A lost replica's lease is forgotten once its set is empty. The work per tick is bounded by the
lapsed replicas' owned conversations, never by all keys.

Each renewal also undoes the claims of this replica whose answers were lost to an outage
(:meth:`SharedLog.unclaim`: the conversation goes back to the replica that owned it, unless
this replica has claimed it again since), and adds back to this replica's set an id taken out
of it while a conversation opened here again under the id was already writing.

A replica judges others' leases only after its own renewals have reached Redis for a whole
``lease_s`` (after starting, and after Redis was unreachable): until then a live replica may
not have had the chance to renew.

Use from the server's event loop only.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import time
from typing import Any, Final

from midstream import Ended, EndReason
from midstream.server._journal import (
    OUTAGES,
    ConversationJournal,
    ConversationKeys,
    SharedLog,
    end_entry_id,
    index_key,
    lease_key,
    owned_key,
    taken_key,
)
from midstream.server._wire import ended_message
from midstream.wire import convert as cv
from prometheus_client import CollectorRegistry, Counter

_log = logging.getLogger(__name__)

# Lapsed replicas handled per tick, and owned ids read per lapsed replica per tick: a tick's
# work stays bounded however many conversations a lost replica held; the rest waits for the
# next tick, a quarter of lease_s later (common practice, no source).
_OWNERS_PER_TICK = 8
_IDS_PER_TICK = 256
# Ids taken out of this replica's own set per renewal (conversations that ended here).
_DISOWNED_PER_TICK = 4096

# KEYS: leases, this replica's owned set, its taken set. ARGV: owner, ttl_ms, lapse_ms ('' to
# judge nobody), owners asked for at most, then ids to remove from the owned set. Renews the
# lease; returns the replicas whose last renewal is older than lapse_ms and what other replicas
# took over from this one (emptying that set).
_KEEP: Final = """
local t = redis.call('TIME')
local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
redis.call('ZADD', KEYS[1], now, ARGV[1])
redis.call('PEXPIRE', KEYS[1], ARGV[2])
for k = 5, #ARGV do
  redis.call('SREM', KEYS[2], ARGV[k])
end
redis.call('PEXPIRE', KEYS[2], ARGV[2])
local taken = redis.call('SPOP', KEYS[3], 1024)
if ARGV[3] == '' then
  return {{}, taken}
end
return {redis.call('ZRANGEBYSCORE', KEYS[1], '-inf', '(' .. (now - tonumber(ARGV[3])),
                   'LIMIT', 0, tonumber(ARGV[4])), taken}
"""

# KEYS: leases, the owned set. ARGV: owner, lapse_ms ('' for any age). Forgets a replica's
# lease when it owns nothing (a lost replica swept clean, or one stopping with every end
# written); an owner that renewed meanwhile is kept.
_FORGET: Final = """
if redis.call('SCARD', KEYS[2]) > 0 then
  return 0
end
if ARGV[2] ~= '' then
  local t = redis.call('TIME')
  local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
  local score = redis.call('ZSCORE', KEYS[1], ARGV[1])
  if score and tonumber(score) >= now - tonumber(ARGV[2]) then
    return 0
  end
end
return redis.call('ZREM', KEYS[1], ARGV[1])
"""

# KEYS: updates, events, meta, snapshot. ARGV: incarnation, lost owner, this owner, useq as
# read, the end (a serialised ServerMessage), ttl_ms, the end reason's wire value, the end's
# entry id. Takes the
# conversation over and writes its end only if the lost owner still owns it, it has not ended
# and nothing was logged since it was read.
_ORPHAN: Final = """
local m = redis.call('HMGET', KEYS[3], 'inc', 'owner', 'useq', 'ended')
if m[1] ~= ARGV[1] or m[2] ~= ARGV[2] or m[4] == '1' then
  return 'SKIP'
end
if (m[3] or '0') ~= ARGV[4] then
  return 'CHANGED'
end
redis.call('XADD', KEYS[1], ARGV[8], 'i', ARGV[1], 'end', ARGV[5])
redis.call('HSET', KEYS[3], 'owner', ARGV[3], 'ended', '1', 'reason', ARGV[7])
for k = 1, 4 do
  redis.call('PEXPIRE', KEYS[k], ARGV[6])
end
return 'ENDED'
"""


# KEYS: the conversation's meta. ARGV: incarnation, this owner, the claim's token, the owner
# before it ('' for none). Undoes a claim of this replica's whose answer was lost, unless the
# conversation ended, another replica claimed it, or this one claimed it again since.
_UNCLAIM: Final = """
local m = redis.call('HMGET', KEYS[1], 'inc', 'owner', 'claim', 'ended')
if m[1] ~= ARGV[1] or m[2] ~= ARGV[2] or m[4] == '1' then
  return 'GONE'
end
if m[3] ~= ARGV[3] then
  return 'KEPT'
end
if ARGV[4] == '' then
  redis.call('HDEL', KEYS[1], 'owner')
else
  redis.call('HSET', KEYS[1], 'owner', ARGV[4])
end
return 'RELEASED'
"""


class Keeper:
    """Renews this replica's lease and ends the conversations of lost replicas.

    Parameters
    ----------
    log
        The server's shared log (its connection, owner token and configuration).
    registry
        The server's metrics registry; the keeper adds its counter there.
    """

    def __init__(self, log: SharedLog, registry: CollectorRegistry) -> None:
        self._log = log
        self._task: asyncio.Task[None] | None = None
        self._scripts: dict[str, Any] = {}
        # Others' leases are judged only from this time on (monotonic seconds; see the module
        # docstring).
        self._judge_from = 0.0
        self.orphans_total = Counter(
            "midstream_shared_log_orphans_ended",
            "Conversations this replica ended because their replica was lost and nobody "
            "continued them within orphan_grace_s.", registry=registry)

    def start(self) -> None:
        """Start renewing (the first renewal is at once)."""
        if self._task is None:
            self._judge_from = time.monotonic() + self._log.config.lease_s
            self._task = asyncio.create_task(self._run(), name="shared-log-lease")

    async def stop(self) -> None:
        """Stop renewing; idempotent. When every end of this replica reached the log its lease
        is forgotten at once, else it lapses and other replicas end what is left."""
        if self._task is None:
            return
        self._task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._task
        self._task = None
        log = self._log
        if log.pending:
            return
        prefix = log.config.key_prefix
        owned = owned_key(prefix, log.owner)
        with contextlib.suppress(*OUTAGES):
            async with asyncio.timeout(log.config.timeout_s):
                if log.disowned:
                    await log.client.srem(owned, *log.disowned)
                    log.disowned.clear()
                await self._script("forget", _FORGET)(keys=[lease_key(prefix), owned],
                                                      args=[log.owner, ""])

    def _script(self, name: str, source: str) -> Any:
        script = self._scripts.get(name)
        if script is None:
            script = self._scripts[name] = self._log.client.register_script(source)
        return script

    async def _run(self) -> None:
        config = self._log.config
        period = config.lease_s / 4
        while True:
            try:
                async with asyncio.timeout(max(config.timeout_s, period)):
                    await self.tick()
            except OUTAGES as exc:
                # The writer reports the outage; others' leases may be stale until they
                # renewed after it, so nobody is judged for a whole lease_s. The keeper's
                # scripts answer with results, never error replies of their own, so any error
                # reply (READONLY, OOM, ...: _journal.TRANSIENT_REPLIES) is such an outage.
                self._judge_from = time.monotonic() + config.lease_s
                _log.debug("lease renewal failed (%s)", type(exc).__name__)
            except Exception as exc:  # a bug must not stop the renewals: others would end ours
                self._judge_from = time.monotonic() + config.lease_s
                _log.error("lease renewal or sweep failed (%s)", type(exc).__name__)
                _log.debug("lease failure detail", exc_info=exc)
            await asyncio.sleep(period)

    async def tick(self) -> int:
        """Renew the lease and end what lost replicas left; the conversations ended."""
        log, config = self._log, self._log.config
        prefix = config.key_prefix
        disowned = list(itertools.islice(log.disowned, _DISOWNED_PER_TICK))
        judging = time.monotonic() >= self._judge_from
        lapsed: list[bytes]
        taken: list[bytes]
        lapsed, taken = await self._script("keep", _KEEP)(
            keys=[lease_key(prefix), owned_key(prefix, log.owner), taken_key(prefix, log.owner)],
            args=[log.owner, int(config.max_age_s * 1000),
                  int((config.lease_s + config.orphan_grace_s) * 1000) if judging else "",
                  _OWNERS_PER_TICK, *disowned])
        for conversation_id in disowned:
            log.disowned.pop(conversation_id, None)
        # An id opened here again while the script was on its way may have been added by the
        # writer before the script removed it: add it back (adding is idempotent).
        again = [conversation_id for conversation_id in disowned
                 if self._writes(conversation_id)]
        if again:
            await log.client.sadd(owned_key(prefix, log.owner), *again)
        await self._unclaim()
        for item in taken:
            incarnation, _, conversation_id = item.decode().partition(":")
            log.taken(conversation_id, incarnation)
        ended = 0
        for owner in lapsed:
            lost = owner.decode()
            if lost != log.owner:
                ended += await self._sweep(lost)
        return ended

    def _writes(self, conversation_id: str) -> bool:
        """Whether this replica holds a live conversation with this id that it still writes."""
        session = self._log.live_session(conversation_id)
        journal = session.journal if session is not None else None
        return isinstance(journal, ConversationJournal) and not journal.dead

    async def _unclaim(self) -> None:
        """Undo the claims whose answers were lost (:meth:`SharedLog.unclaim`)."""
        log = self._log
        prefix = log.config.key_prefix
        for conversation_id, entry in list(log.unclaimed.items())[:_IDS_PER_TICK]:
            keys, incarnation, previous, token = entry
            if previous:
                # A sweep may have dropped it from the previous owner's set while this replica
                # owned it; should that replica be lost, the sweep must find it again.
                await log.client.sadd(owned_key(prefix, previous), conversation_id)
            result = await self._script("unclaim", _UNCLAIM)(
                keys=[keys.meta], args=[incarnation, log.owner, token, previous])
            if log.unclaimed.get(conversation_id) is entry:
                del log.unclaimed[conversation_id]
            if result not in (b"KEPT", "KEPT") and not self._writes(conversation_id):
                log.disowned[conversation_id] = None
            if result in (b"RELEASED", "RELEASED"):
                _log.info("conversation %s: a claim of it whose answer was lost is undone",
                          conversation_id)

    async def _sweep(self, lost: str) -> int:
        """End a bounded batch of the conversations the lost replica ``lost`` still owns."""
        log, config = self._log, self._log.config
        client, prefix = log.client, config.key_prefix
        owned = owned_key(prefix, lost)
        members: Any = await client.srandmember(owned, _IDS_PER_TICK)
        if not members:
            await self._script("forget", _FORGET)(
                keys=[lease_key(prefix), owned],
                args=[lost, int((config.lease_s + config.orphan_grace_s) * 1000)])
            return 0
        ids = [member.decode() for member in members]
        keys = [ConversationKeys.of(prefix, conversation_id) for conversation_id in ids]
        async with client.pipeline(transaction=False) as pipe:
            for conversation in keys:
                pipe.hmget(conversation.meta, ["inc", "owner", "useq", "ended"])
            metas: list[list[bytes | None]] = await pipe.execute()
        orphan = self._script("orphan", _ORPHAN)
        reason = str(int(cv.end_reason_to_wire(EndReason.OWNER_LOST)))
        ttl_ms = int(config.max_age_s * 1000)
        done: list[str] = []
        ended: list[str] = []
        told: list[str] = []
        for conversation_id, conversation, (inc, owner, useq, over) in zip(
                ids, keys, metas, strict=True):
            if inc is None or over == b"1" or owner != lost.encode():
                done.append(conversation_id)  # gone, ended, or continued elsewhere
                continue
            last_seq = int(useq or b"0")
            end = ended_message(Ended(reason=EndReason.OWNER_LOST, last_seq=last_seq))
            result = await orphan(
                keys=[conversation.updates, conversation.events, conversation.meta,
                      conversation.snapshot],
                args=[inc, lost, log.owner, str(last_seq), end.SerializeToString(), ttl_ms,
                      reason, end_entry_id(last_seq)])
            if result in (b"ENDED", "ENDED"):
                ended.append(conversation_id)
                done.append(conversation_id)
                told.append(f"{inc.decode()}:{conversation_id}")
            elif result in (b"SKIP", "SKIP"):
                done.append(conversation_id)
            # CHANGED: written meanwhile (the lost replica was only slow); read it again next
            # tick, when its lease may be renewed.
        if ended:
            # The listing's index drops conversations not written for max_age_s.
            await client.zadd(index_key(prefix), dict.fromkeys(ended, time.time()))
            # Should the lost replica be only cut off, it learns when it is back.
            await client.sadd(taken_key(prefix, lost), *told)
            await client.pexpire(taken_key(prefix, lost), ttl_ms)
            self.orphans_total.inc(len(ended))
            _log.warning("replica %s lost (no lease renewal for %.0f s): ended %d of its "
                         "conversations nobody continued (END_REASON_OWNER_LOST)", lost,
                         config.lease_s + config.orphan_grace_s, len(ended))
            for conversation_id in ended:
                _log.info("conversation %s ended: its replica was lost", conversation_id)
        if done:
            await client.srem(owned, *done)
        return len(ended)
