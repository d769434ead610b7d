"""Training the utterance-function CRF, and choosing its settings by grouped cross-validation.

One training sequence is one conversation's utterances in time order (both speakers). To make the
label of a *growing* utterance good after its first few words, training can add a copy of each
conversation in which some utterances are cut to a random prefix and marked incomplete (prefix
augmentation); the utterance after a cut one still sees the full previous utterance, as it would
in a stream where the context is final.

Cross-validation folds hold whole conversations, so no conversation contributes to both the
training and the scoring side of a fold.
"""

from __future__ import annotations

import logging
import math
import random
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace

from midstream import SWBD42_CLASSES, Conversation, InputError, ModelError, UtteranceFunction
from midstream.models._artifact import ModelArtifact
from midstream.models._crf import shift_state_weights, train_crf
from midstream.models.functions._features import (
    SETTING_SEPARATOR,
    Features,
    FunctionFeatureConfig,
    chain_partners,
    setting_copies,
    utterance_features,
)
from midstream.models.functions._tagger import SCHEMES, FunctionTagger
from midstream.models.functions._views import UtteranceView, clean_view, conversation_views

_log = logging.getLogger(__name__)

_SWBD42 = frozenset(SWBD42_CLASSES)


@dataclass(frozen=True, slots=True, kw_only=True)
class FunctionTrainingOptions:
    """Settings of one training run (see :func:`train_function_model`).

    Parameters
    ----------
    scheme
        ``"coarse"`` (the seven coarse functions) or ``"swbd42"`` (the SWBD-DAMSL 42 classes; SwDA
        conversations only).
    c1, c2
        L1 and L2 regularisation weights of the CRF.
    min_freq
        Features seen fewer times in training are dropped (shrinks the model).
    max_iterations
        L-BFGS iterations.
    augment
        Probability that an utterance of two or more cleaned words is cut to a random prefix in
        the augmented copy of its conversation; 0 adds no copy.
    config
        Feature groups.
    coarse_from
        How a 42-class model derives its coarse function (``"sum"`` or ``"label"``).
    seed
        Seed of the augmentation's random cuts (training is otherwise deterministic).
    oversample
        ``(label, copies)`` pairs: for every utterance with that label, ``copies`` extra short
        training sequences of it, the :data:`OVERSAMPLE_CONTEXT` utterances before it and the
        :data:`OVERSAMPLE_AFTER` after it (the rare one cut to a random prefix with probability
        ``augment``). crfsuite has no class weights;
        repeating a rare class's windows is how its few examples weigh more, and the window is
        what the streaming tagger decodes anyway.
    balance
        Weigh pooled corpora alike: each corpus's conversations are trained on
        ``round(largest / own)`` times (at most :data:`MAX_BALANCE_COPIES`), where ``largest``
        and ``own`` count utterances, the repeats with fresh augmented cuts. crfsuite has no
        instance weights, and without it the largest corpus (SwDA, nine times Map Task) decides
        whatever the corpora's conventions disagree on.
    decode_bias
        ``(label, shift)`` pairs: ``shift`` added to the label's score at every utterance once
        training is done (to the weight of the ``bias`` feature every utterance carries, so
        crfsuite and the streaming tagger decode with it alike). A prior shift towards rare
        classes that L-BFGS's likelihood undervalues, chosen by cross-validation
        (:func:`cross_validate_biases`), never on held-out data.
    setting_features
        Learn each training corpus as a conversation setting
        (:attr:`FunctionFeatureConfig.settings`): a seeded :data:`SETTING_SHARE` of the training
        sequences carry, beside every feature, a copy named for their corpus, so the copies'
        weights learn where a corpus's conventions differ (what counts as a clarification
        request, an answer, a floor grab) and the shared weights, trained on every sequence and
        alone on the rest, still label a conversation of no known setting. The trained model's
        ``config.settings`` lists the corpora.
    """

    scheme: str = "swbd42"
    c1: float = 0.1
    c2: float = 0.01
    min_freq: int = 2
    max_iterations: int = 100
    augment: float = 0.5
    config: FunctionFeatureConfig = field(default_factory=FunctionFeatureConfig)
    coarse_from: str = "sum"
    seed: int = 0
    oversample: tuple[tuple[str, int], ...] = ()
    balance: bool = False
    decode_bias: tuple[tuple[str, float], ...] = ()
    setting_features: bool = False

    def to_json(self) -> dict[str, object]:
        return {
            "scheme": self.scheme, "c1": self.c1, "c2": self.c2, "min_freq": self.min_freq,
            "max_iterations": self.max_iterations, "augment": self.augment,
            "coarse_from": self.coarse_from, "seed": self.seed,
            "oversample": {label: copies for label, copies in self.oversample},
            "balance": self.balance,
            "decode_bias": {label: shift for label, shift in self.decode_bias},
            "setting_features": self.setting_features,
        }


