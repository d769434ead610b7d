"""A tiny coarse function model that learnt two invented conversation settings (test data only).

Two invented corpora, ``workshop`` (calls to a bicycle workshop) and ``choir`` (a choir's
rehearsal planning), hold the same exchanges with the same words. They disagree by
construction on one utterance: a lone "right" after the other speaker's statement is an
agreement in the workshop's annotation and an acknowledgement in the choir's. Only a model that
labels in the named setting can follow both; the shared weights see each label half the time.
"""

from __future__ import annotations

import random
import shutil
from pathlib import Path

from midstream import Conversation, DisfluencyLabel, Utterance, UtteranceFunction, Word
from midstream.corpora import write_jsonl
from midstream.models.training import (
    FunctionFeatureConfig,
    FunctionTrainingOptions,
    ModelArtifact,
    save_artifact,
    train_function_model,
)

SETTINGS = ("choir", "workshop")
#: The utterance the two corpora annotate differently, and how each does.
DISPUTED = "right"
DISPUTED_FUNCTION = {"workshop": UtteranceFunction.AGREEMENT,
                     "choir": UtteranceFunction.ACKNOWLEDGEMENT}

_S, _Q, _A = (UtteranceFunction.STATEMENT, UtteranceFunction.QUESTION,
              UtteranceFunction.ANSWER)
_THINGS = ("bike", "wheel", "score", "folder", "chain", "bench")
# (speaker offset, function or None for the disputed one, text)
_EXCHANGES: tuple[tuple[tuple[int, UtteranceFunction | None, str], ...], ...] = (
    ((0, _S, "the {t} needs a new part"), (1, None, DISPUTED)),
    ((0, _Q, "can you bring the {t} on monday"), (1, _A, "yes i can")),
    ((0, _S, "we moved the {t} to the back room"), (1, None, DISPUTED),
     (0, _Q, "is that fine"), (1, _A, "yes")),
)


def setting_conversation(corpus: str, seed: int) -> Conversation:
    """One invented conversation of ``corpus`` (``workshop`` or ``choir``)."""
    rng = random.Random(f"{corpus}:{seed}")
    words: list[Word] = []
    utterances: list[Utterance] = []
    for _ in range(5):
        first = rng.randint(0, 1)
        for offset, function, text in rng.choice(_EXCHANGES):
            speaker = "AB"[(first + offset) % 2]
            chosen = DISPUTED_FUNCTION[corpus] if function is None else function
            indices = []
            for token in text.format(t=rng.choice(_THINGS)).split():
                indices.append(len(words))
                words.append(Word(text=token, speaker=speaker))
            utterances.append(Utterance(speaker=speaker, words=tuple(indices), function=chosen,
                                        fine_tag=chosen.value, fine_class=chosen.value))
    return Conversation(id=f"{corpus}{seed:03d}", corpus=corpus, words=tuple(words),
                        utterances=tuple(utterances),
                        labels=tuple(DisfluencyLabel.FLUENT for _ in words))


def setting_corpora(count: int = 12) -> list[Conversation]:
    """``count`` conversations of each invented setting."""
    return [setting_conversation(corpus, seed) for corpus in SETTINGS for seed in range(count)]


def setting_model(*, config: FunctionFeatureConfig | None = None,
                  augment: float = 0.0) -> ModelArtifact:
    """A coarse function model trained now on :func:`setting_corpora` with setting features
    (a second or two); ``config`` and ``augment`` let a test reach more of the feature paths."""
    options = FunctionTrainingOptions(scheme="coarse", c1=0.0, c2=0.01, min_freq=1,
                                      max_iterations=30, augment=augment, setting_features=True,
                                      config=config or FunctionFeatureConfig())
    return train_function_model(setting_corpora(), options)


def write_setting_models(folder: Path) -> Path:
    """A model folder: the shipped word model beside :func:`setting_model`."""
    folder.mkdir(parents=True, exist_ok=True)
    shipped = Path(__file__).resolve().parents[1] / "models" / "weights" / "words.tagger"
    shutil.copyfile(shipped, folder / "words.tagger")
    save_artifact(setting_model(), folder / "functions-coarse.tagger")
    return folder


def write_setting_transcripts(path: Path, count: int = 3) -> Path:
    """A JSON Lines transcript file holding ``count`` conversations of each setting."""
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl(setting_corpora(count), stream)
    return path
