"""The documented terminal session, as subprocesses: serve, pipe a CTM file in, subscribe."""

from __future__ import annotations

import json
import re
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from client_kit import CTM_TEXT, models_dir_fixture  # noqa: F401 - fixtures are found by name

pytestmark = [pytest.mark.corpus, pytest.mark.slow]

_CLI = [sys.executable, "-m", "midstream.client.cli._main"]


def test_serve_tag_from_a_pipe_and_subscribe(models_dir: Path, tmp_path: Path) -> None:
    log = (tmp_path / "serve.err").open("w")
    server = subprocess.Popen([*_CLI, "serve", "--port", "0", "--models", str(models_dir)],
                              stdout=subprocess.PIPE, stderr=log, text=True)
    with server, log:
        _session(server)
    assert server.returncode == 0, (tmp_path / "serve.err").read_text()


def _session(server: subprocess.Popen[str]) -> None:
    try:
        assert server.stdout is not None
        first = server.stdout.readline()
        match = re.search(r"serving on (\S+:\d+)", first)
        assert match, first
        target = match.group(1)

        # `cat call.ctm | midstream tag --format ctm --server ...`
        tagged = subprocess.run([*_CLI, "tag", "--format", "ctm", "--server", target],
                                input=CTM_TEXT, capture_output=True, text=True, timeout=60,
                                check=False)
        assert tagged.returncode == 0, tagged.stderr
        assert "| " in tagged.stdout
        conversation = re.search(r"midstream subscribe (?:-- )?([A-Za-z0-9_-]+)'", tagged.stderr)
        assert conversation, tagged.stderr

        followed = subprocess.run([*_CLI, "subscribe", "--from-seq", "1", "--json",
                                   "--server", target, "--", conversation.group(1)],
                                  capture_output=True, text=True, timeout=60, check=False)
        assert followed.returncode == 0, followed.stderr
        records = [json.loads(line) for line in followed.stdout.splitlines()]
        assert records[-1]["type"] == "ended" and records[-1]["reason"] == "closed"
        words = {w["id"] for r in records if r["type"] == "update" for w in r["words"]}
        assert len(words) == len(CTM_TEXT.splitlines()) - 1  # every CTM word, no comment

        missing = subprocess.run([*_CLI, "subscribe", "no-such-call", "--server", target],
                                 capture_output=True, text=True, timeout=60, check=False)
        assert missing.returncode == 1
        assert "no-such-call" in missing.stderr and target in missing.stderr
    finally:
        server.send_signal(signal.SIGTERM)
        server.wait(timeout=30)
