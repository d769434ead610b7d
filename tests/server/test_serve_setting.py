"""A server labels every conversation in the conversation setting it was started with.

The model is a tiny coarse one trained here on two invented corpora that annotate a lone
"right" differently (``setting_kit``): an agreement in the workshop's calls, an
acknowledgement in the choir's.
"""

from __future__ import annotations

import asyncio
import logging
import subprocess
import sys
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

import grpc
import pytest
from midstream import AddWord, ModelError, SpeakerHint, UtteranceFunction
from midstream.client import Client
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig, SharedLogConfig
from midstream.wire import midstream_pb2 as pb
from redis_kit import LIMITS, RedisProcess, redis_server_fixture
from server_kit import (
    Caller,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    spoken,
    start_server_fixture,
    words_event,
)
from setting_kit import (
    DISPUTED,
    DISPUTED_FUNCTION,
    SETTINGS,
    setting_conversation,
    write_setting_models,
)

__all__ = ["bundle_fixture", "models_dir_fixture", "redis_server_fixture",
           "start_server_fixture"]

_SHIPPED = Path(__file__).resolve().parents[2] / "models" / "weights"


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_setting_models(tmp_path_factory.mktemp("setting-models"))


@asynccontextmanager
async def _serving(models: Path, setting: str | None) -> AsyncIterator[
        tuple[MidstreamServer, Client]]:
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=models,
                                          grace_s=1.0, setting=setting))
    await server.start()
    try:
        async with Client(f"127.0.0.1:{server.port}") as client:
            yield server, client
    finally:
        await server.stop(0)


async def _disputed_functions(client: Client) -> list[UtteranceFunction]:
    """The functions the server gives every lone "right" of an unseen conversation."""
    conversation = setting_conversation("workshop", 500)
    events: list[AddWord | SpeakerHint] = []
    for unit in conversation.utterances:
        events.extend(AddWord(word_id=f"w{i}", word=conversation.words[i]) for i in unit.words)
        events.append(SpeakerHint(speaker=unit.speaker, turn_end=True))
    tagged = await client.tag_transcript(events)
    found = [u.function for u in tagged.utterances if u.clean_text == DISPUTED]
    assert found, [u.clean_text for u in tagged.utterances]
    return found


@pytest.mark.parametrize("setting", SETTINGS)
async def test_a_served_conversation_is_labelled_in_the_named_setting(
        models: Path, setting: str, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="midstream.server"):
        async with _serving(models, setting) as (server, client):
            assert server.servicer.bundle.setting == setting  # type: ignore[attr-defined]
            functions = await _disputed_functions(client)
    assert set(functions) == {DISPUTED_FUNCTION[setting]}
    # An operator reading the start-up log sees which setting is in service.
    assert any(r.getMessage().startswith("serving on") and f"setting {setting!r}"
               in r.getMessage() for r in caplog.records), caplog.text


async def test_without_a_setting_the_shared_weights_label(models: Path) -> None:
    async with _serving(models, None) as (server, client):
        assert server.servicer.bundle.setting is None  # type: ignore[attr-defined]
        functions = await _disputed_functions(client)
    assert set(functions) <= set(DISPUTED_FUNCTION.values())


async def test_describe_models_lists_the_settings_a_caller_may_name(models: Path) -> None:
    async with _serving(models, "choir") as (_, client):
        infos = await client.describe_models()
    coarse = next(i for i in infos if i.kind == "utterance_functions")
    assert coarse.training_summary["settings"] == list(SETTINGS)


async def test_reloaded_models_keep_the_setting_or_are_refused(models: Path) -> None:
    async with _serving(models, "workshop") as (server, client):
        await client.reload_models(str(models))
        assert server.servicer.bundle.setting == "workshop"  # type: ignore[attr-defined]
        # The shipped models learnt no settings: refused, and the ones in service stay.
        with pytest.raises(ModelError, match="no setting 'workshop'"):
            await client.reload_models(str(_SHIPPED))
        assert set(await _disputed_functions(client)) == {DISPUTED_FUNCTION["workshop"]}


def test_serve_refuses_an_unknown_setting_naming_the_known_ones(models: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "midstream", "serve", "--port", "0",
         "--models", str(models), "--setting", "orchestra"],
        capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 1
    assert result.stdout == ""  # never said it was serving
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "'orchestra'" in lines[0], result.stderr
    assert all(name in lines[0] for name in SETTINGS), result.stderr




async def test_a_replica_in_another_setting_refuses_to_continue_a_conversation(
        models: Path, start_server: ServerFactory, redis_server: RedisProcess) -> None:
    # Continuing replays the logged input through this replica's engine: in another setting
    # it would relabel the conversation halfway, so the log's model identity includes it.
    bundle = ModelBundle.load_directory(models)
    shared = SharedLogConfig(url=redis_server.url)
    owner, other = [await start_server(limits=LIMITS, given=bundle, shared_log=shared,
                                       setting=setting) for setting in ("workshop", "choir")]
    # A library caller may hand over a bundle already set to a setting and name none in the
    # config: the identity is the bundle's own, so this replica is the owner's equal.
    same = await start_server(limits=LIMITS, given=bundle.with_setting("workshop"),
                              shared_log=shared)
    caller = Caller(owner.stub)
    await caller.open("call-1")
    await caller.send(words_event(spoken("w0", DISPUTED, start=0.0)))
    async with asyncio.timeout(10):
        while not any(c.conversation_id == "call-1" and c.last_seq >= 1 for c in (
                await other.stub.ListConversations(pb.ListConversationsRequest())
        ).conversations):
            await asyncio.sleep(0.02)
    resume = pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-1", resume=True,
                                                     epoch=caller.epoch))
    refused = other.stub.Feed()
    await refused.write(resume)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await refused.read()
    assert info.value.code() == grpc.StatusCode.FAILED_PRECONDITION
    # Refused on the identity written with the conversation, before any replay.
    assert "was decoded with other models, decoder settings or conversation setting" in (
        info.value.details() or "")
    taken = same.stub.Feed()
    await taken.write(resume)
    message = await taken.read()
    assert message.WhichOneof("body") == "welcome", message
    taken.cancel()


def test_serve_workers_refuse_an_unknown_setting_in_one_line(models: Path) -> None:
    # Each worker loads the models itself; the first to fail says why in one line, no
    # traceback, before Redis is ever asked (the URL below has nothing listening).
    result = subprocess.run(
        [sys.executable, "-m", "midstream", "serve", "--port", "0", "--workers", "2",
         "--redis", "redis://127.0.0.1:1/0", "--models", str(models), "--setting", "orchestra"],
        capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode != 0
    assert "Traceback" not in result.stderr
    assert any(line.startswith("midstream: worker:") and "'orchestra'" in line
               and all(name in line for name in SETTINGS)
               for line in result.stderr.splitlines()), result.stderr
