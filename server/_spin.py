"""Keeping the server's cores from going idle: one idle-priority spinning process per core.

A server at a few hundred frames a second is idle between frames, and an idle CPU halts. On a
virtual machine a halted virtual CPU goes back to the hypervisor, which may run other work on
that physical core; the next frame then starts on cold caches and a core that has to be woken.
On a 2-CPU virtual machine this cost a server at a thousand multiplexed conversations about a
quarter more CPU per word and most of its p99 latency (the runs and their command:
docs/service.md); the benchmark report (``midstream bench report --spin-steps``) measures both
ways in one run.

A spinner is a separate process (a thread would contend for the interpreter lock) pinned to one
core under ``SCHED_IDLE``: the kernel runs it only when nothing else on that core wants to run,
and a waking server preempts it at once. It costs the core's power and shows as 100 % busy in
``top``; it takes no time the server wants. It stops when :meth:`IdleSpinners.stop` runs, and by
itself within a fraction of a second when the server process dies (it watches its parent), so
a killed server leaves none behind. Linux only.
"""

from __future__ import annotations

import logging
import os
import subprocess
import sys

from midstream import InputError

__all__ = ["IdleSpinners"]

_log = logging.getLogger(__name__)

# The spinner: pin, drop to SCHED_IDLE, spin; check its parent between rounds of a few ms.
_SPIN = """\
import os, sys
core, parent = int(sys.argv[1]), int(sys.argv[2])
os.sched_setaffinity(0, {core})
os.sched_setscheduler(0, os.SCHED_IDLE, os.sched_param(0))
while os.getppid() == parent:
    for _ in range(200_000):
        pass
"""
#: Seconds :meth:`IdleSpinners.stop` waits for a spinner after SIGTERM before SIGKILL.
_STOP_WAIT_S = 2.0


class IdleSpinners:
    """One ``SCHED_IDLE`` spinning process per core this process may run on.

    Use as a context manager, or call :meth:`start` and :meth:`stop`. Start it before the gRPC
    server so that the spinners are children of a process with one thread.

    Raises
    ------
    InputError
        From :meth:`start`: not Linux (no ``SCHED_IDLE`` or CPU affinity), or a spinner could
        not be started.
    """

    def __init__(self) -> None:
        self._processes: list[subprocess.Popen[bytes]] = []
        self._cores: tuple[int, ...] = ()

    @property
    def cores(self) -> tuple[int, ...]:
        """The cores spinners run on (empty when stopped)."""
        return self._cores

    def start(self) -> None:
        if self._processes:
            return
        if not (hasattr(os, "SCHED_IDLE") and hasattr(os, "sched_getaffinity")):
            raise InputError("spinning idle cores needs Linux (SCHED_IDLE and CPU affinity)")
        cores = sorted(os.sched_getaffinity(0))
        try:
            for core in cores:
                self._processes.append(subprocess.Popen(
                    [sys.executable, "-S", "-c", _SPIN, str(core), str(os.getpid())],
                    stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                    stderr=subprocess.DEVNULL))
        except OSError as exc:
            self.stop()
            raise InputError(f"cannot start an idle spinner: {exc.strerror}") from None
        self._cores = tuple(cores)
        if len(cores) > 2:
            # Not refused (a server may own every core of its machine), but worth a line:
            # every allowed core is kept busy.
            _log.warning("spinning on %d cores: pin the server (taskset) to the cores it owns",
                         len(cores))
        _log.info("idle spinners on cores %s", cores)

    def stop(self) -> None:
        processes, self._processes, self._cores = self._processes, [], ()
        for process in processes:
            if process.poll() is None:
                process.terminate()
        for process in processes:
            try:
                process.wait(timeout=_STOP_WAIT_S)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()

    def __enter__(self) -> IdleSpinners:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
