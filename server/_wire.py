"""The wire form of what a session sends: where the server's domain values become protobuf.

Sessions, their followers' queues, replay buffers and revision histories hold domain values
(:mod:`midstream.server._published`); the edge modules that write to a gRPC stream
(``_servicer``, ``_many``) or to the shared log (``_journal``, ``_replica``) convert them here.

An update is serialised at most once, into the ``ServerMessage`` bytes a ``Feed`` or ``Follow``
stream writes, and stored on its :class:`~midstream.server._published.PublishedUpdate`: the
caller, every follower and the shared log share those bytes (grpc writes bytes a handler
yields as they are, see :func:`midstream.server._decode.add_servicer`). The shared log stores
the ``Update`` inside them, which is the same bytes less the field's tag and length.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence

from midstream import Ended, Gap, Snapshot
from midstream.server._published import Outgoing, PublishedUpdate
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb

# Repeated fields cost their size plus a few bytes of framing each.
_STATE_FRAMING = 6


def update_message(item: PublishedUpdate) -> bytes:
    """The serialised ``ServerMessage`` carrying ``item``'s update, made once per update."""
    wire = item.wire
    if wire is None:
        message = pb.ServerMessage()
        cv.update_into_wire(item.update, message.update)
        wire = item.wire = message.SerializeToString()
    return wire


def update_bytes(item: PublishedUpdate) -> bytes:
    """The serialised ``Update`` of ``item`` (what the shared log stores), from the same bytes.

    A message whose only field is the ``update`` submessage is that field's tag (one byte, the
    field number is below 16), the submessage's length as a varint, then the submessage.
    """
    data = update_message(item)
    pos = 1
    while data[pos] & 0x80:
        pos += 1
    return data[pos + 1:]


def write_update(item: PublishedUpdate, message: pb.ServerMessage) -> None:
    """Write ``item``'s update into an empty ``message`` (one inside a reply frame).

    Parsed from the shared bytes when another reader made them already, else built in place
    (no bytes made: a multiplexed caller usually reads an update before any follower does).
    """
    wire = item.wire
    if wire is not None:
        message.MergeFromString(wire)
    else:
        cv.update_into_wire(item.update, message.update)


def snapshot_message(snapshot: Snapshot, budget: int) -> pb.ServerMessage:
    """The wire form of a snapshot within ``budget`` bytes (see ``message_budget``).

    When its states would not fit, the oldest are left out: a snapshot favours what is still
    changing.
    """
    return fitted_snapshot(
        seq=snapshot.seq, words=[cv.word_state_to_wire(w) for w in snapshot.words],
        utterances=[cv.utterance_state_to_wire(u) for u in snapshot.utterances],
        final=snapshot.conversation_final, epoch=snapshot.epoch, budget=budget)


def fitted_snapshot(*, seq: int, words: Sequence[pb.WordState],
                    utterances: Sequence[pb.UtteranceState], final: bool, epoch: int,
                    budget: int) -> pb.ServerMessage:
    """A snapshot message of wire states within ``budget`` bytes, the oldest left out first
    (the larger of the two oldest goes first). Sessions and the replica that serves a
    conversation from the shared log trim their snapshots alike through this."""
    word_sizes = deque(m.ByteSize() + _STATE_FRAMING for m in words)
    utterance_sizes = deque(m.ByteSize() + _STATE_FRAMING for m in utterances)
    total = sum(word_sizes) + sum(utterance_sizes)
    first_word = first_utterance = 0
    while total > budget and (word_sizes or utterance_sizes):
        if utterance_sizes and (not word_sizes or utterance_sizes[0] >= word_sizes[0]):
            total -= utterance_sizes.popleft()
            first_utterance += 1
        else:
            total -= word_sizes.popleft()
            first_word += 1
    return pb.ServerMessage(snapshot=pb.Snapshot(
        seq=seq, words=words[first_word:], utterances=utterances[first_utterance:],
        conversation_final=final, epoch=epoch,
    ))


def ended_message(ended: Ended) -> pb.ServerMessage:
    """The wire form of a conversation's end."""
    return pb.ServerMessage(ended=pb.Ended(reason=cv.end_reason_to_wire(ended.reason),
                                           last_seq=ended.last_seq))


def gap_message(gap: Gap) -> pb.ServerMessage:
    """The wire form of a gap notice."""
    return pb.ServerMessage(gap=pb.Gap(first_missing=gap.first_missing,
                                       oldest_kept=gap.oldest_kept,
                                       reason=cv.gap_reason_to_wire(gap.reason)))


def server_message(item: Outgoing, budget: int) -> pb.ServerMessage | bytes:
    """What a stream writes for ``item``: an update's shared bytes, else a message (a snapshot
    within ``budget`` bytes)."""
    if isinstance(item, PublishedUpdate):
        return update_message(item)
    if isinstance(item, Snapshot):
        return snapshot_message(item, budget)
    if isinstance(item, Gap):
        return gap_message(item)
    return ended_message(item)
