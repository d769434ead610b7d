"""What the streaming commands show: the current state of a conversation and its renderings.

:class:`Board` folds server events into the latest hypothesis per word and utterance.
:class:`SpokenOrder` releases finished utterances in the order they were spoken (not the order
they became final: one speaker's short reply often closes before the other's long turn that
began first). :class:`TerminalView` redraws the utterances not yet released in place on a
terminal, each cut to the terminal's width (released ones scroll up, wrapped, and stay), and
:func:`disfluency_rates` counts per-speaker rates per 100 words.
"""

from __future__ import annotations

import sys
import textwrap
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import TextIO

from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    DisfluencyLabel,
    HypothesisUpdate,
    UtteranceFunction,
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
    DisfluencyLabel.REPAIR: "fix",
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
        # Position of each word in the order it reached this board: sent (tag) or first
        # published (subscribe), which is the order it was spoken in its conversation.
        self._arrival: dict[str, int] = {}

    def note_text(self, word_id: str, text: str) -> None:
        """Remember what a word said (the server's updates carry ids, not text)."""
        self.texts[word_id] = text
        self._arrival.setdefault(word_id, len(self._arrival))

    def spoken_position(self, utterance: UtteranceHypothesis) -> int:
        """Where the utterance began among the words seen (its first word's arrival)."""
        return min((self._arrival.get(w, sys.maxsize) for w in utterance.word_ids
                    if w not in self.withdrawn), default=sys.maxsize)

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
            self._arrival.setdefault(word.word_id, len(self._arrival))
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


#: The widest utterance function name (``clarification_request``), so function columns align.
_FUNCTION_WIDTH = max(len(function.value) for function in UtteranceFunction)
#: Below this many columns for the words, a line is cut (or wrapped) as a whole instead.
_MIN_BODY = 12


def utterance_prefix(utterance: UtteranceHypothesis, *, speaker_width: int = 8) -> str:
    """Speaker, function and its confidence (``~`` while not final), then ``" | "``."""
    state = "" if utterance.final else "~"
    return (f"{utterance.speaker:>{speaker_width}} | {utterance.function.value:<{_FUNCTION_WIDTH}} "
            f"{utterance.confidence:4.2f}{state:1} | ")


def utterance_line(board: Board, utterance: UtteranceHypothesis, *, clean: bool) -> str:
    """One display line: speaker, function (with confidence), words; ``~`` while not final."""
    body = board.clean(utterance) if clean else board.marked(utterance)
    return utterance_prefix(utterance) + body


class SpokenOrder:
    """Hands out finished utterances in the order they were spoken.

    An utterance is released once it is final and every utterance that began before it (by
    :meth:`Board.spoken_position`) has been released: an open utterance holds back those that
    began after it. At the conversation's end, ``force`` releases every final one in order.
    An utterance the tagger dissolved (it ends with no words) is never released and holds
    nothing back. Not thread-safe; one per :class:`Board`.
    """

    def __init__(self, board: Board) -> None:
        self._board = board
        self._pending: set[str] = set()
        self._released: set[str] = set()

    def note(self, changed: Iterable[str]) -> None:
        """Utterances an event changed (new ones join the waiting list)."""
        for utterance_id in changed:
            if utterance_id not in self._released:
                self._pending.add(utterance_id)

    def waiting(self) -> list[UtteranceHypothesis]:
        """The utterances not yet released that have words, in spoken order."""
        board = self._board
        waiting = [board.utterances[u] for u in self._pending if board.utterances[u].word_ids]
        return sorted(waiting, key=lambda u: (board.spoken_position(u), u.utterance_id))

    def release(self, *, force: bool = False, keep: int | None = None
                ) -> list[UtteranceHypothesis]:
        """The utterances now due, in spoken order; each is released once.

        ``keep``: at most this many may stay waiting; beyond it the earliest final ones are
        released although an open one began before them (a screen holds only so many rows).
        """
        for utterance_id in list(self._pending):
            utterance = self._board.utterances[utterance_id]
            if utterance.final and not utterance.word_ids:
                self._pending.discard(utterance_id)
        due = []
        for utterance in self.waiting():
            if not utterance.final:
                if force:
                    continue
                break
            due.append(utterance)
            self._pending.discard(utterance.utterance_id)
            self._released.add(utterance.utterance_id)
        if keep is not None:
            waiting = self.waiting()
            excess = len(waiting) - keep
            for utterance in waiting:
                if excess <= 0:
                    break
                if utterance.final:
                    due.append(utterance)
                    self._pending.discard(utterance.utterance_id)
                    self._released.add(utterance.utterance_id)
                    excess -= 1
        return due


