"""CI's entry point refuses to run without the corpora, so corpus tests can never skip there,
and installs chromium and redis-server, so the report's browser test and the shared-log tests
cannot skip there either."""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def test_ci_run_fails_fast_when_the_corpora_are_missing(tmp_path: Path) -> None:
    env = dict(os.environ, CI="true", MIDSTREAM_CORPORA=str(tmp_path / "absent"))
    result = subprocess.run(["bash", str(REPO / ".ci" / "run")], env=env, capture_output=True,
                            text=True, timeout=60, check=False)
    assert result.returncode == 1
    assert "corpora missing" in result.stderr


def _fake_bin(folder: Path, name: str, script: str) -> None:
    path = folder / name
    path.write_text(f"#!/bin/bash\n{script}\n", encoding="utf-8")
    path.chmod(0o755)


def test_ci_run_installs_chromium_and_redis_with_apt_when_missing(tmp_path: Path) -> None:
    # A PATH holding only what .ci/run needs, so both packages are missing whatever the host has;
    # apt-get is a stand-in that records its calls and fails the install, which must stop the
    # run with a clear error before any test starts.
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    for tool in ("bash", "dirname", "cat"):
        found = shutil.which(tool)
        assert found is not None
        (bin_dir / tool).symlink_to(found)
    calls = tmp_path / "apt-calls"
    _fake_bin(bin_dir, "id", 'echo 0')
    _fake_bin(bin_dir, "apt-get", f'echo "$*" >> {calls}\n[ "$1" = update ]')
    env = dict(os.environ, CI="true", MIDSTREAM_CORPORA=str(tmp_path), PATH=str(bin_dir))
    result = subprocess.run([str(bin_dir / "bash"), str(REPO / ".ci" / "run")], env=env,
                            capture_output=True, text=True, timeout=60, check=False)
    assert result.returncode == 1
    assert "could not install chromium redis-server" in result.stderr
    assert calls.read_text(encoding="utf-8").splitlines() == [
        "update -qq", "install -y -qq chromium redis-server"]
