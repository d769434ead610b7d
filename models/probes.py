"""The word and function taggers' inner stages, public for the benchmarks that time them alone.

A benchmark that times one stage of the models (``midstream bench decoder``, ``midstream bench
functions``) or replays one decision without applying it (``scripts/abandon_live_check.py``)
needs the stage itself, not the engine around it. These are the very objects the engine calls,
re-exported unchanged so the timed code path is the served one; they are not a stable API
for anything else and may change with the models.

- **Word tagger**: :class:`ChannelDecoder`, the streaming decoder of one channel;
  :class:`Token`, :func:`token_of` and :func:`features_at`, the feature function it calls per
  word; :func:`channel_sequences` and :func:`decode_tag`, the training sequences and the tag
  alphabet; :class:`AbandonCues`, :func:`abandon_examples`, :func:`abandon_features` and
  :func:`fit_abandon`, the abandoned-unit model, its features and its training step;
  :func:`decode_lattice`, the whole-channel lattice the held-out restart measurements decode
  with (``scripts/restart_heldout_check.py``).
- **Function tagger**: :class:`UtteranceView`, the view of an utterance the tagger reads;
  :func:`clean_view`, building it from a corpus utterance; :func:`utterance_features`, the
  feature extraction ``label_partial`` runs before decoding.
"""

from __future__ import annotations

from collections.abc import Sequence

from midstream.models._lattice import decode_lattice
from midstream.models.functions._features import utterance_features
from midstream.models.functions._views import UtteranceView, clean_view
from midstream.models.words._abandon import WHOLE_UNIT, AbandonCues, abandon_features
from midstream.models.words._classes import CLOSED_CLASSES
from midstream.models.words._decoder import ChannelDecoder
from midstream.models.words._features import (
    FeatureConfig,
    Token,
    features_at,
    token_of,
    tokens_from_words,
)
from midstream.models.words._tags import END_SUFFIX, channel_sequences, decode_tag
from midstream.models.words._train import AbandonExample, _fit_abandon, abandon_examples

__all__ = [
    "CLOSED_CLASSES",
    "END_SUFFIX",
    "WHOLE_UNIT",
    "AbandonCues",
    "AbandonExample",
    "ChannelDecoder",
    "FeatureConfig",
    "Token",
    "UtteranceView",
    "abandon_examples",
    "abandon_features",
    "channel_sequences",
    "clean_view",
    "decode_lattice",
    "decode_tag",
    "features_at",
    "fit_abandon",
    "token_of",
    "tokens_from_words",
    "utterance_features",
]


def fit_abandon(examples: Sequence[AbandonExample]) -> dict[str, float]:
    """The abandoned-unit model's weights fitted on ``examples``, as training fits them.

    Parameters
    ----------
    examples : Sequence[AbandonExample]
        Units from :func:`abandon_examples`.

    Returns
    -------
    dict[str, float]
        What ``AbandonCues`` is built from (the trainer's own step, unchanged).
    """
    return _fit_abandon(examples)
