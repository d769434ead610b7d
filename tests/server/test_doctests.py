"""The examples in the server's, the wire conversion's and the metrics reader's docstrings
run."""

from __future__ import annotations

import doctest
import importlib

import pytest


@pytest.mark.parametrize("name", ["midstream.server._config", "midstream.server._status",
                                  "midstream.server._decode",
                                  "midstream.wire.convert", "midstream.client.bench._scrape"])
def test_docstring_examples_run(name: str) -> None:
    result = doctest.testmod(importlib.import_module(name))
    assert result.attempted > 0 and result.failed == 0
