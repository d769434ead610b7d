"""What a revision log ended on: each word's and utterance's last published state.

``midstream export`` writes this as CSV, ISO 24617-2 DiAML or inline markup. It reads a log
written by ``replay --log`` or ``tag --json`` (see ``_records.py``): a word's text comes from the
word record the client wrote when it sent the word or, without one, from the word's own states.

Words are in the order they were sent (else the order the server first published them);
utterances in the order of their first word. A withdrawn word is gone; an utterance published
with no words was dissolved (merged into another) and is gone too.
"""

from __future__ import annotations

import csv
from collections.abc import Iterator
from dataclasses import dataclass
from typing import IO

from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    DisfluencyLabel,
    HypothesisUpdate,
    InputError,
    Repair,
    Utterance,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
    normalise_token,
)
from midstream.client._results import Snapshot
from midstream.client.cli._records import RevisionLog

_L = DisfluencyLabel
#: Labels that may sit between a reparandum and its repair onset (Shriberg 1994's interregnum;
#: the SwDA reader counts discourse markers there too).
_INTERREGNUM = frozenset({_L.FILLER, _L.EDIT_TERM, _L.DISCOURSE_MARKER})


@dataclass(frozen=True, slots=True, kw_only=True)
class FinalWord:
    """A word and its last published state; ``utterance`` indexes :attr:`Outcome.utterances`."""

    word_id: str
    speaker: str
    text: str
    start: float | None
    end: float | None
    state: WordHypothesis
    utterance: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class FinalUtterance:
    """An utterance's last published state and its words (indices into :attr:`Outcome.words`)."""

    state: UtteranceHypothesis
    words: tuple[int, ...]


@dataclass(frozen=True, slots=True, kw_only=True)
class Outcome:
    """The final states of one logged conversation.

    ``complete`` is false when the log stops before the update that finalised the conversation:
    some states in it may still have changed.
    """

    conversation_id: str
    source: str
    words: tuple[FinalWord, ...]
    utterances: tuple[FinalUtterance, ...]
    complete: bool

    @property
    def speakers(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(w.speaker for w in self.words))


def outcome_of(log: RevisionLog) -> Outcome:
    """Fold a revision log into its final states.

    Raises
    ------
    InputError
        When the log holds no word state (nothing to export).
    """
    states: dict[str, WordHypothesis] = {}
    utterances: dict[str, UtteranceHypothesis] = {}
    complete = False
    for event, _ in log.events:
        if isinstance(event, HypothesisUpdate):
            words, spans = event.diff.words, event.diff.utterances
            withdrawn = event.diff.withdrawn_word_ids
            complete = complete or event.conversation_final
        elif isinstance(event, Snapshot):
            words, spans, withdrawn = event.words, event.utterances, ()
            complete = complete or event.conversation_final
        else:
            continue
        for word in words:
            states[word.word_id] = word
        for utterance in spans:
            utterances[utterance.utterance_id] = utterance
        for word_id in withdrawn:
            states.pop(word_id, None)
    if not states:
        raise InputError(f"{log.source}: the log holds no word state to export")
    sent = {w.word_id: w for w in log.words}
    order = [w.word_id for w in log.words if w.word_id in states]
    order += [word_id for word_id in states if word_id not in sent]
    position = {word_id: n for n, word_id in enumerate(order)}
    live = sorted((u for u in utterances.values() if u.word_ids),
                  key=lambda u: min(position.get(w, len(order)) for w in u.word_ids))
    owner: dict[str, int] = {}
    kept: list[FinalUtterance] = []
    for utterance in live:
        indices = tuple(sorted(position[w] for w in utterance.word_ids
                               if w in position and w not in owner))
        if not indices:
            continue
        for index in indices:
            owner[order[index]] = len(kept)
        kept.append(FinalUtterance(state=utterance, words=indices))
    final_words = []
    for word_id in order:
        state = states[word_id]
        record = sent.get(word_id)
        final_words.append(FinalWord(
            word_id=word_id, speaker=state.speaker,
            text=state.text or (record.text if record is not None else ""),
            start=state.start if state.start is not None else (
                record.start if record is not None else None),
            end=state.end if state.end is not None else (
                record.end if record is not None else None),
            state=state, utterance=owner.get(word_id)))
    return Outcome(conversation_id=log.conversation_id, source=log.source,
                   words=tuple(final_words), utterances=tuple(kept), complete=complete)


def clean_text(outcome: Outcome, utterance: FinalUtterance) -> str:
    """The utterance's words without fillers, editing terms, reparanda and restarts."""
    return " ".join(outcome.words[i].text for i in utterance.words
                    if outcome.words[i].state.label not in REMOVED_FROM_CLEAN_TEXT)


