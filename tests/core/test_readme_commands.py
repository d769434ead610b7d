"""The README's two Quick start commands work in order in a fresh clone named ``midstream``.

This is the newcomer's door: the first command installs the package (not editable) and runs the
demo, the second installs the development tools (editable) and runs the checks and tests. A
plain install that leaves files behind in ``site-packages/midstream`` (numba's kernel cache used
to) turns ``midstream`` into a namespace package that shadows the editable install, and every
test module then fails to import. The commands are read from the README, so the check follows
it when it changes.

The clone is of the committed ``HEAD``: uncommitted edits are not part of what a newcomer gets.
The nested test command runs the source pass with ``--collect-only``: it installs, checks the
generated code, lints, type-checks and imports every test module (what broke), while this outer
run executes the tests themselves; running them again inside would double the suite's time.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]

pytestmark = pytest.mark.slow


def quick_start_commands() -> list[str]:
    """The command lines of the README's first code block under "## Quick start"."""
    text = (REPO / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1]
    block = re.search(r"```\n(.*?)```", section, flags=re.DOTALL)
    assert block is not None, "README's Quick start has no code block"
    return [line.strip() for line in block.group(1).splitlines() if line.strip()]


def test_readme_quick_start_has_exactly_two_commands() -> None:
    commands = quick_start_commands()
    assert len(commands) == 2
    assert "midstream demo" in commands[0]
    assert commands[1] == "./scripts/test"


@pytest.mark.skipif(os.environ.get("MIDSTREAM_EXPECT_BUILD") == "compiled",
                    reason="checks the install path, which the source pass already ran; the "
                           "compiled pass differs only in the modules it imports")
@pytest.mark.skipif(shutil.which("git") is None or not (REPO / ".git").exists(),
                    reason="needs git and a git checkout to clone from")
def test_readme_commands_pass_in_order_in_a_fresh_clone(tmp_path: Path) -> None:
    clone = tmp_path / "midstream"
    subprocess.run(["git", "clone", "--quiet", str(REPO), str(clone)], check=True, timeout=120)
    env = {key: value for key, value in os.environ.items()
           if not key.startswith(("VIRTUAL_ENV", "PYTHON", "MIDSTREAM_", "PYTEST"))}
    # The clone has no ../shared beside it: point it at the corpora this run reads.
    env["MIDSTREAM_CORPORA"] = os.environ.get("MIDSTREAM_CORPORA") or str(
        REPO.parent / "shared" / "corpora")
    install_and_demo, run_tests = quick_start_commands()

    demo = subprocess.run(["bash", "-c", install_and_demo], cwd=clone, env=env,
                          capture_output=True, text=True, timeout=1200, check=False)
    assert demo.returncode == 0, demo.stderr[-4000:]
    assert "conversation" in demo.stdout

    env["MIDSTREAM_TEST_BUILDS"] = "source"
    env["PYTEST_ADDOPTS"] = "--collect-only -q"
    tests = subprocess.run(["bash", "-c", run_tests], cwd=clone, env=env,
                           capture_output=True, text=True, timeout=1800, check=False)
    output = tests.stdout + tests.stderr
    assert tests.returncode == 0, output[-4000:]
    assert re.search(r"^\d+ tests? collected", output, flags=re.MULTILINE), output[-4000:]
    assert "error" not in output.splitlines()[-1].lower(), output[-4000:]
