"""Training the word CRF (disfluency roles crossed with utterance ends) from annotated corpora.

Training sequences are per speaker channel: one speaker's words in time order, so a repair that
continues across the other speaker's turn stays in one sequence. Features are computed over the
whole channel (so only a channel's last words lack right context, as in streaming), then the
channel is cut at utterance ends into sequences of at most ``chunk_length`` words.

Only disfluency-annotated conversations train (the tags are joint); hyper-parameters are chosen by
cross-validation grouped by conversation inside the training conversations given, never on
held-out data.
"""

from __future__ import annotations

import itertools
import logging
import random
import sys
import time
from collections import Counter
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import numpy.typing as npt
from midstream import Conversation, DisfluencyLabel, InputError
from midstream.models._artifact import ModelArtifact
from midstream.models._crf import CrfTagger, TrainingPairs, train_crf_from
from midstream.models._lattice import decode_lattice
from midstream.models.words._abandon import WHOLE_UNIT, AbandonCues, abandon_features
from midstream.models.words._classes import CLOSED_CLASSES
from midstream.models.words._eval import BinaryCounts, offline_scores
from midstream.models.words._features import FeatureConfig, features_at, tokens_from_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import (
    END_SUFFIX,
    INTERREGNUM_TAGS,
    TAG_LABEL,
    ChannelSequence,
    channel_sequences,
    chunk_at_ends,
)
from tqdm import tqdm

__all__ = [
    "ABANDON_MIN_PRECISION",
    "ABANDON_THRESHOLDS",
    "BIAS_CANDIDATES",
    "RESTART_BIAS_CANDIDATES",
    "AbandonExample",
    "BiasResult",
    "HeldOutChannel",
    "WordTrainingConfig",
    "abandon_examples",
    "build_lexicon",
    "cross_validate_words",
    "expand_tag_bias",
    "held_out_channels",
    "sweep_tag_bias",
    "train_abandon_cues",
    "train_word_artifact",
    "training_pairs",
    "tune_tag_bias",
]

_log = logging.getLogger(__name__)

#: Lexicon thresholds: a word needs this many training occurrences (common practice, no source).
_LEXICON_MIN_COUNT = 20
#: ... and this share of them labelled as the class (filled pause, edit term, discourse marker).
_LEXICON_MIN_SHARE = {"F": 0.5, "E": 0.2, "D": 0.2}
_LEXICON_LABEL = {
    DisfluencyLabel.FILLER: "F",
    DisfluencyLabel.EDIT_TERM: "E",
    DisfluencyLabel.DISCOURSE_MARKER: "D",
}


@dataclass(frozen=True, slots=True, kw_only=True)
class WordTrainingConfig:
    """Hyper-parameters of the word CRF.

    ``c1``/``c2``: L1/L2 regularisation; ``min_freq``: attributes seen fewer times are dropped;
    ``chunk_length``: longest training sequence (words); ``right``/``left``/``restart_span``:
    feature context (see :class:`~midstream.models.words._features.FeatureConfig`);
    ``word_classes``: use the closed-class substitution features; ``break_ahead``: the
    break-ahead features (see :class:`~midstream.models.words._features.FeatureConfig`);
    ``abandon_cues``: train the abandoned-unit model beside the CRF
    (:func:`train_abandon_cues`).
    """

    c1: float = 0.1
    c2: float = 0.01
    min_freq: int = 2
    max_iterations: int = 150
    chunk_length: int = 60
    right: int = 5
    left: int = 8
    restart_span: int = 5
    tag_bias: tuple[tuple[str, float], ...] = ()
    word_classes: bool = True
    break_ahead: bool = False
    abandon_cues: bool = False


def annotated_channels(conversations: Iterable[Conversation]) -> Iterator[ChannelSequence]:
    """Channels of the disfluency-annotated conversations (the others cannot train tags)."""
    for conversation in conversations:
        if conversation.disfluency_annotated:
            yield from channel_sequences(conversation)


