"""Per-conversation state: sequence numbers, what was published, the replay buffer, followers.

One :class:`Session` per conversation owns its engine while the conversation is live. Every
method runs synchronously on the event loop thread and never awaits, so an engine call, the
update it produces and its delivery to every follower's queue happen as one step: no follower
can register between an update and its delivery, and none can miss or see one twice.

Memory is bounded per conversation by :class:`~midstream.server.ServerLimits`: the replay buffer
(``replay_updates`` updates), the revision history (``history_revisions`` states), the latest
states for snapshots (``snapshot_states``) and each follower's queue (``follower_queue``).

The replay buffer, the revision history and the snapshot tables keep published states as
records of plain values (:mod:`~midstream.server._kept`), which the cycle collector stops
tracking, so its pauses do not grow with the history the server keeps; records become objects
again only when read.

A session speaks only in domain values (:mod:`midstream.server._published`): it never builds a
protobuf message. The edge modules turn what it publishes into wire form when they write it
(:mod:`midstream.server._wire`), once per update however many read it. Kept state therefore
holds no protobuf arena (about 1.5 KB per message however small its content, measured with
``mallinfo2`` on protobuf 7.36), which would be the largest part of what an idle conversation
kept.

Followers (:mod:`~midstream.server._followers`) get every update through their own bounded
queue; the registry of all conversations is :mod:`~midstream.server._registry`.
"""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
from collections import OrderedDict
from collections.abc import Callable, Iterator
from typing import Generic, Protocol, TypeVar

from midstream import (
    Ended,
    EndReason,
    EventError,
    Gap,
    GapReason,
    HypothesisDiff,
    HypothesisUpdate,
    LimitExceededError,
    Snapshot,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
    merge_diffs,
)
from midstream.server._config import ServerLimits
from midstream.server._followers import Follower
from midstream.server._kept import (
    REVISION_ENTRY_BYTES,
    TABLE_ENTRY_BYTES,
    UPDATE_SEQ,
    UTTERANCE_REVISION,
    WORD_REVISION,
    UpdateRecord,
    UtteranceRecord,
    WordRecord,
    is_utterance_record,
    is_word_record,
    pack_update,
    pack_utterance,
    pack_word,
    unpack_update,
    unpack_utterance,
    unpack_word,
    update_record_bytes,
    utterance_record_bytes,
    word_record_bytes,
)
from midstream.server._limits import SpeakerTimeline, check_id
from midstream.server._metrics import ServerMetrics
from midstream.server._models import Engine
from midstream.server._published import QUEUED_UPDATE_BYTES, Outgoing, PublishedUpdate
from midstream.server._silence import SilenceClock
from midstream.server._status import PositionError, ProtocolStateError

_log = logging.getLogger(__name__)

State = WordHypothesis | UtteranceHypothesis
_T = TypeVar("_T")


def new_epoch() -> int:
    """A conversation's epoch: random, never 0 (0 means "none given" on the wire).

    53 bits, so that it survives any JSON reader as a number (a double holds integers up to
    2**53 exactly); two incarnations of one id share an epoch once in 2**53.
    """
    return secrets.randbelow(2**53 - 1) + 1


class Journal(Protocol):
    """Where a session also records what it publishes (a shared log, ``midstream.server._journal``).

    Every method is called synchronously from the session's own step and must not block: it
    queues what it is given and writes later.
    """

    def published(self, update: PublishedUpdate) -> None:
        """An update was published (called with every update, in sequence order); the item is
        the one its caller and followers are sent, so its wire form is shared with them."""

    def accepted(self, serialised: Callable[[], bytes]) -> None:
        """An input event after ``open`` was applied without error (``close`` excluded);
        ``serialised`` gives its wire bytes (called only when the event is logged)."""

    def ended(self, ended: Ended) -> None:
        """The conversation ended."""


def message_budget(limits: ServerLimits) -> int:
    """Bytes a reply built from kept state may use: the message limit less room for framing."""
    return int(limits.max_message_bytes * 0.9)


