"""Which build of Midstream is running: plain source, or with the per-word modules compiled.

``MIDSTREAM_COMPILE=1 pip install .`` (see ``setup.py``) installs C extensions beside the
sources of the modules every word passes through; Python imports an extension in preference to
the source of the same name. The server logs which build it runs, and the benchmarks record it,
so a figure always says which build it came from.
"""

from __future__ import annotations

import importlib
from importlib.machinery import EXTENSION_SUFFIXES

__all__ = ["PER_WORD_MODULES", "build_name", "compiled_modules"]

#: The modules the compiled build compiles (``setup.py`` reads this list). Left as source:
#: modules with async generators (mypyc cannot compile them), the public value types (compiled
#: frozen dataclasses check field types themselves, so a caller's bad value would raise
#: TypeError before Midstream's own checks name it) and modules whose doctests are tests.
PER_WORD_MODULES: tuple[str, ...] = (
    "midstream.models._engine",
    "midstream.models.words._decoder",
    "midstream.models.words._features",
    "midstream.models.functions._features",
    "midstream.models.functions._inference",
    "midstream.models.functions._tagger",
    "midstream.server._ingest",
    "midstream.server._kept",
)


def compiled_modules() -> tuple[str, ...]:
    """Those of :data:`PER_WORD_MODULES` that were loaded from a compiled extension."""
    suffixes = tuple(EXTENSION_SUFFIXES)
    return tuple(name for name in PER_WORD_MODULES
                 if str(getattr(importlib.import_module(name), "__file__", "")).endswith(suffixes))


def build_name() -> str:
    """``"compiled"``, ``"source"``, or ``"mixed"`` (some per-word modules compiled: a stale or
    partial install, worth noticing because figures from it match neither build)."""
    compiled = len(compiled_modules())
    if compiled == len(PER_WORD_MODULES):
        return "compiled"
    return "source" if compiled == 0 else "mixed"