#: Share of the training sequences that carry their corpus's setting copies with
#: :attr:`FunctionTrainingOptions.setting_features`: the others train the shared weights to
#: label on their own, as for a conversation of no known setting (common practice, no source;
#: a half was the first value tried, measured in the coarse model card, not tuned).
SETTING_SHARE = 0.5


#: Most times :attr:`FunctionTrainingOptions.balance` repeats a small corpus, so that a handful
#: of conversations pooled with a large corpus cannot grow the training set without bound
#: (common practice, no source; Map Task against SwDA needs 9).
MAX_BALANCE_COPIES = 10


def balance_copies(sizes: Mapping[str, int]) -> dict[str, int]:
    """How many times :attr:`FunctionTrainingOptions.balance` trains on each corpus, given
    each corpus's number of utterances.

    Examples
    --------
    >>> balance_copies({"big": 90, "small": 10, "tiny": 1, "none": 0})
    {'big': 1, 'small': 9, 'tiny': 10, 'none': 1}
    """
    largest = max(sizes.values(), default=0)
    return {corpus: min(MAX_BALANCE_COPIES, max(1, round(largest / size))) if size else 1
            for corpus, size in sizes.items()}


def _corpus_sizes(conversations: Iterable[Conversation]) -> dict[str, int]:
    sizes: dict[str, int] = {}
    for conversation in conversations:
        sizes[conversation.corpus] = sizes.get(conversation.corpus, 0) + len(
            conversation.utterances)
    return sizes


#: Utterances before a rare one that its oversampled window holds: the streaming tagger's
#: context (:data:`~midstream.models.functions._tagger.DEFAULT_CONTEXT`).
OVERSAMPLE_CONTEXT = 4
#: Utterances after it: windows that all ended on the rare class taught the tagger that the
#: last position of a window (where a stream's current utterance always is) is that class.
OVERSAMPLE_AFTER = 1


def _label(conversation: Conversation, index: int, scheme: str) -> str:
    utterance = conversation.utterances[index]
    if scheme == "coarse":
        return utterance.function.value
    if utterance.fine_class not in _SWBD42:
        raise InputError(
            f"conversation {conversation.id} utterance {index}: class {utterance.fine_class!r} "
            f"is not one of the SWBD-DAMSL 42 classes (train scheme 'swbd42' on SwDA only)"
        )
    return utterance.fine_class


def _augmented(conversation: Conversation, views: Sequence[UtteranceView], rng: random.Random,
               rate: float, config: FunctionFeatureConfig) -> list[Features]:
    out: list[Features] = []
    previous: UtteranceView | None = None
    partners = _partners(views, config)
    for utterance, view, partner in zip(conversation.utterances, views, partners, strict=True):
        shown = view
        n = len(utterance.words)
        if n >= 2 and rng.random() < rate:
            # Cut after a random number of *received* words, as a stream would show it.
            shown = clean_view(conversation, utterance, upto=rng.randint(1, n - 1))
        out.append(utterance_features(shown, previous, config, partner=partner))
        # The next utterance sees this one whole: in a stream its context is final.
        previous = view
    return out


def _partners(views: Sequence[UtteranceView],
              config: FunctionFeatureConfig) -> list[UtteranceView | None]:
    return chain_partners(views) if config.lookback else [None] * len(views)