class KeptBytes:
    """The estimated bytes every conversation of one server keeps, against ``max_kept_bytes``.

    Sessions add what they keep and take off what they drop; when ``used`` goes over ``limit``
    they call :attr:`relieve` (the registry's, which forgets ended conversations and sheds the
    oldest records of the largest live ones). Use from the event loop thread only.
    """

    __slots__ = ("limit", "relieve", "used")

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.used = 0
        self.relieve: Callable[[], None] = lambda: None


class _Recent(Generic[_T]):
    """The newest items appended, oldest first: at most ``capacity`` of them and, when given
    costs, at most ``byte_capacity`` bytes of them (the newest ``keep`` are kept regardless).

    A ``deque(maxlen=...)`` allocates a 64-slot block (over 500 bytes) when made, and a session
    has two; this list grows with its content instead. Evicted slots are cleared at once, and
    the list is compacted when more than half of it is evicted slots, so it holds at most about
    twice ``capacity`` slots and appending stays amortised O(1).
    """

    __slots__ = ("_costs", "_head", "_items", "byte_capacity", "bytes", "capacity", "evicted",
                 "keep")

    def __init__(self, capacity: int, byte_capacity: int | None = None, keep: int = 0) -> None:
        self.capacity = capacity
        self.byte_capacity = byte_capacity
        self.keep = keep
        self._items: list[_T | None] = []
        self._costs: list[int] = []  # parallel to _items
        self._head = 0  # index of the oldest kept item
        self.bytes = 0  # the costs of the kept items
        self.evicted = False  # whether any item was ever dropped

    def append(self, item: _T, cost: int = 0) -> int:
        """Keep ``item`` (which costs ``cost`` bytes), dropping the oldest over the limits.

        Returns the change in :attr:`bytes`.
        """
        self._items.append(item)
        self._costs.append(cost)
        self.bytes += cost
        freed = 0
        if len(self._items) - self._head > self.capacity:
            freed += self._drop_oldest()
        byte_capacity = self.byte_capacity
        if byte_capacity is not None:
            while self.bytes > byte_capacity and len(self) > self.keep:
                freed += self._drop_oldest()
        return cost - freed

    def shed(self, goal: int) -> int:
        """Drop the oldest items (all but the newest ``keep``) until ``goal`` bytes are freed.

        Returns the bytes freed.
        """
        freed = 0
        while freed < goal and len(self) > self.keep:
            freed += self._drop_oldest()
        return freed

    def _drop_oldest(self) -> int:
        items, head = self._items, self._head
        cost = self._costs[head]
        items[head] = None  # release the evicted item now
        self.bytes -= cost
        self.evicted = True
        head = self._head = head + 1
        if head * 2 > len(items):
            del items[:head]
            del self._costs[:head]
            self._head = 0
        return cost

    def __len__(self) -> int:
        return len(self._items) - self._head

    def oldest(self) -> _T:
        """The oldest kept item; raises ``IndexError`` when empty."""
        if self._head >= len(self._items):
            raise IndexError("no items")
        return self._kept(self._head)

    def _kept(self, index: int) -> _T:
        item = self._items[index]
        assert item is not None  # only evicted slots (before _head) hold None
        return item

    def __iter__(self) -> Iterator[_T]:
        for index in range(self._head, len(self._items)):
            yield self._kept(index)

    def __reversed__(self) -> Iterator[_T]:
        for index in range(len(self._items) - 1, self._head - 1, -1):
            yield self._kept(index)


def _unpack_state(record: WordRecord | UtteranceRecord) -> State:
    if is_word_record(record):
        return unpack_word(record)
    if is_utterance_record(record):
        return unpack_utterance(record)
    raise ValueError(f"a kept record of {len(record)} fields is neither a word's nor an "
                     "utterance's")


