"""The terminal view redraws open utterances in place; what a terminal ends up showing."""

from __future__ import annotations

import io
import re

from midstream import (
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client._view import Board, TerminalView


def _screen(output: str) -> list[str]:
    """Replay the two ANSI sequences the view uses (cursor up, erase line) onto a screen."""
    lines: list[str] = [""]
    row = 0
    for token in re.split(r"(\x1b\[\d*A|\x1b\[2K|\n)", output):
        if not token:
            continue
        if token == "\n":
            row += 1
            if row == len(lines):
                lines.append("")
        elif token == "\x1b[2K":
            lines[row] = ""
        elif token.startswith("\x1b["):
            row -= int(token[2:-1])
        else:
            lines[row] += token
    return [line for line in lines if line]


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
