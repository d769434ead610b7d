"""Compiled kernels are cached in the user's cache folder, never beside the installed module.

Files numba writes beside ``models/_lattice.py`` land in ``site-packages/midstream`` for a plain
install; ``pip uninstall`` leaves them, and the folder then shadows a later editable install.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

_PROBE = (
    "from pathlib import Path\n"
    "from midstream.models import _lattice\n"
    "_lattice.warm_up()\n"
    "print(_lattice.kernel_cache_dir())\n"
    "print(Path(_lattice.__file__).parent)\n"
)


def _run_probe(env: dict[str, str]) -> tuple[Path, Path]:
    result = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True,
                            text=True, timeout=300, check=True)
    cache, module_dir = result.stdout.split()
    return Path(cache), Path(module_dir)


def _kernel_files(folder: Path) -> list[Path]:
    return [path for path in folder.rglob("*") if path.suffix in {".nbi", ".nbc"}]


def test_kernels_are_cached_under_xdg_cache_home(tmp_path: Path) -> None:
    env = {key: value for key, value in os.environ.items() if key != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    cache, module_dir = _run_probe(env)
    assert cache == tmp_path / "midstream" / "kernels"
    assert _kernel_files(cache), "warm_up compiled nothing into the cache"
    assert not _kernel_files(module_dir / "__pycache__")


def test_numba_cache_dir_set_by_the_user_wins(tmp_path: Path) -> None:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path / "mine"),
               XDG_CACHE_HOME=str(tmp_path / "xdg"))
    cache, _ = _run_probe(env)
    assert cache == tmp_path / "mine"
    assert _kernel_files(cache)
    assert not (tmp_path / "xdg").exists()
