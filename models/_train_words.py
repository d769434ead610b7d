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

from midstream._errors import InputError
from midstream._types import Conversation, DisfluencyLabel
from midstream.models._artifact import ModelArtifact
from midstream.models._crf import TrainingPairs, train_crf_from
from midstream.models._eval_words import offline_scores
from midstream.models._features import FeatureConfig, features_at, tokens_from_words
from midstream.models._wordmodel import WordModel
from midstream.models._wordtags import ChannelSequence, channel_sequences, chunk_at_ends
from tqdm import tqdm

__all__ = [
    "WordTrainingConfig",
    "build_lexicon",
    "cross_validate_words",
    "train_word_artifact",
    "training_pairs",
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
    feature context (see :class:`~midstream.models._features.FeatureConfig`).
    """

    c1: float = 0.1
    c2: float = 0.01
    min_freq: int = 2
    max_iterations: int = 150
    chunk_length: int = 60
    right: int = 5
    left: int = 8
    restart_span: int = 5


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
        tokens = tokens_from_words(channel.words, channel.after_other_speaker)
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
                             restart_span=config.restart_span)
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
        },
        metadata={"training_data": summary, **(metadata or {})},
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
    annotated = [c for c in conversations if c.disfluency_annotated]
    if len(annotated) < folds:
        raise InputError(f"{len(annotated)} annotated conversations, fewer than {folds} folds")
    rng = random.Random(seed)
    pool = sorted(annotated, key=lambda c: c.id)
    rng.shuffle(pool)
    if subset is not None:
        pool = pool[:subset]
    fold_of = [pool[k::folds] for k in range(folds)]
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