def build_lexicon(conversations: Iterable[Conversation]) -> dict[str, str]:
    """Words whose training share as filled pause / edit term / discourse marker is high.

    Learned from the given (training) conversations only.
    """
    totals: Counter[str] = Counter()
    by_class: dict[str, Counter[str]] = {c: Counter() for c in _LEXICON_MIN_SHARE}
    for conversation in conversations:
        if conversation.labels is None:
            continue
        for word, label in zip(conversation.words, conversation.labels, strict=True):
            if word.fragment:
                continue
            totals[word.text] += 1
            cls = _LEXICON_LABEL.get(label)
            if cls is not None:
                by_class[cls][word.text] += 1
    lexicon: dict[str, str] = {}
    for text, total in totals.items():
        if total < _LEXICON_MIN_COUNT:
            continue
        shares = {c: by_class[c][text] / total for c in _LEXICON_MIN_SHARE}
        best = max(shares, key=shares.__getitem__)
        if shares[best] >= _LEXICON_MIN_SHARE[best]:
            lexicon[text] = best
    return dict(sorted(lexicon.items()))


def training_pairs(
    conversations: Sequence[Conversation], features: FeatureConfig, chunk_length: int
) -> Iterator[tuple[list[str], list[list[str]]]]:
    """(tags, per-word feature names) for every chunk of every annotated channel."""
    for channel in annotated_channels(conversations):
        assert channel.tags is not None
        tokens = tokens_from_words(channel.words, channel.after_other_speaker,
                                   channel.other_words)
        xs = [features_at(tokens, i, features) for i in range(len(tokens))]
        for piece in chunk_at_ends(len(tokens), channel.ends, max_length=chunk_length):
            yield [channel.tags[i] for i in piece], [xs[i] for i in piece]


def _pairs_factory(
    conversations: Sequence[Conversation], features: FeatureConfig, chunk_length: int
) -> TrainingPairs:
    def pairs() -> Iterator[tuple[Sequence[list[str]], Sequence[str]]]:
        for tags, xs in training_pairs(conversations, features, chunk_length):
            yield xs, tags

    return pairs


def train_word_artifact(
    conversations: Sequence[Conversation],
    config: WordTrainingConfig,
    *,
    metadata: dict[str, Any] | None = None,
) -> ModelArtifact:
    """Train the word CRF on ``conversations`` and wrap it with its provenance.

    Raises
    ------
    InputError
        None of the conversations carries disfluency annotation.
    ModelError
        crfsuite failed.
    """
    annotated = [c for c in conversations if c.disfluency_annotated]
    if not annotated:
        raise InputError("no disfluency-annotated conversations to train the word model on")
    features = FeatureConfig(right=config.right, left=config.left,
                             lexicon=build_lexicon(annotated),
                             restart_span=config.restart_span,
                             word_classes=dict(CLOSED_CLASSES) if config.word_classes else {},
                             break_ahead=config.break_ahead)
    started = time.monotonic()
    crf = train_crf_from(
        _pairs_factory(annotated, features, config.chunk_length),
        c1=config.c1,
        c2=config.c2,
        min_freq=config.min_freq,
        max_iterations=config.max_iterations,
    )
    seconds = time.monotonic() - started
    tag_counts: Counter[str] = Counter()
    for channel in annotated_channels(annotated):
        assert channel.tags is not None
        tag_counts.update(channel.tags)
    if config.tag_bias:
        features = replace(features,
                           tag_bias=expand_tag_bias(dict(config.tag_bias), tuple(tag_counts)))
    extra: dict[str, Any] = {}
    if config.abandon_cues:
        cues, report = train_abandon_cues(annotated)
        features = replace(features, abandon=cues)
        extra["abandon_cross_validation"] = report
    summary = {
        "conversations": len(annotated),
        "conversations_skipped_unannotated": len(conversations) - len(annotated),
        "corpora": sorted({c.corpus for c in annotated}),
        "words": sum(tag_counts.values()),
        "tag_counts": dict(sorted(tag_counts.items())),
        "training_seconds": round(seconds, 1),
    }
    return ModelArtifact(
        kind="words",
        labels=tuple(sorted(tag_counts)),
        crf=crf,
        features=features.to_json(),
        hyper_parameters={
            "c1": config.c1,
            "c2": config.c2,
            "min_freq": config.min_freq,
            "max_iterations": config.max_iterations,
            "chunk_length": config.chunk_length,
            "restart_span": config.restart_span,
            "tag_bias": dict(config.tag_bias),
            "word_classes": config.word_classes,
            "break_ahead": config.break_ahead,
            "abandon_cues": config.abandon_cues,
        },
        metadata={"training_data": summary, **extra, **(metadata or {})},
    )


