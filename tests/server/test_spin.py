"""``midstream serve --spin-idle-cores``: idle-priority spinners on the server's cores, which
never outlive the server."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from midstream.server import IdleSpinners

pytestmark = pytest.mark.skipif(not hasattr(os, "SCHED_IDLE"), reason="Linux only")


def _children(pid: int) -> list[int]:
    children = Path(f"/proc/{pid}/task/{pid}/children")
    return [int(c) for c in children.read_text(encoding="ascii").split()]


def _gone(pid: int, within_s: float) -> bool:
    deadline = time.monotonic() + within_s
    while time.monotonic() < deadline:
        try:
            state = Path(f"/proc/{pid}/stat").read_text(encoding="ascii").rsplit(")", 1)[1]
        except FileNotFoundError:
            return True
        if state.split()[0] == "Z":  # exited, waiting for its parent to reap it
            return True
        time.sleep(0.05)
    return False


def test_one_idle_priority_spinner_per_allowed_core() -> None:
    allowed = os.sched_getaffinity(0)
    core = min(allowed)
    os.sched_setaffinity(0, {core})  # the spinners follow the cores this process may use
    try:
        with IdleSpinners() as spinners:
            assert spinners.cores == (core,)
            (child,) = _children(os.getpid())
            deadline = time.monotonic() + 10
            # The spinner pins itself and drops to SCHED_IDLE as its first statements.
            while time.monotonic() < deadline and os.sched_getscheduler(child) != os.SCHED_IDLE:
                time.sleep(0.02)
            assert os.sched_getscheduler(child) == os.SCHED_IDLE
            assert os.sched_getaffinity(child) == {core}
        assert not spinners.cores
        assert _gone(child, within_s=1.0)
    finally:
        os.sched_setaffinity(0, allowed)


def test_spinners_end_with_a_killed_server() -> None:
    # A server killed with SIGKILL cannot stop its spinners: they notice their parent is gone.
    script = ("import os, time; from midstream.server import IdleSpinners\n"
              "os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})\n"
              "IdleSpinners().start(); print('up', flush=True); time.sleep(60)\n")
    server = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE)
    try:
        assert server.stdout is not None and server.stdout.readline() == b"up\n"
        (spinner,) = _children(server.pid)
        os.kill(server.pid, signal.SIGKILL)
        server.wait(timeout=10)
        assert _gone(spinner, within_s=5.0)
    finally:
        if server.poll() is None:
            server.kill()
            server.wait()
        if server.stdout is not None:
            server.stdout.close()
