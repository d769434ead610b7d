"""Midstream's tagging models: features, the CRF adapter, incremental decoding, training.

``ModelBundle`` loads the word tagger (disfluency roles and utterance ends), the boundary model
and the utterance-function tagger; ``ConversationEngine`` turns one conversation's recogniser
events into hypothesis diffs. Each tagger loads on its own too (``WordModel``,
``BoundaryModel``, ``FunctionTagger``; the shipped files at the ``default_*_path`` functions).
Training lives in :mod:`midstream.models.training`, scoring in :mod:`midstream.models.evaluation`.
"""

from midstream import ModelInfo
from midstream.models._bundle import ModelBundle, default_functions_model_path
from midstream.models._engine import ConversationEngine, EngineConfig
from midstream.models.boundaries._model import BoundaryModel, default_boundary_model_path
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.words._decoder import DecoderConfig
from midstream.models.words._model import WordModel, default_words_model_path

__all__ = [
    "BoundaryModel",
    "ConversationEngine",
    "DecoderConfig",
    "EngineConfig",
    "FunctionTagger",
    "ModelBundle",
    "ModelInfo",
    "WordModel",
    "default_boundary_model_path",
    "default_functions_model_path",
    "default_words_model_path",
]
