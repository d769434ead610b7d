"""A replica lost with live conversations, in-process on one real Redis: once its lease has
lapsed and the grace passed with nobody continuing them, another replica ends them
(``END_REASON_OWNER_LOST``), exactly once, so followers everywhere are told; a conversation
continued within the grace is left alone.

A replica is "lost" here by stopping its writer and its lease renewals (``redis_kit.abandon``),
which is what Redis sees of a killed process; ``test_redis_failover.py`` kills a real one.
The limits are short (a lease of 1 s) so the tests wait seconds, and every wait is generous:
nothing here asserts how fast.
"""

from __future__ import annotations

import asyncio
import dataclasses
from typing import Any

import grpc
import pytest
import redis.asyncio as aioredis
from midstream.server import SharedLogConfig
from midstream.server._journal import ConversationKeys, lease_key, owned_key
from midstream.wire import midstream_pb2 as pb
from redis_kit import LIMITS, RedisProcess, abandon, call_words, gaps_told, redis_server_fixture
from server_kit import (
    Caller,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    start_server_fixture,
    words_event,
)

__all__ = ["bundle_fixture", "models_dir_fixture", "redis_server_fixture",
           "start_server_fixture"]

# Seconds any one wait below may take before the test fails: far beyond lease + grace + a
# few renewal periods, for a loaded machine.
_PATIENCE_S = 60


async def _ingest(caller: Caller, words: list[pb.SpokenWord]) -> None:
    for word in words:
        await caller.send(words_event(word))


async def _until_logged(url: str, conversation_id: str, seq: int) -> None:
    client = aioredis.Redis.from_url(url)
    try:
        async with asyncio.timeout(_PATIENCE_S):
            while int(await client.hget(ConversationKeys.of("midstream", conversation_id).meta,
                                        "useq") or 0) < seq:
                await asyncio.sleep(0.02)
    finally:
        await client.aclose()


async def _ends_in_log(url: str, conversation_id: str) -> list[pb.Ended]:
    client = aioredis.Redis.from_url(url)
    try:
        entries: Any = await client.xrange(
            ConversationKeys.of("midstream", conversation_id).updates)
    finally:
        await client.aclose()
    return [pb.ServerMessage.FromString(fields[b"end"]).ended
            for _, fields in entries if b"end" in fields]


async def _until_lease_forgotten(url: str, owner: str) -> None:
    """Wait until the lost replica's lease is gone: a sweep went through all it owned."""
    client = aioredis.Redis.from_url(url)
    try:
        async with asyncio.timeout(_PATIENCE_S):
            while await client.zscore(lease_key("midstream"), owner) is not None:
                await asyncio.sleep(0.05)
    finally:
        await client.aclose()


async def test_a_lost_replicas_conversation_ends_owner_lost_for_followers_everywhere(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    c = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    await caller.open("left-behind")
    await _ingest(caller, call_words()[:8])
    last = caller.updates[-1].seq
    await _until_logged(redis_server.url, "left-behind", last)
    following = asyncio.ensure_future(follow_all(b.stub, "left-behind", from_seq=1))
    lost = abandon(a.server)
    # B's follower is told the conversation ended, and why, right after the last logged update.
    messages = await asyncio.wait_for(following, _PATIENCE_S)
    assert messages[-1].ended.reason == pb.END_REASON_OWNER_LOST
    assert gaps_told(messages, last) == 0
    assert [m.update for m in messages[:-1]] == caller.updates
    # Every replica lists it as ended; a late follower gets its updates and the same end.
    for replica in (b, c):
        listing = await replica.stub.ListConversations(pb.ListConversationsRequest())
        [summary] = [s for s in listing.conversations if s.conversation_id == "left-behind"]
        assert summary.ended and summary.last_seq == last
    late = await asyncio.wait_for(follow_all(c.stub, "left-behind", from_seq=1), _PATIENCE_S)
    assert late[-1].ended.reason == pb.END_REASON_OWNER_LOST
    # One end in the log, written by one of the two replicas that watched.
    assert [e.reason for e in await _ends_in_log(redis_server.url, "left-behind")] == [
        pb.END_REASON_OWNER_LOST]
    assert sum(r.server.metrics.registry.get_sample_value(
        "midstream_shared_log_orphans_ended_total") or 0 for r in (b, c)) == 1
    # A caller coming back too late is told why it cannot continue.
    again = b.stub.Feed()
    await again.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="left-behind",
                                                              resume=True)))
    with pytest.raises(grpc.aio.AioRpcError) as refused:
        await again.read()
    assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "its replica was lost" in (refused.value.details() or "")
    # The lost replica's lease is forgotten once nothing it owned is left.
    await _until_lease_forgotten(redis_server.url, lost.owner)
    caller.call.cancel()


