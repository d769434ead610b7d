"""``midstream serve --workers N``: N server processes on one port, sharing one Redis log.

One Python process drives one core (the event loop runs every word of its conversations); N
processes listening on the same port with ``SO_REUSEPORT`` let the kernel spread new
connections between them. They share nothing but the Redis log, which is what lets a follower
connected to one worker follow a conversation another ingests.

This process supervises: it picks the port (with ``--port 0``, by holding a ``SO_REUSEPORT``
socket bound to a free one until every worker listens on it), starts the workers as fresh
interpreters, prints ``serving on HOST:PORT (N workers)`` once they all serve, forwards
SIGTERM/SIGINT so each drains its own conversations, and starts a worker again if one dies
(its conversations can then be continued from the log, ``docs/deploy.md``).
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import multiprocessing
import multiprocessing.connection
import os
import signal
import socket
import sys
import threading
import time
from multiprocessing.context import SpawnProcess
from typing import Any

from midstream import MidstreamError, UnavailableError
from midstream.server import IdleSpinners, ServerConfig, run_server_loop

_log = logging.getLogger(__name__)

#: Seconds a worker may take to load its models and bind.
_START_TIMEOUT_S = 120.0
#: Seconds between two looks at the workers.
_POLL_S = 0.2
#: A worker that dies sooner than this after starting is not started again (a crash loop).
_MIN_LIFETIME_S = 5.0


def _orphaned(parent: int) -> None:
    """Stop this worker (SIGTERM: it drains) once its supervisor is gone, however it went."""
    while os.getppid() == parent:
        time.sleep(_POLL_S * 5)
    os.kill(os.getpid(), signal.SIGTERM)


def _worker(config: ServerConfig, ready: multiprocessing.connection.Connection,
            options: dict[str, Any]) -> None:
    """A worker's main: serve ``config`` until SIGTERM, telling the supervisor its port."""
    from midstream.client.cli._cmd_serve import serve  # noqa: PLC0415 - in the worker only

    threading.Thread(target=_orphaned, args=(os.getppid(),), daemon=True,
                     name="supervisor-watch").start()

    logging.basicConfig(level=options.pop("log_level"),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    spin = options.pop("spin_idle_cores")
    try:
        with IdleSpinners() if spin else contextlib.nullcontext():
            sys.exit(run_server_loop(serve(config, on_ready=ready.send, **options)))
    except MidstreamError as exc:
        # One line, as the command itself reports a bad option (an unknown --setting, a
        # model folder that does not load), above the supervisor's own line.
        print(f"midstream: worker: {exc}", file=sys.stderr, flush=True)
        sys.exit(1)


def _reserve_port(host: str) -> socket.socket:
    """A socket holding a free port that workers can bind too (not listening itself)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    holder = socket.socket(family, socket.SOCK_STREAM)
    holder.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    holder.bind((host, 0))
    return holder


class _Pool:
    def __init__(self, config: ServerConfig, options: dict[str, Any]) -> None:
        self._config = config
        self._options = options
        self._context = multiprocessing.get_context("spawn")
        self.workers: list[tuple[SpawnProcess, float]] = []

    def start_one(self) -> int:
        receive, send = self._context.Pipe(duplex=False)
        process = self._context.Process(target=_worker, args=(self._config, send,
                                                               dict(self._options)))
        process.start()
        send.close()
        if not receive.poll(_START_TIMEOUT_S):
            process.kill()
            raise UnavailableError(f"a worker did not start serving within "
                                   f"{_START_TIMEOUT_S:g} s (exit code {process.exitcode})")
        try:
            port = int(receive.recv())
        except EOFError:
            process.join(5)
            raise UnavailableError(f"a worker failed to start (exit code "
                                   f"{process.exitcode}); see its log above") from None
        self.workers.append((process, time.monotonic()))
        return port

    def stop(self, grace: float) -> None:
        for process, _ in self.workers:
            if process.is_alive() and process.pid is not None:
                with contextlib.suppress(ProcessLookupError):
                    process.terminate()
        deadline = time.monotonic() + grace + 5
        for process, _ in self.workers:
            process.join(max(deadline - time.monotonic(), 0.1))
            if process.is_alive():
                process.kill()
                process.join(5)


def run_workers(config: ServerConfig, count: int, *, gc_thresholds: tuple[int, int, int],
                full_collection_s: float, spin_idle_cores: bool) -> int:
    """Serve with ``count`` worker processes until SIGTERM or SIGINT; returns the exit code."""
    holder = None
    if config.port == 0:
        holder = _reserve_port(config.host)
        config = dataclasses.replace(config, port=holder.getsockname()[1])
    config = dataclasses.replace(config, reuse_port=True)
    options: dict[str, Any] = {
        "gc_thresholds": gc_thresholds, "full_collection_s": full_collection_s,
        "log_level": logging.getLogger().getEffectiveLevel(), "spin_idle_cores": spin_idle_cores,
    }
    pool = _Pool(config, options)
    stopping = False

    def stop(signum: int, frame: object) -> None:
        nonlocal stopping
        stopping = True

    previous = {s: signal.signal(s, stop) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        for _ in range(count):
            pool.start_one()
        if holder is not None:
            holder.close()
            holder = None
        print(f"serving on {config.host}:{config.port} ({count} workers)", flush=True)
        while not stopping:
            time.sleep(_POLL_S)
            for entry in list(pool.workers):
                process, started = entry
                if process.is_alive() or stopping:
                    continue
                pool.workers.remove(entry)
                if time.monotonic() - started < _MIN_LIFETIME_S:
                    _log.error("worker %d exited with %s right after starting; not restarted",
                               process.pid, process.exitcode)
                    continue
                _log.warning("worker %d exited with %s; starting another", process.pid,
                             process.exitcode)
                try:
                    pool.start_one()
                except UnavailableError:
                    if not stopping:  # a stop signal reaches the new worker too: no fault
                        raise
            if not pool.workers:
                print("every worker has exited", file=sys.stderr, flush=True)
                return 1
        print("draining: finishing live conversations", file=sys.stderr, flush=True)
    finally:
        pool.stop(config.grace_s)
        if holder is not None:
            holder.close()
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    print("stopped", file=sys.stderr, flush=True)
    return 0
