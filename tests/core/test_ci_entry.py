"""CI's entry point refuses to run without the corpora, so corpus tests can never skip there."""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def test_ci_run_fails_fast_when_the_corpora_are_missing(tmp_path: Path) -> None:
    env = dict(os.environ, CI="true", MIDSTREAM_CORPORA=str(tmp_path / "absent"))
    result = subprocess.run(["bash", str(REPO / ".ci" / "run")], env=env, capture_output=True,
                            text=True, timeout=60, check=False)
    assert result.returncode == 1
    assert "corpora missing" in result.stderr