class TerminalView:
    """Redraw unreleased utterances in place on a terminal; released ones scroll up and stay.

    Every row written is shorter than the terminal (``width`` is asked on each redraw, so a
    resized window is followed): a row the terminal wrapped would put the cursor-up count out
    and garble the screen; so would a live area taller than the screen (``height``). A live
    utterance is one row showing the end of its words (``…``
    where the start was cut: the newest words are the ones changing); a released one is
    wrapped under its words' column. Uses only two ANSI sequences (cursor up, erase line),
    which every terminal emulator of the last decades understands; it is used only when the
    output is a TTY.
    """

    def __init__(self, out: TextIO, board: Board, *, clean: bool,
                 width: int | Callable[[], int] = 160,
                 height: int | Callable[[], int] = 1000) -> None:
        self._out = out
        self._board = board
        self._clean = clean
        self._width = width
        self._height = height
        self._order = SpokenOrder(board)
        self._drawn = 0
        self._speaker_width = 1

    def _columns(self) -> int:
        width = self._width() if callable(self._width) else self._width
        # One column short of the edge: some terminals wrap on reaching the last column.
        return max(width - 1, 20)

    def _parts(self, utterance: UtteranceHypothesis) -> tuple[str, str]:
        prefix = utterance_prefix(utterance, speaker_width=self._speaker_width)
        body = (self._board.clean(utterance) if self._clean
                else self._board.marked(utterance))
        return prefix, body

    def _live_row(self, utterance: UtteranceHypothesis, columns: int) -> str:
        prefix, body = self._parts(utterance)
        room = columns - len(prefix)
        if room < _MIN_BODY:
            return (prefix + body)[:columns]
        if len(body) > room:
            tail = body[len(body) - room + 1:]
            # Start at a word where one begins within the tail, so no word shows half.
            space = tail.find(" ")
            if 0 <= space < len(tail) - 1:
                tail = tail[space + 1:]
            body = "…" + tail
        return prefix + body

    def _released_rows(self, utterance: UtteranceHypothesis, columns: int) -> list[str]:
        prefix, body = self._parts(utterance)
        room = columns - len(prefix)
        if room < _MIN_BODY:
            return textwrap.wrap(prefix + body, columns) or [prefix.rstrip()]
        rows = textwrap.wrap(body, room) or [""]
        indent = " " * (len(prefix) - 2) + "| "
        return [prefix + rows[0], *(indent + row for row in rows[1:])]

    def refresh(self, changed: Iterable[str], *, ended: bool = False) -> None:
        """Redraw after an event that changed the utterances ``changed``.

        ``ended``: the conversation is over (every final utterance is released).
        """
        self._order.note(changed)
        columns = self._columns()
        for utterance_id in changed:
            # Speaker column as wide as the longest name seen (at most 8): narrow terminals
            # keep their columns for words.
            speaker = self._board.utterances[utterance_id].speaker
            self._speaker_width = max(self._speaker_width, min(len(speaker), 8))
        # Cursor-up cannot climb above the screen's top row: the live area stays shorter than
        # the screen, releasing early (or, when open utterances alone overflow it, showing
        # the latest of them).
        lines = self._height() if callable(self._height) else self._height
        room = max(lines - 1, 1)
        released = self._order.release(force=ended or self._board.final, keep=room)
        rows = [row for u in released for row in self._released_rows(u, columns)]
        live = [self._live_row(u, columns) for u in self._order.waiting()][-room:]
        if self._drawn:
            self._out.write(f"\x1b[{self._drawn}A")
        # Released rows go above the live area and are never redrawn.
        for row in (*rows, *live):
            self._out.write(f"\x1b[2K{row}\n")
        leftover = self._drawn - len(rows) - len(live)
        if leftover > 0:
            # Erase what remains of a taller previous drawing, then return above it.
            self._out.write("\x1b[2K\n" * leftover)
            self._out.write(f"\x1b[{leftover}A")
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
