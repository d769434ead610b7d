"""What any replica serves from the shared log: ``Follow``, ``GetRevisions``, the listing, and
continuing a conversation whose replica died.

The keys and their layout are described in :mod:`midstream.server._journal`. A follower here
reads the conversation's update stream: from its position while the stream holds it, else a
``gap`` (``EVICTED``) and a snapshot (the stored snapshot with every later update folded in),
then live entries with blocking reads. A jump in sequence numbers while reading (entries
dropped past a replica's local buffer, or a Redis that lost its data) gets the same gap notice
and snapshot: never a silent gap. The conversation's epoch is checked as on the ingesting
replica: a position of another epoch (or beyond seq 1 without one), and entries of another
conversation that took over the id while following, get ``gap`` (``EPOCH_MISMATCH``) and a
snapshot of the conversation now under the id, never a splice.

A follower of a conversation this replica held itself until another replica took it over is
carried on here too (``stale_from``): the ``Follow`` handler moves it off the stale copy.

Continuing (:func:`resume`) reads the conversation in one transaction, replays every logged
input event through a fresh engine from the same models (decoding is deterministic, so it
publishes the same updates with the same sequence numbers and the same epoch) and checks the
newest update the log holds against the replay; only then does it claim the conversation for
this replica, and only if nothing was logged since the read (the old owner's later writes are
refused, and it is told through its taken set, :mod:`midstream.server._lease`). It then writes
the updates the old replica published but never logged and hands the session on like a newly
opened one. A continuation that fails therefore changes nothing in the log: the old owner
goes on writing it if it can, or the others end it as a lost replica's.

Use from the server's event loop only.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import secrets
import time
from collections import OrderedDict
from collections.abc import AsyncIterator, Iterator
from typing import Any, Final

from midstream import (
    EventError,
    MidstreamError,
    ModelError,
    NotFoundError,
    UnavailableError,
)
from midstream.server._config import ServerLimits
from midstream.server._ingest import apply_event
from midstream.server._journal import (
    OUTAGES,
    TRANSIENT_REPLIES,
    ConversationJournal,
    ConversationKeys,
    SharedLog,
    index_key,
    owned_key,
    refused,
    taken_key,
)
from midstream.server._limits import check_id
from midstream.server._models import Bundle
from midstream.server._published import PublishedUpdate
from midstream.server._registry import SessionRegistry
from midstream.server._session import Session, message_budget
from midstream.server._status import ConflictError, PositionError, ProtocolStateError
from midstream.server._wire import fitted_snapshot
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb

_log = logging.getLogger(__name__)

# Milliseconds one blocking read waits before the follower checks for a stop and whether the
# conversation was started anew; entries read per call.
_BLOCK_MS = 1000
_READ_COUNT = 512
# Seconds between retries while Redis is unreachable for a follower.
_RETRY_S = 0.5
# Input events replayed between two returns to the event loop, so a long rebuild does not
# starve live streams (decodes themselves are never split).
_REPLAY_SLICE = 64
# Most conversations the listing reads from the shared log.
_LIST_LIMIT = 10_000

# KEYS: meta. ARGV: incarnation, this owner, then the owner, useq and events as read, a token
# naming this claim. Claims the conversation only if it is the one read, has not ended and
# nothing was logged since it was read.
_CLAIM: Final = """
local m = redis.call('HMGET', KEYS[1], 'inc', 'ended', 'owner', 'useq', 'events')
if m[1] ~= ARGV[1] then
  return redis.error_reply('MIDSTREAM_CONFLICT')
end
if m[2] == '1' then
  return redis.error_reply('MIDSTREAM_ENDED')
end
if (m[3] or '') ~= ARGV[3] or (m[4] or '0') ~= ARGV[4] or (m[5] or '0') ~= ARGV[5] then
  return 'CHANGED'
