"""Replicas sharing a real Redis Cluster (three nodes): ``--redis redis+cluster://NODE``.

Every key of one conversation carries one hash tag, so the cluster keeps them on one node and
each script call stays there; the listing's index lives wherever its own key falls. The
conversations' ids are chosen so that they fall on more than one node.
"""

from __future__ import annotations

import asyncio
import dataclasses
from typing import Any

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from midstream.server import SharedLogConfig
from midstream.server._journal import SHARED_LOG_HEALTH, lease_key
from midstream.wire import midstream_pb2 as pb
from redis.asyncio.cluster import RedisCluster as ClusterClient
from redis_kit import (
    LIMITS,
    RedisCluster,
    call_words,
    failing_cluster_fixture,
    gaps_told,
    redis_cluster_fixture,
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

__all__ = ["bundle_fixture", "failing_cluster_fixture", "models_dir_fixture",
           "redis_cluster_fixture", "start_server_fixture"]


async def _nodes_holding(url: str, conversation_ids: list[str]) -> set[str]:
    """The cluster nodes (host:port) that hold these conversations' keys."""
    client = ClusterClient.from_url(url.replace("+cluster", ""))
    try:
        await client.initialize()  # learns which node holds which slots
        nodes = set()
        for conversation_id in conversation_ids:
            node = client.get_node_from_key(f"midstream:{{{conversation_id}}}:m")
            assert node is not None
            assert await client.exists(f"midstream:{{{conversation_id}}}:u",
                                       f"midstream:{{{conversation_id}}}:e",
                                       f"midstream:{{{conversation_id}}}:m") == 3
            nodes.add(node.name)
        return nodes
    finally:
        await client.aclose()


async def _until_logged(stub: object, conversation_id: str, last_seq: int) -> None:
    async with asyncio.timeout(10):
        while not any(c.conversation_id == conversation_id and c.last_seq >= last_seq
                      for c in (await stub.ListConversations(  # type: ignore[attr-defined]
                          pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)


@pytest.mark.slow
async def test_replicas_on_a_cluster_follow_list_and_continue_each_others_conversations(
        start_server: ServerFactory, redis_cluster: RedisCluster) -> None:
    shared = SharedLogConfig(url=redis_cluster.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    c = await start_server(limits=LIMITS, shared_log=shared)  # reads everything from Redis
    words = call_words()[:16]
    ids = [f"cl-{n}" for n in range(6)]
    callers = {}
    for conversation_id in ids:
        caller = Caller(a.stub)
        await caller.open(conversation_id)
        for word in words[:10]:
            await caller.send(words_event(word))
        callers[conversation_id] = caller
    for conversation_id in ids:
        await _until_logged(b.stub, conversation_id, callers[conversation_id].updates[-1].seq)
    assert len(await _nodes_holding(redis_cluster.url, ids)) > 1
    # Each is continued on B (A cut off from them), finished there, and followed from seq 1
    # on C: one sequence, no gap, A's first ten updates then B's.
    for conversation_id in ids:
        old = callers[conversation_id]
        again = Caller(b.stub)
        await again.call.write(pb.ClientEvent(open=pb.OpenConversation(
            conversation_id=conversation_id, resume=True, epoch=old.epoch)))
        welcome = (await again.call.read()).welcome
        assert welcome.events_logged == 10 and welcome.epoch == old.epoch
        old.call.cancel()
        for word in words[10:]:
            await again.send(words_event(word))
        ended = await again.close()
        messages = await asyncio.wait_for(follow_all(c.stub, conversation_id, from_seq=1), 30)
        assert gaps_told(messages, ended.last_seq) == 0
        followed = [m.update for m in messages if m.WhichOneof("body") == "update"]
        assert [u.SerializeToString() for u in followed[:10]] == [
            u.SerializeToString() for u in old.updates]
        assert {w.word_id for u in followed for w in u.words} == {w.word_id for w in words}
    listing = await c.stub.ListConversations(pb.ListConversationsRequest())
    assert {c.conversation_id for c in listing.conversations if c.ended} >= set(ids)
    # Every replica's lease script runs on the cluster (its keys share one slot).
    client = ClusterClient.from_url(redis_cluster.url.replace("+cluster", ""))
    try:
        owners = {r.server._shared.owner for r in (a, b, c)}  # type: ignore[union-attr]
        async with asyncio.timeout(30):
            while True:
                leased: Any = await client.zrange(lease_key("midstream"), 0, -1)
                if {owner.decode() for owner in leased} == owners:
                    break
                await asyncio.sleep(0.05)
    finally:
        await client.aclose()


async def _ids_on(url: str, port: int, prefix: str, count: int) -> list[str]:
    """``count`` conversation ids whose keys the cluster node on ``port`` holds."""
    client = ClusterClient.from_url(url.replace("+cluster", ""))
    try:
        await client.initialize()
        ids = []
        for n in range(200):
            node = client.get_node_from_key(f"midstream:{{{prefix}-{n}}}:m")
            if node is not None and node.port == port:
                ids.append(f"{prefix}-{n}")
        return ids[:count]
    finally:
        await client.aclose()


async def _until_health(channel: grpc.aio.Channel, status: int) -> None:
    health = health_pb2_grpc.HealthStub(channel)
    async with asyncio.timeout(60):
        while (await health.Check(health_pb2.HealthCheckRequest(
                service=SHARED_LOG_HEALTH))).status != status:
            await asyncio.sleep(0.1)


async def _code(call: Any) -> grpc.StatusCode:
    """The status code a call (unary, or a stream read to its first message) fails with."""
    with pytest.raises(grpc.aio.AioRpcError) as failed:
        if isinstance(call, grpc.aio.UnaryStreamCall):
            await call.read()
        else:
            await call
    code: grpc.StatusCode = failed.value.code()
    return code


@pytest.mark.slow
async def test_a_cluster_outage_is_buffered_reported_and_unavailable_never_a_fault(
        start_server: ServerFactory, failing_cluster: RedisCluster) -> None:
    """The cluster client's own errors (a node down: CLUSTERDOWN from the others; every node
    down: no node reachable) are outages like a lost single Redis: the ingesting caller never
    notices, health reports the log down, other replicas answer UNAVAILABLE, and once the
    cluster is back every buffered update reaches the log."""
    cluster = failing_cluster
    shared = SharedLogConfig(url=cluster.url, timeout_s=1.0)
    limits = dataclasses.replace(LIMITS, idle_timeout_s=600.0)
    a = await start_server(limits=limits, shared_log=shared)
    b = await start_server(limits=limits, shared_log=shared)
    kept, stopped = cluster.nodes[0], cluster.nodes[1]
    (up,) = await _ids_on(cluster.url, kept.port, "up", 1)
    words = call_words()
    caller = Caller(a.stub)
    await caller.open(up)
    for word in words[:5]:
        await caller.send(words_event(word))
    await _until_logged(b.stub, up, caller.updates[-1].seq)
    # One node stops: once the others mark it failed they answer CLUSTERDOWN for every key,
    # the kept node's too (a ResponseError in redis-py, yet no refusal).
    stopped.stop()
    await asyncio.to_thread(cluster.until, "fail", [kept, cluster.nodes[2]])
    for word in words[5:10]:
        await caller.send(words_event(word))  # the caller keeps getting its updates
    await _until_health(a.channel, health_pb2.HealthCheckResponse.NOT_SERVING)
    assert a.server.metrics.registry.get_sample_value("midstream_shared_log_up") == 0
    assert await _code(b.stub.Follow(pb.FollowRequest(conversation_id=up))) == (
        grpc.StatusCode.UNAVAILABLE)
    assert await _code(b.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=up))) == (
        grpc.StatusCode.UNAVAILABLE)
    assert await _code(b.stub.ListConversations(pb.ListConversationsRequest())) == (
        grpc.StatusCode.UNAVAILABLE)
    stopped.start()  # empty, with its slots: the cluster is whole again
    await asyncio.to_thread(cluster.until, "ok", cluster.nodes)
    await _until_health(a.channel, health_pb2.HealthCheckResponse.SERVING)
    for word in words[10:15]:
        await caller.send(words_event(word))
    # Every node stops: the cluster client finds none (RedisClusterException, no RedisError).
    cluster.stop()
    for word in words[15:20]:
        await caller.send(words_event(word))
    await _until_health(a.channel, health_pb2.HealthCheckResponse.NOT_SERVING)
    assert await _code(b.stub.Follow(pb.FollowRequest(conversation_id=up))) == (
        grpc.StatusCode.UNAVAILABLE)
    # A replica started meanwhile starts degraded, not failing.
    c = await start_server(limits=limits, shared_log=shared)
    await _until_health(c.channel, health_pb2.HealthCheckResponse.NOT_SERVING)
    for node in cluster.nodes:
        node.start()
    await asyncio.to_thread(cluster.until, "ok", cluster.nodes)
    await _until_health(a.channel, health_pb2.HealthCheckResponse.SERVING)
    for word in words[20:25]:
        await caller.send(words_event(word))
    ended = await caller.close()
    # The writer wrote through both outages: the conversation (written afresh from a snapshot
    # after the restart emptied its node) reaches its end in the log, told, never silently cut.
    messages = await asyncio.wait_for(follow_all(c.stub, up, from_seq=1), 60)
    gaps_told(messages, ended.last_seq)
    followed = {w.word_id for m in messages if m.WhichOneof("body") == "snapshot"
                for w in m.snapshot.words}
    followed |= {w.word_id for m in messages if m.WhichOneof("body") == "update"
                 for w in m.update.words}
    assert followed >= {w.word_id for w in words[20:25]}
    assert (a.server.metrics.registry.get_sample_value("midstream_shared_log_degraded_total")
            or 0) >= 2  # both outages were reported (a flap in between may add one)
