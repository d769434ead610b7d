"""``midstream serve`` in a subprocess: SIGTERM drains live conversations before exiting."""

from __future__ import annotations

import argparse
import asyncio
import gc
import os
import signal
import subprocess
import sys
import weakref
from pathlib import Path

import grpc
import pytest
from midstream import InputError, ModelError, NotFoundError, UnavailableError
from midstream.client.cli import _cmd_serve
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from server_kit import (  # noqa: F401 - fixtures are found by name
    Caller,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    spoken,
    start_server_fixture,
    words_event,
)


def _serve(*args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", "0", *args],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, **(env or {})},
    )


async def test_sigterm_finalises_every_conversation_before_exit(models_dir: Path) -> None:
    process = _serve("--models", str(models_dir), "--grace", "5", "--token-env",
                     env={"MIDSTREAM_TOKEN": "t0ken"})
    try:
        assert process.stdout is not None
        line = await asyncio.wait_for(asyncio.to_thread(process.stdout.readline), 60)
        assert line.startswith("serving on 127.0.0.1:"), line
        port = int(line.rsplit(":", 1)[1])
        auth = (("authorization", "Bearer t0ken"),)
        async with grpc.aio.insecure_channel(f"127.0.0.1:{port}") as channel:
            stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]
            caller = Caller(stub, auth)
            conversation = await caller.open()
            for i, text in enumerate(["well", "i", "i", "think", "so"]):
                await caller.send(words_event(spoken(f"w{i}", text, start=float(i))))
            request = pb.FollowRequest(conversation_id=conversation, from_seq=1)
            follow_call = stub.Follow(request, metadata=auth)
            seen: list[pb.ServerMessage] = [await follow_call.read() for _ in caller.updates]
            process.send_signal(signal.SIGTERM)
            final = await asyncio.wait_for(caller.call.read(), 10)
            ended = await caller.call.read()
            assert final.update.conversation_final
            assert ended.ended.reason == pb.END_REASON_SERVER_SHUTDOWN
            while (message := await follow_call.read()) is not grpc.aio.EOF:
                seen.append(message)
        assert [m.update for m in seen[:-1]] == [*caller.updates, final.update]
        assert seen[-1].ended.reason == pb.END_REASON_SERVER_SHUTDOWN
        finals = {w.word_id: w.final for m in seen[:-1] for w in m.update.words}
        assert len(finals) == 5 and all(finals.values())
        _, stderr = await asyncio.to_thread(process.communicate, timeout=15)
        assert process.returncode == 0, stderr
        assert "draining" in stderr
    finally:
        if process.poll() is None:
            process.kill()
        process.communicate()


def _config(*argv: str) -> ServerConfig:
    # The command's own parser, without importing every other command.
    parser = argparse.ArgumentParser(prog="midstream")
    _cmd_serve.register(parser.add_subparsers())
    return _cmd_serve.build_config(parser.parse_args(["serve", "--port", "0", *argv]))


async def test_require_tls_without_certificate_refuses_to_start(models_dir: Path) -> None:
    config = _config("--models", str(models_dir), "--require-tls")
    with pytest.raises(InputError, match="refusing to start without TLS"):
        await _cmd_serve.serve(config)


@pytest.mark.parametrize("flags", [["--token-env"], ["--token-env", "NO_SUCH_VARIABLE_SET"],
                                   ["--token", ""]])
