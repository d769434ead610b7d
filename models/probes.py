"""The word and function taggers' inner stages, public for the benchmarks that time them alone.

A benchmark that times one stage of the models (``midstream bench decoder``, ``midstream bench
functions``) or replays one decision without applying it (``scripts/abandon_live_check.py``)
needs the stage itself, not the engine around it. These are the very objects the engine calls,
re-exported unchanged so the timed code path is the served one; they are not a stable API
for anything else and may change with the models.

- **Word tagger**: :class:`ChannelDecoder`, the streaming decoder of one channel;
  :class:`Token`, :func:`token_of` and :func:`features_at`, the feature function it calls per
  word; :func:`channel_sequences` and :func:`decode_tag`, the training sequences and the tag
  alphabet; :class:`AbandonCues`, :func:`abandon_examples` and :func:`fit_abandon`, the
  abandoned-unit model and its training step.
- **Function tagger**: :class:`UtteranceView`, the view of an utterance the tagger reads;
  :func:`clean_view`, building it from a corpus utterance; :func:`utterance_features`, the
  feature extraction ``label_partial`` runs before decoding.
"""

from __future__ import annotations

from collections.abc import Sequence

from midstream.models.functions._features import utterance_features
from midstream.models.functions._views import UtteranceView, clean_view
from midstream.models.words._abandon import AbandonCues
from midstream.models.words._decoder import ChannelDecoder
from midstream.models.words._features import Token, features_at, token_of
from midstream.models.words._tags import channel_sequences, decode_tag
from midstream.models.words._train import AbandonExample, _fit_abandon, abandon_examples

__all__ = [
    "AbandonCues",
    "AbandonExample",
    "ChannelDecoder",
    "Token",
    "UtteranceView",
    "abandon_examples",
    "channel_sequences",
    "clean_view",
    "decode_tag",
    "features_at",
    "fit_abandon",
    "token_of",
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
