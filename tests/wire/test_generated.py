"""The generated wire code must match protos/ (regenerate with scripts/gen_protos.py)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def test_generated_code_is_current() -> None:
    result = subprocess.run(
        [sys.executable, str(REPO / "scripts" / "gen_protos.py"), "--check"],
        capture_output=True, text=True, check=False,
    )
    assert result.returncode == 0, result.stderr


def test_stale_code_is_detected(tmp_path: Path) -> None:
    # A check that cannot fail proves nothing: edit a copy of the tree and expect a failure.
    copy = tmp_path / "repo"
    shutil.copytree(REPO / "protos", copy / "protos")
    shutil.copytree(REPO / "scripts", copy / "scripts")
    proto = copy / "protos" / "midstream" / "wire" / "midstream.proto"
    proto.write_text(proto.read_text() + "\nmessage Extra { string added = 1; }\n")
    result = subprocess.run(
        [sys.executable, str(copy / "scripts" / "gen_protos.py"), "--check"],
        capture_output=True, text=True, check=False,
    )
    assert result.returncode == 1
    assert "stale" in result.stderr