@dataclass(frozen=True, slots=True, kw_only=True)
class CvResult:
    """Cross-validated scores of one hyper-parameter setting (means over folds)."""

    config: WordTrainingConfig
    reparandum_f1: float
    filler_f1: float
    segmentation_f1: float

    @property
    def objective(self) -> float:
        """What selection maximises: reparandum and utterance-end F1 weigh equally."""
        return (self.reparandum_f1 + self.segmentation_f1) / 2


def _folds(conversations: Sequence[Conversation], folds: int, subset: int | None,
           seed: int) -> list[list[Conversation]]:
    """Annotated conversations of a seeded random subset, dealt into ``folds`` groups."""
    annotated = [c for c in conversations if c.disfluency_annotated]
    if len(annotated) < folds:
        raise InputError(f"{len(annotated)} annotated conversations, fewer than {folds} folds")
    rng = random.Random(seed)
    pool = sorted(annotated, key=lambda c: c.id)
    rng.shuffle(pool)
    if subset is not None:
        pool = pool[:subset]
    return [pool[k::folds] for k in range(folds)]


def cross_validate_words(
    conversations: Sequence[Conversation],
    base: WordTrainingConfig,
    *,
    grid: Sequence[dict[str, Any]],
    folds: int,
    subset: int | None,
    seed: int = 0,
    progress: bool = True,
) -> list[CvResult]:
    """Score each grid point by K-fold cross-validation grouped by conversation.

    Folds are drawn from (a seeded random subset of) the given training conversations; scoring
    decodes held-out folds offline (whole channels) for speed.
    """
    fold_of = _folds(conversations, folds, subset, seed)
    results = []
    bar = tqdm(total=len(grid) * folds, desc="cross-validation", file=sys.stderr,
               disable=not progress)
    for point in grid:
        config = replace(base, **point)
        sums: dict[str, float] = {}
        for k in range(folds):
            held = fold_of[k]
            train = list(itertools.chain.from_iterable(fold_of[j] for j in range(folds) if j != k))
            model = WordModel.from_artifact(train_word_artifact(train, config))
            scores = offline_scores(held, model)
            for name, value in scores.items():
                sums[name] = sums.get(name, 0.0) + value / folds
            bar.update(1)
        result = CvResult(
            config=config,
            reparandum_f1=sums["reparandum_f1"],
            filler_f1=sums["filler_f1"],
            segmentation_f1=sums["segmentation_f1"],
        )
        _log.info("cv %s: %s", point, result)
        results.append(result)
    bar.close()
    return results


FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]


#: Tag biases ``--tune-bias`` compares: a raised last reparandum word moves the interruption
#: point's threshold, the others follow it a little (grid: common practice, no source).
BIAS_CANDIDATES: tuple[dict[str, float], ...] = tuple(
    {"rp": rp, "rp.ip": ip}
    for rp in (-0.5, -0.4, -0.3, -0.2, -0.1, 0.0, 0.1) for ip in (0.0, 0.2, 0.4, 0.6, 0.8, 1.0)
)
#: Restart tag biases ``--tune-restart-bias`` compares, added to a fixed reparandum bias (grid:
#: common practice, no source; the first, no restart bias, is the reference).
RESTART_BIAS_CANDIDATES: tuple[dict[str, float], ...] = tuple(
    {"rs": rs, "rs.ip": ip}
    # A bias on every restart word adds up along a run, so its steps are small; the last
    # word's bias decides one word and reaches further.
    for rs in (0.0, 0.1, 0.2, 0.3) for ip in (0.0, 0.5, 1.0, 1.5, 2.0, 3.0)
)


