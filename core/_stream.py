"""What flows on a conversation's stream, defined once for every layer.

The events a caller sends (a recogniser's words, revisions, withdrawals, hints, time moving on),
why a follower misses updates or a conversation ends, what a served model is, and how diffs
merge. The server, the models, the client library and the command line all use these; the wire
enums are mapped onto them at each edge (``midstream.wire``, the client), nowhere else.

Units follow :mod:`midstream._types`: times in seconds.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

from midstream._types import HypothesisDiff, UtteranceHypothesis, Word, WordHypothesis

__all__ = [
    "AddWord",
    "EndReason",
    "Ended",
    "Gap",
    "GapReason",
    "InputEvent",
    "ModelInfo",
    "ReplaceWord",
    "Snapshot",
    "SpeakerHint",
    "TimeTick",
    "WithdrawWord",
    "merge_diffs",
]

# --- what a caller sends ----------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class AddWord:
    """A new recogniser word; ``word_id`` is unique within the conversation."""

    word_id: str
    word: Word


@dataclass(frozen=True, slots=True, kw_only=True)
class ReplaceWord:
    """The recogniser revised an earlier word: same ``word_id``, new text or times."""

    word_id: str
    word: Word


@dataclass(frozen=True, slots=True, kw_only=True)
class WithdrawWord:
    """The recogniser withdrew an earlier word."""

    word_id: str


@dataclass(frozen=True, slots=True, kw_only=True)
class SpeakerHint:
    """The speaker's utterance (or, with ``turn_end``, turn) ends after their last word."""

    speaker: str
    turn_end: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class TimeTick:
    """The stream's time moved on to ``time`` (seconds, the clock of the words' times) with no
    word: a silence the server weighs to close an utterance without waiting for the next word."""

    time: float


#: One event of a word stream, in the order a recogniser would produce it.
InputEvent = AddWord | ReplaceWord | WithdrawWord | SpeakerHint | TimeTick


# --- why a stream misses updates or ends ------------------------------------------------------


class GapReason(StrEnum):
    """Why a follower misses updates."""

    EVICTED = "evicted"
    """The asked-for position is older than the server's replay buffer keeps."""
    LAGGED = "lagged"
    """The follower read too slowly; the server dropped updates and sends a snapshot."""
    EPOCH_MISMATCH = "epoch_mismatch"
    """The position belonged to another conversation that used the same id (another epoch,
    e.g. before a server restart): the snapshot that follows is of the conversation now
    using it."""
    OWNER_CHANGED = "owner_changed"
    """Replicas sharing a log: the replica followed was fenced off as the conversation's writer
    (another continues it); what it sent from ``first_missing`` on never reached the log. The
    snapshot that follows is the log's state and replaces the follower's (its seq may be
    below what was sent)."""
    UNKNOWN = "unknown"
    """A reason this client version does not know."""


class EndReason(StrEnum):
    """Why a conversation ended."""

    CLOSED = "closed"
    IDLE_TIMEOUT = "idle_timeout"
    CALLER_VANISHED = "caller_vanished"
    SERVER_SHUTDOWN = "server_shutdown"
    REJECTED = "rejected"
    """The caller sent an event the server refused; the call failed with its error."""
    OWNER_LOST = "owner_lost"
    """Replicas sharing a log: the replica ingesting it was lost and nobody continued it within
    the grace; another replica ended it (no final update)."""
    UNKNOWN = "unknown"


# --- what a follower is sent besides updates --------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class Snapshot:
    """The whole current state as of ``seq`` (after a gap, or to a follower with no position)."""

    seq: int
    words: tuple[WordHypothesis, ...]
    utterances: tuple[UtteranceHypothesis, ...]
    conversation_final: bool
    epoch: int = 0


@dataclass(frozen=True, slots=True, kw_only=True)
class Gap:
    """Updates ``first_missing`` up to the following snapshot's seq will never be delivered."""

    first_missing: int
    oldest_kept: int
    reason: GapReason


@dataclass(frozen=True, slots=True, kw_only=True)
class Ended:
    """The conversation ended; ``last_seq`` is the seq of its last update (0 if none)."""

    reason: EndReason
    last_seq: int


# --- what serves it ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class ModelInfo:
    """A model in service: kind (``"words"``, ``"utterance_functions"``, ``"boundaries"``), file
    name, format, labels, checksum and the provenance its file records."""

    kind: str
    name: str
    format_version: int
    labels: tuple[str, ...]
    sha256: str
    training_summary: Mapping[str, Any] = field(default_factory=dict, hash=False, compare=False)



def merge_diffs(diffs: Iterable[HypothesisDiff]) -> HypothesisDiff:
    """One diff with the latest state of everything the given diffs (in order) touched.

    Applying the result has the same effect as applying the diffs one by one: a word withdrawn
    and then added again is present, one added and then withdrawn is withdrawn.
    """
    words: dict[str, WordHypothesis] = {}
    utterances: dict[str, UtteranceHypothesis] = {}
    withdrawn: dict[str, None] = {}
    for diff in diffs:
        for word in diff.words:
            withdrawn.pop(word.word_id, None)
            words[word.word_id] = word
        for utterance in diff.utterances:
            utterances[utterance.utterance_id] = utterance
        for word_id in diff.withdrawn_word_ids:
            words.pop(word_id, None)
            withdrawn[word_id] = None
    return HypothesisDiff(
        words=tuple(words.values()), utterances=tuple(utterances.values()),
        withdrawn_word_ids=tuple(withdrawn),
    )
