"""Invented conversations and a tiny word model for fast tests (demo data, not a corpus).

The conversations mix fluent utterances with filled pauses ("uh"), editing terms ("i mean"),
repeated words and phrases (reparandum, optional interregnum, repair onset) and restarts, with
seeded variation; a CRF trained on a few of them in a second or two learns what the tests need.
"""

from __future__ import annotations

import dataclasses
import functools
import random

from midstream import (
    Conversation,
    DisfluencyLabel,
    Repair,
    Utterance,
    UtteranceFunction,
    Word,
)
from midstream.models._artifact import ModelArtifact
from midstream.models.boundaries._model import BoundaryConfig
from midstream.models.boundaries._train import BoundaryTrainingConfig, train_boundary_artifact
from midstream.models.words._model import WordModel
from midstream.models.words._train import WordTrainingConfig, train_word_artifact

_SENTENCES = (
    "we went to the store last week",
    "i think that is a good idea",
    "the kids like to play outside",
    "my brother lives in texas",
    "it was a really nice day",
    "you can get a lot of rain here",
    "they bought a new car",
)

_L = DisfluencyLabel


def invented_conversation(seed: int, *, annotated: bool = True,
                          times: bool = False) -> Conversation:
    """One invented two-speaker conversation with disfluencies and gold repairs."""
    rng = random.Random(seed)
    words: list[Word] = []
    labels: list[DisfluencyLabel] = []
    repairs: list[Repair] = []
    utterances: list[Utterance] = []
    clock = 0.0

    def add(text: str, speaker: str, label: DisfluencyLabel) -> int:
        nonlocal clock
        start, end = (clock, clock + 0.3) if times else (None, None)
        clock += 0.35
        words.append(Word(text=text, speaker=speaker, start=start, end=end,
                          confidence=0.9 if times else None))
        labels.append(label)
        return len(words) - 1

    for turn in range(14):
        speaker = "AB"[turn % 2]
        clock += 0.8
        tokens = rng.choice(_SENTENCES).split()
        indices: list[int] = []
        kind = rng.random()
        if kind < 0.35:
            # Repeat the first one or two words, maybe with an interregnum.
            span = tokens[: rng.choice((1, 2))]
            reparandum = tuple(add(t, speaker, _L.REPARANDUM) for t in span)
            interregnum: tuple[int, ...] = ()
            if rng.random() < 0.5:
                interregnum = (add("uh", speaker, _L.FILLER),)
            elif rng.random() < 0.3:
                interregnum = (add("i", speaker, _L.EDIT_TERM), add("mean", speaker, _L.EDIT_TERM))
            indices += [*reparandum, *interregnum]
            onset = add(tokens[0], speaker, _L.REPAIR)
            indices.append(onset)
            indices += [add(t, speaker, _L.FLUENT) for t in tokens[1:]]
            repairs.append(Repair(reparandum=reparandum, interregnum=interregnum,
                                  repair_onset=onset))
        elif kind < 0.5:
            indices.append(add("uh", speaker, _L.FILLER))
            indices += [add(t, speaker, _L.FLUENT) for t in tokens]
        elif kind < 0.6:
            # Abandon the start of a different sentence (a repeat would be a repair).
            other = rng.choice([x for x in _SENTENCES if not x.startswith(tokens[0])]).split()[:2]
            restart = tuple(add(t, speaker, _L.RESTART) for t in other)
            repairs.append(Repair(reparandum=restart))
            indices += [*restart, *(add(t, speaker, _L.FLUENT) for t in tokens)]
        else:
            if rng.random() < 0.3:
                indices.append(add("well", speaker, _L.DISCOURSE_MARKER))
            indices += [add(t, speaker, _L.FLUENT) for t in tokens]
        utterances.append(Utterance(speaker=speaker, words=tuple(indices),
                                    function=UtteranceFunction.STATEMENT,
                                    fine_tag="sd", fine_class="sd"))
    return Conversation(
        id=f"invented-{seed}", corpus="invented", words=tuple(words),
        utterances=tuple(utterances), labels=tuple(labels) if annotated else None,
        repairs=tuple(repairs) if annotated else (),
    )


def invented_abandoning(seed: int) -> Conversation:
    """Speaker A abandons some starts ("i was going to") and begins afresh; B backchannels."""
    rng = random.Random(seed)
    words: list[Word] = []
    labels: list[DisfluencyLabel] = []
    utterances: list[Utterance] = []
    starts = ("i was going to", "we were on the", "and then she", "it is in")
    fresh = ("we went to the store", "my brother lives in texas", "they bought a new car",
             "it was a nice day")

    def unit(text: str, speaker: str, label: DisfluencyLabel, *, abandoned: bool) -> None:
        first = len(words)
        for token in text.split():
            words.append(Word(text=token, speaker=speaker))
            labels.append(label)
        utterances.append(Utterance(
            speaker=speaker, words=tuple(range(first, len(words))),
            function=UtteranceFunction.STATEMENT, fine_tag="sd", fine_class="sd",
            complete=not abandoned, abandoned=abandoned))

    for _ in range(12):
        if rng.random() < 0.4:
            unit(rng.choice(starts), "A", DisfluencyLabel.RESTART, abandoned=True)
        unit(rng.choice(fresh), "A", DisfluencyLabel.FLUENT, abandoned=False)
        unit("uh-huh", "B", DisfluencyLabel.FLUENT, abandoned=False)
    return Conversation(id=f"abandoning-{seed}", corpus="invented", words=tuple(words),
                        utterances=tuple(utterances), labels=tuple(labels), repairs=())


#: Small, fast settings for test models (not the shipped model's). Eight invented conversations
#: are too few to weigh the word-class features against the copy features (with them, "the kids
#: the kids" came out a restart), so test models leave them out; the shipped-model tests and the
#: feature tests cover them.
TINY = WordTrainingConfig(c1=0.05, c2=0.01, min_freq=1, max_iterations=60, word_classes=False)


@functools.cache
def tiny_artifact_bytes() -> bytes:
    """A word model trained on eight invented conversations (cached for the test session)."""
    conversations = [invented_conversation(seed) for seed in range(8)]
    return train_word_artifact(conversations, TINY).to_bytes()


def tiny_model() -> WordModel:
    return WordModel.from_artifact(ModelArtifact.from_bytes(tiny_artifact_bytes()))


def one_speaker(conversation: Conversation) -> Conversation:
    """The conversation said by one speaker, 2 s of silence before every utterance: only the
    silences tell where its utterances end."""
    clock, words = 0.0, []
    for utterance in conversation.utterances:
        clock += 2.0
        for index in utterance.words:
            word = conversation.words[index]
            words.append(dataclasses.replace(word, speaker="A", start=clock, end=clock + 0.3))
            clock += 0.35
    return dataclasses.replace(conversation, words=tuple(words), utterances=tuple(
        dataclasses.replace(u, speaker="A") for u in conversation.utterances))


@functools.cache
def tiny_boundary_bytes() -> bytes:
    """A boundary model trained on invented timed conversations (cached for the session): four
    two-speaker ones and four said by one speaker, so both silences and turns teach it."""
    conversations = [invented_conversation(seed, times=True) for seed in range(4)]
    conversations += [one_speaker(invented_conversation(seed, times=True))
                      for seed in range(4, 8)]
    artifact = train_boundary_artifact(
        conversations, BoundaryTrainingConfig(min_freq=1, max_iterations=50),
        join=BoundaryConfig(weight=1.0, offset=0.0), metadata={})
    return artifact.to_bytes()