def expand_tag_bias(bias: dict[str, float], tags: Sequence[str]) -> dict[str, float]:
    """Per-tag bias of ``tags`` from a bias per disfluency tag (``rp`` also biases ``rp/end``).

    Raises
    ------
    InputError
        A key is no disfluency tag of :mod:`~midstream.models.words._tags`.
    """
    unknown = sorted(set(bias) - set(TAG_LABEL))
    if unknown:
        raise InputError(f"tag bias names unknown tags {unknown}; known: {sorted(TAG_LABEL)}")
    expanded = {tag: bias[base] for tag in tags
                if (base := tag.removesuffix(END_SUFFIX)) in bias and bias[base] != 0.0}
    return dict(sorted(expanded.items()))


@dataclass(frozen=True, slots=True, kw_only=True)
class HeldOutChannel:
    """A held-out channel's unbiased state scores and the gold facts the bias sweep scores.

    ``emissions``: ``(n, tags)`` state scores of the fold model; ``reparandum``,
    ``restart``, ``ends``: gold reparandum words, restart words and utterance ends;
    ``counted``: words that count for the disfluency scores (not fragments).
    """

    emissions: FloatArray
    reparandum: BoolArray
    counted: BoolArray
    restart: BoolArray
    ends: BoolArray


def held_out_channels(conversations: Sequence[Conversation],
                      model: WordModel) -> list[HeldOutChannel]:
    """State scores of every annotated channel of ``conversations`` under ``model``.

    ``model`` must carry no tag bias (the sweep adds its own).
    """
    if model.config.tag_bias:
        raise ValueError("held_out_channels needs a model without tag bias")
    result = []
    for channel in annotated_channels(conversations):
        assert channel.tags is not None
        if not channel.words:
            continue
        tokens = tokens_from_words(channel.words, channel.after_other_speaker,
                                   channel.other_words)
        emissions = np.stack([model.score(features_at(tokens, i, model.config))
                              for i in range(len(tokens))])
        gold = [TAG_LABEL[t.removesuffix(END_SUFFIX)] for t in channel.tags]
        result.append(HeldOutChannel(
            emissions=emissions,
            reparandum=np.array([g == DisfluencyLabel.REPARANDUM for g in gold]),
            counted=np.array([not w.fragment for w in channel.words]),
            restart=np.array([g == DisfluencyLabel.RESTART for g in gold]),
            ends=np.array(channel.ends),
        ))
    return result


@dataclass(frozen=True, slots=True, kw_only=True)
class BiasResult:
    """Held-out scores of one bias, counts pooled over folds.

    ``precision``/``recall``/``f1``: reparandum words, fragments left out; ``restart_*``:
    restart words (both kinds), fragments left out; ``edited_f1``: reparandum and restart words
    together, fragments left out; ``segmentation_f1``: utterance ends.
    """

    bias: tuple[tuple[str, float], ...]
    precision: float
    recall: float
    f1: float
    restart_precision: float = 0.0
    restart_recall: float = 0.0
    restart_f1: float = 0.0
    edited_f1: float = 0.0
    segmentation_f1: float = 0.0


def sweep_tag_bias(
    folds: Sequence[tuple[WordModel, Sequence[HeldOutChannel]]],
    candidates: Sequence[dict[str, float]],
) -> list[BiasResult]:
    """Viterbi-decode every fold's held-out channels under each candidate bias and score it.

    A candidate maps disfluency tags (``rp``, ``ro``...) to the constant added to their state
    scores, as :class:`~midstream.models.words._features.FeatureConfig` ``tag_bias`` does at
    decoding.
    """
    results = []
    for candidate in candidates:
        counts = BinaryCounts()
        restarts = BinaryCounts()
        edited = BinaryCounts()
        ends = BinaryCounts()
        for model, channels in folds:
            bias = expand_tag_bias(candidate, model.tags)
            vector = np.array([bias.get(t, 0.0) for t in model.tags])
            reparandum = np.array([lab == DisfluencyLabel.REPARANDUM for lab in model.tag_label])
            restart = np.array([lab == DisfluencyLabel.RESTART for lab in model.tag_label])
            for channel in channels:
                path, _ = decode_lattice(channel.emissions + vector, model.exp_transitions)
                counted = channel.counted
                _pool(counts, reparandum[path][counted], channel.reparandum[counted])
                _pool(restarts, restart[path][counted], channel.restart[counted])
                _pool(edited, (reparandum[path] | restart[path])[counted],
                      (channel.reparandum | channel.restart)[counted])
                _pool(ends, model.tag_end[path], channel.ends)
        results.append(BiasResult(bias=tuple(sorted(candidate.items())),
                                  precision=counts.precision, recall=counts.recall,
                                  f1=counts.f1, restart_precision=restarts.precision,
                                  restart_recall=restarts.recall, restart_f1=restarts.f1,
                                  edited_f1=edited.f1, segmentation_f1=ends.f1))
    return results


