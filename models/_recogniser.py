"""Annotated conversations as a speech recogniser would feed them, for evaluation.

A transcript is cleaner than recogniser output in two ways that matter here: it writes the
word fragments a speaker broke off ("th-"), which a recogniser does not emit, and it has no
word errors. :func:`as_recognised` removes the fragments and, optionally, seeds word errors at
a given rate, carrying the gold annotation along so the figures stay scoreable:

- a **substitution** replaces a word's text with another word drawn from the conversation's
  own words (so the replacement is a plausible word of the domain, not noise); the word keeps
  its gold label, times and utterance;
- a **deletion** removes a word with its label (an utterance that loses every word is gone; a
  repair whose onset is deleted loses its structure, its words keep their labels);
- an **insertion** adds a drawn word right after a word of the same speaker, labelled fluent,
  in that word's utterance (after an utterance's last word it becomes the utterance's last
  word), timed at the end of the word before it when there are times.

Each word of the reference draws its error independently with probability ``rate``, split
60 % substitutions, 25 % deletions, 15 % insertions (common practice, no source: substitutions
dominate published recogniser error breakdowns on conversational speech, deletions come next).
The word error rate against the fragment-free transcript is then ``rate`` in expectation. The
draws are seeded per conversation from ``seed`` and the conversation id, so a conversation's
errors do not depend on which others are evaluated with it.

A live recogniser's clock also runs through the silences: :func:`silence_ticks` gives the time
ticks a caller that ticks through every silence would send (one as each speaker's silence
passes each of the boundary model's silence marks, the silences at which its evidence can
change), so that evaluation closes utterances during silences as a live stream does, rather
than only when the speaker's next word arrives.
"""

from __future__ import annotations

import random
from collections.abc import Sequence
from dataclasses import dataclass, replace

from midstream import Conversation, DisfluencyLabel, Repair, Word

__all__ = ["ERROR_SHARES", "RecogniserConditions", "SilenceTick", "as_recognised",
           "silence_ticks"]

#: Shares of substitutions, deletions and insertions among seeded errors (see module docstring).
ERROR_SHARES: dict[str, float] = {"substitution": 0.60, "deletion": 0.25, "insertion": 0.15}


@dataclass(frozen=True, slots=True, kw_only=True)
class RecogniserConditions:
    """How :func:`as_recognised` degrades a transcript.

    ``word_error_rate``: expected errors per reference word, in ``[0, 1]``; ``seed``: seed of
    the error draws. Word fragments are always removed.
    """

    word_error_rate: float = 0.0
    seed: int = 0

    def __post_init__(self) -> None:
        if not 0.0 <= self.word_error_rate <= 1.0:
            raise ValueError(f"word_error_rate must be in [0, 1], got {self.word_error_rate}")


def as_recognised(conversation: Conversation, conditions: RecogniserConditions) -> Conversation:
    """The conversation without word fragments and with seeded word errors.

    Examples
    --------
    >>> from midstream import Utterance, UtteranceFunction
    >>> words = (Word(text="th-", speaker="A", fragment=True), Word(text="the", speaker="A"))
    >>> u = Utterance(speaker="A", words=(0, 1), function=UtteranceFunction.STATEMENT,
    ...               fine_tag="sd", fine_class="sd")
    >>> out = as_recognised(Conversation(id="c", corpus="demo", words=words, utterances=(u,)),
    ...                     RecogniserConditions())
    >>> [w.text for w in out.words], out.utterances[0].words
    (['the'], (0,))
    """
    rng = random.Random(f"{conditions.seed}:{conversation.id}")
    rate = conditions.word_error_rate
    pool = [w.text for w in conversation.words if not w.fragment] or ["uh"]
    utterance_of: dict[int, int] = {}
    for position, utterance in enumerate(conversation.utterances):
        for index in utterance.words:
            utterance_of[index] = position
    labels = conversation.labels
    words: list[Word] = []
    new_labels: list[DisfluencyLabel] = []
    new_index: dict[int, int] = {}  # old word index -> new index, for kept words
    members: list[list[int]] = [[] for _ in conversation.utterances]
    substitute = rate * ERROR_SHARES["substitution"]
    delete = substitute + rate * ERROR_SHARES["deletion"]
    insert = delete + rate * ERROR_SHARES["insertion"]
    for index, spoken in enumerate(conversation.words):
        if spoken.fragment:
            continue
        draw = rng.random() if rate else 1.0
        u = utterance_of.get(index)
        if substitute <= draw < delete:
            continue
        word = spoken
        if draw < substitute:
            word = replace(spoken, text=_other_word(rng, pool, spoken.text))
        new_index[index] = len(words)
        if u is not None:
            members[u].append(len(words))
        words.append(word)
        if labels is not None:
            new_labels.append(labels[index])
        if delete <= draw < insert:
            inserted = Word(text=rng.choice(pool), speaker=word.speaker, start=word.end,
                            end=word.end)
            if u is not None:
                members[u].append(len(words))
            words.append(inserted)
            if labels is not None:
                new_labels.append(DisfluencyLabel.FLUENT)
    utterances = tuple(replace(utterance, words=tuple(kept))
                       for utterance, kept in zip(conversation.utterances, members, strict=True)
                       if kept)
    return replace(
        conversation,
        words=tuple(words),
        utterances=utterances,
        labels=None if labels is None else tuple(new_labels),
        repairs=_remap_repairs(conversation.repairs, new_index),
        interruption_points=tuple(new_index[i] for i in conversation.interruption_points
                                  if i in new_index),
    )


