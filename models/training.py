"""Training Midstream's three models and choosing their settings by grouped cross-validation.

The public training API, the one the ``midstream train`` commands and the model-reproduction
script stand on. Every cross-validation here holds out whole conversations, drawn from the
training conversations it is given; none ever looks at a val or test split.

- **Word tagger** (disfluency roles crossed with utterance ends):
  :func:`train_word_artifact` with a :class:`WordTrainingConfig`; :func:`cross_validate_words`
  compares settings, :func:`tune_tag_bias` compares per-tag biases (:data:`BIAS_CANDIDATES`,
  :data:`RESTART_BIAS_CANDIDATES`) on the folds :func:`word_folds` draws. :data:`TAG_LABEL`
  names the tags a bias can be given.
- **Utterance-function tagger**: :func:`train_function_model` with
  :class:`FunctionTrainingOptions` (a label scheme of :data:`SCHEMES`, feature groups in
  :class:`FunctionFeatureConfig`); :func:`cross_validate_functions` averages a
  :data:`Scorer`'s figures over folds, and :func:`cross_validate_biases` scores decode-bias
  candidates on the same fold models.
- **Boundary model** (timing evidence for utterance ends): :func:`train_boundary_artifact`
  with a :class:`BoundaryTrainingConfig`; :func:`cross_validate_boundaries` chooses how it
  joins the word tagger (:class:`BoundaryConfig`).

Each trainer returns a :class:`ModelArtifact` (the model bytes with the command and
hyper-parameters that made them); :func:`save_artifact` writes one and :func:`load_artifact`
reads one back. Training holds the GIL for minutes: run it in its own process, never inside a
server.
"""

from __future__ import annotations

from collections.abc import Sequence

from midstream import Conversation
from midstream.models._artifact import ModelArtifact, load_artifact, save_artifact
from midstream.models.boundaries._model import BoundaryConfig
from midstream.models.boundaries._train import (
    BoundaryTrainingConfig,
    cross_validate_boundaries,
    train_boundary_artifact,
)
from midstream.models.functions._features import FunctionFeatureConfig
from midstream.models.functions._tagger import SCHEMES
from midstream.models.functions._train import (
    FunctionTrainingOptions,
    Scorer,
    cross_validate_biases,
    train_function_model,
)
from midstream.models.functions._train import cross_validate as cross_validate_functions
from midstream.models.words._tags import TAG_LABEL
from midstream.models.words._train import (
    BIAS_CANDIDATES,
    RESTART_BIAS_CANDIDATES,
    BiasResult,
    WordTrainingConfig,
    _folds,
    cross_validate_words,
    train_word_artifact,
    tune_tag_bias,
)

__all__ = [
    "BIAS_CANDIDATES",
    "RESTART_BIAS_CANDIDATES",
    "SCHEMES",
    "TAG_LABEL",
    "BiasResult",
    "BoundaryConfig",
    "BoundaryTrainingConfig",
    "FunctionFeatureConfig",
    "FunctionTrainingOptions",
    "ModelArtifact",
    "Scorer",
    "WordTrainingConfig",
    "cross_validate_biases",
    "cross_validate_boundaries",
    "cross_validate_functions",
    "cross_validate_words",
    "load_artifact",
    "save_artifact",
    "train_boundary_artifact",
    "train_function_model",
    "train_word_artifact",
    "tune_tag_bias",
    "word_folds",
]


def word_folds(conversations: Sequence[Conversation], folds: int, *, subset: int | None = None,
               seed: int = 0) -> list[list[Conversation]]:
    """The folds :func:`cross_validate_words` and :func:`tune_tag_bias` hold out, in order.

    Parameters
    ----------
    conversations : Sequence[Conversation]
        Training conversations; only disfluency-annotated ones are dealt.
    folds : int
        Number of folds.
    subset : int or None
        Deal only this many conversations of a seeded shuffle (``None``: all).
    seed : int
        Seed of the shuffle; the same seed gives the same folds as the cross-validation.

    Returns
    -------
    list[list[Conversation]]
        ``folds`` groups of whole conversations.

    Raises
    ------
    midstream.InputError
        Fewer annotated conversations than folds.
    """
    return _folds(conversations, folds, subset, seed)
