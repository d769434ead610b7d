"""A conversation's memory stays within its byte limits however large its batches.

The replay buffer, the revision history and the snapshot tables are bounded in estimated bytes
(``replay_bytes``, ``history_bytes``, ``snapshot_bytes``), and the estimate never falls below
what the records really take. Measured with ``tracemalloc`` while one conversation is filled
with maximal batches: 512 words each, ids and speaker names of ``max_id_chars`` characters,
words of ``max_word_chars`` characters (non-ASCII, the costliest per character).
"""

from __future__ import annotations

import gc
import tracemalloc
from collections import OrderedDict

from midstream import EndReason, Gap, Snapshot, Word
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._metrics import ServerMetrics
from midstream.server._registry import SessionRegistry
from midstream.server._session import Session, _Recent
from midstream.server._wire import server_message
from server_kit import bundle_fixture, models_dir_fixture  # noqa: F401 - fixtures by name

_LIMITS = ServerLimits(replay_bytes=256 * 1024, history_bytes=512 * 1024,
                       snapshot_bytes=256 * 1024)
#: What the engine of such a conversation holds at most, measured by this test's fill (the
#: remembered word ids dominate: 4,096 ids of 128 characters); docs/limits.md gives it.
ENGINE_BYTES = 3 * 1024 * 1024


