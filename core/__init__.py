"""Midstream: streaming disfluency and utterance-function tagging over recogniser words.

The root package holds the domain types, the exception tree and the token normalisation
(transcript token to recogniser word) shared by every layer, and says which build is running:
``midstream.corpora`` reads annotated conversations, ``midstream.models`` tags them,
``midstream.server`` serves the models over gRPC and ``midstream.client`` talks to it.
"""

from midstream._build import build_name, compiled_modules
from midstream._errors import (
    CorpusNotFoundError,
    EventError,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    TranscriptFormatError,
    UnavailableError,
)
from midstream._normalise import NormalisedToken, normalise_token
from midstream._schemes import (
    SWBD42_CLASSES,
    MappingRow,
    coarse_function,
    mapping_rows,
    swbd42_class,
)
from midstream._stream import (
    AddWord,
    Ended,
    EndReason,
    Gap,
    GapReason,
    InputEvent,
    ModelInfo,
    ReplaceWord,
    Snapshot,
    SpeakerHint,
    TimeTick,
    WithdrawWord,
    merge_diffs,
)
from midstream._types import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    Repair,
    Utterance,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
)

__all__ = [
    "REMOVED_FROM_CLEAN_TEXT",
    "SWBD42_CLASSES",
    "AddWord",
    "Conversation",
    "CorpusNotFoundError",
    "DisfluencyLabel",
    "EndReason",
    "Ended",
    "EventError",
    "Gap",
    "GapReason",
    "HypothesisDiff",
    "HypothesisUpdate",
    "InputError",
    "InputEvent",
    "LimitExceededError",
    "MappingRow",
    "MidstreamError",
    "ModelError",
    "ModelInfo",
    "NormalisedToken",
    "NotFoundError",
    "Repair",
    "ReplaceWord",
    "Snapshot",
    "SpeakerHint",
    "TimeTick",
    "TranscriptFormatError",
    "UnavailableError",
    "Utterance",
    "UtteranceFunction",
    "UtteranceHypothesis",
    "WithdrawWord",
    "Word",
    "WordHypothesis",
    "build_name",
    "coarse_function",
    "compiled_modules",
    "mapping_rows",
    "merge_diffs",
    "normalise_token",
    "swbd42_class",
]
__version__ = "0.1.0"