def repairs_of(outcome: Outcome, utterance: FinalUtterance) -> list[Repair]:
    """Repair structures read off the utterance's final word labels (word indices).

    A reparandum is a run of ``reparandum``/``restart`` words, ended by the word that carries
    the interruption point; the filler, editing-term and discourse-marker words after it are its
    interregnum and the next word its repair onset. A run of ``restart`` words, or a reparandum
    with nothing after it in the utterance, is a restart (no onset).
    """
    words = outcome.words
    indices = utterance.words
    repairs: list[Repair] = []
    position = 0
    removed = (_L.REPARANDUM, _L.RESTART)
    while position < len(indices):
        state = words[indices[position]].state
        if state.label not in removed:
            position += 1
            continue
        run = [indices[position]]
        restart = state.label is _L.RESTART
        while not words[run[-1]].state.interruption_point and position + 1 < len(indices) \
                and words[indices[position + 1]].state.label in removed:
            position += 1
            run.append(indices[position])
            restart = restart and words[run[-1]].state.label is _L.RESTART
        position += 1
        interregnum = []
        while position < len(indices) and words[indices[position]].state.label in _INTERREGNUM:
            interregnum.append(indices[position])
            position += 1
        onset = indices[position] if position < len(indices) and not restart else None
        repairs.append(Repair(reparandum=tuple(run),
                              interregnum=tuple(interregnum) if onset is not None else (),
                              repair_onset=onset))
        # The onset is read again: it may start the next reparandum ("i i i").
    return repairs


def conversation_of(outcome: Outcome) -> Conversation:
    """The outcome as an annotated :class:`~midstream.Conversation`, ready for inline markup.

    Labels are what the markup can say: a reparandum or restart word outside every repair
    structure keeps its label only through the structure; each repair onset is ``repair``.

    Raises
    ------
    InputError
        When a word's text has no speech content (the server never publishes such a word).
    """
    words: list[Word] = []
    for word in outcome.words:
        token = normalise_token(word.text) if word.text.strip() else None
        if token is None:
            raise InputError(f"{outcome.source}: word {word.word_id!r} has no text to write")
        words.append(Word(text=token.text, speaker=word.speaker, start=word.start,
                          end=word.end, fragment=token.fragment))
    labels = [w.state.label for w in outcome.words]
    repairs: list[Repair] = []
    utterances: list[Utterance] = []
    for utterance in outcome.utterances:
        for repair in repairs_of(outcome, utterance):
            repairs.append(repair)
            if repair.repair_onset is not None and labels[repair.repair_onset] not in (
                    _L.REPARANDUM, _L.RESTART):
                labels[repair.repair_onset] = _L.REPAIR
        state = utterance.state
        utterances.append(Utterance(
            speaker=state.speaker, words=utterance.words, function=state.function,
            fine_tag=state.fine_class, fine_class=state.fine_class, complete=True))
    # A word in no utterance (the log stopped early) becomes an utterance of its own.
    for index, word in enumerate(outcome.words):
        if word.utterance is None:
            utterances.append(Utterance(speaker=word.speaker, words=(index,),
                                        function=UtteranceFunction.OTHER, fine_tag="",
                                        fine_class="", complete=False))
    utterances.sort(key=lambda u: u.words[0])
    in_repair = {i for r in repairs for i in (*r.reparandum, *r.interregnum)}
    labels = [_L.FLUENT if label in (_L.REPARANDUM, _L.RESTART) and i not in in_repair
              else label for i, label in enumerate(labels)]
    conversation_id = outcome.conversation_id or "conversation"
    return Conversation(id="-".join(conversation_id.split()), corpus="midstream-log",
                        words=tuple(words), utterances=tuple(utterances), labels=tuple(labels),
                        repairs=tuple(repairs))


#: Columns of the CSV export, in order.
CSV_COLUMNS = ("row", "conversation", "id", "speaker", "start", "end", "text", "role",
               "function", "fine_class", "confidence", "final", "utterance", "reparandum_of",
               "interruption_point", "clean_text")


def csv_rows(outcome: Outcome) -> Iterator[dict[str, str]]:
    """One row per utterance followed by one per word of it, in spoken order (see
    ``docs/client.md``); words in no utterance (a log that stopped early) come last."""

    def seconds(value: float | None) -> str:
        return "" if value is None else f"{value:.3f}"

    def word_row(word: FinalWord, utterance_id: str) -> dict[str, str]:
        state = word.state
        return {"row": "word", "conversation": outcome.conversation_id, "id": word.word_id,
                "speaker": word.speaker, "start": seconds(word.start), "end": seconds(word.end),
                "text": word.text, "role": state.label.value, "function": "",
                "fine_class": "", "confidence": f"{state.confidence:.4f}",
                "final": "true" if state.final else "false", "utterance": utterance_id,
                "reparandum_of": state.reparandum_of or "",
                "interruption_point": "true" if state.interruption_point else "false",
                "clean_text": ""}

    for utterance in outcome.utterances:
        state = utterance.state
        words = [outcome.words[i] for i in utterance.words]
        yield {"row": "utterance", "conversation": outcome.conversation_id,
               "id": state.utterance_id, "speaker": state.speaker,
               "start": seconds(words[0].start), "end": seconds(words[-1].end),
               "text": " ".join(w.text for w in words), "role": "",
               "function": state.function.value, "fine_class": state.fine_class,
               "confidence": f"{state.confidence:.4f}",
               "final": "true" if state.final else "false", "utterance": state.utterance_id,
               "reparandum_of": "", "interruption_point": "",
               "clean_text": clean_text(outcome, utterance)}
        for word in words:
            yield word_row(word, state.utterance_id)
    for word in outcome.words:
        if word.utterance is None:
            yield word_row(word, "")


def write_csv(outcome: Outcome, stream: IO[str]) -> int:
    """Write the CSV export (RFC 4180 quoting, header row first); returns the rows written."""
    writer = csv.DictWriter(stream, fieldnames=CSV_COLUMNS, lineterminator="\r\n")
    writer.writeheader()
    count = 0
    for row in csv_rows(outcome):
        writer.writerow(row)
        count += 1
    return count
