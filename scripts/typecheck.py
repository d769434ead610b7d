"""Run ``mypy --strict`` over the installed layout of the package.

The repository keeps each subpackage in its own top-level folder (``server/`` is
``midstream.server``, ``core/`` is ``midstream`` itself), which mypy cannot map by itself. This
script builds a tree of symbolic links under ``build/typecheck`` that mirrors the import names
from ``[tool.setuptools.package-dir]`` in pyproject.toml, then type-checks that tree, the tests
and the scripts. Reported paths run through the link tree; the line numbers are the sources'.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
TREE = REPO / "build" / "typecheck"


def build_tree() -> Path:
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    mapping: dict[str, str] = config["tool"]["setuptools"]["package-dir"]
    root = TREE / "midstream"
    if TREE.exists():
        for path in sorted(TREE.rglob("*"), reverse=True):
            if path.is_symlink() or path.is_file():
                path.unlink()
            elif path.is_dir():
                path.rmdir()
    root.mkdir(parents=True)
    for item in (REPO / mapping["midstream"]).iterdir():
        if item.suffix in {".py", ".pyi"} or item.name == "py.typed":
            (root / item.name).symlink_to(item)
    for name, folder in mapping.items():
        if name == "midstream":
            continue
        (root / name.split(".", 1)[1]).symlink_to(REPO / folder, target_is_directory=True)
    return TREE


def main() -> int:
    tree = build_tree()
    env = dict(os.environ, MYPYPATH=str(tree))
    targets = [str(tree / "midstream"), "tests", "scripts"]
    command = [sys.executable, "-m", "mypy", "--config-file", "pyproject.toml", *targets]
    return subprocess.call(command, cwd=REPO, env=env)


if __name__ == "__main__":
    sys.exit(main())
