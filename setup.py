"""Optional compiled build: ``MIDSTREAM_COMPILE=1`` compiles the modules every word passes through.

Everything else about the package lives in ``pyproject.toml``; this file only adds extension
modules, and only when asked (``PER_WORD_MODULES`` in ``core/_build.py`` lists them). They are the
same Python source translated to C by mypyc: a C compiler and mypy at build time, nothing extra at
run time. The plain install runs the source as it is. Never compile an editable install: an
extension shadows its source, so later edits to that source would silently not run.

mypyc names a module after its path, so the modules are compiled from a copy of the sources laid
out as the installed package (``midstream/models/...``) rather than from the repository's
folders, which ``[tool.setuptools.package-dir]`` maps onto that package. Build it without build
isolation, in an environment that has mypy (the ``dev`` extra), so that mypy sees the same
numpy and protobuf types as the type check::

    MIDSTREAM_COMPILE=1 pip install --no-build-isolation .
"""

from __future__ import annotations

import ast
import os
import shutil
import sys
import tomllib
from pathlib import Path

from setuptools import Extension, setup


def _per_word_modules(root: Path) -> tuple[str, ...]:
    """``PER_WORD_MODULES`` of ``core/_build.py``, read without importing the package (its
    dependencies need not be installed while it builds)."""
    tree = ast.parse((root / "core" / "_build.py").read_text(encoding="utf-8"))
    for node in tree.body:
        if (isinstance(node, ast.AnnAssign) and isinstance(node.target, ast.Name)
                and node.target.id == "PER_WORD_MODULES" and node.value is not None):
            return tuple(ast.literal_eval(node.value))
    raise RuntimeError("core/_build.py no longer defines PER_WORD_MODULES")


def _stage(root: Path, into: Path) -> None:
    """Copy every package's ``.py`` and ``.pyi`` files to ``into`` in the installed layout."""
    config = tomllib.loads((root / "pyproject.toml").read_text(encoding="utf-8"))
    folders: dict[str, str] = config["tool"]["setuptools"]["package-dir"]
    if into.exists():
        shutil.rmtree(into)
    for package, folder in folders.items():
        base = root / folder
        # Subpackages (``models/words/``) sit in their parent's folder; other packages' folders
        # never do, so walking the folder copies this package and its subpackages only.
        for source in base.rglob("*"):
            if "__pycache__" in source.parts or not (
                    source.suffix in (".py", ".pyi") or source.name == "py.typed"):
                continue
            target = into.joinpath(*package.split("."), source.relative_to(base))
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(source, target)


#: mypy's settings while compiling (the repository's [tool.mypy] is for the type check).
_COMPILE_CONFIG = """\
[mypy]
python_version = 3.11
ignore_missing_imports = True
follow_imports = silent
"""


def _extensions() -> list[Extension]:
    if os.environ.get("MIDSTREAM_COMPILE", "") not in ("1", "true", "yes"):
        return []
    if "editable_wheel" in sys.argv:
        raise SystemExit("MIDSTREAM_COMPILE: an editable install cannot be compiled (the "
                         "extensions would shadow the sources being edited); unset it for "
                         "'pip install -e', or install without -e")
    from mypyc.build import mypycify  # noqa: PLC0415 - only the compiled build needs mypy

    root = Path(__file__).resolve().parent
    # setuptools reuses build/lib.*: an extension left there by an earlier build (of a module
    # no longer listed, say) would ship again beside the new ones.
    for stale in Path("build").glob("lib.*"):
        shutil.rmtree(stale)
    staged = Path("build") / "mypyc-src"
    _stage(root, staged)
    # mypy takes the staged folder as the package root (it has no __init__.py), so the
    # extensions are named midstream.models._engine and so on.
    paths = [staged.joinpath(*name.split(".")).with_suffix(".py")
             for name in _per_word_modules(root)]
    # Compiling needs types, not a verdict: scripts/typecheck.py holds the code to --strict.
    # Here missing stubs (an environment without the dev extra) just make those types Any.
    config = staged / "mypy.ini"
    config.write_text(_COMPILE_CONFIG, encoding="utf-8")
    return mypycify(["--config-file", str(config), *map(str, paths)],
                    target_dir=str(Path("build") / "mypyc"), opt_level="3",
                    group_name="midstream")


setup(ext_modules=_extensions())
