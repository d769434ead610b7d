"""Replicas as real processes on one real Redis: a replica killed with SIGKILL loses no word.

Each replica is ``midstream serve --redis URL`` in its own process. The words are the demo's
invented phone call, one per event. "No word lost or duplicated" is checked against the same
words tagged in one uninterrupted conversation: the followed update sequence (server times
aside) must be exactly that conversation's.
"""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
from collections.abc import AsyncIterator, Callable
from pathlib import Path

import grpc
import pytest
import redis.asyncio as aioredis
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from redis_kit import RedisProcess, call_words, comparable, gaps_told, redis_server_fixture
from server_kit import models_dir_fixture, words_event

__all__ = ["models_dir_fixture", "redis_server_fixture"]

pytestmark = pytest.mark.slow


class Replica:
    """One ``midstream serve`` process and a channel to it."""

    def __init__(self, process: subprocess.Popen[str], port: int) -> None:
        self.process = process
        self.port = port
        self.channel = grpc.aio.insecure_channel(f"127.0.0.1:{port}")
        self.stub = pb_grpc.MidstreamStub(self.channel)  # type: ignore[no-untyped-call]

    def kill(self) -> None:
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(10)




@pytest.fixture(name="spawn")
async def spawn_fixture(models_dir: Path, redis_server: RedisProcess,
                        ) -> AsyncIterator[Callable[..., object]]:
    started: list[Replica] = []

    async def spawn(*extra: str) -> Replica:
        process = subprocess.Popen(
            [sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", "0",
             "--models", str(models_dir), "--redis", redis_server.url, "--grace", "1",
             "--idle-timeout", "60", *extra],
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
            env={**os.environ})
        assert process.stdout is not None
        line = await asyncio.wait_for(asyncio.to_thread(process.stdout.readline), 120)
        assert line.startswith("serving on 127.0.0.1:"), line
        replica = Replica(process, int(line.split()[2].rsplit(":", 1)[1]))
        started.append(replica)
        return replica

    yield spawn
    for replica in started:
        await replica.channel.close()
        if replica.process.poll() is None:
            replica.process.kill()
        replica.process.communicate(timeout=30)


async def _reference(stub: pb_grpc.MidstreamStub, words: list[pb.SpokenWord]) -> list[bytes]:
    """The updates of the words tagged in one uninterrupted conversation (times cleared)."""
    call = stub.Feed()
    await call.write(pb.ClientEvent(open=pb.OpenConversation()))
    await call.read()
    updates: list[bytes] = []
    for word in words:
        await call.write(words_event(word))
        updates.append(comparable((await call.read()).update))
    await call.write(pb.ClientEvent(close=pb.CloseConversation()))
    await call.done_writing()
    updates.append(comparable((await call.read()).update))
    assert (await call.read()).ended.reason == pb.END_REASON_CLOSED
    return updates


async def _follow(stub: pb_grpc.MidstreamStub, conversation_id: str, from_seq: int,
                  into: list[pb.ServerMessage], epoch: int = 0) -> None:
    async for message in stub.Follow(pb.FollowRequest(conversation_id=conversation_id,
                                                      from_seq=from_seq, epoch=epoch)):
        into.append(message)


async def _logged(url: str, conversation_id: str) -> int:
    client = aioredis.Redis.from_url(url)
    try:
        useq = await client.hget(f"midstream:{{{conversation_id}}}:m", "useq")
        return int(useq or 0)
    finally:
        await client.aclose()


async def _until_in_log(url: str, conversation_id: str) -> None:
    """Wait until the log knows the conversation (its replica writes it right after open)."""
    client = aioredis.Redis.from_url(url)
    try:
        async with asyncio.timeout(10):
            while not await client.exists(f"midstream:{{{conversation_id}}}:m"):
                await asyncio.sleep(0.02)
    finally:
        await client.aclose()


