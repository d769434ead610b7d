"""The terminal view redraws open utterances in place; what a terminal ends up showing."""

from __future__ import annotations

import io
import re

import pytest
from midstream import (
    DisfluencyLabel,
    EndReason,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client._results import Ended
from midstream.client.cli._output import Printer
from midstream.client.cli._view import Board, TerminalView


def _screen(output: str, width: int = 1000, height: int = 100_000) -> list[str]:
    """What a terminal ``width`` columns by ``height`` rows shows after ``output`` (scrollback
    included).

    Replays the two ANSI sequences the view uses (cursor up, erase line) and wraps text that
    reaches the right edge onto the next row, as a terminal does: a view that writes rows wider
    than the terminal leaves its cursor-up count wrong and the screen garbled. Cursor-up stops
    at the top of the visible screen (the last ``height`` rows), as on a terminal.
    """
    rows: list[list[str]] = [[]]
    row = column = 0
    for token in re.split(r"(\x1b\[\d*A|\x1b\[2K|\n)", output):
        if not token:
            continue
        if token == "\n":
            row, column = row + 1, 0
        elif token == "\x1b[2K":
            rows[row] = []
        elif token.startswith("\x1b["):
            row = max(row - int(token[2:-1]), len(rows) - height, 0)
        else:
            for char in token:
                if column == width:
                    row, column = row + 1, 0
                while row >= len(rows):
                    rows.append([])
                line = rows[row]
                line.extend(" " * (column - len(line)))
                if column < len(line):
                    line[column] = char
                else:
                    line.append(char)
                column += 1
        while row >= len(rows):
            rows.append([])
    return [text for text in ("".join(r).rstrip() for r in rows) if text]


def _update(seq: int, label: DisfluencyLabel, function: UtteranceFunction, *,
            final: bool, words: tuple[str, ...] = ("w1", "w2"), utterance_id: str = "u1",
            speaker: str = "A") -> HypothesisUpdate:
    states = tuple(WordHypothesis(word_id=w, speaker=speaker, label=label if w == words[0]
                                  else DisfluencyLabel.FLUENT, confidence=0.8, revision=seq,
                                  final=final) for w in words)
    utterance = UtteranceHypothesis(utterance_id=utterance_id, speaker=speaker, word_ids=words,
                                    clean_text="", function=function, fine_class="x",
                                    confidence=0.5, revision=seq, final=final)
    return HypothesisUpdate(seq=seq, server_time=0.0,
                            diff=HypothesisDiff(words=states, utterances=(utterance,)))


def test_open_utterance_is_rewritten_in_place_and_finished_ones_stay() -> None:
    out = io.StringIO()
    board = Board()
    for word_id, text in (("w1", "uh"), ("w2", "okay"), ("w3", "what"), ("w4", "now")):
        board.note_text(word_id, text)
    view = TerminalView(out, board, clean=False)
    steps = [
        _update(1, DisfluencyLabel.FLUENT, UtteranceFunction.STATEMENT, final=False),
        _update(2, DisfluencyLabel.FILLER, UtteranceFunction.ACKNOWLEDGEMENT, final=False),
        _update(3, DisfluencyLabel.FILLER, UtteranceFunction.ACKNOWLEDGEMENT, final=True),
        _update(4, DisfluencyLabel.FLUENT, UtteranceFunction.QUESTION, final=False,
                words=("w3", "w4"), utterance_id="u2", speaker="B"),
    ]
    for update in steps:
        changed, _ = board.apply(update)
        view.refresh(changed)
    screen = _screen(out.getvalue())
    # One line per utterance: the first shows only its last (final) state, the second is live.
    assert len(screen) == 2
    assert "acknowledgement" in screen[0] and "uh/fil okay" in screen[0]
    assert "statement" not in screen[0] and "~" not in screen[0]
    assert screen[1].strip().startswith("B |") and "question" in screen[1]
    assert "~" in screen[1]  # not final yet


def test_an_utterance_that_ends_empty_leaves_no_line() -> None:
    out = io.StringIO()
    board = Board()
    view = TerminalView(out, board, clean=True)
    changed, _ = board.apply(_update(1, DisfluencyLabel.FLUENT, UtteranceFunction.OTHER,
                                     final=False))
    view.refresh(changed)
    changed, _ = board.apply(_update(2, DisfluencyLabel.FLUENT, UtteranceFunction.OTHER,
                                     final=True, words=()))
    view.refresh(changed)
    assert _screen(out.getvalue()) == []


# A two-speaker call (invented): A starts a long turn, B answers briefly in the middle and B's
# reply becomes final before A's turn, which began first.
_A_TEXT = ("so i was uh i was thinking that we could maybe book the whole team into the "
           "small meeting room on the third floor next tuesday afternoon if nobody minds")
_A_WORDS = _A_TEXT.split()
_B_WORDS = ["mhm", "right"]


def _call_updates() -> tuple[Board, list[HypothesisUpdate]]:
    board = Board()
    a_ids = tuple(f"a{i}" for i in range(len(_A_WORDS)))
    b_ids = ("b0", "b1")
    for word_id, text in zip((*a_ids[:6], *b_ids, *a_ids[6:]), (*_A_WORDS[:6], *_B_WORDS,
                                                                  *_A_WORDS[6:]), strict=True):
        board.note_text(word_id, text)
    speaker_a = "caller-A"

    def a(seq: int, count: int, *, final: bool) -> HypothesisUpdate:
        return _update(seq, DisfluencyLabel.FILLER, UtteranceFunction.STATEMENT, final=final,
                       words=a_ids[:count], utterance_id="ua", speaker=speaker_a)

    def b(seq: int, *, final: bool) -> HypothesisUpdate:
        return _update(seq, DisfluencyLabel.FLUENT, UtteranceFunction.ACKNOWLEDGEMENT,
                       final=final, words=b_ids, utterance_id="ub", speaker="B")

    steps = [a(1, 3, final=False), a(2, 6, final=False), b(3, final=False), b(4, final=True),
             a(5, 12, final=False), a(6, 20, final=False), a(7, len(a_ids), final=True)]
    return board, steps


@pytest.mark.parametrize("width", [80, 160])
def test_the_view_fits_the_terminal_and_ends_in_spoken_order(width: int) -> None:
    board, steps = _call_updates()
    out = io.StringIO()
    view = TerminalView(out, board, clean=False, width=lambda: width)
    for number, update in enumerate(steps):
        changed, _ = board.apply(update)
        view.refresh(changed)
        # After every redraw: no row reaches the edge, one live row per unreleased utterance.
        screen = _screen(out.getvalue(), width)
        assert all(len(row) < width for row in screen), screen
        if number == 3:
            # B's reply is final but A's turn began first and is still open: both stay live,
            # A's first, the end of its words shown.
            assert len(screen) == 2 and "caller-A" in screen[0] and "~" in screen[0]
            assert screen[1].split()[0] == "B" and "right" in screen[1]
        if number == 5 and width == 80:
            assert "…" in screen[0] and screen[0].endswith(" ".join(_A_WORDS[17:20]))
    screen = _screen(out.getvalue(), width)
    # Finished: A's whole turn (wrapped at 80 columns), then B's reply.
    first_b = next(i for i, row in enumerate(screen) if row.split()[0] == "B")
    turn = " ".join(row.rsplit(" | ", 1)[1] for row in screen[:first_b])
    assert turn.split() == ["so/fil", *_A_WORDS[1:]]
    assert first_b == (5 if width == 80 else 2)  # wrapped under its words column
    assert "mhm right" in screen[first_b] and first_b == len(screen) - 1
    assert all("~" not in row for row in screen)


def test_outside_a_terminal_utterances_print_in_spoken_order() -> None:
    board, steps = _call_updates()
    out = io.StringIO()
    printer = Printer(out, json_lines=False, live=False, clean=False, rates=False)
    for word_id, text in board.texts.items():
        printer.board.note_text(word_id, text)
    printed_after: list[int] = []
    for update in steps:
        before = out.getvalue().count("\n")
        printer.event(update)
        printed_after.append(out.getvalue().count("\n") - before)
    printer.event(Ended(reason=EndReason.CLOSED, last_seq=7))
    lines = out.getvalue().splitlines()
    # Nothing is printed while A's earlier turn is open, although B's reply is final at seq 4.
    assert printed_after == [0, 0, 0, 0, 0, 0, 2]
    assert lines[0].split()[0] == "caller-A" and lines[0].endswith("if nobody minds")
    assert lines[1].split()[0] == "B" and lines[1].endswith("mhm right")
    assert lines[2].startswith("[conversation ended")


def test_a_live_area_taller_than_the_screen_releases_early_instead_of_garbling() -> None:
    # A's turn stays open while B backchannels nine times (invented): in spoken order all nine
    # would wait behind A's turn, more rows than a 6-row terminal can redraw.
    width, height = 80, 6
    board = Board()
    board.note_text("a0", "so")
    for i in range(9):
        board.note_text(f"b{i}", f"mhm{i}")
    out = io.StringIO()
    view = TerminalView(out, board, clean=False, width=width, height=height)
    steps = [_update(1, DisfluencyLabel.FLUENT, UtteranceFunction.STATEMENT, final=False,
                     words=("a0",), utterance_id="ua", speaker="A")]
    steps += [_update(2 + i, DisfluencyLabel.FLUENT, UtteranceFunction.ACKNOWLEDGEMENT,
                      final=True, words=(f"b{i}",), utterance_id=f"ub{i}", speaker="B")
              for i in range(9)]
    steps.append(_update(11, DisfluencyLabel.FLUENT, UtteranceFunction.STATEMENT, final=True,
                         words=("a0",), utterance_id="ua", speaker="A"))
    for update in steps:
        changed, _ = board.apply(update)
        view.refresh(changed)
    screen = _screen(out.getvalue(), width, height)
    # Every utterance ends on screen exactly once, none still marked live.
    assert sorted(row.rsplit(" | ", 1)[1] for row in screen) == sorted(
        ["so", *(f"mhm{i}" for i in range(9))])
    assert all("~" not in row for row in screen)