def build_sequences(conversations: Iterable[Conversation],
                    options: FunctionTrainingOptions) -> tuple[list[list[Features]],
                                                               list[list[str]]]:
    """Feature and label sequences for training: one per conversation, plus augmented copies."""
    if options.scheme not in SCHEMES:
        raise InputError(f"unknown function scheme {options.scheme!r} "
                         f"(known: {', '.join(SCHEMES)})")
    xseqs: list[list[Features]] = []
    yseqs: list[list[str]] = []
    copies = dict(options.oversample)
    known = ({f.value for f in UtteranceFunction} if options.scheme == "coarse" else _SWBD42)
    unknown = sorted(set(copies) - known)
    if unknown:
        raise InputError(f"cannot oversample {', '.join(unknown)}: not a label of scheme "
                         f"{options.scheme!r}")
    conversations = list(conversations)
    repeats = balance_copies(_corpus_sizes(conversations)) if options.balance else {}
    for conversation in conversations:
        if not conversation.utterances:
            continue
        first = len(xseqs)
        views = conversation_views(conversation)
        labels = [_label(conversation, i, options.scheme) for i in range(len(views))]
        previous: UtteranceView | None = None
        xseq: list[Features] = []
        for view, partner in zip(views, _partners(views, options.config), strict=True):
            xseq.append(utterance_features(view, previous, options.config, partner=partner))
            previous = view
        xseqs.append(xseq)
        yseqs.append(labels)
        if options.augment > 0:
            # A string seed is hashed deterministically (not with Python's salted hash).
            rng = random.Random(f"{options.seed}:{conversation.id}")
            xseqs.append(_augmented(conversation, views, rng, options.augment, options.config))
            yseqs.append(labels)
        if copies:
            rng = random.Random(f"{options.seed}:rare:{conversation.id}")
            for i, label in enumerate(labels):
                for _ in range(copies.get(label, 0)):
                    xseqs.append(_rare_window(conversation, views, i, xseq=xseq, rng=rng,
                                              rate=options.augment, config=options.config))
                    yseqs.append(labels[max(0, i - OVERSAMPLE_CONTEXT):i + 1 + OVERSAMPLE_AFTER])
        for repeat in range(1, repeats.get(conversation.corpus, 1)):
            # A repeat is the same conversation again; its augmented copy is cut afresh, so the
            # repeats add prefixes a stream shows rather than the same ones again.
            xseqs.append(xseq)
            yseqs.append(labels)
            if options.augment > 0:
                rng = random.Random(f"{options.seed}:{conversation.id}:{repeat}")
                xseqs.append(_augmented(conversation, views, rng, options.augment,
                                        options.config))
                yseqs.append(labels)
        if options.setting_features:
            rng = random.Random(f"{options.seed}:setting:{conversation.id}")
            for k in range(first, len(xseqs)):
                if rng.random() < SETTING_SHARE:
                    xseqs[k] = [setting_copies(feats, conversation.corpus) for feats in xseqs[k]]
    return xseqs, yseqs


def _rare_window(conversation: Conversation, views: Sequence[UtteranceView], index: int, *,
                 xseq: Sequence[Features], rng: random.Random, rate: float,
                 config: FunctionFeatureConfig) -> list[Features]:
    """Utterance ``index`` with the ones before it, as the streaming tagger decodes it, and
    :data:`OVERSAMPLE_AFTER` after it: the window's first utterance opens the chain, the rare
    one is cut to a prefix with probability ``rate``."""
    start = max(0, index - OVERSAMPLE_CONTEXT)
    # Earlier partners are looked for within the window, as the streaming tagger does.
    partners = _partners(views[start:index + 1], config)
    window: list[Features] = []
    if index > start:
        window.append(utterance_features(views[start], None, config))
        window.extend(utterance_features(views[i], views[i - 1], config,
                                         partner=partners[i - start])
                      for i in range(start + 1, index))
    utterance = conversation.utterances[index]
    shown = views[index]
    n = len(utterance.words)
    if n >= 2 and rng.random() < rate:
        shown = clean_view(conversation, utterance, upto=rng.randint(1, n - 1))
    previous = views[index - 1] if index > start else None
    window.append(utterance_features(shown, previous, config, partner=partners[-1]))
    # The utterances after it see it whole, as a stream's context is final.
    window.extend(xseq[index + 1:index + 1 + OVERSAMPLE_AFTER])
    return window


def train_function_model(conversations: Iterable[Conversation],
                         options: FunctionTrainingOptions = FunctionTrainingOptions(),
                         *, command: str = "") -> ModelArtifact:
    """Train an utterance-function CRF on annotated conversations.

    Parameters
    ----------
    conversations
        Conversations with gold utterance functions; disfluency labels, where present, clean the
        utterances (conversations without them keep all words).
    options
        Scheme, hyper-parameters, augmentation and features.
    command
        The command line that started training, recorded in the artifact's provenance.

    Returns
    -------
    ModelArtifact
        Of kind ``"utterance_functions"``; load it with :meth:`FunctionTagger.from_artifact`.

    Raises
    ------
    InputError
        An unknown scheme, a class outside the scheme, or no utterances at all.
    ModelError
        The CRF trainer failed.
    """
    conversations = list(conversations)
    if options.setting_features:
        bad = sorted({c.corpus for c in conversations
                      if not c.corpus or SETTING_SEPARATOR in c.corpus})
        if bad:
            raise InputError(f"cannot learn corpus names {bad} as settings: a setting's name is "
                             f"not empty and holds no {SETTING_SEPARATOR!r}")
    started = time.monotonic()
    xseqs, yseqs = build_sequences(conversations, options)
    if not xseqs:
        raise InputError("no utterances to train the function model on")
    _log.info("training function model (%s) on %d conversations, %d sequences",
              options.scheme, len(conversations), len(xseqs))
    crf = train_crf(xseqs, yseqs, c1=options.c1, c2=options.c2, min_freq=options.min_freq,
                    max_iterations=options.max_iterations)
    crf = shift_state_weights(crf, BIAS_FEATURE, dict(options.decode_bias))
    config = options.config
    if options.setting_features:
        config = replace(config, settings=tuple(sorted({c.corpus for c in conversations})))
    seconds = time.monotonic() - started
    counts: dict[str, int] = {}
    for conversation in conversations:
        counts[conversation.corpus] = counts.get(conversation.corpus, 0) + 1
    labels = sorted({y for ys in yseqs for y in ys})
    return ModelArtifact(
        kind="utterance_functions",
        labels=tuple(labels),
        crf=crf,
        features={"scheme": options.scheme, "config": config.to_json(),
                  "coarse_from": options.coarse_from},
        hyper_parameters=options.to_json(),
        metadata={
            "training": {
                "conversations": counts,
                "utterances": sum(len(c.utterances) for c in conversations),
                "seconds": round(seconds, 1),
            },
            "command": command,
        },
    )


