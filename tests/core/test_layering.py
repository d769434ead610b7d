"""No module reaches into a private part of another top-level package (a house rule).

The top-level packages are the folders ``pyproject.toml`` maps to import names (``core`` is
``midstream``, ``models`` is ``midstream.models``, ...). A module may import anything of its own
package, but of another package only what that package makes public: its ``__init__`` names and
its public submodules (``midstream.models.training``, ``midstream.wire.convert``,
``midstream.client.cli``, the ``probes`` modules the benchmarks time inner stages through).
Importing a ``_``-prefixed module or name of another package fails here, in library code and in
``scripts/`` (entry points are held to the same rule, since they show a user how to drive the
package). Tests are exempt: they test the private modules.

The check reads the sources with :mod:`ast` (nothing is imported), so it sees imports inside
functions as well, and ``importlib.import_module`` calls with a literal name.
"""

from __future__ import annotations

import ast
import tomllib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]

@dataclass(frozen=True, slots=True)
class Reach:
    """One import of a private module or name of another package."""

    path: str
    line: int
    imported: str
    #: The private module reached (``midstream.models.words._decoder``), or the owning module of a
    #: private name imported from a public one.
    private_module: str

    def __str__(self) -> str:
        return f"{self.path}:{self.line}: imports {self.imported}"


def packages() -> dict[str, str]:
    """Import name of each top-level package -> its folder, as ``pyproject.toml`` maps them."""
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    mapping: dict[str, str] = config["tool"]["setuptools"]["package-dir"]
    return dict(mapping)


def _owner(module: str, names: list[str]) -> str | None:
    """The top-level package ``module`` belongs to (the longest mapped prefix)."""
    for name in names:
        if module == name or module.startswith(name + "."):
            return name
    return None


def _is_private(part: str) -> bool:
    return part.startswith("_") and not (part.startswith("__") and part.endswith("__"))


def _imports(tree: ast.AST) -> Iterator[tuple[int, str, str | None]]:
    """``(line, module, name)`` of every absolute import; ``name`` for ``from m import name``."""
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield node.lineno, alias.name, None
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for alias in node.names:
                yield node.lineno, node.module, alias.name
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr == "import_module" and node.args
              and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)):
            yield node.lineno, node.args[0].value, None


def private_reaches(source: str, path: str, own_package: str | None,
                    mapped: Mapping[str, str]) -> list[Reach]:
    """Imports in ``source`` of a private module or name of a package other than its own.

    Parameters
    ----------
    source : str
        Python source of one module.
    path : str
        Where it lives, for messages.
    own_package : str or None
        Import name of the top-level package the module belongs to (``None``: a script).
    mapped : Mapping[str, str]
        The top-level packages' import names (keys) as ``pyproject.toml`` maps them.
    """
    names = sorted(mapped, key=len, reverse=True)
    found: list[Reach] = []
    for line, module, name in _imports(ast.parse(source, filename=path)):
        owner = _owner(module, names)
        if owner is None or owner == own_package:
            continue
        parts = module[len(owner):].lstrip(".").split(".") if module != owner else []
        private = [i for i, part in enumerate(parts) if _is_private(part)]
        imported = f"{module}.{name}" if name else module
        if private:
            reached = ".".join([owner, *parts[: private[0] + 1]])
            found.append(Reach(path, line, imported, reached))
        elif name is not None and _is_private(name):
            found.append(Reach(path, line, imported, f"{module}.{name}"))
    return found


def _sources() -> Iterator[tuple[Path, str | None]]:
    """Every hand-written module of the packages, with its package, and every script."""
    for import_name, folder in packages().items():
        root = REPO / folder
        for path in sorted(root.rglob("*.py")):  # a subfolder is part of its top-level package
            if "_pb2" not in path.name:
                yield path, import_name
    for path in sorted((REPO / "scripts").glob("*.py")):
        yield path, None


def _all_reaches() -> list[Reach]:
    mapped = packages()
    reaches: list[Reach] = []
    for path, package in _sources():
        relative = path.relative_to(REPO).as_posix()
        reaches += private_reaches(path.read_text(encoding="utf-8"), relative, package, mapped)
    return reaches


def test_no_module_imports_a_private_module_of_another_package() -> None:
    # No exemptions: a benchmark that times one private stage reaches it through the owning
    # package's public hook (``midstream.models.probes``, ``midstream.server.probes``,
    # ``midstream.corpora.probes``), as any user's script would.
    offending = _all_reaches()
    assert not offending, ("private modules or names of another package imported (use or add "
                           "its public API):\n" + "\n".join(map(str, offending)))


def test_the_checker_sees_every_way_of_reaching_in() -> None:
    mapped = packages()
    source = "\n".join([
        "import midstream.models.words._decoder",
        "from midstream.models.words._decoder import ChannelDecoder",
        "from midstream.wire import _convert",
        "from midstream import _types",
        "from midstream.client.cli._cmd_serve import parse_gc_thresholds",
        "def later() -> None:",
        "    from midstream.corpora._swda import read_swda",
        "    importlib.import_module('midstream.server._session')",
    ])
    reaches = private_reaches(source, "client/_example.py", "midstream.client", mapped)
    assert [r.private_module for r in reaches] == [
        "midstream.models.words._decoder", "midstream.models.words._decoder",
        "midstream.wire._convert",
        "midstream._types", "midstream.corpora._swda", "midstream.server._session"]


@pytest.mark.parametrize("source", [
    "from midstream import Word, normalise_token",
    "from midstream.models import ModelBundle",
    "from midstream.models.training import train_word_artifact",
    "from midstream.wire import convert as cv",
    "from midstream.client.cli._main import main",  # the client's own private module
    "from midstream.client import __version__",
    "import numpy._core",  # not a Midstream package
])
def test_the_checker_lets_public_and_own_imports_pass(source: str) -> None:
    assert private_reaches(source, "client/_example.py", "midstream.client", packages()) == []
