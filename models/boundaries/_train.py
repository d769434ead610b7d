"""Training the boundary model and choosing how it joins the word CRF, by grouped cross-validation.

Examples are the words of every speaker channel whose silence after is known from the word
times (the word's end and the start of the channel's next word); words without times teach a
timing model nothing. :func:`cross_validate_boundaries` splits the training conversations into
folds by conversation, trains the classifier on the other folds, and decodes each held-out
channel whole with the word CRF, the held-out words' evidence added to the end tags for every
candidate ``weight`` and ``offset``: utterance-end F1 pooled over the folds picks them.
"""

from __future__ import annotations

import random
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from midstream import Conversation, InputError
from midstream.models._artifact import ModelArtifact
from midstream.models._crf import CrfTagger, train_crf_from
from midstream.models._lattice import decode_lattice
from midstream.models.boundaries._model import (
    BOUNDARY_LABELS,
    END,
    GOES_ON,
    BoundaryConfig,
    BoundaryModel,
    boundary_features,
    overlap_flags,
)
from midstream.models.words._eval import BinaryCounts
from midstream.models.words._features import Token, features_at, tokens_from_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import ChannelSequence, channel_sequences

__all__ = [
    "BoundaryTrainingConfig",
    "boundary_examples",
    "cross_validate_boundaries",
    "silence_after",
    "train_boundary_artifact",
]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, slots=True, kw_only=True)
class BoundaryTrainingConfig:
    """Hyper-parameters of the boundary classifier (L-BFGS, elastic net; see ``_crf``)."""

    c1: float = 0.1
    c2: float = 0.01
    min_freq: int = 2
    max_iterations: int = 100
    lexical: bool = True


def _channel_tokens(channel: ChannelSequence, flags: Sequence[bool]) -> list[Token]:
    return tokens_from_words(channel.words, channel.after_other_speaker, channel.other_words,
                             overlap=[flags[i] for i in channel.indices])


def silence_after(tokens: Sequence[Token], i: int) -> float | None:
    """Seconds from the end of ``tokens[i]`` to the start of the next one, if both are known."""
    if i + 1 >= len(tokens):
        return None
    end, start = tokens[i].end, tokens[i + 1].start
    if end is None or start is None:
        return None
    return max(start - end, 0.0)


def boundary_examples(conversations: Iterable[Conversation], *,
                      lexical: bool = True) -> Iterator[tuple[list[str], str]]:
    """(features, label) of every word whose silence after is known, in corpus order."""
    for conversation in conversations:
        flags = overlap_flags(conversation)
        for channel in channel_sequences(conversation):
            tokens = _channel_tokens(channel, flags)
            for i in range(len(tokens) - 1):
                silence = silence_after(tokens, i)
                if silence is None:
                    continue
                features = boundary_features(
                    tokens, i, silence=silence,
                    other_spoke=tokens[i + 1].after_other_speaker, lexical=lexical)
                yield features, END if channel.ends[i] else GOES_ON


def train_boundary_artifact(conversations: Sequence[Conversation],
                            config: BoundaryTrainingConfig, *, join: BoundaryConfig,
                            metadata: dict[str, object]) -> ModelArtifact:
    """Train the classifier on ``conversations`` and wrap it with its joining weights.

    Raises
    ------
    InputError
        No word of the conversations has a known silence after it (no word times).
    """
    examples = list(boundary_examples(conversations, lexical=config.lexical))
    if not examples:
        raise InputError("no word with times in the training conversations: the boundary "
                         "model learns from word times (MRDA carries them)")
    crf = train_crf_from(
        lambda: (([features], [label]) for features, label in examples),
        c1=config.c1, c2=config.c2, min_freq=config.min_freq,
        max_iterations=config.max_iterations)
    summary = dict(metadata)
    summary["examples"] = len(examples)
    summary["ends"] = sum(label == END for _, label in examples)
    return ModelArtifact(
        kind="boundaries", labels=BOUNDARY_LABELS, crf=crf,
        features={**join.to_json(), "lexical": config.lexical},
        hyper_parameters={"c1": config.c1, "c2": config.c2, "min_freq": config.min_freq,
                          "max_iterations": config.max_iterations},
        metadata=summary)


@dataclass(frozen=True, slots=True)
class _HeldOut:
    emissions: FloatArray
    features: list[list[str] | None]
    ends: tuple[bool, ...]


def _held_out(conversations: Sequence[Conversation], words: WordModel,
              lexical: bool) -> list[_HeldOut]:
    result = []
    for conversation in conversations:
        flags = overlap_flags(conversation)
        for channel in channel_sequences(conversation):
            tokens = _channel_tokens(channel, flags)
            if not tokens:
                continue
            emissions = np.stack([words.score(features_at(tokens, i, words.config))
                                  for i in range(len(tokens))])
            features: list[list[str] | None] = []
            for i in range(len(tokens)):
                silence = silence_after(tokens, i)
                features.append(None if silence is None else boundary_features(
                    tokens, i, silence=silence, other_spoke=tokens[i + 1].after_other_speaker,
                    lexical=lexical))
            result.append(_HeldOut(emissions, features, channel.ends))
    return result


def _folds(conversations: Sequence[Conversation], folds: int,
           seed: int) -> list[list[Conversation]]:
    if folds < 2 or folds > len(conversations):
        raise InputError(f"cannot make {folds} folds of {len(conversations)} conversations")
    order = list(conversations)
    random.Random(seed).shuffle(order)
    return [order[k::folds] for k in range(folds)]


def cross_validate_boundaries(
    conversations: Sequence[Conversation], words: WordModel, config: BoundaryTrainingConfig,
    *, weights: Sequence[float], offsets: Sequence[float], folds: int = 3, seed: int = 0,
) -> dict[tuple[float, float], BinaryCounts]:
    """Held-out utterance-end counts for every (weight, offset), pooled over grouped folds.

    ``weight`` 0 with ``offset`` 0 is the word CRF alone. Each held-out channel is decoded
    whole (Viterbi), as the streaming decoder's settled paths are.
    """
    counts = {(w, o): BinaryCounts() for w in weights for o in offsets}
    counts.setdefault((0.0, 0.0), BinaryCounts())
    end_columns = [k for k, e in enumerate(words.tag_ends) if e]
    parts = _folds(conversations, folds, seed)
    for k, held in enumerate(parts):
        train = [c for j, part in enumerate(parts) if j != k for c in part]
        artifact = train_boundary_artifact(train, config, join=BoundaryConfig(),
                                           metadata={})
        model = BoundaryModel(artifact, CrfTagger.from_bytes(artifact.crf))
        for channel in _held_out(held, words, config.lexical):
            odds = np.array([0.0 if f is None else model.log_odds(f)
                             for f in channel.features])
            known = np.array([f is not None for f in channel.features])
            for (weight, offset), tally in counts.items():
                emissions = channel.emissions.copy()
                add = np.where(known, weight * odds + offset, 0.0)
                emissions[:, end_columns] += add[:, None]
                path, _ = decode_lattice(emissions, words.exp_transitions)
                for position, tag in enumerate(path):
                    tally.add(words.tag_ends[tag], channel.ends[position])
    return counts