@dataclass(frozen=True, slots=True)
class SilenceTick:
    """A time tick sent before word ``before`` of the conversation (``len(words)``: after the
    last word, before the end) saying the clock reads ``time`` (seconds)."""

    before: int
    time: float


def _arrival(word: Word) -> float | None:
    # A recogniser sends a word once it has ended (the client's readers time events the same).
    return word.end if word.end is not None else word.start


def silence_ticks(conversation: Conversation,
                  marks: Sequence[float]) -> tuple[SilenceTick, ...]:
    """The ticks a live caller ticking through every silence sends, in sending order.

    For each timed word, a tick at ``end + mark`` for every mark (seconds, the boundary
    model's ``silence_marks``) that falls in the silence before the same speaker's next word
    starts (after the speaker's last word: before the conversation's last word arrives). Each
    goes before the first later word that arrives after it (words arrive at their end). Words
    without times get none, so an untimed conversation gets no ticks.

    Examples
    --------
    >>> words = (Word(text="hi", speaker="A", start=0.0, end=0.3),
    ...          Word(text="yes", speaker="B", start=1.0, end=1.2),
    ...          Word(text="so", speaker="A", start=1.6, end=1.8))
    >>> conversation = Conversation(id="c", corpus="demo", words=words, utterances=())
    >>> [(t.before, round(t.time, 2)) for t in silence_ticks(conversation, (0.5, 1.0, 2.0))]
    [(1, 0.8), (2, 1.3), (2, 1.7)]
    """
    words = conversation.words
    if not marks or not words:
        return ()
    arrivals = [_arrival(w) for w in words]
    horizon = max((a for a in arrivals if a is not None), default=None)
    if horizon is None:
        return ()
    next_start: dict[str, float | None] = {}  # per speaker, filled walking backwards
    limit: list[float | None] = [None] * len(words)
    for index in range(len(words) - 1, -1, -1):
        word = words[index]
        limit[index] = next_start.get(word.speaker, horizon)
        next_start[word.speaker] = word.start if word.start is not None else _arrival(word)
    ticks: list[SilenceTick] = []
    for index, word in enumerate(words):
        end, until = word.end, limit[index]
        if end is None or until is None:
            continue
        before = index + 1
        for mark in marks:
            time = end + mark
            if time >= until:
                break
            while before < len(words):
                arrival = arrivals[before]
                if arrival is not None and arrival > time:
                    break
                before += 1
            ticks.append(SilenceTick(before=before, time=time))
    ticks.sort(key=lambda tick: (tick.before, tick.time))
    return tuple(ticks)


def _other_word(rng: random.Random, pool: Sequence[str], text: str) -> str:
    # A few draws find a different word in any real conversation; a one-word pool keeps it.
    for _ in range(8):
        candidate = rng.choice(pool)
        if candidate != text:
            return candidate
    return text


def _remap_repairs(repairs: Sequence[Repair], new_index: dict[int, int]) -> tuple[Repair, ...]:
    kept = []
    for repair in repairs:
        reparandum = tuple(new_index[i] for i in repair.reparandum if i in new_index)
        if not reparandum:
            continue
        onset = repair.repair_onset
        if onset is not None and onset not in new_index:
            continue  # the repair lost its onset: its words keep their labels, not the link
        kept.append(Repair(
            reparandum=reparandum,
            interregnum=tuple(new_index[i] for i in repair.interregnum if i in new_index),
            repair_onset=None if onset is None else new_index[onset],
        ))
    return tuple(kept)