async def test_replicas_noticing_a_lost_replica_at_once_write_each_end_once(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    watchers = [await start_server(limits=LIMITS, shared_log=shared) for _ in range(3)]
    ids = [f"orphan-{n}" for n in range(4)]
    callers = []
    for number, conversation_id in enumerate(ids):
        caller = Caller(a.stub)
        await caller.open(conversation_id)
        await _ingest(caller, call_words()[number:number + 3])
        await _until_logged(redis_server.url, conversation_id, caller.updates[-1].seq)
        callers.append(caller)
    # The watchers renew and sweep only when told below: all three at once.
    keepers = []
    for watcher in watchers:
        log = watcher.server._shared
        assert log is not None and log._keeper is not None and log._keeper._task is not None
        log._keeper._task.cancel()
        keepers.append(log._keeper)
    lost = abandon(a.server)
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        async with asyncio.timeout(_PATIENCE_S):  # until the lost lease is past lease + grace
            while True:
                now_s, now_us = await client.time()
                score = await client.zscore(lease_key("midstream"), lost.owner)
                assert score is not None
                if now_s * 1000 + now_us // 1000 - score > 2000 + 100:
                    break
                await asyncio.sleep(0.1)
    finally:
        await client.aclose()
    ended = await asyncio.gather(*(keeper.tick() for keeper in keepers))
    assert sum(ended) == len(ids)
    for conversation_id in ids:
        assert [e.reason for e in await _ends_in_log(redis_server.url, conversation_id)] == [
            pb.END_REASON_OWNER_LOST]
    # Sweeping again finds nothing left to end.
    assert await asyncio.gather(*(keeper.tick() for keeper in keepers)) == [0, 0, 0]
    for caller in callers:
        caller.call.cancel()


async def test_a_conversation_continued_within_the_grace_is_not_ended(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    # B owns the conversation once it continued it: a busy machine stalling B's renewals for
    # lease + grace (5 s) would make C take B for lost, so that is kept out of reach.
    shared = SharedLogConfig(url=redis_server.url, lease_s=2.0, orphan_grace_s=3.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    c = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:12]
    old = Caller(a.stub)
    await old.open("carried-on")
    await _ingest(old, words[:6])
    await _until_logged(redis_server.url, "carried-on", old.updates[-1].seq)
    following = asyncio.ensure_future(follow_all(c.stub, "carried-on", from_seq=1))
    lost = abandon(a.server)
    # The caller continues on B before the grace is out.
    new = Caller(b.stub)
    await new.call.write(pb.ClientEvent(open=pb.OpenConversation(
        conversation_id="carried-on", resume=True, epoch=old.epoch)))
    welcome = (await new.call.read()).welcome
    assert welcome.events_logged == 6
    # Past lease + grace the lost replica's owned conversations were swept (its lease is
    # forgotten only then), and this one was left alone: it is B's and live.
    await _until_lease_forgotten(redis_server.url, lost.owner)
    listing = await c.stub.ListConversations(pb.ListConversationsRequest())
    [summary] = [s for s in listing.conversations if s.conversation_id == "carried-on"]
    assert not summary.ended
    assert await _ends_in_log(redis_server.url, "carried-on") == []
    await _ingest(new, words[6:])
    assert (await new.close()).reason == pb.END_REASON_CLOSED
    messages = await asyncio.wait_for(following, _PATIENCE_S)
    assert messages[-1].ended.reason == pb.END_REASON_CLOSED
    assert gaps_told(messages, new.updates[-1].seq) == 0
    assert {w.word_id for m in messages[:-1] for w in m.update.words} == {
        w.word_id for w in words}
    assert [e.reason for e in await _ends_in_log(redis_server.url, "carried-on")] == [
        pb.END_REASON_CLOSED]
    old.call.cancel()


async def test_a_replica_stopping_with_every_end_written_gives_up_its_lease(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    await caller.open("stopping")
    await _ingest(caller, call_words()[:3])
    log = a.server._shared
    assert log is not None
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        assert await client.zscore(lease_key("midstream"), log.owner) is not None
        await a.server.stop(2)
        assert await client.zscore(lease_key("midstream"), log.owner) is None
    finally:
        await client.aclose()


async def test_a_replica_cut_off_past_the_grace_hands_its_followers_the_logs_end_on_return(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """A replica only cut off (not dead) is taken for lost and its conversation is ended in
    the log; when it is back, its own follower is moved to the log and gets that end, rather
    than its stale copy for ever."""
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    await caller.open("cut-off")
    await _ingest(caller, call_words()[:5])
    last = caller.updates[-1].seq
    await _until_logged(redis_server.url, "cut-off", last)
    on_a: list[pb.ServerMessage] = []

    async def collect() -> None:
        async for message in a.stub.Follow(pb.FollowRequest(conversation_id="cut-off",
                                                            from_seq=1)):
            on_a.append(message)

    following = asyncio.ensure_future(collect())
    log = abandon(a.server)
    ended_on_b = await asyncio.wait_for(follow_all(b.stub, "cut-off", from_seq=1), _PATIENCE_S)
    assert ended_on_b[-1].ended.reason == pb.END_REASON_OWNER_LOST
    assert not following.done()  # A's follower still waits on A's own copy
    # A reaches Redis again.
    log._task = asyncio.create_task(log._run())
    assert log._keeper is not None
    log._keeper._task = None
    log._keeper.start()
    await asyncio.wait_for(following, _PATIENCE_S)
    assert on_a[-1].ended.reason == pb.END_REASON_OWNER_LOST
    assert gaps_told(on_a, last) == 0
    caller.call.cancel()


async def test_a_failed_continuation_leaves_the_conversation_to_its_replica_and_the_sweep(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """Continuing a conversation whose logged input lacks an event fails (INVALID_ARGUMENT)
    and changes nothing: the replica writing it goes on writing it (it is not fenced off by
    a continuation that never happened), and once that replica is lost the conversation
    ends OWNER_LOST for a follower on a third replica, as if nobody had tried."""
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    c = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    await caller.open("damaged")
    await _ingest(caller, call_words()[:8])
    await _until_logged(redis_server.url, "damaged", caller.updates[-1].seq)
    following = asyncio.ensure_future(follow_all(c.stub, "damaged", from_seq=1))
    keys = ConversationKeys.of("midstream", "damaged")
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        # Redis loses the last input event (as a failover to a replica that had not got it
        # would): the log holds an update its input no longer gives.
        assert await client.xdel(keys.events, "8-0") == 1
        again = b.stub.Feed()
        await again.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="damaged",
                                                                  resume=True)))
        with pytest.raises(grpc.aio.AioRpcError) as refused:
            await again.read()
        assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert refused.value.details() == (
            "conversation damaged cannot be continued: the log holds updates up to seq 8 but "
            "its logged input gives only 7")
        # Nothing of the attempt reached Redis: A owns it, B's set does not name it.
        writer, tried = a.server._shared, b.server._shared  # their owner tokens
        assert writer is not None and tried is not None
        assert await client.hget(keys.meta, "owner") == writer.owner.encode()
        assert not await client.sismember(owned_key("midstream", tried.owner), "damaged")
    finally:
        await client.aclose()
    # A still writes it: the follower on C gets these too.
    await _ingest(caller, call_words()[8:10])
    last = caller.updates[-1].seq
    await _until_logged(redis_server.url, "damaged", last)
    abandon(a.server)
    messages = await asyncio.wait_for(following, _PATIENCE_S)
    assert messages[-1].ended.reason == pb.END_REASON_OWNER_LOST
    assert gaps_told(messages, last) == 0
    assert [m.update for m in messages[:-1]] == caller.updates
    caller.call.cancel()


async def test_an_id_opened_again_while_its_old_entry_leaves_the_owned_set_stays_in_it(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """The lease keeper takes a conversation out of its replica's owned set after its end
    landed; should the id be opened again on that replica while the removal is on its way,
    the new conversation's own adding may land first. The keeper adds it back, so the new
    conversation is ended like any other should the replica be lost."""
    shared = SharedLogConfig(url=redis_server.url)
    # Ended conversations are not kept, so the id can be opened again here at once.
    a = await start_server(limits=dataclasses.replace(LIMITS, ended_retention_s=0.0),
                           shared_log=shared)
    log = a.server._shared  # its keeper and owner token
    assert log is not None and log._keeper is not None
    first = Caller(a.stub)
    await first.open("reopened")
    await _ingest(first, call_words()[:2])
    await first.close()
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        async with asyncio.timeout(_PATIENCE_S):  # the end landed: due to leave the set
            while await client.hget(ConversationKeys.of("midstream", "reopened").meta,
                                    "ended") != b"1":
                await asyncio.sleep(0.02)
    finally:
        await client.aclose()
    second = Caller(a.stub)
    await second.open("reopened")
    await _ingest(second, call_words()[2:4])
    await _until_logged(redis_server.url, "reopened", second.updates[-1].seq)
    # The interleaving: the renewal that removes the old entry read the id before the new
    # conversation's first write took it off the list, and its removal lands after the add.
    log.disowned["reopened"] = None
    await log._keeper.tick()
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        assert await client.sismember(owned_key("midstream", log.owner), "reopened")
    finally:
        await client.aclose()
    await second.close()


async def test_a_claim_whose_answer_was_lost_is_undone_once_redis_answers(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """Redis went away at the moment B claimed a conversation, so B cannot know whether the
    claim landed (it answered UNAVAILABLE). Its lease keeper gives the conversation back to
    the replica that owned it, and back into that replica's set for the sweep; a claim B made
    again since (another token) is left alone."""
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0, orphan_grace_s=60.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    writer, claimer = a.server._shared, b.server._shared  # their owner tokens and queues
    assert writer is not None and claimer is not None
    caller = Caller(a.stub)
    await caller.open("uncertain")
    await _ingest(caller, call_words()[:3])
    await _until_logged(redis_server.url, "uncertain", caller.updates[-1].seq)
    keys = ConversationKeys.of("midstream", "uncertain")
    client = aioredis.Redis.from_url(redis_server.url)
    try:
        stored: Any = await client.hget(keys.meta, "inc")
        incarnation = stored.decode()
        owned_by_a = owned_key("midstream", writer.owner)
        for token, undone in (("lost-answer", True), ("older-claim", False)):
            # What the claim script writes when it lands (the answer never arrived) ...
            await client.hset(keys.meta, mapping={"owner": claimer.owner, "claim": "lost-answer"})
            await client.srem(owned_by_a, "uncertain")  # ... and a sweep that ran meanwhile
            claimer.unclaim(keys, "uncertain", incarnation, writer.owner, token)
            async with asyncio.timeout(_PATIENCE_S):  # B's keeper acts at its next renewal
                while "uncertain" in claimer.unclaimed:
                    await asyncio.sleep(0.05)
            owner = await client.hget(keys.meta, "owner")
            assert owner == (writer.owner if undone else claimer.owner).encode(), token
            assert await client.sismember(owned_by_a, "uncertain")
    finally:
        await client.aclose()
    caller.call.cancel()