end
redis.call('HSET', KEYS[1], 'owner', ARGV[2], 'claim', ARGV[6])
return 'OK'
"""
# Reads of a conversation rebuilt again because its replica logged more meanwhile.
_CLAIM_TRIES = 3


@contextlib.contextmanager
def _reachable() -> Iterator[None]:
    """Report Redis being unreachable as ``UNAVAILABLE`` (try again), not as a fault."""
    try:
        yield
    except OUTAGES as exc:
        if refused(exc):
            raise
        raise UnavailableError(f"the shared log is unreachable ({type(exc).__name__}); "
                               "try again") from exc


def _entry(entry_id: bytes) -> tuple[int, bool]:
    """``(seq, is_end)`` of a stream entry id (``<seq>-0`` update, ``<last seq>-1`` end)."""
    seq, _, kind = entry_id.partition(b"-")
    return int(seq), kind != b"0"


class _State:
    """The latest word and utterance states, folded from a snapshot and later updates."""

    __slots__ = ("epoch", "final", "seq", "utterances", "words")

    def __init__(self, snapshot: pb.Snapshot | None, epoch: int) -> None:
        self.words: OrderedDict[str, pb.WordState] = OrderedDict()
        self.utterances: OrderedDict[str, pb.UtteranceState] = OrderedDict()
        self.seq = 0
        self.final = False
        self.epoch = epoch
        if snapshot is not None:
            self.seq, self.final = snapshot.seq, snapshot.conversation_final
            for word in snapshot.words:
                self.words[word.word_id] = word
            for utterance in snapshot.utterances:
                self.utterances[utterance.utterance_id] = utterance

    def apply(self, update: pb.Update) -> None:
        for word in update.words:
            self.words.pop(word.word_id, None)  # a revised state moves to the newest end
            self.words[word.word_id] = word
        for utterance in update.utterances:
            self.utterances.pop(utterance.utterance_id, None)
            self.utterances[utterance.utterance_id] = utterance
        for word_id in update.withdrawn_word_ids:
            self.words.pop(word_id, None)
        self.seq = update.seq
        self.final = update.conversation_final

    def message(self, limits: ServerLimits) -> pb.ServerMessage:
        """The state as a snapshot within ``snapshot_states`` and the message budget; the
        oldest states are left out first, as the ingesting replica's snapshots do."""
        keep = limits.snapshot_states
        return fitted_snapshot(
            seq=self.seq, words=list(self.words.values())[-keep:],
            utterances=list(self.utterances.values())[-keep:], final=self.final,
            epoch=self.epoch, budget=message_budget(limits))


