"""A Redis that cannot take writes for now is an outage, never a refusal: the replica that
writes a conversation buffers, reports the log down and catches up, and its conversation can
still be followed everywhere and continued elsewhere.

Each state is a real redis-server's own: ``READONLY`` (the address reaches a replica, as right
after a Sentinel failover before the proxy or DNS name moves), ``MASTERDOWN`` (that replica's
link to its primary down with ``replica-serve-stale-data no``), ``OOM`` (``maxmemory`` reached
under ``noeviction``) and ``LOADING`` (Redis loading its dataset). The scripts' own error
replies (the append script's owner fence, a continuing replica's claim) stay refusals. Every
wait is generous: nothing here asserts how fast.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator, Callable
from typing import Any

import grpc
import pytest
import redis.asyncio as aioredis
from grpc_health.v1 import health_pb2, health_pb2_grpc
from midstream.server import SharedLogConfig
from midstream.server._journal import (
    _APPEND,
    SHARED_LOG_HEALTH,
    TRANSIENT_REPLIES,
    ConversationKeys,
    refused,
)
from midstream.server._replica import _CLAIM
from midstream.wire import midstream_pb2 as pb
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import (
    BusyLoadingError,
    MasterDownError,
    OutOfMemoryError,
    ReadOnlyError,
    ResponseError,
)
from redis_kit import (
    LIMITS,
    RedisFactory,
    RedisProcess,
    call_words,
    gaps_told,
    redis_servers_fixture,
)
from server_kit import (
    Caller,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    start_server_fixture,
    words_event,
)

__all__ = ["bundle_fixture", "models_dir_fixture", "redis_servers_fixture",
           "start_server_fixture"]

# Seconds any one wait below may take before the test fails (a loaded machine).
_PATIENCE_S = 60

# The error class of the reply a state gives writes.
_Reply = type[Exception]


@contextlib.asynccontextmanager
async def _client(server: RedisProcess) -> AsyncIterator[aioredis.Redis]:
    # No retries of its own: a probe must see the reply Redis gives, LOADING included (redis-py
    # retries that one by default, as a connection error). A long read timeout: DEBUG RELOAD,
    # below, answers only once it has loaded everything again.
    client = aioredis.Redis.from_url(server.url, retry=Retry(NoBackoff(), 0),
                                     socket_timeout=_PATIENCE_S)
    try:
        yield client
    finally:
        await client.aclose()


async def _command(client: aioredis.Redis, *args: str) -> Any:
    """A command redis-py has no method for (FAILOVER, DEBUG); its ``execute_command`` is
    untyped."""
    return await client.execute_command(*args)  # type: ignore[no-untyped-call]


async def _until(probe: Callable[[], Any], error: type[BaseException]) -> None:
    """Wait until ``probe()`` (a Redis command) fails with ``error``."""
    async with asyncio.timeout(_PATIENCE_S):
        while True:
            try:
                await probe()
            except error:
                return
            await asyncio.sleep(0.05)


async def _replication(client: aioredis.Redis) -> dict[str, Any]:
    info: dict[str, Any] = await client.info("replication")
    return info


async def _replicating(replica: aioredis.Redis, primary: RedisProcess) -> None:
    """Make ``replica`` a replica of ``primary`` and wait until it holds all it has."""
    await replica.replicaof("127.0.0.1", str(primary.port))
    async with asyncio.timeout(_PATIENCE_S):
        while (await _replication(replica)).get("master_link_status") != "up":
            await asyncio.sleep(0.05)


async def _demoted(primary: RedisProcess, spare: RedisProcess) -> None:
    """Turn ``primary`` into a read-only replica of ``spare``, which takes over everything it
    held: ``FAILOVER`` pauses the primary's writes until its replica has them all, then swaps
    the two (so no write is lost, and the test needs no luck)."""
    async with _client(spare) as new, _client(primary) as old:
        await _replicating(new, primary)
        async with asyncio.timeout(_PATIENCE_S):  # FAILOVER wants it online on both sides
            while (await _replication(old)).get("slave0", {}).get("state") != "online":
                await asyncio.sleep(0.05)
        await _command(old, "FAILOVER", "TO", "127.0.0.1", str(spare.port))
        async with asyncio.timeout(_PATIENCE_S):
            while (await _replication(old)).get("role") != "slave":
                await asyncio.sleep(0.05)


@contextlib.asynccontextmanager
async def _read_only(primary: RedisProcess, servers: RedisFactory) -> AsyncIterator[_Reply]:
    await _demoted(primary, servers())
    async with _client(primary) as old:
        await _until(lambda: old.set("probe", "1"), ReadOnlyError)
        yield ReadOnlyError
        # The address reaches a primary again (the proxy moved back, or it was promoted).
        await old.replicaof("NO", "ONE")


@contextlib.asynccontextmanager
async def _master_down(primary: RedisProcess, servers: RedisFactory) -> AsyncIterator[_Reply]:
    spare = servers()
    await _demoted(primary, spare)
    async with _client(primary) as old:
        await old.config_set("replica-serve-stale-data", "no")
        spare.stop()  # its link to its new primary is down: it answers MASTERDOWN
        await _until(lambda: old.get("probe"), MasterDownError)
        yield MasterDownError
        await old.replicaof("NO", "ONE")
        await old.config_set("replica-serve-stale-data", "yes")


@contextlib.asynccontextmanager
async def _out_of_memory(primary: RedisProcess, _: RedisFactory) -> AsyncIterator[_Reply]:
    async with _client(primary) as client:
        await client.config_set("maxmemory-policy", "noeviction")
        await client.config_set("maxmemory", "1")  # bytes: below what it holds already
        await _until(lambda: client.set("probe", "1"), OutOfMemoryError)
        yield OutOfMemoryError
        await client.config_set("maxmemory", "0")  # no limit


@contextlib.asynccontextmanager
async def _loading(primary: RedisProcess, _: RedisFactory) -> AsyncIterator[_Reply]:
    async with _client(primary) as client, _client(primary) as probe:
        # Enough keys, each loaded slowly (key-load-delay: microseconds per key, a setting
        # Redis keeps for its own tests), and events served while loading, so DEBUG RELOAD
        # (save, empty, load again: nothing is lost) answers LOADING for some seconds.
        await _command(client, "DEBUG", "POPULATE", "40000", "filler")
        await client.config_set("key-load-delay", "100")
        await client.config_set("loading-process-events-interval-bytes", "1024")
        reload = asyncio.ensure_future(_command(client, "DEBUG", "RELOAD"))
        await _until(lambda: probe.get("probe"), BusyLoadingError)
        yield BusyLoadingError
        await reload
        await client.config_set("key-load-delay", "0")


_STATES = {"readonly": _read_only, "masterdown": _master_down, "oom": _out_of_memory,
           "loading": _loading}


async def _health(channel: grpc.aio.Channel) -> int:
    health = health_pb2_grpc.HealthStub(channel)
    reply = await health.Check(health_pb2.HealthCheckRequest(service=SHARED_LOG_HEALTH))
    status: int = reply.status
    return status


async def _until_health(channel: grpc.aio.Channel, status: int) -> None:
    async with asyncio.timeout(_PATIENCE_S):
        while await _health(channel) != status:
            await asyncio.sleep(0.05)


async def _until_logged(stub: object, conversation_id: str, last_seq: int) -> None:
    async with asyncio.timeout(_PATIENCE_S):
        while True:
            reply = await stub.ListConversations(pb.ListConversationsRequest())  # type: ignore[attr-defined]
            if any(c.conversation_id == conversation_id and c.last_seq >= last_seq
                   for c in reply.conversations):
                return
            await asyncio.sleep(0.05)


@pytest.mark.slow
@pytest.mark.parametrize("state", list(_STATES))
async def test_a_redis_that_cannot_take_writes_for_now_is_an_outage_the_log_catches_up_from(
        start_server: ServerFactory, redis_servers: RedisFactory, state: str,
        caplog: pytest.LogCaptureFixture) -> None:
    """While Redis answers the writes with ``state``'s error the caller keeps getting its
    updates and health reports the log down; once Redis takes writes again the log catches up:
    a follower on another replica gets every update once and ``ended``, and the conversation
    can still be continued elsewhere (its logged input is whole)."""
    primary = redis_servers(*(("--enable-debug-command", "yes") if state == "loading" else ()))
    shared = SharedLogConfig(url=primary.url, timeout_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:40]
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    for word in words[:15]:
        await caller.send(words_event(word))
    await _until_logged(b.stub, conversation_id, caller.updates[-1].seq)
    live = asyncio.ensure_future(follow_all(b.stub, conversation_id, from_seq=1))
    async with _STATES[state](primary, redis_servers) as reply:
        for word in words[15:25]:
            await caller.send(words_event(word))  # the caller keeps getting its updates
        await _until_health(a.channel, health_pb2.HealthCheckResponse.NOT_SERVING)
        assert a.server.metrics.registry.get_sample_value("midstream_shared_log_up") == 0
        if state in ("readonly", "oom"):
            # Reads still work: another replica lists the conversation (as far as it was
            # written) while the log is down.
            listing = await b.stub.ListConversations(pb.ListConversationsRequest())
            assert [c.conversation_id for c in listing.conversations] == [conversation_id]
    await _until_health(a.channel, health_pb2.HealthCheckResponse.SERVING)
    for word in words[25:]:
        await caller.send(words_event(word))
    ended = await caller.close()
    last = caller.updates[-1].seq
    assert ended.last_seq == last
    # Every update reached the log, once and in order: the live follower and one from seq 1.
    for messages in (await asyncio.wait_for(live, _PATIENCE_S),
                     await follow_all(b.stub, conversation_id, from_seq=1)):
        assert gaps_told(messages, last) == 0
        assert [m.update.seq for m in messages if m.WhichOneof("body") == "update"] == list(
            range(1, last + 1))
    async with _client(primary) as client:
        meta = await client.hgetall(ConversationKeys.of("midstream", conversation_id).meta)
    assert meta[b"resumable"] == b"1"  # nothing dropped: it could be continued elsewhere
    metrics = a.server.metrics.registry
    assert (metrics.get_sample_value("midstream_shared_log_degraded_total") or 0) >= 1
    assert metrics.get_sample_value("midstream_shared_log_dropped_total") == 0
    said = [r.getMessage() for r in caplog.records if r.name == "midstream.server._journal"]
    # Taken for an outage, never for a refusal (which would stop the conversation's log).
    assert not any("refused" in m or "stops writing" in m for m in said), said
    # The outage named the reply (redis-py retries LOADING by itself, a connection error to
    # it, so the round trip may time out first).
    names = {reply.__name__} | ({"TimeoutError"} if state == "loading" else set())
    assert any(f"unreachable ({name})" in m for m in said for name in names), said


def _append_args(owner: str, incarnation: str) -> list[Any]:
    """The append script's arguments for a write of nothing but the conversation's hash, by
    ``owner``, to a conversation that must exist already (``_journal.SharedLog._call``)."""
    return [owner, incarnation, 60_000, "1", 0, 1, 0, "", b"", b"", "0", 0]


async def test_the_owner_fences_replies_are_refusals_and_unwritable_replies_are_not(
        redis_servers: RedisFactory) -> None:
    """The real scripts' refusals (the append script's: another owner, another conversation
    under the id, a conversation Redis lost; the continuing replica's claim: the conversation
    ended or was started anew) against the real replies of a Redis that cannot write for
    now, to the same scripts."""
    primary = redis_servers()
    keys = ConversationKeys.of("midstream", "c")

    async def append(client: aioredis.Redis, owner: str, incarnation: str) -> Any:
        async with client.pipeline(transaction=False) as pipe:  # as the writer sends it
            pipe.eval(_APPEND, 4, keys.updates, keys.events, keys.meta, keys.snapshot,
                      *_append_args(owner, incarnation))
            [result] = await pipe.execute(raise_on_error=False)
        return result

    async def claim(client: aioredis.Redis, incarnation: str, read: str = "theirs") -> Any:
        # A claim of what was read as owned by ``read`` at useq 0 with no events
        # (_replica._claim).
        try:
            return await client.eval(_CLAIM, 1, keys.meta, incarnation, "mine", read, "0",
                                     "0", "token")
        except ResponseError as exc:  # raised, as the continuing replica meets it
            return exc

    async with _client(primary) as client:
        # Nothing under the id, yet the write says it was logged before: Redis lost it.
        lost = await append(client, "mine", "1")
        await client.hset(keys.meta, mapping={"inc": "1", "owner": "theirs"})
        superseded = await append(client, "mine", "1")  # another replica continued it
        conflict = await append(client, "mine", "2")  # another live conversation has the id
        started_anew = await claim(client, "2")
        await client.hset(keys.meta, "ended", "1")
        ended = await claim(client, "1")
        for name, result in [("MIDSTREAM_LOST", lost), ("MIDSTREAM_SUPERSEDED", superseded),
                             ("MIDSTREAM_CONFLICT", conflict),
                             ("MIDSTREAM_CONFLICT", started_anew), ("MIDSTREAM_ENDED", ended)]:
            assert isinstance(result, ResponseError) and name in str(result), (name, result)
            assert not isinstance(result, TRANSIENT_REPLIES)
            assert refused(result)
        await client.delete(keys.meta)
        await client.hset(keys.meta, mapping={"inc": "1", "owner": "mine"})
        assert await append(client, "mine", "1") == b"OK"
        await client.hset(keys.meta, "owner", "theirs")
        assert await claim(client, "1") == b"OK"
        await client.hset(keys.meta, "owner", "mine")
    unwritable: list[BaseException] = []
    for state in (_out_of_memory, _read_only, _master_down):
        async with state(primary, redis_servers) as reply, _client(primary) as client:
            for result in (await append(client, "mine", "1"),
                           await claim(client, "1", read="mine")):
                assert isinstance(result, reply), (reply, result)
                unwritable.append(result)
    assert not any(refused(error) for error in unwritable)


async def _resume(stub: object, conversation_id: str) -> tuple[Any, pb.ServerMessage]:
    """Open a ``Feed`` continuing ``conversation_id``; the call and its first message."""
    call: Any = stub.Feed()  # type: ignore[attr-defined]
    await call.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id=conversation_id,
                                                             resume=True)))
    message: pb.ServerMessage = await call.read()
    return call, message


async def test_continuing_on_a_read_only_redis_is_unavailable_and_goes_through_after(
        start_server: ServerFactory, redis_servers: RedisFactory) -> None:
    """A continuation can read the log on a read-only Redis, but its claim is a write: the
    caller is told to try again (``UNAVAILABLE``), not that the conversation changed, and
    once Redis takes writes the same continuation goes through and loses no word."""
    primary = redis_servers()
    shared = SharedLogConfig(url=primary.url, timeout_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:12]
    old = Caller(a.stub)
    await old.open("moving")
    for word in words[:8]:
        await old.send(words_event(word))
    await _until_logged(b.stub, "moving", old.updates[-1].seq)
    async with _read_only(primary, redis_servers):
        with pytest.raises(grpc.aio.AioRpcError) as failed:
            await _resume(b.stub, "moving")
        assert failed.value.code() == grpc.StatusCode.UNAVAILABLE
        assert failed.value.details() == (
            "the shared log is unreachable (ReadOnlyError); try again")
    call, welcome = await _resume(b.stub, "moving")
    assert welcome.welcome.events_logged == 8
    assert welcome.welcome.next_seq == old.updates[-1].seq + 1
    old.call.cancel()
    new = Caller(b.stub)
    new.call = call
    for word in words[8:]:
        await new.send(words_event(word))
    ended = await new.close()
    # Read from the log on a third replica (A may serve its own stale copy until it learns
    # it was fenced off: docs/deploy.md).
    c = await start_server(limits=LIMITS, shared_log=shared)
    messages = await asyncio.wait_for(follow_all(c.stub, "moving", from_seq=1), _PATIENCE_S)
    assert gaps_told(messages, ended.last_seq) == 0
    followed = {w.word_id for m in messages if m.WhichOneof("body") == "update"
                for w in m.update.words}
    assert followed == {w.word_id for w in words}
