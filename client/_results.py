"""Typed values the client library hands back: server messages, summaries, revision histories.

Generated protobuf types never leave ``midstream.client``: every reply is converted into these
frozen dataclasses (or the domain types of :mod:`midstream`) at the edge. Input events a caller
sends are here too, so a transcript reader and a live recogniser feed the same methods.

Units follow :mod:`midstream._types`: times in seconds, ``server_time`` in Unix seconds.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

from midstream import HypothesisUpdate, UtteranceHypothesis, Word, WordHypothesis

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


# --- what the server says on a stream -----------------------------------------------------------


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
    UNKNOWN = "unknown"


@dataclass(frozen=True, slots=True, kw_only=True)
class Welcome:
    """The server accepted a conversation; ``next_seq`` is the seq the next update carries.

    ``epoch`` tells this conversation apart from any other that uses or used the same id (0:
    a server that does not say); give it with a ``from_seq`` to :meth:`Client.follow`.
    ``events_logged``: for a conversation continued with ``resume=True``, how many of the
    caller's events (after opening) the server holds; send the rest, from the next one on.
    """

    conversation_id: str
    next_seq: int
    epoch: int = 0
    events_logged: int = 0


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


@dataclass(frozen=True, slots=True, kw_only=True)
class Reconnected:
    """A follower lost its connection and is reconnecting (a client-side notice).

    Yielded after the back-off wait, just before the new ``Follow`` call. ``from_seq`` is the
    first seq it asks for (``None``: a fresh snapshot); ``attempt`` counts consecutive
    attempts from 1.
    """

    from_seq: int | None
    attempt: int


#: Anything :meth:`Client.converse` or :meth:`Client.follow` yields.
ServerEvent = Welcome | HypothesisUpdate | Snapshot | Gap | Ended | Reconnected


# --- unary replies ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class ConversationSummary:
    """One live or recently ended conversation the server keeps."""

    conversation_id: str
    speakers: tuple[str, ...]
    words: int
    last_seq: int
    started_at: float
    ended: bool
    epoch: int = 0


@dataclass(frozen=True, slots=True, kw_only=True)
class ModelInfo:
    """A model in service: ``kind`` is ``"words"`` or ``"utterance_functions"``."""

    kind: str
    name: str
    format_version: int
    labels: tuple[str, ...]
    sha256: str
    training_summary: dict[str, Any] = field(default_factory=dict, hash=False, compare=False)


@dataclass(frozen=True, slots=True, kw_only=True)
class TaggedTranscript:
    """The final hypotheses of a whole transcript tagged in one call."""

    words: tuple[WordHypothesis, ...]
    utterances: tuple[UtteranceHypothesis, ...]


@dataclass(frozen=True, slots=True, kw_only=True)
class Revision:
    """One state a word or utterance had, published with update ``seq``."""

    seq: int
    server_time: float
    state: WordHypothesis | UtteranceHypothesis


@dataclass(frozen=True, slots=True, kw_only=True)
class RevisionHistory:
    """Every published state of a conversation's words and utterances, in seq order.

    ``truncated`` is true when the server's history limit dropped the oldest revisions.
    """

    conversation_id: str
    revisions: tuple[Revision, ...]
    truncated: bool
    epoch: int = 0
