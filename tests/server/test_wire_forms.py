"""What a session publishes reaches the wire byte for byte as the conversion functions give it,
and each update is turned into bytes once for its caller, every follower and the shared log."""

from __future__ import annotations

import pytest
from midstream import (
    DisfluencyLabel,
    Ended,
    EndReason,
    Gap,
    GapReason,
    HypothesisDiff,
    HypothesisUpdate,
    Snapshot,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
)
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._metrics import ServerMetrics
from midstream.server._published import PublishedUpdate
from midstream.server._session import Session
from midstream.server._wire import (
    ended_message,
    gap_message,
    server_message,
    snapshot_message,
    update_bytes,
    update_message,
    write_update,
)
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import bundle_fixture, models_dir_fixture

__all__ = ["bundle_fixture", "models_dir_fixture"]


def _word(index: int, *, start: float | None = None) -> WordHypothesis:
    return WordHypothesis(word_id=f"w{index}", speaker="A", label=DisfluencyLabel.FILLER,
                          confidence=0.25 + index / 1000, revision=index % 3, final=index % 2 == 0,
                          reparandum_of=None if index % 4 else "w0", text=f"word{index}",
                          start=start, end=None if start is None else start + 0.2)


def _utterance(words: int) -> UtteranceHypothesis:
    return UtteranceHypothesis(
        utterance_id="u1", speaker="A", word_ids=tuple(f"w{i}" for i in range(words)),
        clean_text="an invented clean text", function=UtteranceFunction.QUESTION,
        fine_class="qy", confidence=0.5, revision=1, final=False)


# One word (a length under 128 bytes: a one-byte varint), and forty (several bytes of length).
@pytest.mark.parametrize("words", [1, 40])
def test_an_update_s_shared_bytes_are_the_conversion_s(words: int) -> None:
    update = HypothesisUpdate(
        seq=7, server_time=1_700_000_000.25, epoch=12345, conversation_final=words > 1,
        diff=HypothesisDiff(words=tuple(_word(i, start=i * 0.5 if i % 2 else None)
                                        for i in range(words)),
                            utterances=(_utterance(words),), withdrawn_word_ids=("w99",)))
    item = PublishedUpdate(update)
    expected = pb.ServerMessage(update=cv.update_to_wire(update))
    assert update_message(item) == expected.SerializeToString()
    assert update_bytes(item) == cv.update_to_wire(update).SerializeToString()
    # Into a reply frame: built in place before the bytes exist, parsed from them after.
    built = pb.ServerMessage()
    write_update(PublishedUpdate(update), built)
    parsed = pb.ServerMessage()
    write_update(item, parsed)
    assert built == parsed == expected
    assert built.SerializeToString() == parsed.SerializeToString() == item.wire


def test_gaps_and_ends_take_the_wire_values_of_their_reasons() -> None:
    assert gap_message(Gap(first_missing=3, oldest_kept=9, reason=GapReason.LAGGED)) == \
        pb.ServerMessage(gap=pb.Gap(first_missing=3, oldest_kept=9,
                                    reason=pb.GAP_REASON_LAGGED))
    assert ended_message(Ended(reason=EndReason.REJECTED, last_seq=4)) == \
        pb.ServerMessage(ended=pb.Ended(reason=pb.END_REASON_REJECTED, last_seq=4))
    # A conversation a fault ended says no reason, as it always did on the wire.
    assert ended_message(Ended(reason=EndReason.UNKNOWN, last_seq=0)).ended.reason == \
        pb.END_REASON_UNSPECIFIED
    for reason in EndReason:
        assert cv.end_reason_from_wire(cv.end_reason_to_wire(reason)) is reason
    for gap_reason in GapReason:
        assert cv.gap_reason_from_wire(cv.gap_reason_to_wire(gap_reason)) is gap_reason
    assert cv.end_reason_from_wire(99) is EndReason.UNKNOWN
    assert cv.gap_reason_from_wire(99) is GapReason.UNKNOWN


def test_a_snapshot_over_the_budget_leaves_out_its_oldest_states() -> None:
    words = tuple(_word(i, start=float(i)) for i in range(30))
    snapshot = Snapshot(seq=30, words=words, utterances=(_utterance(30),),
                        conversation_final=False, epoch=5)
    whole = snapshot_message(snapshot, 1_000_000)
    assert [w.word_id for w in whole.snapshot.words] == [w.word_id for w in words]
    assert whole.snapshot.epoch == 5 and whole.snapshot.seq == 30
    budget = whole.snapshot.ByteSize() // 2
    cut = snapshot_message(snapshot, budget)
    kept = [w.word_id for w in cut.snapshot.words]
    assert 0 < len(kept) < len(words)
    assert kept == [w.word_id for w in words[-len(kept):]]  # the newest stay
    assert cut.snapshot.ByteSize() <= budget
    assert server_message(snapshot, budget) == cut


def test_one_update_is_serialised_once_for_its_caller_and_every_follower(
        bundle: ModelBundle) -> None:
    session = Session("shared", bundle.new_engine(), ServerLimits(), ServerMetrics())
    followers = []
    for _ in range(3):
        _, follower = session.follow(None)
        assert follower is not None
        followers.append(follower)
    session.add_words([("w1", Word(text="well", speaker="A", start=0.0, end=0.3))], 0.0)
    queued = [follower._queue[0] for follower in followers]
    (sent,) = session.since(session.seq - 1)
    assert all(item is sent for item in queued)  # one item for everybody
    first = server_message(queued[0], 1_000_000)
    assert isinstance(first, bytes)
    # Every other reader gets the very same bytes, not a second conversion.
    assert all(server_message(item, 1_000_000) is first for item in queued[1:])
    assert update_message(sent) is first
    # The final update too: the caller reading it after the end shares the followers' item.
    session.finish(EndReason.CLOSED)
    final = followers[0]._queue[-2]
    assert isinstance(final, PublishedUpdate) and final.update.conversation_final
    assert session.since(final.update.seq - 1) == [final]
    assert session.closing_messages == (final, Ended(reason=EndReason.CLOSED,
                                                     last_seq=final.update.seq))