def _pool(counts: BinaryCounts, predicted: BoolArray, gold: BoolArray) -> None:
    counts.tp += int((predicted & gold).sum())
    counts.fp += int((predicted & ~gold).sum())
    counts.fn += int((~predicted & gold).sum())


def tune_tag_bias(
    conversations: Sequence[Conversation],
    config: WordTrainingConfig,
    candidates: Sequence[dict[str, float]],
    *,
    folds: int,
    subset: int | None,
    seed: int = 0,
    progress: bool = True,
) -> list[BiasResult]:
    """Score each candidate tag bias by cross-validation grouped by conversation.

    One model per fold is trained (without bias) on the other folds of (a seeded random subset
    of) ``conversations``; its held-out fold is decoded offline under every candidate.
    """
    fold_of = _folds(conversations, folds, subset, seed)
    trained = []
    unbiased = replace(config, tag_bias=())
    for k in tqdm(range(folds), desc="bias cross-validation", file=sys.stderr,
                  disable=not progress):
        train = list(itertools.chain.from_iterable(fold_of[j] for j in range(folds) if j != k))
        model = WordModel.from_artifact(train_word_artifact(train, unbiased))
        trained.append((model, held_out_channels(fold_of[k], model)))
    return sweep_tag_bias(trained, candidates)


#: Probability thresholds ``--abandon-cues`` compares by cross-validation (grid: common
#: practice, no source).
ABANDON_THRESHOLDS: tuple[float, ...] = (0.05, 0.1, 0.15, 0.175, 0.2, 0.225, 0.25, 0.3, 0.35,
                                          0.4, 0.5)
#: Held-out precision a threshold needs: revising a word to restart adds an EDITED word, which
#: raises EDITED F1 only when at least F1 / 2 of the added words are right (EDITED F1 is about
#: 0.75 here, so 0.375; rounded up to 0.4 for a margin).
ABANDON_MIN_PRECISION = 0.4
#: Regularisation of the abandoned-unit model (light L1 keeps it small; common practice,
#: no source).
_ABANDON_C1, _ABANDON_C2, _ABANDON_MIN_FREQ = 0.1, 1.0, 3


@dataclass(frozen=True, slots=True, kw_only=True)
class AbandonExample:
    """One gold unit followed by its speaker's next word: features, gold flag and its words
    that a restart would cover (fillers and editing terms keep their own label)."""

    features: list[str]
    abandoned: bool
    words: int


def abandon_examples(conversations: Iterable[Conversation]) -> Iterator[AbandonExample]:
    """The units of every annotated channel that the speaker's own next word follows.

    Units and the abandoned flag come from the corpus (``Utterance.abandoned``); the features
    are those the decoder computes at a predicted end (:func:`abandon_features`).
    """
    classes = dict(CLOSED_CLASSES)
    for conversation in conversations:
        if not conversation.disfluency_annotated:
            continue
        abandoned = {u.words[-1] for u in conversation.utterances if u.abandoned and u.words}
        for channel in channel_sequences(conversation):
            assert channel.tags is not None
            start = 0
            n = len(channel.words)
            other = channel.other_words or (0,) * n
            for e in range(n - 1):
                if not channel.ends[e]:
                    continue
                texts = [w.text for w in channel.words[start:e + 1]]
                covered = sum(1 for t in channel.tags[start:e + 1]
                              if t.removesuffix(END_SUFFIX) not in INTERREGNUM_TAGS)
                yield AbandonExample(
                    features=abandon_features(
                        texts[-WHOLE_UNIT:], fragment=channel.words[e].fragment,
                        whole=len(texts) <= WHOLE_UNIT, length=len(texts),
                        next_text=channel.words[e + 1].text, other_words=other[e + 1],
                        classes=classes),
                    abandoned=channel.indices[e] in abandoned, words=covered)
                start = e + 1


