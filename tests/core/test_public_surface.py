"""Each package exports a short, sorted ``__all__`` of names that exist (a house rule)."""

from __future__ import annotations

import importlib
import importlib.util

import pytest

PACKAGES = [
    "midstream",
    "midstream.corpora",
    "midstream.models",
    "midstream.server",
    "midstream.client",
    "midstream.wire",
]


def _isort_key(name: str) -> tuple[int, str]:
    # The order ruff's RUF022 keeps: CONSTANTS, then Classes, then functions, each alphabetical.
    kind = 0 if name.isupper() else 1 if name[:1].isupper() else 2
    return kind, name


@pytest.mark.parametrize("name", PACKAGES)
def test_all_is_sorted_and_every_name_exists(name: str) -> None:
    module = importlib.import_module(name)
    exported = list(module.__all__)
    assert exported == sorted(exported, key=_isort_key), f"{name}.__all__ is not sorted"
    assert len(exported) == len(set(exported)), f"{name}.__all__ repeats a name"
    missing = [n for n in exported if not hasattr(module, n)]
    assert not missing, f"{name}.__all__ names what it does not define: {missing}"


@pytest.mark.parametrize("name", PACKAGES)
def test_no_private_name_is_exported(name: str) -> None:
    module = importlib.import_module(name)
    assert not [n for n in module.__all__ if n.startswith("_")]


def test_nothing_is_installed_under_a_bare_layer_name() -> None:
    # The layers are folders in the repository but import only under ``midstream.``.
    for bare in ("server", "client", "models", "corpora", "core", "protos"):
        spec = importlib.util.find_spec(bare)
        origin = getattr(spec, "origin", None) or ""
        assert spec is None or "site-packages" not in origin, f"bare {bare!r} is installed"