async def test_a_conversation_tagged_on_a_is_followed_identically_on_b_also_after_a_is_killed(
        spawn: Callable[..., object], redis_server: RedisProcess) -> None:
    a = await spawn()  # type: ignore[misc]
    b = await spawn()  # type: ignore[misc]
    words = call_words()[:30]
    call = a.stub.Feed()
    await call.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-1")))
    await call.read()
    seen: list[pb.Update] = []
    for word in words:
        await call.write(words_event(word))
        seen.append((await call.read()).update)
    await call.write(pb.ClientEvent(close=pb.CloseConversation()))
    await call.done_writing()
    seen.append((await call.read()).update)
    await call.read()
    followed: list[pb.ServerMessage] = []
    await asyncio.wait_for(_follow(b.stub, "call-1", 1, followed), 30)
    a.kill()
    after_kill: list[pb.ServerMessage] = []
    await asyncio.wait_for(_follow(b.stub, "call-1", 1, after_kill), 30)
    for messages in (followed, after_kill):
        assert [m.update.SerializeToString() for m in messages[:-1]] == [
            u.SerializeToString() for u in seen]
        assert messages[-1].ended.reason == pb.END_REASON_CLOSED


async def test_kill_9_of_the_ingesting_replica_loses_and_repeats_no_word(
        spawn: Callable[..., object], redis_server: RedisProcess) -> None:
    a = await spawn()  # type: ignore[misc]
    b = await spawn()  # type: ignore[misc]
    words = call_words()[:48]
    reference = await _reference(b.stub, words)
    call = a.stub.Feed()
    await call.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-2")))
    epoch = (await call.read()).welcome.epoch
    await _until_in_log(redis_server.url, "call-2")
    # Followers on both replicas from the start; B's reads the shared log.
    on_a: list[pb.ServerMessage] = []
    on_b: list[pb.ServerMessage] = []
    follow_a = asyncio.ensure_future(_follow(a.stub, "call-2", 1, on_a))
    follow_b = asyncio.ensure_future(_follow(b.stub, "call-2", 1, on_b))
    caller_seqs: list[int] = []
    for word in words[:30]:
        await call.write(words_event(word))
        caller_seqs.append((await call.read()).update.seq)
    a.kill()  # mid-conversation: what A had not yet written to Redis is lost with it
    with pytest.raises(grpc.aio.AioRpcError):
        await call.read()
    with pytest.raises(grpc.aio.AioRpcError):
        await follow_a
    # The caller continues on B; the welcome says how many of its events the log holds.
    again = b.stub.Feed()
    await again.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-2",
                                                              resume=True)))
    welcome = (await again.read()).welcome
    assert welcome.conversation_id == "call-2"
    assert welcome.epoch == epoch  # the same conversation goes on
    assert 0 < welcome.events_logged <= 30
    assert welcome.next_seq == welcome.events_logged + 1  # one update per word
    for word in words[welcome.events_logged:]:
        await again.write(words_event(word))
        assert (await again.read()).update.seq >= welcome.next_seq
    await again.write(pb.ClientEvent(close=pb.CloseConversation()))
    await again.done_writing()
    final = (await again.read()).update
    assert final.conversation_final
    assert (await again.read()).ended.reason == pb.END_REASON_CLOSED
    await asyncio.wait_for(follow_b, 30)
    # B's follower: every update once, no gap, and exactly the uninterrupted conversation's.
    assert gaps_told(on_b, final.seq) == 0
    assert [comparable(m.update) for m in on_b[:-1]] == reference
    assert {m.update.epoch for m in on_b[:-1]} == {epoch}
    # A's follower lost its server; it resumes on B from the next seq it lacks.
    resumed_from = on_a[-1].update.seq + 1 if on_a else 1
    rest: list[pb.ServerMessage] = []
    await asyncio.wait_for(_follow(b.stub, "call-2", resumed_from, rest, epoch), 30)
    assert [comparable(m.update) for m in (on_a + rest)[:-1]] == reference
    # Every word once in the final state.
    final_words = {w.word_id for m in on_b[:-1] for w in m.update.words}
    assert final_words == {w.word_id for w in words}
    assert await _logged(redis_server.url, "call-2") == final.seq


