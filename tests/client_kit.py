"""Client test kit: a real server with the shipped models, in a thread or a subprocess.

The command-line tests call ``midstream.client.cli._main.main`` in-process; it runs its own event
loop (``asyncio.run``), so the server it talks to runs on another loop in a daemon thread.
Test modules import what they use (``from client_kit import served``): a second
``conftest.py`` would clash with ``tests/conftest.py`` under mypy.

The models are the shipped ones in ``models/weights``. Until those exist, :func:`models_dir`
trains tiny real ones (15 SwDA train conversations, a few seconds) so the client is always
tested against the real engine, never a double.
"""

from __future__ import annotations

import asyncio
import os
import socket
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
from midstream import ModelError
from midstream.corpora import read_corpus
from midstream.models import ModelBundle
from midstream.models._artifact import save_artifact
from midstream.models.functions._train import FunctionTrainingOptions, train_function_model
from midstream.models.words._train import WordTrainingConfig, train_word_artifact
from midstream.server import MidstreamServer, ServerConfig

REPO = Path(__file__).resolve().parents[1]
WEIGHTS = REPO / "models" / "weights"


def _train_tiny(swda: Path, folder: Path) -> Path:
    conversations = []
    for conversation in read_corpus(swda, split="train"):
        if conversation.disfluency_annotated:
            conversations.append(conversation)
        if len(conversations) == 15:
            break
    save_artifact(train_word_artifact(conversations, WordTrainingConfig(max_iterations=40)),
                  folder / "words.tagger")
    save_artifact(train_function_model(
        conversations, FunctionTrainingOptions(scheme="coarse", max_iterations=40)),
        folder / "functions.tagger")
    return folder


@pytest.fixture(name="models_dir", scope="session")
def models_dir_fixture(request: pytest.FixtureRequest,
                       tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The shipped models, or tiny real ones trained from SwDA train when none are shipped.

    The shipped folder counts once it holds both kinds a server needs (a word model and an
    utterance-function model); a broken shipped model fails under ``CI=true``.
    """
    if any(WEIGHTS.glob("*.tagger")):
        try:
            ModelBundle.load_directory(WEIGHTS)
            return WEIGHTS
        except ModelError as exc:
            if os.environ.get("CI") == "true":
                pytest.fail(f"the shipped models do not load: {exc}")
    # Every module that imports this fixture gets its own copy of it, so the session's models
    # are kept in one folder of the session's temporary directory and trained only once.
    folder = tmp_path_factory.getbasetemp() / "tiny-models"
    if (folder / "functions.tagger").exists():
        return folder
    swda: Path = request.getfixturevalue("swda_dir")
    folder.mkdir(exist_ok=True)
    return _train_tiny(swda, folder)


@dataclass
class Served:
    """A server running on its own loop in a daemon thread."""

    server: MidstreamServer
    loop: asyncio.AbstractEventLoop

    @property
    def target(self) -> str:
        return f"127.0.0.1:{self.server.port}"


@pytest.fixture(name="served", scope="module")
def served_fixture(models_dir: Path) -> Iterator[Served]:
    """A real server with real models on a free loopback port, for one test module."""
    weights = models_dir
    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=loop.run_forever, name="test-server", daemon=True)
    thread.start()
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=weights,
                                          grace_s=1.0))
    asyncio.run_coroutine_threadsafe(server.start(), loop).result(timeout=60)
    try:
        yield Served(server=server, loop=loop)
    finally:
        asyncio.run_coroutine_threadsafe(server.stop(0.5), loop).result(timeout=30)
        loop.call_soon_threadsafe(loop.stop)
        thread.join(timeout=10)
        loop.close()


def free_port() -> int:
    """A loopback port free right now (for a subprocess server that must be told its port)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


CTM_TEXT = """;; an invented two-channel call (not corpus text)
call7 A 0.10 0.20 well 0.91
call7 A 0.35 0.20 i
call7 A 0.60 0.20 want
call7 A 0.85 0.20 to
call7 A 1.10 0.20 uh
call7 A 1.35 0.20 i
call7 A 1.60 0.20 need
call7 A 1.85 0.20 to
call7 A 2.10 0.20 book
call7 A 2.35 0.20 a
call7 A 2.60 0.20 repair
call7 B 3.00 0.20 sure 0.88
call7 B 3.25 0.20 what
call7 B 3.50 0.20 is
call7 B 3.75 0.20 wrong
call7 B 4.00 0.20 with
call7 B 4.25 0.20 it
"""


class CuttingProxy:
    """A TCP forwarder in front of a server whose open connections a test can cut.

    Cutting closes every connection open now and keeps listening, as a network blip or a load
    balancer restart would: a client must notice, reconnect and resume.
    """

    def __init__(self, upstream_port: int) -> None:
        self._upstream_port = upstream_port
        self._server: asyncio.Server | None = None
        self._writers: list[asyncio.StreamWriter] = []
        self.connections = 0

    async def start(self) -> int:
        self._server = await asyncio.start_server(self._accept, "127.0.0.1", 0)
        port: int = self._server.sockets[0].getsockname()[1]
        return port

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.connections += 1
        up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self._upstream_port)
        self._writers += [writer, up_writer]

        async def pipe(source: asyncio.StreamReader, sink: asyncio.StreamWriter) -> None:
            try:
                while data := await source.read(65536):
                    sink.write(data)
                    await sink.drain()
            except (ConnectionError, OSError):
                pass
            finally:
                sink.close()

        await asyncio.gather(pipe(reader, up_writer), pipe(up_reader, writer))

    def cut(self) -> None:
        for writer in self._writers:
            writer.transport.abort()
        self._writers.clear()

    async def stop(self) -> None:
        self.cut()
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()


# Older spellings that other test modules import (``from client_kit import served``).
models_dir = models_dir_fixture
served = served_fixture
