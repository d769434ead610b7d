"""Server test kit: fixtures that start real servers on the real engine, and event builders.

The models are the shipped ones (``models/weights``) when they load; otherwise tiny models are
trained once per test session from a few SwDA train conversations, in a separate process (the
CRF trainer forks, which must not happen in a process already running gRPC).

Test modules import the fixtures they use (``from server_kit import running_fixture``): a
second ``conftest.py`` would clash with ``tests/conftest.py`` under mypy.
"""

from __future__ import annotations

import asyncio
import subprocess
import sys
from collections.abc import AsyncIterator, Awaitable, Callable
from pathlib import Path
from typing import Any

import grpc
import pytest
from midstream import ModelError, NotFoundError
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig, ServerLimits
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc

# --- fixtures ----------------------------------------------------------------------------------

#: Limits small enough that tests reach them quickly; everything else keeps its default.
TEST_LIMITS = ServerLimits(idle_timeout_s=1.0, ended_retention_s=60.0, replay_updates=50,
                           follower_queue=64)


class Running:
    """A started server with a connected stub; closed by the fixture."""

    def __init__(self, server: MidstreamServer, channel: grpc.aio.Channel) -> None:
        self.server = server
        self.channel = channel
        self.stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]


ServerFactory = Callable[..., Awaitable[Running]]


_TRAIN = """
import itertools, sys
from pathlib import Path
from midstream.corpora import read_corpus
from midstream.models._artifact import save_artifact
from midstream.models.functions._train import FunctionTrainingOptions, train_function_model
from midstream.models.words._train import WordTrainingConfig, train_word_artifact
swda, out = Path(sys.argv[1]), Path(sys.argv[2])
conversations = list(itertools.islice(read_corpus(swda, split="train"), 8))
save_artifact(train_word_artifact(conversations, WordTrainingConfig(max_iterations=25)),
              out / "words.tagger")
save_artifact(train_function_model(conversations, FunctionTrainingOptions(max_iterations=25)),
              out / "functions.tagger")
"""

_MODELS: list[Path] = []  # once per session, whichever test module asks first


@pytest.fixture(name="models_dir")
def models_dir_fixture(request: pytest.FixtureRequest,
                       tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of models: the shipped weights if they load, else tiny ones trained now."""
    if not _MODELS:
        shipped = Path(__file__).resolve().parents[1] / "models" / "weights"
        try:
            ModelBundle.load_directory(shipped)
            _MODELS.append(shipped)
        except (ModelError, NotFoundError):
            swda: Path = request.getfixturevalue("swda_dir")
            out = tmp_path_factory.mktemp("tiny-models")
            subprocess.run([sys.executable, "-c", _TRAIN, str(swda), str(out)], check=True,
                           timeout=600, capture_output=True)
            _MODELS.append(out)
    return _MODELS[0]


_BUNDLES: dict[Path, ModelBundle] = {}


@pytest.fixture(name="bundle")
def bundle_fixture(models_dir: Path) -> ModelBundle:
    """The loaded models (immutable, so one load serves every test)."""
    if models_dir not in _BUNDLES:
        _BUNDLES[models_dir] = ModelBundle.load_directory(models_dir)
    return _BUNDLES[models_dir]


@pytest.fixture(name="start_server")
async def start_server_fixture(bundle: ModelBundle) -> AsyncIterator[ServerFactory]:
    """Start servers on port 0: ``await start_server(limits=..., given=bundle, **config)``."""
    started: list[Running] = []

    async def start(*, limits: ServerLimits = TEST_LIMITS, given: ModelBundle | None = None,
                    **config: Any) -> Running:
        server = MidstreamServer(
            ServerConfig(host="127.0.0.1", port=0, grace_s=2.0, limits=limits, **config),
            bundle=given if given is not None else bundle,
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


@pytest.fixture(name="running")
async def running_fixture(start_server: ServerFactory) -> Running:
    return await start_server()


def spoken(word_id: str, text: str, speaker: str = "A", start: float | None = None,
           **extra: Any) -> pb.SpokenWord:
    """A wire word (tests build events with this)."""
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


class Caller:
    """The ingesting side of one ``Feed`` stream, driven event by event."""

    def __init__(self, stub: pb_grpc.MidstreamStub,
                 metadata: tuple[tuple[str, str], ...] = ()) -> None:
        self.call = stub.Feed(metadata=metadata)
        self.updates: list[pb.Update] = []
        self.epoch = 0  # the conversation's, from the welcome

    async def open(self, conversation_id: str = "") -> str:
        await self.call.write(open_event(conversation_id))
        message = await self.call.read()
        assert message.WhichOneof("body") == "welcome"
        self.epoch = message.welcome.epoch
        return str(message.welcome.conversation_id)

    async def send(self, event: pb.ClientEvent) -> pb.Update:
        """Send an event that changes something and read its update."""
        await self.call.write(event)
        message = await self.call.read()
        assert message.WhichOneof("body") == "update", message
        update: pb.Update = message.update
        self.updates.append(update)
        return update

    async def close(self) -> pb.Ended:
        """Send ``close``, collect the final update, return ``ended``."""
        await self.call.write(CLOSE)
        await self.call.done_writing()
        final = await self.call.read()
        self.updates.append(final.update)
        assert final.update.conversation_final
        ended: pb.Ended = (await self.call.read()).ended
        return ended


async def follow_all(stub: pb_grpc.MidstreamStub, conversation_id: str,
                     from_seq: int | None = None) -> list[pb.ServerMessage]:
    """Every message of a ``Follow`` stream until it ends."""
    request = pb.FollowRequest(conversation_id=conversation_id)
    if from_seq is not None:
        request.from_seq = from_seq
    return [m async for m in stub.Follow(request)]


async def until_followers(running: Running, conversation_id: str, count: int) -> None:
    """Wait (at most five seconds) until ``count`` followers are attached to a conversation."""
    session = running.server.servicer.registry.get(conversation_id)
    async with asyncio.timeout(5):
        while session.follower_count < count:
            await asyncio.sleep(0.01)
