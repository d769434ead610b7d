"""Typed values the client library hands back: server messages, summaries, revision histories.

Generated protobuf types never leave ``midstream.client``: every reply is converted into these
frozen dataclasses (or the domain types of :mod:`midstream`) at the edge. The input events a
caller sends, the gap and end reasons, ``Snapshot``, ``Gap``, ``Ended`` and ``ModelInfo`` are the
core's (:mod:`midstream`), shared with the server and the models.

Units follow :mod:`midstream._types`: times in seconds, ``server_time`` in Unix seconds.
"""

from __future__ import annotations

from dataclasses import dataclass

from midstream import (
    Ended,
    Gap,
    HypothesisUpdate,
    Snapshot,
    UtteranceHypothesis,
    WordHypothesis,
)

# Snapshot, Gap and Ended are the core's, named here with the rest of what a stream yields.
__all__ = [
    "ConversationSummary",
    "Ended",
    "Gap",
    "Reconnected",
    "Revision",
    "RevisionHistory",
    "ServerEvent",
    "Snapshot",
    "TaggedTranscript",
    "Welcome",
]


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
class Reconnected:
    """A follower lost its connection and is reconnecting (a client-side notice).

    Yielded after the back-off wait, just before the new ``Follow`` call. ``from_seq`` is the
    first seq it asks for (``None``: a fresh snapshot); ``attempt`` counts consecutive
    attempts from 1.
    """

    from_seq: int | None
    attempt: int


#: Anything :meth:`Client.feed` or :meth:`Client.follow` yields.
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
