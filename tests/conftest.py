"""Shared fixtures. The corpora live outside the repository (never copied in).

``MIDSTREAM_CORPORA`` overrides the default ``../shared/corpora`` beside the checkout. Tests
marked ``corpus`` fail under ``CI=true`` when the corpora are missing and skip elsewhere.
"""

from __future__ import annotations

import asyncio
import os
from pathlib import Path

import pytest

_REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(autouse=True, scope="session")
def no_implicit_event_loop() -> None:
    """Mark the main thread as having no current event loop, for the whole session.

    pytest-asyncio 1.3.0 saves "the current loop" before each async test with
    ``asyncio.get_event_loop()``, which on the main thread *creates* a loop when none was ever
    set, and then leaves that loop current without closing it (pytest-asyncio issue #724, fixed
    upstream by PR #1430). The next ``asyncio.run`` in a sync test (every client command makes
    one) replaces it; the orphan is freed at some later garbage collection and its
    "unclosed event loop" ResourceWarning, an error here, fails whichever test is running.
    With the loop explicitly unset, ``get_event_loop()`` raises instead of creating one, so
    there is nothing to leak; loops made by tests and by library code are closed by them.
    """
    asyncio.set_event_loop(None)


def corpora_root() -> Path:
    """Where the annotated corpora are: ``$MIDSTREAM_CORPORA`` or ``../shared/corpora``."""
    override = os.environ.get("MIDSTREAM_CORPORA")
    return Path(override) if override else _REPO.parent / "shared" / "corpora"


def _require(path: Path) -> Path:
    if path.is_dir():
        return path
    message = f"annotated corpora not found at {path} (set MIDSTREAM_CORPORA)"
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture(scope="session")
def corpora_dir() -> Path:
    return _require(corpora_root())


@pytest.fixture(scope="session")
def swda_dir(corpora_dir: Path) -> Path:
    return _require(corpora_dir / "swda")


@pytest.fixture(scope="session")
def mrda_dir(corpora_dir: Path) -> Path:
    return _require(corpora_dir / "mrda")


@pytest.fixture(scope="session")
def maptask_dir(corpora_dir: Path) -> Path:
    return _require(corpora_dir / "maptask")


@pytest.fixture(scope="session")
def disfl_qa_dir(corpora_dir: Path) -> Path:
    return _require(corpora_dir / "disfl_qa")
