"""Midstream's client library.

:class:`Client` is the asyncio client (an async context manager owning one channel);
:class:`SyncClient` wraps it for scripts. Everything they return is a domain type of
:mod:`midstream` or one of the result types here; failures raise :class:`midstream.MidstreamError`
subclasses mapped from gRPC status codes.
"""

from midstream import (
    AddWord,
    EndReason,
    GapReason,
    ModelInfo,
    ReplaceWord,
    SpeakerHint,
    TimeTick,
    WithdrawWord,
)
from midstream.client._client import Client, ConversationStream, MultiplexedStream, RetryPolicy
from midstream.client._inputs import TimedEvent, parse_ctm, parse_jsonl_events, read_events
from midstream.client._results import (
    ConversationSummary,
    Ended,
    Gap,
    Reconnected,
    Revision,
    RevisionHistory,
    Snapshot,
    TaggedTranscript,
    Welcome,
)
from midstream.client._sync import SyncClient, SyncConversation, SyncMultiplexedStream

__all__ = [
    "AddWord",
    "Client",
    "ConversationStream",
    "ConversationSummary",
    "EndReason",
    "Ended",
    "Gap",
    "GapReason",
    "ModelInfo",
    "MultiplexedStream",
    "Reconnected",
    "ReplaceWord",
    "RetryPolicy",
    "Revision",
    "RevisionHistory",
    "Snapshot",
    "SpeakerHint",
    "SyncClient",
    "SyncConversation",
    "SyncMultiplexedStream",
    "TaggedTranscript",
    "TimeTick",
    "TimedEvent",
    "Welcome",
    "WithdrawWord",
    "parse_ctm",
    "parse_jsonl_events",
    "read_events",
]