async def test_kill_9_with_no_caller_coming_back_ends_the_conversation_for_followers_elsewhere(
        spawn: Callable[..., object], redis_server: RedisProcess) -> None:
    """The ingesting replica is killed and its caller never continues: once its lease has
    lapsed and the grace passed, a follower on another replica gets ``ended``
    (``OWNER_LOST``) instead of waiting for ever, and a late resume is told why not."""
    short = ("--redis-limit", "lease_s=1", "--redis-limit", "orphan_grace_s=2")
    a = await spawn(*short)  # type: ignore[misc]
    b = await spawn(*short)  # type: ignore[misc]
    call = a.stub.Feed()
    await call.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-3")))
    await call.read()
    await _until_in_log(redis_server.url, "call-3")
    on_b: list[pb.ServerMessage] = []
    follow_b = asyncio.ensure_future(_follow(b.stub, "call-3", 1, on_b))
    for word in call_words()[:10]:
        await call.write(words_event(word))
        await call.read()
    a.kill()
    # Generous: lease + grace is 3 s; this waits for the end, it does not time it.
    await asyncio.wait_for(follow_b, 120)
    assert on_b[-1].ended.reason == pb.END_REASON_OWNER_LOST
    logged = await _logged(redis_server.url, "call-3")
    assert 0 < logged <= 10
    assert gaps_told(on_b, logged) == 0
    listing = await b.stub.ListConversations(pb.ListConversationsRequest())
    assert [s.ended for s in listing.conversations if s.conversation_id == "call-3"] == [True]
    again = b.stub.Feed()
    await again.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="call-3",
                                                              resume=True)))
    with pytest.raises(grpc.aio.AioRpcError) as refused:
        await again.read()
    assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "its replica was lost" in (refused.value.details() or "")


async def _ingest(port: int, conversation_id: str, words: list[pb.SpokenWord]) -> None:
    """Tag ``words`` as one conversation over a connection of its own."""
    async with grpc.aio.insecure_channel(
            f"127.0.0.1:{port}", options=[("grpc.use_local_subchannel_pool", 1)]) as channel:
        stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]
        call = stub.Feed()
        await call.write(pb.ClientEvent(open=pb.OpenConversation(
            conversation_id=conversation_id)))
        await call.read()
        for word in words:
            await call.write(words_event(word))
            await call.read()
        await call.write(pb.ClientEvent(close=pb.CloseConversation()))
        await call.done_writing()
        await call.read()
        await call.read()


async def test_workers_share_one_port_and_one_log(models_dir: Path,
                                                  redis_server: RedisProcess) -> None:
    process = subprocess.Popen(
        [sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", "0", "--workers",
         "2", "--models", str(models_dir), "--redis", redis_server.url, "--grace", "1"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        assert process.stdout is not None
        line = await asyncio.wait_for(asyncio.to_thread(process.stdout.readline), 180)
        assert line.startswith("serving on 127.0.0.1:") and "(2 workers)" in line, line
        port = int(line.split()[2].rsplit(":", 1)[1])
        words = call_words()[:5]
        ids: list[str] = []
        owners: set[bytes | str | None] = set()
        # Separate connections (channels share connections unless told not to): the kernel
        # spreads them over the workers by a hash of each connection's addresses, so keep
        # opening until both have ingested some; 40 all on one worker is a 1 in 2**39 chance.
        client = aioredis.Redis.from_url(redis_server.url)
        try:
            while len(owners) < 2 and len(ids) < 40:
                batch = [f"w-{index}" for index in range(len(ids), len(ids) + 8)]
                for conversation_id in batch:
                    await _ingest(port, conversation_id, words)
                ids.extend(batch)
                async with asyncio.timeout(10):  # the last conversations' writes may be in flight
                    while None in (owners := {await client.hget(f"midstream:{{{i}}}:m", "owner")
                                              for i in ids}):
                        await asyncio.sleep(0.05)
        finally:
            await client.aclose()
        assert len(owners) == 2, f"one worker ingested all {len(ids)} conversations: {owners}"
        # Any connection (so either worker) follows every conversation to its end.
        async with grpc.aio.insecure_channel(f"127.0.0.1:{port}") as channel:
            stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]
            for conversation_id in ids:
                messages: list[pb.ServerMessage] = []
                await asyncio.wait_for(_follow(stub, conversation_id, 1, messages), 30)
                assert gaps_told(messages, len(words) + 1) == 0
        process.send_signal(signal.SIGTERM)
        _, stderr = await asyncio.to_thread(process.communicate, timeout=60)
        assert process.returncode == 0, stderr
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)  # the supervisor and its workers
            process.communicate()


def test_workers_without_a_shared_log_are_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("MIDSTREAM_REDIS", raising=False)
    result = subprocess.run(
        [sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", "0", "--workers",
         "2"], capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode != 0
    assert "--workers 2 needs a shared log (--redis URL" in result.stderr
