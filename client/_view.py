"""What the streaming commands show: the current state of a conversation and its renderings.

:class:`Board` folds server events into the latest hypothesis per word and utterance.
:class:`TerminalView` redraws the still-open utterances in place on a terminal (final ones scroll
up and stay), and :func:`disfluency_rates` counts per-speaker rates per 100 words.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import TextIO

from midstream._types import (
    REMOVED_FROM_CLEAN_TEXT,
    DisfluencyLabel,
    HypothesisUpdate,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client._results import ServerEvent, Snapshot

#: Printed wherever rates are: they come from a statistical tagger, not from a clinician.
RATES_CAUTION = (
    "Caution: these rates are automatic estimates for research, not a diagnosis; clinical "
    "decisions rest with licensed clinicians and local practice."
)

#: Short marks after a word in the terminal view; fluent words carry none.
LABEL_MARKS: dict[DisfluencyLabel, str] = {
    DisfluencyLabel.FLUENT: "",
    DisfluencyLabel.FILLER: "fil",
    DisfluencyLabel.EDIT_TERM: "edt",
    DisfluencyLabel.DISCOURSE_MARKER: "dm",
    DisfluencyLabel.REPARANDUM: "rpd",
    DisfluencyLabel.REPAIR: "rep",
    DisfluencyLabel.RESTART: "rst",
}


class Board:
    """The latest state of every word and utterance of one conversation.

    Not thread-safe; one per stream. Memory grows with the conversation (a command-line view
    shows the whole conversation, unlike the server, which bounds what it keeps).
    """

    def __init__(self) -> None:
        self.words: dict[str, WordHypothesis] = {}
        self.texts: dict[str, str] = {}
        self.utterances: dict[str, UtteranceHypothesis] = {}
        self.withdrawn: set[str] = set()
        self.final = False

    def note_text(self, word_id: str, text: str) -> None:
        """Remember what a word said (the server's updates carry ids, not text)."""
        self.texts[word_id] = text

    def apply(self, event: ServerEvent) -> tuple[list[str], list[str]]:
        """Fold one event in; return the ids of utterances that changed and words that moved."""
        changed_utterances: list[str] = []
        words: Iterable[WordHypothesis] = ()
        utterances: Iterable[UtteranceHypothesis] = ()
        if isinstance(event, HypothesisUpdate):
            words, utterances = event.diff.words, event.diff.utterances
            for word_id in event.diff.withdrawn_word_ids:
                self.withdrawn.add(word_id)
                self.words.pop(word_id, None)
            self.final = self.final or event.conversation_final
        elif isinstance(event, Snapshot):
            words, utterances = event.words, event.utterances
            self.final = self.final or event.conversation_final
        moved = []
        for word in words:
            self.words[word.word_id] = word
            moved.append(word.word_id)
        for utterance in utterances:
            self.utterances[utterance.utterance_id] = utterance
            changed_utterances.append(utterance.utterance_id)
        return changed_utterances, moved

    def text_of(self, word_id: str) -> str:
        return self.texts.get(word_id, word_id)

    def marked(self, utterance: UtteranceHypothesis) -> str:
        """The utterance's words, each disfluent one followed by its mark (``uh/fil``)."""
        parts = []
        for word_id in utterance.word_ids:
            if word_id in self.withdrawn:
                continue
            text = self.text_of(word_id)
            state = self.words.get(word_id)
            if state is not None and LABEL_MARKS[state.label]:
                text = f"{text}/{LABEL_MARKS[state.label]}"
            parts.append(text)
        return " ".join(parts)

    def clean(self, utterance: UtteranceHypothesis) -> str:
        """The utterance without fillers, editing terms, reparanda and restarts."""
        if all(w in self.texts for w in utterance.word_ids) or not utterance.clean_text:
            kept = [self.text_of(w) for w in utterance.word_ids
                    if w not in self.withdrawn and (
                        w not in self.words or self.words[w].label not in REMOVED_FROM_CLEAN_TEXT)]
            return " ".join(kept) if kept or not utterance.clean_text else utterance.clean_text
        return utterance.clean_text


def utterance_line(board: Board, utterance: UtteranceHypothesis, *, clean: bool) -> str:
    """One display line: speaker, function (with confidence), words; ``~`` while not final."""
    body = board.clean(utterance) if clean else board.marked(utterance)
    state = "" if utterance.final else "~"
    return (f"{utterance.speaker:>8} | {utterance.function.value:<21} "
            f"{utterance.confidence:4.2f}{state:1} | {body}")


class TerminalView:
    """Redraw open utterances in place on a terminal; finished ones scroll up and stay.

    Uses only two ANSI sequences (cursor up, erase line), which every terminal emulator of the
    last decades understands; it is used only when the output is a TTY.
    """

    def __init__(self, out: TextIO, board: Board, *, clean: bool, width: int = 160) -> None:
        self._out = out
        self._board = board
        self._clean = clean
        self._width = width
        self._open: list[str] = []
        self._drawn = 0
        self._printed: set[str] = set()

    def refresh(self, changed: Iterable[str]) -> None:
        """Redraw after an update that changed the utterances ``changed``."""
        for utterance_id in changed:
            if utterance_id not in self._open and utterance_id not in self._printed:
                self._open.append(utterance_id)
        if self._drawn:
            self._out.write(f"\x1b[{self._drawn}A")
        finished: list[str] = []
        live: list[str] = []
        still_open: list[str] = []
        for utterance_id in self._open:
            utterance = self._board.utterances[utterance_id]
            line = utterance_line(self._board, utterance, clean=self._clean)[: self._width]
            if not utterance.final:
                still_open.append(utterance_id)
                live.append(line)
                continue
            self._printed.add(utterance_id)
            # An utterance the tagger dissolved (its words moved elsewhere) ends empty.
            if utterance.word_ids:
                finished.append(line)
        # Finished lines go above the live area and are never redrawn.
        for line in (*finished, *live):
            self._out.write(f"\x1b[2K{line}\n")
        leftover = self._drawn - len(finished) - len(live)
        if leftover > 0:
            # Erase what remains of a taller previous drawing, then return above it.
            self._out.write("\x1b[2K\n" * leftover)
            self._out.write(f"\x1b[{leftover}A")
        self._open = still_open
        self._drawn = len(live)
        self._out.flush()


@dataclass(frozen=True, slots=True, kw_only=True)
class SpeakerRates:
    """Counts of one speaker's final word labels, and rates per 100 words."""

    speaker: str
    words: int
    counts: dict[DisfluencyLabel, int]

    def per_100(self, label: DisfluencyLabel) -> float:
        return 100.0 * self.counts.get(label, 0) / self.words if self.words else 0.0

    @property
    def disfluent_per_100(self) -> float:
        """Words that clean text drops (fillers, editing terms, reparanda, restarts) per 100."""
        removed = sum(self.counts.get(label, 0) for label in REMOVED_FROM_CLEAN_TEXT)
        return 100.0 * removed / self.words if self.words else 0.0


def disfluency_rates(words: Iterable[WordHypothesis]) -> list[SpeakerRates]:
    """Per-speaker label counts over the given (final) word hypotheses, speakers in order seen.

    Repairs are counted by their onset word, so the ``repair`` rate is repairs per 100 words.
    """
    totals: dict[str, int] = {}
    counts: dict[str, dict[DisfluencyLabel, int]] = {}
    for word in words:
        totals[word.speaker] = totals.get(word.speaker, 0) + 1
        per = counts.setdefault(word.speaker, {})
        per[word.label] = per.get(word.label, 0) + 1
    return [SpeakerRates(speaker=s, words=totals[s], counts=counts[s]) for s in totals]


_RATE_COLUMNS = (
    ("filled pauses", DisfluencyLabel.FILLER),
    ("editing terms", DisfluencyLabel.EDIT_TERM),
    ("discourse markers", DisfluencyLabel.DISCOURSE_MARKER),
    ("repairs", DisfluencyLabel.REPAIR),
    ("reparandum words", DisfluencyLabel.REPARANDUM),
    ("restart words", DisfluencyLabel.RESTART),
)


def rates_table(rates: list[SpeakerRates]) -> str:
    """A plain-text table of rates per 100 words, with the caution line under it."""
    header = ["speaker", "words", *(name for name, _ in _RATE_COLUMNS), "disfluent words"]
    rows = [header]
    for rate in rates:
        rows.append([rate.speaker, str(rate.words),
                     *(f"{rate.per_100(label):.1f}" for _, label in _RATE_COLUMNS),
                     f"{rate.disfluent_per_100:.1f}"])
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    lines = ["Disfluency rates per 100 words (automatic estimates):"]
    lines += ["  ".join(cell.rjust(widths[i]) for i, cell in enumerate(row)) for row in rows]
    lines.append(RATES_CAUTION)
    return "\n".join(lines)