def test_token_must_be_given_and_non_empty(flags: list[str],
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("MIDSTREAM_TOKEN", raising=False)
    with pytest.raises(InputError, match="empty"):
        _config(*flags)


def test_token_is_read_from_the_named_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("OUR_TOKEN", "abc")
    config = _config("--token-env", "OUR_TOKEN", "--idle-timeout", "7")
    assert config.token == "abc" and config.limits.idle_timeout_s == 7
    assert "abc" not in repr(config)


async def test_default_config_serves_the_shipped_models_or_says_they_are_missing() -> None:
    # No flags means the shipped models: they start the server when present and give one clear
    # error naming the folder when not (never a crash or a half-started server).
    shipped = Path(__file__).resolve().parents[2] / "models" / "weights"
    server = MidstreamServer(_config())
    if list(shipped.glob("*.tagger")):
        await server.start()
        try:
            assert server.port > 0
        finally:
            await server.stop(0)
    else:
        with pytest.raises((NotFoundError, ModelError), match="weights"):
            await server.start()
        await server.stop(0)


async def test_a_port_in_use_is_a_clear_error(start_server: ServerFactory,
                                              bundle: ModelBundle) -> None:
    running = await start_server()
    taken = running.server.port
    second = MidstreamServer(ServerConfig(port=taken), bundle=bundle)
    with pytest.raises(UnavailableError, match=f"cannot listen on 127.0.0.1:{taken}"):
        await second.start()
    await second.stop(0)


def test_gc_thresholds_are_three_positive_integers() -> None:
    assert _cmd_serve.parse_gc_thresholds("50000,50,1000") == (50000, 50, 1000)
    for bad in ("", "700,10", "700,10,10,10", "a,b,c", "0,10,10", "-1,10,10"):
        with pytest.raises(InputError, match="--gc-thresholds"):
            _cmd_serve.parse_gc_thresholds(bad)


def test_the_default_thresholds_leave_older_generations_to_the_timer() -> None:
    g0, g1, g2 = _cmd_serve.parse_gc_thresholds(_cmd_serve._GC_THRESHOLDS)
    # Young collections stay small (short pauses); older ones effectively never run by
    # themselves (midstream bench gc: they walk live conversations and free nothing).
    assert g0 <= 1000 and g1 >= 100_000 and g2 >= 100_000
    assert _cmd_serve._FULL_COLLECTION_S > 0


def test_a_short_lived_cycle_is_still_freed_without_the_timer() -> None:
    class Node:
        other: object = None

    saved = gc.get_threshold()
    gc.collect()
    gc.set_threshold(*_cmd_serve.parse_gc_thresholds(_cmd_serve._GC_THRESHOLDS))
    try:
        node = Node()
        node.other = node  # a reference cycle: only the collector can free it
        alive = weakref.ref(node)
        del node
        for _ in range(10):  # enough tracked allocations for several young collections
            _ = [[] for _ in range(1000)]
            if alive() is None:
                break
        assert alive() is None
    finally:
        gc.set_threshold(*saved)


async def test_full_collections_run_on_the_timer_until_cancelled(
        monkeypatch: pytest.MonkeyPatch) -> None:
    runs: list[int] = []

    def collect(*generation: int) -> int:
        runs.append(len(generation))
        return 0

    monkeypatch.setattr(gc, "collect", collect)
    task = asyncio.create_task(_cmd_serve._collect_periodically(0.01))
    for _ in range(500):  # up to 5 s on a busy machine; usually a few hundredths
        await asyncio.sleep(0.01)
        if len(runs) >= 3:
            break
    task.cancel()
    with pytest.raises(asyncio.CancelledError):
        await task
    count = len(runs)
    assert count >= 3 and runs == [0] * count  # full collections: no generation argument
    await asyncio.sleep(0.05)
    assert len(runs) == count  # cancelled means stopped


def test_decoder_flags_reach_the_server_config() -> None:
    parser = argparse.ArgumentParser()
    _cmd_serve.register(parser.add_subparsers())
    config = _cmd_serve.build_config(parser.parse_args(["serve", "--lag", "2", "--no-settle"]))
    assert (config.max_open_words, config.settle) == (2, False)
    default = _cmd_serve.build_config(parser.parse_args(["serve"]))
    assert (default.max_open_words, default.settle) == (None, True)
    with pytest.raises(InputError, match="--lag must be >= 0"):
        _cmd_serve.build_config(parser.parse_args(["serve", "--lag", "-1"]))
    with pytest.raises(InputError, match="max_open_words must be >= 0"):
        ServerConfig(max_open_words=-1)


def test_any_limit_can_be_set_by_name() -> None:
    parser = argparse.ArgumentParser()
    _cmd_serve.register(parser.add_subparsers())
    config = _cmd_serve.build_config(parser.parse_args([
        "serve", "--max-live-conversations", "1000", "--limit", "max_channels_per_stream=2048",
        "--limit", "idle_timeout_s=2.5", "--limit", "history_revisions = 8192"]))
    assert config.limits.max_channels_per_stream == 2048
    assert config.limits.idle_timeout_s == 2.5  # --limit applies after --idle-timeout
    assert config.limits.history_revisions == 8192
    assert config.limits.max_live_conversations == 1000
    for bad, message in (("max_channels_per_stream", "expected NAME=VALUE"),
                         ("max_channel=3", "is no server limit; the limits are max_word_chars"),
                         ("replay_updates=1.5", "replay_updates takes a whole number"),
                         ("idle_timeout_s=soon", "idle_timeout_s takes a number"),
                         ("replay_updates=0", "replay_updates must be at least 1")):
        with pytest.raises(InputError, match=message):
            _cmd_serve.build_config(parser.parse_args(["serve", "--limit", bad]))


def test_a_negative_collection_period_is_refused() -> None:
    parser = argparse.ArgumentParser()
    _cmd_serve.register(parser.add_subparsers())
    args = parser.parse_args(["serve", "--full-collection-every", "-1"])
    with pytest.raises(InputError, match="--full-collection-every"):
        _cmd_serve.run(args)