def _fit_abandon(examples: Sequence[AbandonExample]) -> dict[str, float]:
    def pairs() -> Iterator[tuple[Sequence[list[str]], Sequence[str]]]:
        for example in examples:
            yield [example.features], ["ab" if example.abandoned else "no"]

    crf = train_crf_from(pairs, c1=_ABANDON_C1, c2=_ABANDON_C2, min_freq=_ABANDON_MIN_FREQ,
                         max_iterations=200)
    weights = CrfTagger.from_bytes(crf).weights()
    if set(weights.labels) != {"ab", "no"}:
        raise InputError("abandoned-unit model needs both abandoned and other units to train")
    ab, no = weights.labels.index("ab"), weights.labels.index("no")
    # A one-item CRF is a logistic model: the log-odds weight is the difference of the rows.
    diff = weights.state[:, ab] - weights.state[:, no]
    return {name: round(float(diff[row]), 5) for name, row in weights.attributes.items()
            if abs(diff[row]) >= 1e-5}


def train_abandon_cues(
    conversations: Sequence[Conversation], *, folds: int = 3, seed: int = 0,
    thresholds: Sequence[float] = ABANDON_THRESHOLDS,
) -> tuple[AbandonCues, dict[str, Any]]:
    """Train the abandoned-unit model on ``conversations`` and choose its threshold.

    The threshold maximises held-out F1 over the words a restart decision covers, among those
    with a held-out precision of at least :data:`ABANDON_MIN_PRECISION` (the highest
    threshold when none reaches it), by
    ``folds``-fold cross-validation grouped by conversation inside ``conversations`` (gold
    units; counts pooled over folds). Returns the model trained on all of them and the
    cross-validation report.

    Raises
    ------
    InputError
        No unit of ``conversations`` is abandoned.
    """
    examples = list(abandon_examples(conversations))
    if not any(e.abandoned for e in examples):
        raise InputError("no abandoned utterances in the training data (Utterance.abandoned) "
                         "to train the abandoned-unit model on; leave out --abandon-cues")
    fold_of = _folds(conversations, folds, None, seed)
    counts = {t: BinaryCounts() for t in thresholds}
    for k in range(folds):
        train = list(itertools.chain.from_iterable(fold_of[j] for j in range(folds) if j != k))
        fold_examples = list(abandon_examples(train))
        # A fold with no abandoned unit to learn from judges none abandoned.
        fold = (AbandonCues(weights=_fit_abandon(fold_examples), threshold=1.0)
                if any(e.abandoned for e in fold_examples) else None)
        for example in abandon_examples(fold_of[k]):
            p = fold.probability(example.features) if fold is not None else 0.0
            for t, tally in counts.items():
                if p >= t and example.abandoned:
                    tally.tp += example.words
                elif p >= t:
                    tally.fp += example.words
                elif example.abandoned:
                    tally.fn += example.words
    allowed = [t for t in thresholds if counts[t].precision >= ABANDON_MIN_PRECISION]
    best = max(allowed or [max(thresholds)], key=lambda t: counts[t].f1)
    report = {
        "folds": folds, "seed": seed,
        "objective": "held-out F1 of the words of abandoned units (gold units, fillers and "
                     "editing terms left out), counts pooled over folds, among thresholds "
                     f"with held-out precision >= {ABANDON_MIN_PRECISION}",
        "results": [{"threshold": t, "precision": round(c.precision, 4),
                     "recall": round(c.recall, 4), "f1": round(c.f1, 4)}
                    for t, c in counts.items()],
        "chosen": best,
    }
    return AbandonCues(weights=_fit_abandon(examples), threshold=best), report
