"""Reliability test kit: real servers on the real engine, started in-process on port 0.

The models are the shipped ones (``models/weights``) when they load; otherwise tiny real models
are trained once per test session from a few SwDA train conversations, in a separate process
(the CRF trainer forks, which must not happen in a process already running gRPC). Tests that
use the models are therefore marked ``corpus``.

Test modules import the fixtures they use by name (``from reliability_kit import ...``): a
second ``conftest.py`` would clash with ``tests/conftest.py`` under mypy. The model fixtures,
the server handle and the wire-event builders are the server suite's own (``tests/server_kit.py``,
importable because ``tests/conftest.py`` puts its folder on ``sys.path``); only the defaults for
these tests differ.
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import grpc
import pytest
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig, ServerLimits
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from server_kit import (
    CLOSE,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    spoken,
    words_event,
)

# What the reliability tests import from here (server_kit's names are re-exported).
__all__ = [
    "CLOSE",
    "REPO",
    "SMALL_LIMITS",
    "WAIT_S",
    "Running",
    "ServerFactory",
    "bundle_fixture",
    "models_dir_fixture",
    "open_event",
    "refusal",
    "served_in_thread",
    "spoken",
    "start_server_fixture",
    "words_event",
]

REPO = Path(__file__).resolve().parents[2]

#: Small buffers so tests reach them quickly; a short idle timeout so vanished callers end soon.
SMALL_LIMITS = ServerLimits(idle_timeout_s=1.0, ended_retention_s=60.0, replay_updates=50,
                            follower_queue=16)

#: Every wait in these tests is bounded: a hang fails the test instead of stalling CI.
WAIT_S = 10.0

@pytest.fixture(name="start_server")
async def start_server_fixture(bundle: ModelBundle) -> AsyncIterator[ServerFactory]:
    """Start servers on port 0: ``await start_server(limits=..., **config)``."""
    started: list[Running] = []

    async def start(*, limits: ServerLimits = SMALL_LIMITS, port: int = 0,
                    **config: Any) -> Running:
        server = MidstreamServer(
            ServerConfig(host="127.0.0.1", port=port, grace_s=2.0, limits=limits, **config),
            bundle=bundle,
        )
        await server.start()
        channel = grpc.aio.insecure_channel(f"127.0.0.1:{server.port}")
        running = Running(server, channel)
        started.append(running)
        return running

    yield start
    for running in started:
        await running.server.stop(0)
        await running.channel.close()


async def refusal(stub: pb_grpc.MidstreamStub,
                  events: list[pb.ClientEvent]) -> grpc.aio.AioRpcError:
    """Send ``events`` on one Feed stream, read everything and return the error status.

    Raises
    ------
    AssertionError
        When the stream ends without an error status.
    """
    try:
        async with asyncio.timeout(WAIT_S):
            _ = [m async for m in stub.Feed(iter(events))]
    except grpc.aio.AioRpcError as exc:
        return exc
    raise AssertionError("the stream ended without an error status")


@contextlib.contextmanager
def served_in_thread(bundle: ModelBundle, limits: ServerLimits = SMALL_LIMITS,
                     **config: Any) -> Iterator[MidstreamServer]:
    """A server on port 0 running on its own event loop in a daemon thread.

    For synchronous callers (Hypothesis examples, the blocking gRPC client): the test's thread
    makes calls while the server loop serves them. The server is stopped on exit.
    """
    loop = asyncio.new_event_loop()
    server = MidstreamServer(
        ServerConfig(host="127.0.0.1", port=0, grace_s=1.0, limits=limits, **config),
        bundle=bundle)
    thread = threading.Thread(target=loop.run_forever, daemon=True)
    thread.start()
    try:
        asyncio.run_coroutine_threadsafe(server.start(), loop).result(WAIT_S)
        yield server
    finally:
        asyncio.run_coroutine_threadsafe(server.stop(0), loop).result(WAIT_S)
        loop.call_soon_threadsafe(loop.stop)
        thread.join(WAIT_S)
        loop.close()