class Session:
    """One conversation: its engine while live, and what it published.

    Not thread-safe: use it from the event loop thread only.
    """

    # Thousands may be live at once: no per-instance __dict__.
    __slots__ = (
        "_budget", "_ended", "_engine", "_followers", "_metrics", "_newest", "_replay",
        "_revisions", "_shared", "_silence", "_table_bytes", "_utterances", "_words",
        "clock",
        "closing_messages", "end_reason", "ended_at",
        "epoch", "id", "journal", "limits", "owner", "revisions_truncated", "seq", "started_at",
        "superseded", "timeline",
        "word_count",
    )

    def __init__(self, conversation_id: str, engine: Engine, limits: ServerLimits,
                 metrics: ServerMetrics, *, budget: KeptBytes | None = None,
                 owner: str = "") -> None:
        self.id = conversation_id
        # Who opened it (the caller's address without its port), so that retention can share
        # room between callers: one caller cannot push everybody's ended conversations out.
        self.owner = owner
        self._budget = budget
        # Tells this conversation apart from any other that uses or used the same id: a
        # follower's position is only meaningful within one epoch. (A replica continuing the
        # same conversation after a failover would carry the epoch on rather than draw one.)
        self.epoch = new_epoch()
        self.started_at = time.time()
        # Stamps each update (Unix seconds); a conversation rebuilt from a shared log stamps
        # its replayed updates with the times they were first published.
        self.clock: Callable[[], float] = time.time
        self.limits = limits
        self.timeline = SpeakerTimeline(limits)
        self.word_count = 0
        self.seq = 0
        self.end_reason: EndReason | None = None
        self.ended_at: float | None = None
        # The final update and the end, once ended.
        self.closing_messages: tuple[Outgoing, ...] = ()
        self._engine: Engine | None = engine
        self._metrics = metrics
        # Made on first use (see ended_signal): most conversations never need one.
        self._ended: asyncio.Future[None] | None = None
        # The two newest updates are kept whatever they cost: the caller is sent what an event
        # published (at most an update and the final one) right after it.
        self._replay: _Recent[UpdateRecord] = _Recent(limits.replay_updates,
                                                      limits.replay_bytes, keep=2)
        # The newest update as published, so the usual read (the one update since the caller
        # was last sent) needs no record turned back into objects.
        self._newest: HypothesisUpdate | None = None
        # The newest update as followers and the shared log were given it, so the caller is
        # sent the same item (and its wire form is made once); dropped once the caller read it.
        self._shared: PublishedUpdate | None = None
        self._words: OrderedDict[str, WordRecord] = OrderedDict()
        self._utterances: OrderedDict[str, UtteranceRecord] = OrderedDict()
        # (seq, server time, record): one level of nesting, see midstream.server._kept.
        self._revisions: _Recent[tuple[int, float, WordRecord | UtteranceRecord]] = _Recent(
            limits.history_revisions, limits.history_bytes)
        self._table_bytes = 0  # the estimated bytes of _words and _utterances
        self.revisions_truncated = False
        # A dict rather than a set: an empty set costs over 200 bytes, an empty dict 64.
        self._followers: dict[Follower, None] = {}
        # Set by the registry when the server shares its log with other replicas.
        self.journal: Journal | None = None
        # With a shared log: another replica writes this conversation now (this one was fenced
        # off), so what this replica holds of it is stale; Follow, the listing and GetRevisions
        # serve it from the log (see moved_away).
        self.superseded = False
        # The server's clock, when the caller asked for it (see tick_by_server).
        self._silence: SilenceClock | None = None

    # --- ingest ---------------------------------------------------------------------------

    @property
    def live(self) -> bool:
        return self._engine is not None

    def ended_signal(self) -> asyncio.Future[None]:
        """A future that is done once the conversation has ended; one per session.

        Waiters add a done callback (or await it) instead of each running a task; never cancel
        it. Call from the event loop that serves the session.
        """
        if self._ended is None:
            self._ended = asyncio.get_running_loop().create_future()
            if not self.live:
                self._ended.set_result(None)
        return self._ended

    def tick_by_server(self, wake: Callable[[], None]) -> None:
        """Let the server's clock move this conversation's time on while no word arrives.

        ``wake`` is called (from a loop callback) after such a tick published an update. Ticks
        come at the engine's silence marks from ``server_tick_min_silence_s`` on; see
        :mod:`midstream.server._silence`.

        Raises
        ------
        ProtocolStateError
            When the conversation is recorded in a shared log: its logged input could not give
            the server's ticks back when it is continued on another replica.
        """
        engine = self._engine_or_error()
        if self.journal is not None:
            raise ProtocolStateError(
                "open.server_ticks is refused on servers sharing a log (midstream serve "
                "--redis): the server's ticks are not logged input, so the conversation could "
                "not be continued on another replica; send time ticks instead")
        least = self.limits.server_tick_min_silence_s
        marks = tuple(mark for mark in engine.silence_marks if mark >= least)
        if self._silence is not None:
            self._silence.cancel()
        self._silence = SilenceClock(self, marks, wake)

    @property
    def server_ticks(self) -> SilenceClock | None:
        """The server's clock of this conversation, when its caller asked for one."""
        return self._silence

    def _engine_or_error(self) -> Engine:
        if self._engine is None:
            raise EventError(f"conversation {self.id} has ended; no more events are taken")
        return self._engine

    def add_words(self, words: list[tuple[str, Word]], received: float,
                  ) -> HypothesisUpdate | None:
        """Give validated words to the engine; publish one update for the whole batch.

        On an engine error the words before the bad one stay applied and their update is
        published before the error propagates.
        """
        engine = self._engine_or_error()
        timeline = self.timeline
        diffs: list[HypothesisDiff] = []
        try:
            for word_id, word in words:
                timeline.check_new_word(word_id, word)
                diffs.append(engine.add_word(word_id, word))
                timeline.record(word)
        finally:
            silence = self._silence
            if silence is not None and diffs:
                for _, word in words[:len(diffs)]:
                    if word.end is not None:
                        silence.heard(word.end, received)
            if diffs:
                self.word_count += len(diffs)
                self._metrics.tally.words += len(diffs)
                # One diff needs no merging: an engine names each word and utterance at
                # most once per diff (merging it would give the same diff, rebuilt).
                update = self._publish(diffs[0] if len(diffs) == 1 else merge_diffs(diffs),
                                       received)
            else:
                update = None
        return update

    def replace_word(self, word_id: str, word: Word, received: float,
                     ) -> HypothesisUpdate | None:
        """The recogniser revised a word (same id, new text or times)."""
        engine = self._engine_or_error()
        self.timeline.check_speaker(word.speaker)
        diff = engine.replace_word(word_id, word)
        self.timeline.record(word)
        if self._silence is not None and word.end is not None:
            self._silence.heard(word.end, received)
        return self._publish(diff, received)

    def withdraw_word(self, word_id: str, received: float) -> HypothesisUpdate | None:
        """The recogniser withdrew a word."""
        diff = self._engine_or_error().withdraw_word(word_id)
        return self._publish(diff, received)

    def hint(self, speaker: str, *, turn_end: bool, received: float,
             ) -> HypothesisUpdate | None:
        """An utterance or turn of ``speaker`` ended."""
        engine = self._engine_or_error()
        check_id(speaker, "hint.speaker", self.limits)
        self.timeline.check_speaker(speaker)
        return self._publish(engine.hint(speaker, turn_end=turn_end), received)

    def tick(self, now: float, *, received: float) -> HypothesisUpdate | None:
        """The stream's time moved on to ``now`` (seconds, the word times' clock) with no word."""
        return self._publish(self._engine_or_error().tick(now), received)

    def finish(self, reason: EndReason) -> tuple[Outgoing, ...]:
        """Finalise everything and end the conversation; idempotent.

        Returns the final update and the ``ended`` message (also queued to every follower).
        The first call's reason wins.
        """
        if self._engine is None:
            return self.closing_messages
        engine, self._engine = self._engine, None
        if self._silence is not None:
            self._silence.cancel()
            self._silence = None
        try:
            diff = engine.finish()
        except Exception as exc:  # whatever broke, followers get the end
            # Publish the final mark anyway so followers are not left waiting. Only the type is
            # logged: an engine's message may quote words.
            _log.error("engine of conversation %s failed to finish (%s)", self.id,
                       type(exc).__name__)
            _log.debug("engine failure detail", exc_info=True)
            diff = HypothesisDiff()
        self._publish(diff, None, final=True)
        # Kept as the newest item too: the caller reading it (since) gets the very item the
        # followers and the shared log were given, whose wire form they share.
        final = self._shared
        assert final is not None  # a final update is always published
        self.end_reason = reason
        self.ended_at = time.time()
        ended = Ended(reason=reason, last_seq=self.seq)
        if self.journal is not None:
            self.journal.ended(ended)
        for follower in self._followers:
            follower.push_end(ended)
        self._followers.clear()
        self.closing_messages = (final, ended)
        if self._ended is not None and not self._ended.done():
            self._ended.set_result(None)
        _log.info("conversation %s ended (%s) after %d words, %d updates",
                  self.id, reason.value, self.word_count, self.seq)
        return self.closing_messages

    def _publish(self, diff: HypothesisDiff, received: float | None, *,
                 final: bool = False) -> HypothesisUpdate | None:
        # Runs once per word: the tables and limits are fetched once, not per state.
        if not diff and not final:
            return None
        seq = self.seq = self.seq + 1
        now = self.clock()
        update = self._newest = HypothesisUpdate(seq=seq, server_time=now, diff=diff,
                                                 conversation_final=final, epoch=self.epoch)
        history = self._revisions
        remember, limits = history.append, self.limits
        kept, table_limit = limits.snapshot_states, limits.snapshot_bytes
        table = table_before = self._table_bytes
        grown = 0  # bytes the replay buffer and the history grew by
        states_bytes = 0
        revised = 0
        words = self._words
        word_records: list[WordRecord] = []
        for word in diff.words:
            # A revision is a state whose revision count went up (not a word turning final).
            word_id = word.word_id
            record = pack_word(word)
            cost = word_record_bytes(record)
            states_bytes += cost
            before = words.get(word_id)
            if before is not None:
                revised += word.revision > before[WORD_REVISION]
                table -= word_record_bytes(before)
            else:
                revised += word.revision > 0
                table += TABLE_ENTRY_BYTES
            table += cost
            words[word_id] = record  # a known id keeps its place: the oldest are dropped first
            while len(words) > kept or (table > table_limit and words):
                table -= word_record_bytes(words.popitem(last=False)[1]) + TABLE_ENTRY_BYTES
            grown += remember((seq, now, record), cost + REVISION_ENTRY_BYTES)
            word_records.append(record)
        utterances = self._utterances
        utterance_records: list[UtteranceRecord] = []
        for utterance in diff.utterances:
            utterance_id = utterance.utterance_id
            urecord = pack_utterance(utterance)
            cost = utterance_record_bytes(urecord)
            states_bytes += cost
            previous = utterances.get(utterance_id)
            if previous is not None:
                revised += utterance.revision > previous[UTTERANCE_REVISION]
                table -= utterance_record_bytes(previous)
            else:
                revised += utterance.revision > 0
                table += TABLE_ENTRY_BYTES
            table += cost
            utterances[utterance_id] = urecord
            while len(utterances) > kept or (table > table_limit and utterances):
                table -= (utterance_record_bytes(utterances.popitem(last=False)[1])
                          + TABLE_ENTRY_BYTES)
            grown += remember((seq, now, urecord), cost + REVISION_ENTRY_BYTES)
            utterance_records.append(urecord)
        if history.evicted:
            self.revisions_truncated = True
        record_of_update = pack_update(update, word_records, utterance_records)
        update_bytes = update_record_bytes(record_of_update, states_bytes)
        grown += self._replay.append(record_of_update, update_bytes)
        for word_id in diff.withdrawn_word_ids:
            gone = words.pop(word_id, None)
            if gone is not None:
                table -= word_record_bytes(gone) + TABLE_ENTRY_BYTES
        self._table_bytes = table
        budget = self._budget
        if budget is not None:
            budget.used += grown + table - table_before
            if budget.used > budget.limit:
                budget.relieve()
        # One item for the caller, every follower and the shared log: its wire form is made
        # at most once, by whichever edge writes it first.
        item = self._shared = PublishedUpdate(update)
        if self._followers:
            cost = QUEUED_UPDATE_BYTES + update_bytes
            for follower in self._followers:
                follower.offer(item, seq, cost)
        journal = self.journal
        if journal is not None:
            journal.published(item)
        tally = self._metrics.tally
        tally.revisions += revised
        if received is not None:
            tally.observe_latency(time.monotonic() - received)
        return update

    @property
    def kept_bytes(self) -> int:
        """Estimated bytes of the replay buffer, the history and the snapshot tables."""
        return self._replay.bytes + self._revisions.bytes + self._table_bytes

    def shed(self, goal: int) -> int:
        """Drop the oldest kept records until ``goal`` bytes are freed; return the bytes freed.

        The replay buffer goes first (a follower resuming there gets ``gap`` ``EVICTED`` and a
        snapshot), then the history (``GetRevisions`` says ``truncated``), then the oldest
        states of the snapshot tables. The two newest updates stay. The caller accounts for
        the freed bytes (this does not touch the server's budget).
        """
        freed = self._replay.shed(goal)
        if freed < goal:
            dropped = self._revisions.shed(goal - freed)
            if dropped:
                self.revisions_truncated = True
            freed += dropped
        words, utterances = self._words, self._utterances
        while freed < goal and (words or utterances):
            if words and (not utterances or len(words) >= len(utterances)):
                cost = word_record_bytes(words.popitem(last=False)[1])
            else:
                cost = utterance_record_bytes(utterances.popitem(last=False)[1])
            freed += cost + TABLE_ENTRY_BYTES
            self._table_bytes -= cost + TABLE_ENTRY_BYTES
        return freed

    # --- reading ---------------------------------------------------------------------------

    @property
    def oldest_kept(self) -> int:
        """The oldest sequence number still in the replay buffer (``seq + 1`` when empty)."""
        return self._replay.oldest()[UPDATE_SEQ] if self._replay else self.seq + 1

    def _after(self, seq: int) -> list[HypothesisUpdate]:
        """Updates in the replay buffer after ``seq``, oldest first."""
        if self.seq == seq + 1 and self._newest is not None:
            # The usual case, one update since the caller was last sent: the newest one.
            return [self._newest]
        newer: list[HypothesisUpdate] = []
        for record in reversed(self._replay):
            if record[UPDATE_SEQ] <= seq:
                break
            newer.append(unpack_update(record))
        newer.reverse()
        return newer

    def since(self, seq: int) -> list[PublishedUpdate]:
        """Updates in the replay buffer after ``seq``, oldest first.

        The newest is the item followers and the shared log were given (its wire form is
        shared with them); the session forgets that item here, as the caller has now read it.
        """
        shared, self._shared = self._shared, None
        newest = self._newest
        if self.seq == seq + 1 and newest is not None:
            # The usual case (once per word): the newest update alone, no list rebuilt.
            return [shared if shared is not None and shared.update is newest
                    else PublishedUpdate(newest)]
        updates = self._after(seq)
        items = [PublishedUpdate(update) for update in updates[:-1]]
        if updates:
            newest = updates[-1]
            items.append(shared if shared is not None and shared.update.seq == newest.seq
                         else PublishedUpdate(newest))
        return items

    def snapshot(self) -> Snapshot:
        """The whole kept state as of the current sequence number, oldest states first.

        The edge leaves out the oldest when they would not fit in one message
        (:func:`midstream.server._wire.snapshot_message`).
        """
        return Snapshot(
            seq=self.seq, words=tuple(unpack_word(w) for w in self._words.values()),
            utterances=tuple(unpack_utterance(u) for u in self._utterances.values()),
            conversation_final=not self.live, epoch=self.epoch,
        )

    def revisions(self) -> tuple[list[tuple[int, float, State]], bool]:
        """Every kept published state with its sequence number and time, and ``truncated``."""
        return [(seq, when, _unpack_state(record)) for seq, when, record in self._revisions
                ], self.revisions_truncated

    def follow(self, from_seq: int | None, epoch: int = 0,
               ) -> tuple[list[Outgoing], Follower | None]:
        """Register a follower; return what it must be sent first and its live queue.

        ``from_seq=None`` starts with a snapshot. A position still in the replay buffer replays
        from there; an older one gets ``gap`` (``EVICTED``) and a snapshot. A position of
        another epoch (``epoch`` given and not this one's), or beyond 1 without an epoch, gets
        ``gap`` (``EPOCH_MISMATCH``) and a snapshot: sequence numbers of one conversation say
        nothing about another that reuses its id. On an ended conversation the backlog ends with
        ``ended`` and no follower is registered.

        Raises
        ------
        PositionError
            When ``from_seq`` is beyond the next sequence number (of this epoch).
        EventError
            When ``from_seq`` is 0 (sequence numbers count from 1).
        LimitExceededError
            When ``max_followers_per_conversation`` followers are already attached.
        """
        if from_seq is not None and from_seq < 1:
            raise EventError("field 'from_seq' must be at least 1 (sequence numbers count from 1)")
        other_epoch = epoch not in (0, self.epoch)
        if from_seq is not None and from_seq > self.seq + 1 and not other_epoch:
            raise PositionError(
                f"field 'from_seq' ({from_seq}) is beyond the next sequence number "
                f"({self.seq + 1}) of conversation {self.id}"
            )
        limit = self.limits.max_followers_per_conversation
        if self.live and len(self._followers) >= limit:
            raise LimitExceededError(
                "max_followers_per_conversation", limit,
                f"conversation {self.id} already has {limit} followers; "
                f"limit max_followers_per_conversation is {limit}",
            )
        backlog: list[Outgoing] = []
        # Seq 1 is the start of whichever epoch: nothing was seen that could be spliced onto.
        unchecked = epoch == 0 and from_seq is not None and from_seq > 1
        if other_epoch or unchecked:
            backlog.append(Gap(first_missing=from_seq if from_seq is not None else 1,
                               oldest_kept=self.oldest_kept, reason=GapReason.EPOCH_MISMATCH))
            backlog.append(self.snapshot())
        elif from_seq is None:
            backlog.append(self.snapshot())
        elif from_seq < self.oldest_kept:
            backlog.append(Gap(first_missing=from_seq, oldest_kept=self.oldest_kept,
                               reason=GapReason.EVICTED))
            backlog.append(self.snapshot())
        else:
            shared = self._shared
            for record in self._replay:
                if record[UPDATE_SEQ] >= from_seq:
                    # The newest may be the item the caller is about to be sent: share it.
                    backlog.append(shared if shared is not None
                                   and shared.update.seq == record[UPDATE_SEQ]
                                   else PublishedUpdate(unpack_update(record)))
        if not self.live:
            backlog.append(self.closing_messages[-1])
            return backlog, None
        follower = Follower(self, self.limits.follower_queue, self.limits.follower_queue_bytes)
        self._followers[follower] = None
        return backlog, follower

    def moved_away(self, logged: int) -> None:
        """Another replica writes this conversation now: hand every follower over to the
        shared log (:meth:`Follower.move`); ``logged`` is the newest sequence number this
        replica wrote there. Its caller, if still connected, carries on here."""
        self.superseded = True
        for follower in self._followers:
            follower.move(logged)
        self._followers.clear()

    def unfollow(self, follower: Follower) -> None:
        """Forget a follower whose stream ended; idempotent."""
        self._followers.pop(follower, None)

    @property
    def follower_count(self) -> int:
        return len(self._followers)

