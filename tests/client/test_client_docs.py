"""The Python examples of docs/client.md run as written, in order, against a real server.

Each ```python block is run as its own script (a fresh interpreter, as a reader would run it)
in a folder holding what the page says it needs: ``call7.ctm`` and a copy of the server's
models in ``models/``. The only change made to a block is the server's address: the page uses
``midstream serve``'s default, the test a server started in-process on a free port.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    CTM_TEXT,
    REPO,
    Served,
    models_dir_fixture,
    served_fixture,
)

pytestmark = pytest.mark.corpus

_PAGE = REPO / "docs" / "client.md"
_ADDRESS = "127.0.0.1:50051"
_BLOCK = re.compile(r"^```python\n(.*?)^```$", re.DOTALL | re.MULTILINE)

#: What each example must print (in page order), so a block that ran but did nothing fails.
_EXPECTED = [
    r"^conversation call-7$",
    r"^channel 2 Ended$",
    r"^ended: closed$",
    r"^\d+ revisions of call-7$",
    r"^1 Welcome\(conversation_id='call-8'",
]


def _blocks() -> list[str]:
    return _BLOCK.findall(_PAGE.read_text(encoding="utf-8"))


def test_the_page_has_the_examples_this_test_expects() -> None:
    blocks = _blocks()
    assert len(blocks) == len(_EXPECTED)
    assert all(_ADDRESS in block for block in blocks)


def test_every_example_runs_as_written(served: Served, models_dir: Path,
                                       tmp_path: Path) -> None:
    (tmp_path / "call7.ctm").write_text(CTM_TEXT, encoding="utf-8")
    shutil.copytree(models_dir, tmp_path / "models")
    for number, (block, expected) in enumerate(zip(_blocks(), _EXPECTED, strict=True), 1):
        done = subprocess.run([sys.executable, "-c", block.replace(_ADDRESS, served.target)],
                              cwd=tmp_path, capture_output=True, text=True, timeout=120,
                              check=False)
        assert done.returncode == 0, f"example {number} failed:\n{block}\n{done.stderr}"
        assert re.search(expected, done.stdout, re.MULTILINE), (
            f"example {number} printed:\n{done.stdout}")
