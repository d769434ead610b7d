"""The compiled build (setup.py with MIDSTREAM_COMPILE=1) is the one that runs when installed.

``scripts/test`` runs the suite twice: over the editable source install, then over a compiled
wheel installed beside it, naming the build it expects in ``MIDSTREAM_EXPECT_BUILD``.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from midstream._build import PER_WORD_MODULES, build_name, compiled_modules

REPO = Path(__file__).resolve().parents[2]


def test_the_build_under_test_is_the_expected_one() -> None:
    expected = os.environ.get("MIDSTREAM_EXPECT_BUILD")
    if expected is not None:
        # Otherwise the compiled pass could quietly test the sources a second time.
        assert build_name() == expected, compiled_modules()
    else:
        # A half-compiled install (a stale extension beside edited sources) is never right.
        assert build_name() in ("source", "compiled"), compiled_modules()


def test_every_per_word_module_exists_as_source() -> None:
    # setup.py compiles exactly these; a renamed module would otherwise drop out of the build.
    folders = {"midstream.models": "models", "midstream.server": "server"}
    for name in PER_WORD_MODULES:
        top = ".".join(name.split(".")[:2])
        path = REPO / folders[top] / Path(*name.split(".")[2:]).with_suffix(".py")
        assert path.is_file(), name


def test_an_editable_install_is_never_compiled() -> None:
    env = dict(os.environ, MIDSTREAM_COMPILE="1")
    result = subprocess.run([sys.executable, "setup.py", "editable_wheel"], cwd=REPO, env=env,
                            capture_output=True, text=True, timeout=60, check=False)
    assert result.returncode != 0
    assert "editable install cannot be compiled" in result.stderr