def _maximal_batch(batch: int, limits: ServerLimits) -> list[tuple[str, Word]]:
    words = []
    for i in range(limits.max_words_per_message):
        number = batch * limits.max_words_per_message + i
        word_id = f"{number:08d}".ljust(limits.max_id_chars, "x")
        speaker = ("AB"[number % 2] * limits.max_id_chars)
        # Non-ASCII letters cost up to four bytes each; varied so no cache holds them.
        text = ("é" + chr(0x4E00 + number % 500)) * (limits.max_word_chars // 2)
        words.append((word_id, Word(text=text, speaker=speaker, start=float(number))))
    return words


def _kept_containers(session: Session) -> None:
    """Empty the session's kept state in place (what the estimate counts)."""
    session._replay = _Recent(1)
    session._revisions = _Recent(1)
    session._words = OrderedDict()
    session._utterances = OrderedDict()


def test_a_conversation_fed_maximal_batches_stays_within_its_byte_bound(
        bundle: ModelBundle) -> None:
    gc.collect()
    tracemalloc.start()
    try:
        before, _ = tracemalloc.get_traced_memory()
        registry = SessionRegistry(_LIMITS, ServerMetrics())
        session = registry.open("big", bundle)
        for batch in range(3):
            session.add_words(_maximal_batch(batch, _LIMITS), received=0.0)
        gc.collect()
        filled, _ = tracemalloc.get_traced_memory()
        estimate = session.kept_bytes
        newest_two = session._replay.bytes  # what the replay buffer holds: see below
        _kept_containers(session)
        gc.collect()
        without_kept, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # The buffers really filled: each was cut at its byte limit, not its count.
    assert session.revisions_truncated and session.seq == 3
    # The estimate counts at least what the kept records really take...
    assert filled - without_kept <= estimate
    # ...and stays within the limits: the replay buffer holds only the two newest updates
    # here (each maximal update costs more than replay_bytes), which it keeps whatever they
    # cost; the other buffers stay within theirs.
    assert newest_two > _LIMITS.replay_bytes
    assert estimate - newest_two <= _LIMITS.history_bytes + _LIMITS.snapshot_bytes
    # The whole conversation, engine included, within the documented bound.
    assert filled - before <= estimate + ENGINE_BYTES
    assert registry.kept.used == estimate


def test_the_server_budget_forgets_ended_then_sheds_the_largest(bundle: ModelBundle) -> None:
    # Each conversation may keep 6 MiB, the server 3 MiB in all.
    limits = ServerLimits(max_kept_bytes=3 * 1024 * 1024, replay_bytes=2 * 1024 * 1024,
                          history_bytes=2 * 1024 * 1024, snapshot_bytes=2 * 1024 * 1024)
    registry = SessionRegistry(limits, ServerMetrics())
    small = registry.open("small", bundle, owner="a")
    small.add_words(_maximal_batch(0, limits)[:4], received=0.0)
    ended = registry.open("ended", bundle, owner="a")
    ended.add_words(_maximal_batch(1, limits)[:4], received=0.0)
    registry.close(ended, EndReason.CLOSED)
    big = registry.open("big", bundle, owner="b")
    for batch in range(2, 8):
        big.add_words(_maximal_batch(batch, limits), received=0.0)
        assert registry.kept.used <= limits.max_kept_bytes
    assert registry.kept.used == sum(s.kept_bytes for s in registry.sessions())
    names = [s.id for s in registry.sessions()]
    assert "ended" not in names  # forgotten first
    # The small conversation kept everything: the large one gave up its oldest records.
    assert not small.revisions_truncated and big.revisions_truncated
    assert big.oldest_kept > 1


def test_one_caller_cannot_flush_every_ended_conversation(bundle: ModelBundle) -> None:
    registry = SessionRegistry(ServerLimits(max_ended_conversations=4), ServerMetrics())
    for name in ("a1", "a2"):
        registry.close(registry.open(name, bundle, owner="caller-a"), EndReason.CLOSED)
    for n in range(20):  # caller b ends conversation after conversation
        registry.close(registry.open(f"b{n}", bundle, owner="caller-b"), EndReason.CLOSED)
    kept = [s.id for s in registry.sessions()]
    assert kept == ["a1", "a2", "b18", "b19"]


async def test_a_follower_queue_is_bounded_in_bytes(bundle: ModelBundle) -> None:
    limits = ServerLimits(follower_queue_bytes=256 * 1024)
    session = SessionRegistry(limits, ServerMetrics()).open("followed", bundle)
    backlog, follower = session.follow(None)
    assert follower is not None
    session.add_words(_maximal_batch(0, limits)[:8], received=0.0)  # small: queued
    session.add_words(_maximal_batch(1, limits), received=0.0)  # a maximal batch: over
    messages = follower.messages(backlog)
    kinds = [type(await anext(messages)) for _ in range(3)]
    # The snapshot it started with, then told it lagged and given the state: no maximal batch
    # queued for a reader that holds more than its share.
    assert kinds == [Snapshot, Gap, Snapshot]
    await messages.aclose()  # type: ignore[attr-defined]


def test_a_follower_queue_s_estimate_covers_its_updates_and_their_wire_bytes(
        bundle: ModelBundle) -> None:
    # Word by word (the usual update: a word or two and an utterance), and with every queued
    # update's wire bytes made, as a follower's stream makes them when it writes.
    limits = ServerLimits(follower_queue=1_000, follower_queue_bytes=1 << 30)
    words = [(f"w{i}", Word(text=("so", "um", "well", "what")[i % 4] + f"{i}", speaker="AB"[i % 2],
                            start=float(i))) for i in range(200)]

    def fill(session: Session) -> None:
        for word in words:
            session.add_words([word], received=0.0)
            session.since(session.seq - 1)  # the caller reads each, as Feed does

    unfollowed = Session("alone", bundle.new_engine(), limits, ServerMetrics())
    followed = Session("followed", bundle.new_engine(), limits, ServerMetrics())
    _, follower = followed.follow(None)
    assert follower is not None
    gc.collect()
    tracemalloc.start()
    try:
        start, _ = tracemalloc.get_traced_memory()
        fill(unfollowed)
        gc.collect()
        middle, _ = tracemalloc.get_traced_memory()
        fill(followed)
        for item in follower._queue:
            server_message(item, 1 << 20)
        gc.collect()
        end, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    queued = len(follower._queue)
    assert queued == followed.seq  # nothing was dropped
    assert (end - middle) - (middle - start) <= follower._bytes
