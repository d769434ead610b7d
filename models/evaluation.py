"""Scoring Midstream's models on annotated conversations, replayed word by word.

The public evaluation API, the one ``midstream evaluate`` stands on. Every score uses only what
the stream had said at each moment: the models are fed one word at a time and never see a gold
boundary.

- :func:`evaluate_words` scores the word tagger's disfluency roles and utterance ends, final and
  incremental (keys and their sources in :mod:`midstream.models.words._eval`). The incremental
  measures are published ones: time to detection and delayed accuracy (Zwarts, Johnson & Dale,
  COLING 2010) and edit overhead (Baumann, Buß & Schlangen, Dialogue & Discourse 2011).
- :func:`evaluate_functions` scores the utterance-function tagger on gold utterances, as they
  grow and once complete.
- :func:`evaluate_engine` replays whole conversations through a :class:`ModelBundle`'s
  conversation engine, as a live caller would see them (predicted segmentation).
- :func:`as_recognised` turns annotated conversations into what a speech recogniser would give
  (no word fragments; seeded word errors under :class:`RecogniserConditions`), so each of the
  above can be scored on recogniser-like input.
"""

from __future__ import annotations

from midstream.models._eval_engine import evaluate_engine
from midstream.models._recogniser import RecogniserConditions, as_recognised
from midstream.models.functions._eval import evaluate_functions
from midstream.models.words._eval import evaluate_words

__all__ = [
    "RecogniserConditions",
    "as_recognised",
    "evaluate_engine",
    "evaluate_functions",
    "evaluate_words",
]