def conversation_folds(conversations: Sequence[Conversation], k: int) -> list[list[int]]:
    """Indices of ``conversations`` split into ``k`` folds of whole conversations.

    The assignment depends only on the conversation ids (sorted, then dealt round-robin), so it
    is reproducible and independent of input order.
    """
    if k < 2:
        raise InputError(f"cross-validation needs at least 2 folds, got {k}")
    if len(conversations) < k:
        raise InputError(f"{len(conversations)} conversations cannot fill {k} folds")
    order = sorted(range(len(conversations)), key=lambda i: conversations[i].id)
    return [order[f::k] for f in range(k)]


Scorer = Callable[[FunctionTagger, Sequence[Conversation]], dict[str, float]]


#: The feature every utterance carries (see ``_shape_features``), whose weights a decode bias
#: shifts.
BIAS_FEATURE = "bias"


def with_decode_bias(artifact: ModelArtifact,
                     bias: Sequence[tuple[str, float]]) -> ModelArtifact:
    """``artifact`` with ``bias`` added to its labels' scores (see
    :attr:`FunctionTrainingOptions.decode_bias`), recorded in its hyper-parameters."""
    hyper = dict(artifact.hyper_parameters)
    before = dict(hyper.get("decode_bias") or {})
    for label, shift in bias:
        before[label] = before.get(label, 0.0) + shift
    hyper["decode_bias"] = before
    return replace(artifact, crf=shift_state_weights(artifact.crf, BIAS_FEATURE, dict(bias)),
                   hyper_parameters=hyper)


def cross_validate(conversations: Sequence[Conversation], options: FunctionTrainingOptions,
                   *, folds: int, score: Scorer) -> dict[str, float]:
    """Mean of ``score``'s figures over conversation-grouped folds (train split only!).

    ``score(tagger, held_out)`` returns named figures for one fold; their means are returned.
    """
    return cross_validate_biases(conversations, options, [options.decode_bias], folds=folds,
                                 score=score)[0]


def cross_validate_biases(conversations: Sequence[Conversation],
                          options: FunctionTrainingOptions,
                          biases: Sequence[tuple[tuple[str, float], ...]], *, folds: int,
                          score: Scorer) -> list[dict[str, float]]:
    """:func:`cross_validate` of ``options`` with each decode bias of ``biases`` in turn.

    A bias changes no training, so each fold's model is trained once and scored with every
    bias; the figures of ``biases[i]`` are the ``i``-th of the list. A bias that some fold's
    model cannot take (L1 removed the label's bias weight there) scores ``{"score": nan}``, with
    a warning, and the grid carries on: one such cell must not cost a long run its other cells.
    """
    parts = conversation_folds(conversations, folds)
    totals: list[dict[str, float]] = [{} for _ in biases]
    unusable: set[int] = set()
    plain = replace(options, decode_bias=())
    for f, held in enumerate(parts):
        held_set = set(held)
        train = [c for i, c in enumerate(conversations) if i not in held_set]
        artifact = train_function_model(train, plain)
        for index, (bias, total) in enumerate(zip(biases, totals, strict=True)):
            if index in unusable:
                continue
            try:
                biased = with_decode_bias(artifact, bias)
            except ModelError as exc:
                _log.warning("fold %d/%d: decode bias %s left out of the grid: %s",
                             f + 1, folds, bias, exc)
                unusable.add(index)
                continue
            tagger = FunctionTagger.from_artifact(biased)
            figures = score(tagger, [conversations[i] for i in held])
            _log.info("fold %d/%d, bias %s: %s", f + 1, folds, bias, figures)
            for name, value in figures.items():
                total[name] = total.get(name, 0.0) + value
    return [{"score": math.nan} if index in unusable
            else {name: value / folds for name, value in total.items()}
            for index, total in enumerate(totals)]
