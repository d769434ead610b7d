"""Midstream's tagging models: features, the CRF adapter, incremental decoding, training.

``ModelBundle`` loads the word tagger (disfluency roles and utterance ends) and the
utterance-function tagger; ``ConversationEngine`` turns one conversation's recogniser events
into hypothesis diffs.
"""

from midstream import ModelInfo
from midstream.models._bundle import ModelBundle
from midstream.models._engine import ConversationEngine, EngineConfig
from midstream.models.words._decoder import DecoderConfig

__all__ = ["ConversationEngine", "DecoderConfig", "EngineConfig", "ModelBundle", "ModelInfo"]
