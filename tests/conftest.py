"""Shared fixtures. The corpora live outside the repository (never copied in).

``MIDSTREAM_CORPORA`` overrides the default ``../shared/corpora`` beside the checkout. Tests
marked ``corpus`` fail under ``CI=true`` when the corpora are missing and skip elsewhere.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

_REPO = Path(__file__).resolve().parent.parent


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
