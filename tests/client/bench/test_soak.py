"""``midstream bench soak``: its short run passes against a real server, and its checker
catches faults.

The full run (1,000 conversations, 600 s) is reported in ``docs/soak.md``; CI runs ``--short``
(20 SwDA conversations, 10 s) as a subprocess, the way a user runs it.
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest
from client_kit import models_dir
from midstream import (
    DisfluencyLabel,
    EndReason,
    HypothesisDiff,
    HypothesisUpdate,
    WordHypothesis,
)
from midstream.client import Ended, Welcome
from midstream.client.bench._soak import Event, Totals, check_stream

__all__ = ["models_dir"]  # fixtures used here, for pytest


@pytest.mark.corpus
@pytest.mark.slow
def test_short_soak_passes(models_dir: Path, swda_dir: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "midstream", "bench", "soak", "--short", "--models",
         str(models_dir), "--corpus", str(swda_dir)],
        capture_output=True, text=True, timeout=180, check=False)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "no violations" in done.stdout
    finished = re.search(r"conversations checked\s+(\d+) \(\d+ of them cut short at the "
                         r"deadline, (\d+) also followed\)", done.stdout)
    assert finished is not None, done.stdout
    assert int(finished[1]) >= 4 and int(finished[2]) >= 1
    words = re.search(r"words sent\s+(\d+)", done.stdout)
    assert words is not None and int(words[1]) > 100
    assert re.search(r"server RSS\s+\d+ MiB at start", done.stdout), done.stdout


# --- the checker itself ------------------------------------------------------------------------


def _update(seq: int, *words: tuple[str, bool], final: bool = False) -> HypothesisUpdate:
    return HypothesisUpdate(seq=seq, server_time=0.0, conversation_final=final,
                            diff=HypothesisDiff(words=tuple(
                                WordHypothesis(word_id=w, speaker="A",
                                               label=DisfluencyLabel.FLUENT, confidence=1.0,
                                               revision=0, final=f)
                                for w, f in words)))


_WELCOME = Welcome(conversation_id="c", next_seq=1)


def _ended(last: int) -> Ended:
    return Ended(reason=EndReason.CLOSED, last_seq=last)


def _violations(messages: list[Event]) -> list[str]:
    totals = Totals()
    check_stream("#0", ["w0", "w1"], messages, totals)
    return list(totals.violations)


def test_checker_accepts_a_clean_stream() -> None:
    clean: list[Event] = [_WELCOME, _update(1, ("w0", False)),
                          _update(2, ("w0", True), ("w1", False)),
                          _update(3, ("w1", True), final=True), _ended(3)]
    assert _violations(clean) == []


@pytest.mark.parametrize(("messages", "named"), [
    ([_WELCOME, _update(1, ("w0", True)), _update(3, ("w1", True), final=True), _ended(3)],
     "not contiguous"),
    ([_WELCOME, _update(1, ("w0", True)), _update(2, ("w0", True), ("w1", True), final=True),
      _ended(2)], "published again after it was final"),
    ([_WELCOME, _update(1, ("w0", True), final=True), _ended(1)], "1 words never final"),
    ([_WELCOME, _update(1, ("w0", True), ("w1", True), final=True), _ended(5)],
     "ended.last_seq 5"),
    ([_WELCOME, _update(1, ("w0", True), ("w1", True), final=True)], "expected one"),
    ([_WELCOME, _update(1, ("w0", True), ("w1", True), ("w7", True), final=True), _ended(1)],
     "never sent"),
], ids=["gap", "duplicate final", "word never final", "wrong last seq", "no ended",
        "unknown word"])
def test_checker_names_each_violation(messages: list[Event], named: str) -> None:
    found = _violations(messages)
    assert any(named in v for v in found), found
