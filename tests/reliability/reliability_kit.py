"""Reliability test kit: real servers on the real engine, started in-process on port 0.

The models are the shipped ones (``models/weights``) when they load; otherwise tiny real models
are trained once per test session from a few SwDA train conversations, in a separate process
(the CRF trainer forks, which must not happen in a process already running gRPC). Tests that
use the models are therefore marked ``corpus``.

Test modules import the fixtures they use by name (``from reliability_kit import ...``): a
second ``conftest.py`` would clash with ``tests/conftest.py`` under mypy.
"""

from __future__ import annotations

import asyncio
import contextlib
import subprocess
import sys
import threading
from collections.abc import AsyncIterator, Awaitable, Callable, Iterator
from pathlib import Path
from typing import Any

import grpc
import pytest
from midstream import ModelError, NotFoundError
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig, ServerLimits
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc

REPO = Path(__file__).resolve().parents[2]

#: Small buffers so tests reach them quickly; a short idle timeout so vanished callers end soon.
SMALL_LIMITS = ServerLimits(idle_timeout_s=1.0, ended_retention_s=60.0, replay_updates=50,
                            follower_queue=16)

#: Every wait in these tests is bounded: a hang fails the test instead of stalling CI.
WAIT_S = 10.0

_TRAIN = """
import itertools, sys
from pathlib import Path
from midstream.corpora import read_corpus
from midstream.models._artifact import save_artifact
from midstream.models._train_functions import FunctionTrainingOptions, train_function_model
from midstream.models._train_words import WordTrainingConfig, train_word_artifact
swda, out = Path(sys.argv[1]), Path(sys.argv[2])
conversations = list(itertools.islice(read_corpus(swda, split="train"), 12))
save_artifact(train_word_artifact(conversations, WordTrainingConfig(max_iterations=30)),
              out / "words.msm")
save_artifact(train_function_model(conversations, FunctionTrainingOptions(max_iterations=30)),
              out / "functions.msm")
"""

_MODELS: list[Path] = []  # once per session, whichever test asks first


def train_tiny_models(swda: Path, out: Path) -> Path:
    """Train tiny real models from 12 SwDA train conversations into ``out`` (a subprocess)."""
    out.mkdir(parents=True, exist_ok=True)
    subprocess.run([sys.executable, "-c", _TRAIN, str(swda), str(out)], check=True,
                   timeout=600, capture_output=True)
    return out


@pytest.fixture(name="models_dir")
def models_dir_fixture(request: pytest.FixtureRequest,
                       tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of models: the shipped weights if they load, else tiny ones trained now."""
    if not _MODELS:
        shipped = REPO / "models" / "weights"
        try:
            ModelBundle.load_directory(shipped)
            _MODELS.append(shipped)
        except (ModelError, NotFoundError):
            swda: Path = request.getfixturevalue("swda_dir")
            _MODELS.append(train_tiny_models(swda, tmp_path_factory.mktemp("tiny-models")))
    return _MODELS[0]


@pytest.fixture(name="bundle")
def bundle_fixture(models_dir: Path) -> ModelBundle:
    return ModelBundle.load_directory(models_dir)


class Running:
    """A started server with a connected stub; stopped by the fixture."""

    def __init__(self, server: MidstreamServer, channel: grpc.aio.Channel) -> None:
        self.server = server
        self.channel = channel
        self.stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]


ServerFactory = Callable[..., Awaitable[Running]]


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


def spoken(word_id: str, text: str, speaker: str = "A", start: float | None = None,
           **extra: Any) -> pb.SpokenWord:
    """A wire word; ``start`` also sets ``end_s`` 0.2 s later."""
    word = pb.SpokenWord(word_id=word_id, speaker=speaker, text=text, **extra)
    if start is not None:
        word.start_s = start
        word.end_s = start + 0.2
    return word


def words_event(*words: pb.SpokenWord) -> pb.ClientEvent:
    return pb.ClientEvent(words=pb.WordBatch(words=list(words)))


def open_event(conversation_id: str = "") -> pb.ClientEvent:
    return pb.ClientEvent(open=pb.OpenConversation(conversation_id=conversation_id))


CLOSE = pb.ClientEvent(close=pb.CloseConversation())


async def refusal(stub: pb_grpc.MidstreamStub,
                  events: list[pb.ClientEvent]) -> grpc.aio.AioRpcError:
    """Send ``events`` on one Converse stream, read everything and return the error status.

    Raises
    ------
    AssertionError
        When the stream ends without an error status.
    """
    try:
        async with asyncio.timeout(WAIT_S):
            _ = [m async for m in stub.Converse(iter(events))]
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
