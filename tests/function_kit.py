"""Invented conversations and tiny function models for fast tests (demo data, not a corpus).

The conversations follow a few fixed exchanges (question then answer, opinion then agreement,
statement then backchannel) with seeded variation, so a CRF trained on a handful of them in well
under a second learns the patterns the tests rely on.
"""

from __future__ import annotations

import random

from midstream import Conversation, DisfluencyLabel, Utterance, Word
from midstream._schemes import coarse_function
from midstream.models._artifact import ModelArtifact
from midstream.models.functions._features import FunctionFeatureConfig
from midstream.models.functions._train import FunctionTrainingOptions, train_function_model

F = DisfluencyLabel.FLUENT
FILLER = DisfluencyLabel.FILLER
REP = DisfluencyLabel.REPARANDUM

_NOUNS = ("kids", "dogs", "cars", "books", "plans", "tickets", "friends", "bikes")

# (speaker offset, fine class, words with optional "uh" filler marks)
_EXCHANGES: tuple[tuple[tuple[int, str, str], ...], ...] = (
    ((0, "qy", "do you have {n}"), (1, "ny", "yes"), (1, "sd", "we have two {n}"),
     (0, "b", "uh-huh")),
    ((0, "sv", "i think {n} are great"), (1, "aa", "yeah"), (1, "sv", "i think so too")),
    ((0, "qw", "what kind of {n} do you like"), (1, "sd", "we like old {n}"),
     (0, "b", "uh-huh")),
    ((0, "sd", "we bought new {n} last year"), (1, "b", "uh-huh"),
     (0, "sd", "they cost a lot")),
    ((0, "qy", "are your {n} old"), (1, "nn", "no"), (1, "sd", "they are new {n}")),
)


def invented_conversation(seed: int, *, annotated: bool = True,
                          timed: bool = False) -> Conversation:
    """One invented two-speaker conversation of several exchanges; ``timed`` gives its words
    times: a backchannel ("b") overlaps the end of the utterance before it, any other utterance
    starts after a seeded gap."""
    rng = random.Random(seed)
    clock = 0.0
    words: list[Word] = []
    labels: list[DisfluencyLabel] = []
    utterances: list[Utterance] = []
    for _ in range(6):
        exchange = rng.choice(_EXCHANGES)
        first = rng.randint(0, 1)
        for offset, fine, text in exchange:
            speaker = "AB"[(first + offset) % 2]
            indices: list[int] = []
            tokens = text.format(n=rng.choice(_NOUNS)).split()
            if timed:
                clock += -0.4 if fine == "b" else rng.choice((0.1, 0.6, 1.5))
            if len(tokens) > 2 and rng.random() < 0.3:
                # A filler and a repeated first word (reparandum) in front.
                for token, label in (("uh", FILLER), (tokens[0], REP)):
                    indices.append(len(words))
                    words.append(_word(token, speaker, clock if timed else None))
                    clock += 0.3
                    labels.append(label)
            for token in tokens:
                indices.append(len(words))
                words.append(_word(token, speaker, clock if timed else None))
                clock += 0.3
                labels.append(F)
            utterances.append(Utterance(speaker=speaker, words=tuple(indices),
                                        function=coarse_function("swbd42", fine),
                                        fine_tag=fine, fine_class=fine))
    return Conversation(id=f"demo{seed:03d}", corpus="demo", words=tuple(words),
                        utterances=tuple(utterances),
                        labels=tuple(labels) if annotated else None)


def _word(text: str, speaker: str, start: float | None) -> Word:
    if start is None:
        return Word(text=text, speaker=speaker)
    return Word(text=text, speaker=speaker, start=round(start, 3), end=round(start + 0.25, 3))


def invented_corpus(n: int, start: int = 0, *, timed: bool = False) -> list[Conversation]:
    return [invented_conversation(seed, timed=timed) for seed in range(start, start + n)]


def tiny_model(scheme: str = "swbd42", *, augment: float = 0.5,
               partner: bool = False, opening: bool = False,
               lookback: bool = False, timing: bool = False) -> ModelArtifact:
    """A function model trained on 20 invented conversations (about a second), timed ones
    with ``timing``."""
    options = FunctionTrainingOptions(scheme=scheme, c1=0.01, c2=0.01, min_freq=1,
                                      max_iterations=60, augment=augment,
                                      config=FunctionFeatureConfig(partner=partner,
                                                                   opening=opening,
                                                                   lookback=lookback,
                                                                   timing=timing))
    return train_function_model(invented_corpus(20, timed=timing), options)
