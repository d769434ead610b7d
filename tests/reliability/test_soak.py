"""The soak script: its short run passes against a real server, and its checker catches faults.

The full run (1,000 conversations, 600 s) is reported in ``docs/soak.md``; CI runs ``--short``
(20 SwDA conversations, 10 s) as a subprocess, the way a user runs it.
"""

from __future__ import annotations

import re
import runpy
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from midstream.wire import midstream_pb2 as pb
from reliability_kit import REPO, models_dir_fixture  # noqa: F401 - fixtures are found by name

pytestmark = pytest.mark.corpus

SOAK = REPO / "scripts" / "soak.py"


def test_short_soak_passes(models_dir: Path, swda_dir: Path) -> None:
    done = subprocess.run(
        [sys.executable, str(SOAK), "--short", "--models", str(models_dir),
         "--corpus", str(swda_dir)],
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


@pytest.fixture(name="soak", scope="module")
def soak_fixture() -> dict[str, Any]:
    """The script's functions (run as a module, so its main() does not start)."""
    return runpy.run_path(str(SOAK))


def _update(seq: int, *words: tuple[str, bool], final: bool = False) -> pb.ServerMessage:
    return pb.ServerMessage(update=pb.Update(
        seq=seq, conversation_final=final,
        words=[pb.WordState(word_id=w, speaker="A", final=f) for w, f in words]))


_WELCOME = pb.ServerMessage(welcome=pb.Welcome(conversation_id="c", next_seq=1))


def _ended(last: int) -> pb.ServerMessage:
    return pb.ServerMessage(ended=pb.Ended(reason=pb.END_REASON_CLOSED, last_seq=last))


def _violations(soak: dict[str, Any], messages: list[pb.ServerMessage]) -> list[str]:
    totals = soak["Totals"]()
    soak["check_stream"]("#0", ["w0", "w1"], messages, totals)
    return list(totals.violations)


def test_checker_accepts_a_clean_stream(soak: dict[str, Any]) -> None:
    clean = [_WELCOME, _update(1, ("w0", False)), _update(2, ("w0", True), ("w1", False)),
             _update(3, ("w1", True), final=True), _ended(3)]
    assert _violations(soak, clean) == []


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
def test_checker_names_each_violation(soak: dict[str, Any], messages: list[pb.ServerMessage],
                                      named: str) -> None:
    found = _violations(soak, messages)
    assert any(named in v for v in found), found