class Replica:
    """Serves conversations from the shared log to this replica's callers.

    Parameters
    ----------
    log
        The server's shared log (its connection and its writer).
    limits
        The server's limits (message budget, snapshot size, id length).
    """

    def __init__(self, log: SharedLog, limits: ServerLimits) -> None:
        self._log = log
        self._limits = limits
        self._claim_script: Any = None

    def _keys(self, conversation_id: str) -> ConversationKeys:
        check_id(conversation_id, "conversation_id", self._limits)
        return ConversationKeys.of(self._log.config.key_prefix, conversation_id)

    async def _meta(self, keys: ConversationKeys, conversation_id: str) -> dict[bytes, bytes]:
        with _reachable():
            meta: Any = await self._log.client.hgetall(keys.meta)
        if not meta or b"inc" not in meta:
            raise NotFoundError(f"no live or kept conversation with id {conversation_id!r}")
        return dict(meta)

    # --- snapshot ---------------------------------------------------------------------

    async def _fold(self, keys: ConversationKeys,
                    ) -> tuple[_State, bytes, pb.ServerMessage | None]:
        """The current state from the stored snapshot and every later update; also the last
        entry id read and the ``ended`` message when the stream holds the end."""
        client = self._log.client
        for _ in range(3):
            with _reachable():
                async with client.pipeline(transaction=True) as pipe:
                    pipe.hget(keys.meta, "inc")
                    pipe.get(keys.snapshot)
                    pipe.xrange(keys.updates, "-", "+")
                    epoch, stored, entries = await pipe.execute()
            state = _State(pb.Snapshot.FromString(stored) if stored else None, int(epoch or 0))
            last_id = f"{state.seq}-0".encode()
            ended: pb.ServerMessage | None = None
            consistent = True
            for entry_id, fields in entries:
                seq, is_end = _entry(entry_id)
                if is_end:
                    ended = pb.ServerMessage.FromString(fields[b"end"])
                elif seq <= state.seq:
                    continue
                elif seq != state.seq + 1:
                    consistent = False  # a hole the snapshot does not cover: read again
                    break
                else:
                    state.apply(pb.Update.FromString(fields[b"u"]))
                last_id = entry_id
            if consistent:
                return state, last_id, ended
            await asyncio.sleep(0.05)
        raise UnavailableError("the shared log changed while it was read three times; try again")

    # --- Follow ---------------------------------------------------------------------------

    async def follow(self, conversation_id: str, from_seq: int | None, epoch: int,
                     stop: asyncio.Future[None], *, stale_from: int | None = None,
                     ) -> AsyncIterator[pb.ServerMessage]:
        """The messages ``Follow`` sends, read from the shared log (see the module docstring).

        ``stale_from`` carries on a follower of this replica's own copy of a conversation that
        another replica took over, after it was sent updates from ``stale_from`` on that never
        reached the log: it gets ``gap`` (``OWNER_CHANGED``, ``first_missing`` = ``stale_from``)
        and a snapshot of the log, then the log's updates.

        Raises
        ------
        NotFoundError, EventError, PositionError, UnavailableError
            As the ingesting replica's ``Follow`` would, and ``UNAVAILABLE`` when Redis is
            unreachable at the start or this server stops (follow again elsewhere, from the
            next sequence number).
        """
        keys = self._keys(conversation_id)
        meta = await self._meta(keys, conversation_id)
        incarnation = meta[b"inc"]
        logged = int(meta.get(b"useq", b"0"))
        other_epoch = epoch not in (0, int(incarnation))
        # Seq 1 is the start of whichever epoch: nothing was seen that could be spliced onto.
        unchecked = epoch == 0 and from_seq is not None and from_seq > 1
        if from_seq is not None and from_seq < 1:
            raise EventError("field 'from_seq' must be at least 1 (sequence numbers count from 1)")
        if from_seq is not None and from_seq > logged + 1 and not other_epoch \
                and stale_from is None:
            raise PositionError(
                f"field 'from_seq' ({from_seq}) is beyond the next sequence number "
                f"({logged + 1}) of conversation {conversation_id}")
        client = self._log.client
        # A blocking read must return well within the connection's own timeout.
        block_ms = int(min(_BLOCK_MS, 500 * self._log.config.timeout_s))
        # Either the follower starts over from a snapshot of the log (after the gap notice, if
        # any, that says why), or it reads the log on from the position it asked for.
        read_on_from: int | None = None
        gap: tuple[int, int | None, pb.GapReason] | None = None
        if stale_from is not None:
            gap = (stale_from, None, pb.GAP_REASON_OWNER_CHANGED)
        elif from_seq is None or other_epoch or unchecked:
            if from_seq is not None:
                gap = (from_seq, await self._oldest(keys, logged), pb.GAP_REASON_EPOCH_MISMATCH)
        else:
            with _reachable():
                first: Any = await client.xrange(keys.updates, f"{from_seq}-0", "+", count=1)
            oldest = _entry(first[0][0])[0] if first else logged + 1
            if oldest > from_seq and from_seq <= logged:
                gap = (from_seq, oldest, pb.GAP_REASON_EVICTED)
            else:
                read_on_from = from_seq
        expected: int
        if read_on_from is None:
            messages, state, last_id, over = await self._start_over(keys, gap)
            for message in messages:
                yield message
            if over:
                return
            expected = state.seq + 1
        else:
            last_id = f"{read_on_from - 1}-0".encode()
            expected = read_on_from
        while True:
            if stop.done():
                raise UnavailableError(
                    f"this server is stopping; follow conversation {conversation_id} again "
                    f"elsewhere from seq {expected}")
            try:
                reply: Any = await client.xread({keys.updates: last_id},
                                                count=_READ_COUNT, block=block_ms)
                current = None if reply else await client.hget(keys.meta, "inc")
            except OUTAGES:
                await asyncio.sleep(_RETRY_S)  # the writer logs the outage once
                continue
            entries = reply[0][1] if reply else []
            if (current is not None and current != incarnation) or (
                    entries and entries[0][1].get(b"i") != incarnation):
                # Another conversation took over the id (this one had ended): say so and
                # carry on with it from a snapshot, as the ingesting replica would.
                messages, state, last_id, over = await self._start_over(
                    keys, (expected, None, pb.GAP_REASON_EPOCH_MISMATCH))
                incarnation = str(state.epoch).encode()
                for message in messages:
                    yield message
                if over:
                    return
                expected = state.seq + 1
                continue
            for entry_id, fields in entries:
                if fields.get(b"i") != incarnation:
                    break  # the next read tells the followers about the new conversation
                seq, is_end = _entry(entry_id)
                last_id = entry_id
                if not is_end and seq < expected:
                    continue
                if (is_end and seq >= expected) or (not is_end and seq > expected):
                    # Entries are missing here: tell, then start again from a snapshot.
                    messages, state, last_id, over = await self._start_over(
                        keys, (expected, seq + 1 if is_end else seq, pb.GAP_REASON_EVICTED))
                    for message in messages:
                        yield message
                    if over:
                        return
                    expected = state.seq + 1
                    break
                if is_end:
                    yield pb.ServerMessage.FromString(fields[b"end"])
                    return
                yield pb.ServerMessage(update=pb.Update.FromString(fields[b"u"]))
                expected = seq + 1

    async def _start_over(
            self, keys: ConversationKeys,
            gap: tuple[int, int | None, pb.GapReason] | None,
    ) -> tuple[list[pb.ServerMessage], _State, bytes, bool]:
        """What a follower is told when it starts over from a snapshot of the log.

        ``gap`` is ``(first missing, oldest kept, reason)`` of the notice that comes first
        (``None``: no notice; oldest kept ``None``: the oldest entry the log holds after the
        fold). Returns the messages (notice, snapshot, and the end when the conversation has
        ended), the folded state, the entry id to read on from and whether it has ended.
        """
        state, last_id, ended = await self._fold(keys)
        messages: list[pb.ServerMessage] = []
        if gap is not None:
            first_missing, oldest, reason = gap
            if oldest is None:
                oldest = await self._oldest(keys, state.seq)
            messages.append(pb.ServerMessage(gap=pb.Gap(
                first_missing=first_missing, oldest_kept=oldest, reason=reason)))
        messages.append(state.message(self._limits))
        if ended is not None:
            messages.append(ended)
        return messages, state, last_id, ended is not None

    async def _oldest(self, keys: ConversationKeys, logged: int) -> int:
        """The oldest sequence number the update stream holds (``logged + 1`` when none)."""
        with _reachable():
            first: Any = await self._log.client.xrange(keys.updates, "-", "+", count=1)
        return _entry(first[0][0])[0] if first else logged + 1

    # --- GetRevisions and the listing ----------------------------------------------------------

    async def revisions(self, conversation_id: str) -> pb.GetRevisionsReply:
        """Every state the log still holds, oldest first, within the message budget."""
        keys = self._keys(conversation_id)
        meta = await self._meta(keys, conversation_id)
        with _reachable():
            entries: Any = await self._log.client.xrange(keys.updates, "-", "+")
        kept: list[pb.Revision] = []
        for entry_id, fields in entries:
            seq, is_end = _entry(entry_id)
            if is_end:
                continue
            update = pb.Update.FromString(fields[b"u"])
            kept.extend(pb.Revision(seq=seq, server_time=update.server_time, word=word)
                        for word in update.words)
            kept.extend(pb.Revision(seq=seq, server_time=update.server_time, utterance=u)
                        for u in update.utterances)
        truncated = not entries or _entry(entries[0][0])[0] > 1
        room = message_budget(self._limits)
        revisions: list[pb.Revision] = []
        for revision in reversed(kept):  # newest first: a cut drops the oldest
            room -= revision.ByteSize() + 6
            if room < 0:
                truncated = True
                break
            revisions.append(revision)
        revisions.reverse()
        return pb.GetRevisionsReply(conversation_id=conversation_id, revisions=revisions,
                                    truncated=truncated, epoch=int(meta[b"inc"]))

    async def newer_than(self, conversation_id: str, epoch: int) -> bool:
        """Whether the log holds another conversation under this id than ``epoch`` (one that
        took the id over); ``False`` when Redis cannot be asked."""
        keys = self._keys(conversation_id)
        try:
            current: Any = await self._log.client.hget(keys.meta, "inc")
        except OUTAGES:
            return False
        return current is not None and int(current) != epoch

    async def summaries(self, skip: set[tuple[str, int]]) -> list[pb.ConversationSummary]:
        """Conversations the log holds (written within ``max_age_s``), but those in ``skip``
        (``(conversation id, epoch)`` pairs)."""
        client, config = self._log.client, self._log.config
        index = index_key(config.key_prefix)
        horizon = time.time() - config.max_age_s
        try:
            with contextlib.suppress(*TRANSIENT_REPLIES):
                # Housekeeping, and a write: a Redis not taking writes for now (a read-only
                # replica behind the address) still lists; the range below skips the old.
                await client.zremrangebyscore(index, "-inf", horizon)
            ids: Any = await client.zrangebyscore(index, horizon, "+inf", start=0,
                                                          num=_LIST_LIMIT)
            # Ids held here are asked about too: another replica may have reused one.
            wanted = [i.decode() for i in ids]
            async with client.pipeline(transaction=False) as pipe:
                for conversation_id in wanted:
                    pipe.hgetall(ConversationKeys.of(config.key_prefix, conversation_id).meta)
                metas: list[dict[bytes, bytes]] = await pipe.execute()
        except OUTAGES as exc:
            raise UnavailableError(f"the shared log is unreachable ({type(exc).__name__}); "
                                   "try again") from exc
        summaries = []
        for conversation_id, meta in zip(wanted, metas, strict=True):
            if not meta or b"inc" not in meta:
                continue  # expired since the index was read
            if (conversation_id, int(meta[b"inc"])) in skip:
                continue  # listed from this replica's memory
            speakers = meta.get(b"speakers", b"").decode()
            summaries.append(pb.ConversationSummary(
                conversation_id=conversation_id,
                speakers=speakers.split("\x1f") if speakers else [],
                words=int(meta.get(b"words", b"0")), last_seq=int(meta.get(b"useq", b"0")),
                started_at=float(meta.get(b"started", b"0")),
                ended=meta.get(b"ended") == b"1", epoch=int(meta[b"inc"])))
        return summaries

    # --- opening and continuing ----------------------------------------------------------

    async def check_new(self, conversation_id: str) -> None:
        """Refuse a new conversation whose caller-chosen id is live in the shared log.

        An unreachable log lets it through (the log's own check refuses to write it later).

        Raises
        ------
        ConflictError
            When another replica holds a live conversation with this id.
        """
        self._keys(conversation_id)  # an id no conversation can have is refused as such
        if await self.live_in_log([conversation_id]):
            raise ConflictError(
                f"conversation id {conversation_id!r} is live in the shared log; continue it "
                "with open.resume, or choose another id")

    async def live_in_log(self, conversation_ids: list[str]) -> set[str]:
        """Those of ``conversation_ids`` the shared log holds as live conversations, asked in
        one round trip (``FeedMany`` checks every ``open`` of a frame at once).

        Ids no conversation can have are left out (opening them refuses them), and an
        unreachable log answers none (the log's own check refuses to write them later). While
        the writer finds Redis unreachable it is not asked at all: each frame with an ``open``
        would otherwise wait out the connection timeout, holding up the stream's other
        channels.
        """
        if not self._log.healthy:
            return set()
        keys: list[tuple[str, ConversationKeys]] = []
        for conversation_id in conversation_ids:
            try:
                keys.append((conversation_id, self._keys(conversation_id)))
            except MidstreamError:
                continue
        if not keys:
            return set()
        try:
            async with self._log.client.pipeline(transaction=False) as pipe:
                for _, conversation in keys:
                    pipe.hmget(conversation.meta, ["inc", "ended"])
                replies: list[list[bytes | None]] = await pipe.execute()
        except OUTAGES:
            return set()
        return {conversation_id for (conversation_id, _), (inc, ended) in
                zip(keys, replies, strict=True) if inc is not None and ended != b"1"}

    async def resume(self, conversation_id: str, registry: SessionRegistry, bundle: Bundle, *,
                     owner: str = "", epoch: int = 0) -> tuple[Session, int]:
        """Continue ``conversation_id`` here; returns the session and the events replayed.

        ``owner`` names the caller, as :meth:`SessionRegistry.open` takes it; ``epoch``, when
        not 0, the epoch of the conversation the caller means.

        The conversation is claimed only once it has been rebuilt and checked, and only if
        nothing was logged since it was read: a continuation that fails leaves the log as it
        was, so the caller can try again elsewhere, the replica that wrote it (when only cut
        off) goes on writing it, and should that replica be lost, the others end it after the
        grace as they would have (``docs/deploy.md``).

        Raises
        ------
        NotFoundError
            The log holds no such conversation, or holds another one under the id than
            ``epoch`` names (it took the id over).
        ProtocolStateError
            It has ended, or its logged input is incomplete (``INVALID_ARGUMENT``: nothing to
            continue; open a new conversation).
        ModelError
            It was decoded with other models, decoder settings or conversation setting than
            this replica's, or replaying its input did not give what the log holds
            (``FAILED_PRECONDITION``: continue it on a replica serving what it was decoded
            with).
        ConflictError
            It is live on this replica already, or its replica kept writing it while it was
            being rebuilt here (it is not lost).
        UnavailableError
            Redis is unreachable.
        """
        keys = self._keys(conversation_id)
        if any(s.id == conversation_id and s.live for s in registry.sessions()):
            raise ConflictError(f"conversation {conversation_id!r} is live on this replica")
        for _ in range(_CLAIM_TRIES):
            meta, events, logged = await self._whole(keys, conversation_id)
            self._continuable(conversation_id, meta, epoch)
            session = registry.open(conversation_id, bundle, owner=owner)
            try:
                missing = await self._rebuild(session, meta, events, logged)
                claimed = await self._claim(keys, conversation_id, meta, len(events))
            except MidstreamError as exc:
                self._abandoned(registry, session)
                if isinstance(exc, ProtocolStateError | ModelError | UnavailableError):
                    raise
                raise ProtocolStateError(
                    f"conversation {conversation_id!r} cannot be continued: replaying its "
                    "logged input was refused") from exc
            except BaseException:
                self._abandoned(registry, session)
                raise
            if claimed:
                break
            self._abandoned(registry, session)  # written meanwhile: read it again
        else:
            raise ConflictError(
                f"conversation {conversation_id!r} is still being written by its replica; "
                "it is not lost, go on there")
        journal = session.journal
        assert isinstance(journal, ConversationJournal)
        previous = meta.get(b"owner", b"").decode()
        if previous and previous != self._log.owner:
            # The replica that wrote it may be only cut off: it learns at its next renewal and
            # moves its followers to the log (a refused write would tell it too, later).
            told = taken_key(self._log.config.key_prefix, previous)
            with contextlib.suppress(*OUTAGES):
                await self._log.client.sadd(told, f"{journal.incarnation}:{conversation_id}")
                await self._log.client.pexpire(told, int(self._log.config.max_age_s * 1000))
        journal.replaying = False
        journal.first_kept = 1
        session.clock = time.time
        for item in missing:
            journal.republished(item)
        self._log.queued(journal, 0)
        _log.info("conversation %s continued here from %d logged events (seq %d, %d updates "
                  "the log lacked)", conversation_id, len(events), session.seq, len(missing))
        return session, len(events)

    def _abandoned(self, registry: SessionRegistry, session: Session) -> None:
        """Drop a session whose continuation failed. The conversation is not this replica's
        (unless a claim whose answer was lost is still to be undone), so its id leaves this
        replica's owned set should the lease keeper have added it back meanwhile."""
        registry.forget(session)
        if session.id not in self._log.unclaimed:
            self._log.disowned[session.id] = None

    async def _whole(self, keys: ConversationKeys, conversation_id: str,
                     ) -> tuple[dict[bytes, bytes], list[Any], list[Any]]:
        """The conversation's hash, logged input events and updates, read in one transaction
        (so they agree with each other)."""
        with _reachable():
            async with self._log.client.pipeline(transaction=True) as pipe:
                pipe.hgetall(keys.meta)
                pipe.xrange(keys.events, "-", "+")
                pipe.xrange(keys.updates, "-", "+")
                meta, events, logged = await pipe.execute()
        if not meta or b"inc" not in meta:
            raise NotFoundError(f"no live or kept conversation with id {conversation_id!r}")
        return dict(meta), events, logged

    def _continuable(self, conversation_id: str, meta: dict[bytes, bytes], epoch: int) -> None:
        """Refuse what the log says cannot be continued here (see :meth:`resume`)."""
        if epoch and int(meta[b"inc"]) != epoch:
            # Continuing it would splice the caller's words onto someone else's conversation.
            raise NotFoundError(
                f"no conversation with id {conversation_id!r} in epoch {epoch}: another "
                "conversation has taken the id over since; open a new one to go on")
        if meta.get(b"ended") == b"1":
            if meta.get(b"reason") == str(int(pb.END_REASON_OWNER_LOST)).encode():
                config = self._log.config
                raise ProtocolStateError(
                    f"conversation {conversation_id!r} has ended: its replica was lost and "
                    f"nobody continued it within orphan_grace_s ({config.orphan_grace_s:g} s "
                    f"after its lease of {config.lease_s:g} s lapsed); open a new one to go on")
            raise ProtocolStateError(f"conversation {conversation_id!r} has ended; open a new "
                                     "one to go on")
        if meta.get(b"resumable") != b"1":
            raise ProtocolStateError(
                f"conversation {conversation_id!r} cannot be continued: its logged input is "
                "incomplete (it outgrew max_events, or the shared log was unreachable longer "
                "than the local buffer held)")
        if meta.get(b"models", b"").decode() != self._log.models():
            raise ModelError(
                f"conversation {conversation_id!r} was decoded with other models, decoder "
                "settings or conversation setting than this replica serves; continue it on a "
                "replica serving the same")

    async def _rebuild(self, session: Session, meta: dict[bytes, bytes], events: list[Any],
                       logged: list[Any]) -> list[PublishedUpdate]:
        """Replay the logged input into the new ``session`` and check it against the log;
        returns the updates the log lacks. Nothing of it is written meanwhile."""
        journal = session.journal
        assert isinstance(journal, ConversationJournal)
        self._log.hold(journal)
        journal.incarnation = meta[b"inc"].decode()
        journal.models = self._log.models()
        journal.created = True
        journal.replaying = True
        journal.events_queued = journal.events_written = len(events)
        # The same conversation goes on: it keeps its epoch (followers' positions stay valid),
        # its start, and the times its updates were published (a follower reading them here
        # gets what it would have got from the dead replica).
        session.epoch = int(meta[b"inc"])
        session.started_at = float(meta.get(b"started", session.started_at))
        published = {_entry(entry_id)[0]: pb.Update.FromString(fields[b"u"]).server_time
                     for entry_id, fields in logged if not _entry(entry_id)[1]}
        session.clock = lambda: published.get(session.seq, time.time())
        stored: pb.Update | None = None  # the newest update the stream still holds
        for entry_id, fields in reversed(logged):
            if not _entry(entry_id)[1]:
                stored = pb.Update.FromString(fields[b"u"])
                break
        await self._replay(session, events)
        return self._check(session, int(meta.get(b"useq", b"0")), stored)

    async def _claim(self, keys: ConversationKeys, conversation_id: str,
                     meta: dict[bytes, bytes], events: int) -> bool:
        """Make this replica the conversation's owner if nothing changed since ``meta`` was
        read; ``False`` when something was logged meanwhile. (Added to this replica's owned
        set first; a failed claim's caller takes it out again: ``_abandoned``.)"""
        log = self._log
        client = log.client
        if self._claim_script is None:
            self._claim_script = client.register_script(_CLAIM)
        owned = owned_key(log.config.key_prefix, log.owner)
        # A fresh token per claim, so that undoing an uncertain claim never undoes a later one.
        token = secrets.token_hex(8)
        args = [meta[b"inc"], log.owner, meta.get(b"owner", b""), meta.get(b"useq", b"0"),
                str(events), token]
        try:
            # Owned before it is claimed: were this replica lost right after the claim, the
            # other replicas must find the conversation among its own.
            await client.sadd(owned, conversation_id)
            log.disowned.pop(conversation_id, None)
            result: Any = await self._claim_script(keys=[keys.meta], args=args)
        except OUTAGES as exc:
            if not refused(exc):
                # The claim may have landed with its answer lost: undone once Redis answers
                # (by the lease keeper), unless this replica has claimed it again by then.
                log.unclaim(keys, conversation_id, meta[b"inc"].decode(),
                            meta.get(b"owner", b"").decode(), token)
                raise UnavailableError(f"the shared log is unreachable ({type(exc).__name__}); "
                                       "try again") from exc
            raise ProtocolStateError(f"conversation {conversation_id!r} changed while being "
                                     "continued (ended, or started anew); try again") from exc
        return result in (b"OK", "OK")

    async def _replay(self, session: Session, events: list[Any]) -> None:
        limits = self._limits
        for index, (_, fields) in enumerate(events):
            if index and index % _REPLAY_SLICE == 0:
                await asyncio.sleep(0)
            apply_event(session, pb.ClientEvent.FromString(fields[b"e"]), time.monotonic(),
                        limits)

    @staticmethod
    def _check(session: Session, logged: int, stored: pb.Update | None,
               ) -> list[PublishedUpdate]:
        """Compare the replay with the log (``logged`` updates written, the newest still held
        ``stored``); return the updates the log lacks."""
        if logged > session.seq:
            raise ProtocolStateError(
                f"conversation {session.id} cannot be continued: the log holds updates up to "
                f"seq {logged} but its logged input gives only {session.seq}")
        if stored is not None:
            replayed = session.since(stored.seq - 1)
            if replayed and replayed[0].update.seq == stored.seq:
                mine = cv.update_to_wire(replayed[0].update)
                mine.server_time = stored.server_time
                if mine != stored:
                    raise ModelError(
                        f"conversation {session.id} cannot be continued: replaying its input "
                        f"gave a different update {stored.seq} than the log holds (other "
                        "models or decoder settings)")
        return session.since(logged)

