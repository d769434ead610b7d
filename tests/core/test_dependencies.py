"""``pyproject.toml`` declares only what the packages import (a house rule: no dead weight).

Every run-time dependency must be imported by some module of the installed packages; a
declared one nobody imports is a download and an attack surface for nothing (sklearn-crfsuite
was one: DEVELOPERS.md says why python-crfsuite alone serves).
"""

from __future__ import annotations

import ast
import re
import tomllib
from importlib import metadata
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def _normal(name: str) -> str:
    # Distribution names compare case-insensitively with runs of -_. as one dash (PEP 503).
    return re.sub(r"[-_.]+", "-", name).lower()


def _declared() -> set[str]:
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    requirements: list[str] = config["project"]["dependencies"]
    return {_normal(re.split(r"[<>=!~;\[ ]", requirement, maxsplit=1)[0])
            for requirement in requirements}


def _imported_top_levels() -> set[str]:
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    folders: dict[str, str] = config["tool"]["setuptools"]["package-dir"]
    names: set[str] = set()
    for folder in folders.values():
        for path in (REPO / folder).rglob("*.py"):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                if isinstance(node, ast.Import):
                    names.update(alias.name.split(".")[0] for alias in node.names)
                elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                    names.add(node.module.split(".")[0])
    return names


def test_every_declared_dependency_is_imported() -> None:
    providers = metadata.packages_distributions()
    imported = {_normal(dist) for name in _imported_top_levels()
                for dist in providers.get(name, [])}
    unused = sorted(_declared() - imported)
    assert not unused, f"declared in pyproject.toml but imported by no package module: {unused}"
