"""Replicas sharing one Redis log, in-process: following, listing and revisions on a replica
that never saw the conversation, and what retention and a lost Redis do to a follower.

The processes-and-SIGKILL cases are in ``test_redis_failover.py``.
"""

from __future__ import annotations

import asyncio

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from midstream import Word
from midstream.client import AddWord, Client
from midstream.server import SharedLogConfig
from midstream.server._journal import SHARED_LOG_HEALTH
from midstream.wire import midstream_pb2 as pb
from redis_kit import LIMITS, RedisProcess, call_words, gaps_told, redis_server_fixture
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


async def _ingest(caller: Caller, words: list[pb.SpokenWord]) -> None:
    for word in words:
        await caller.call.write(words_event(word))
    # Every word of the invented call changes something, so each gets exactly one update.
    for _ in words:
        message = await caller.call.read()
        assert message.WhichOneof("body") == "update", message
        caller.updates.append(message.update)


async def _until_logged(stub: object, conversation_id: str, last_seq: int) -> None:
    """Wait until a replica's listing shows the conversation logged up to ``last_seq``."""
    async with asyncio.timeout(10):
        while True:
            reply = await stub.ListConversations(pb.ListConversationsRequest())  # type: ignore[attr-defined]
            if any(c.conversation_id == conversation_id and c.last_seq >= last_seq
                   for c in reply.conversations):
                return
            await asyncio.sleep(0.02)


async def _until_ended(stub: object, conversation_id: str) -> None:
    """Wait until a replica's listing shows the conversation ended (its end was written)."""
    async with asyncio.timeout(10):
        while not any(c.conversation_id == conversation_id and c.ended for c in (
                await stub.ListConversations(  # type: ignore[attr-defined]
                    pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)


async def test_a_conversation_ingested_on_one_replica_is_followed_from_seq_1_on_another(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:30]
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _until_logged(b.stub, conversation_id, 0)
    # A follower on B attached before the first word sees the conversation live.
    live = asyncio.ensure_future(follow_all(b.stub, conversation_id, from_seq=1))
    await _ingest(caller, words)
    ended = await caller.close()
    assert ended.reason == pb.END_REASON_CLOSED
    followed = await asyncio.wait_for(live, 20)
    later = await follow_all(b.stub, conversation_id, from_seq=1)
    for messages in (followed, later):
        updates = [m.update for m in messages if m.WhichOneof("body") == "update"]
        # Identical updates, server times included: B relays what A published.
        assert [u.SerializeToString() for u in updates] == [
            u.SerializeToString() for u in caller.updates]
        assert messages[-1].ended.reason == pb.END_REASON_CLOSED
        assert messages[-1].ended.last_seq == caller.updates[-1].seq
    # The listing and the revisions on B agree with A's own.
    listing = await b.stub.ListConversations(pb.ListConversationsRequest())
    [summary] = [c for c in listing.conversations if c.conversation_id == conversation_id]
    assert summary.ended and summary.words == len(words)
    assert summary.last_seq == caller.updates[-1].seq
    on_a = await a.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=conversation_id))
    on_b = await b.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=conversation_id))
    assert list(on_b.revisions) == list(on_a.revisions)
    assert on_b.truncated == on_a.truncated


async def test_a_snapshot_on_another_replica_is_the_ingesting_replicas_state(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, call_words()[:20])
    await _until_logged(b.stub, conversation_id, caller.updates[-1].seq)
    stream_a = a.stub.Follow(pb.FollowRequest(conversation_id=conversation_id))
    stream_b = b.stub.Follow(pb.FollowRequest(conversation_id=conversation_id))
    snap_a, snap_b = (await stream_a.read()).snapshot, (await stream_b.read()).snapshot
    stream_a.cancel()
    stream_b.cancel()
    assert snap_b.seq == snap_a.seq == caller.updates[-1].seq
    assert sorted(w.SerializeToString() for w in snap_b.words) == sorted(
        w.SerializeToString() for w in snap_a.words)
    assert sorted(u.SerializeToString() for u in snap_b.utterances) == sorted(
        u.SerializeToString() for u in snap_a.utterances)
    await caller.close()


async def test_a_resume_point_retention_dropped_gets_a_gap_notice_and_snapshot(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url, max_entries=8)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, call_words()[:40])
    await caller.close()
    await _until_ended(b.stub, conversation_id)  # the log holds it all, trimmed
    messages = await follow_all(b.stub, conversation_id, from_seq=1)
    kinds = [m.WhichOneof("body") for m in messages]
    assert kinds[:2] == ["gap", "snapshot"]
    gap, snapshot = messages[0].gap, messages[1].snapshot
    assert gap.reason == pb.GAP_REASON_EVICTED and gap.first_missing == 1
    assert gap.oldest_kept > 1
    # The stream keeps max_entries and at most a quarter more between trims.
    assert caller.updates[-1].seq - gap.oldest_kept + 1 <= 8 + 8 // 4 + 1
    # After the snapshot: every later update once, in order, then the end.
    after = [m.update.seq for m in messages if m.WhichOneof("body") == "update"]
    assert after == list(range(snapshot.seq + 1, caller.updates[-1].seq + 1))
    assert kinds[-1] == "ended"
    # The snapshot plus what follows is the final state the caller saw.
    final: dict[str, bytes] = {}
    for update in caller.updates:
        for word in update.words:
            final[word.word_id] = word.SerializeToString()
    folded = {w.word_id: w.SerializeToString() for w in snapshot.words}
    for message in messages[2:]:
        if message.WhichOneof("body") == "update":
            for word in message.update.words:
                folded[word.word_id] = word.SerializeToString()
    assert folded == final
    revisions = await b.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=conversation_id))
    assert revisions.truncated


async def test_unknown_conversations_and_bad_positions_are_refused_as_on_one_server(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    with pytest.raises(grpc.aio.AioRpcError) as missing:
        await follow_all(b.stub, "nobody-here")
    assert missing.value.code() == grpc.StatusCode.NOT_FOUND
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, call_words()[:3])
    await _until_logged(b.stub, conversation_id, 3)
    with pytest.raises(grpc.aio.AioRpcError) as ahead:
        await follow_all(b.stub, conversation_id, from_seq=99)
    assert ahead.value.code() == grpc.StatusCode.OUT_OF_RANGE
    # A caller-chosen id live on A cannot be opened anew on B.
    second = Caller(b.stub)
    await second.call.write(pb.ClientEvent(open=pb.OpenConversation(
        conversation_id=conversation_id)))
    with pytest.raises(grpc.aio.AioRpcError) as taken:
        await second.call.read()
    assert taken.value.code() == grpc.StatusCode.ALREADY_EXISTS
    await caller.close()


@pytest.mark.parametrize("buffer_entries", [100_000, 4])
async def test_a_redis_restart_mid_conversation_never_costs_a_silent_gap(
        start_server: ServerFactory, redis_server: RedisProcess, buffer_entries: int,
        caplog: pytest.LogCaptureFixture) -> None:
    """Redis dies and comes back empty (no persistence) while A ingests: the caller never
    notices; a follower on B gets every update once when A's buffer held the outage, else
    an explicit gap notice and snapshot where the dropped entries were."""
    shared = SharedLogConfig(url=redis_server.url, timeout_s=0.5,
                             buffer_entries=buffer_entries)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:40]
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, words[:15])
    await _until_logged(b.stub, conversation_id, caller.updates[-1].seq)
    live = asyncio.ensure_future(follow_all(b.stub, conversation_id, from_seq=1))
    await asyncio.sleep(0.3)
    redis_server.stop()
    # The caller keeps getting its updates while Redis is down.
    await _ingest(caller, words[15:25])
    # Health says so under the shared log's own name; the service itself stays SERVING.
    health = health_pb2_grpc.HealthStub(a.channel)
    async with asyncio.timeout(10):
        while (await health.Check(health_pb2.HealthCheckRequest(
                service=SHARED_LOG_HEALTH))).status != health_pb2.HealthCheckResponse.NOT_SERVING:
            await asyncio.sleep(0.05)
    overall = await health.Check(health_pb2.HealthCheckRequest(service=""))
    assert overall.status == health_pb2.HealthCheckResponse.SERVING
    redis_server.start()  # empty: persistence is off
    await _ingest(caller, words[25:])
    await caller.close()
    messages = await asyncio.wait_for(live, 30)
    kinds = [m.WhichOneof("body") for m in messages]
    last = caller.updates[-1].seq
    assert kinds[-1] == "ended"
    gaps = gaps_told(messages, last)
    if buffer_entries > 1000:
        # The outage fitted in A's buffer: every update, once, in order.
        assert gaps == 0
        assert [m.update.seq for m in messages if m.WhichOneof("body") == "update"] == list(
            range(1, last + 1))
    else:
        assert gaps >= 1
    assert (await health.Check(health_pb2.HealthCheckRequest(
        service=SHARED_LOG_HEALTH))).status == health_pb2.HealthCheckResponse.SERVING
    metrics = a.server.metrics.registry
    assert metrics.get_sample_value("midstream_shared_log_degraded_total") == 1
    assert metrics.get_sample_value("midstream_shared_log_up") == 1
    dropped = metrics.get_sample_value("midstream_shared_log_dropped_total")
    assert (dropped == 0) == (buffer_entries > 1000)
    # The outage is logged once when it begins and once when it ends, not per word or retry.
    said = [r.getMessage() for r in caplog.records if r.name == "midstream.server._journal"]
    # Only A had anything to write; B's writer never tried.
    assert sum("unreachable (" in m for m in said) == 1
    assert sum("reachable again" in m for m in said) == 1
    # Drops are told once per episode (a buffer of 4 overflows in each burst of words that
    # arrives before the writer runs), not once per dropped entry.
    told = sum("buffer full" in m for m in said)
    if buffer_entries > 1000:
        assert told == 0
    else:
        assert 1 <= told <= (dropped or 0) / 4, (told, dropped)


async def test_an_id_reused_after_its_conversation_ended_is_never_spliced_on_another_replica(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    c = await start_server(limits=LIMITS, shared_log=shared)
    first = Caller(a.stub)
    await first.open("reused")
    await _ingest(first, call_words()[:6])
    await first.close()
    old_epoch = first.updates[0].epoch
    await _until_logged(c.stub, "reused", first.updates[-1].seq)
    # The same id, a new conversation, ingested by B.
    second = Caller(b.stub)
    await second.call.write(pb.ClientEvent(open=pb.OpenConversation(conversation_id="reused")))
    welcome = (await second.call.read()).welcome
    assert welcome.epoch != old_epoch
    await _ingest(second, call_words()[10:20])
    async with asyncio.timeout(10):
        while True:
            listing = await c.stub.ListConversations(pb.ListConversationsRequest())
            if any(s.conversation_id == "reused" and s.epoch == welcome.epoch
                   and s.last_seq == second.updates[-1].seq for s in listing.conversations):
                break
            await asyncio.sleep(0.02)
    # A follower of the first conversation resuming on C is told, not carried on.
    stream = c.stub.Follow(pb.FollowRequest(conversation_id="reused", from_seq=4,
                                            epoch=old_epoch))
    gap, snapshot = (await stream.read()).gap, (await stream.read()).snapshot
    stream.cancel()
    assert gap.reason == pb.GAP_REASON_EPOCH_MISMATCH and gap.first_missing == 4
    assert snapshot.epoch == welcome.epoch and snapshot.seq == second.updates[-1].seq
    assert {w.word_id for w in snapshot.words} == {w.word_id for w in call_words()[10:20]}
    # Without an epoch, a position beyond 1 is not taken on trust either.
    stream = c.stub.Follow(pb.FollowRequest(conversation_id="reused", from_seq=4))
    assert (await stream.read()).gap.reason == pb.GAP_REASON_EPOCH_MISMATCH
    stream.cancel()
    # A still keeps the first conversation (ended) in memory, yet serves the one now under
    # the id, and lists both.
    stream = a.stub.Follow(pb.FollowRequest(conversation_id="reused", from_seq=1,
                                            epoch=welcome.epoch))
    update = (await stream.read()).update
    stream.cancel()
    assert update.seq == 1 and update.epoch == welcome.epoch
    listing = await a.stub.ListConversations(pb.ListConversationsRequest())
    assert sorted((s.epoch, s.ended) for s in listing.conversations
                  if s.conversation_id == "reused") == sorted(
        [(old_epoch, True), (welcome.epoch, False)])
    await second.close()


async def _refusal(stub: object, request: pb.OpenConversation) -> grpc.StatusCode:
    call = stub.Feed()  # type: ignore[attr-defined]
    await call.write(pb.ClientEvent(open=request))
    with pytest.raises(grpc.aio.AioRpcError) as refused:
        await call.read()
    code: grpc.StatusCode = refused.value.code()
    return code


async def test_continuing_is_refused_where_it_cannot_be_done_faithfully(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    alone = await start_server(limits=LIMITS)
    assert await _refusal(b.stub, pb.OpenConversation(
        conversation_id="never-opened", resume=True)) == grpc.StatusCode.NOT_FOUND
    assert await _refusal(alone.stub, pb.OpenConversation(
        conversation_id="x", resume=True)) == grpc.StatusCode.INVALID_ARGUMENT
    caller = Caller(a.stub)
    await caller.open("done")
    await _ingest(caller, call_words()[:3])
    await caller.close()
    await _until_logged(b.stub, "done", caller.updates[-1].seq)
    async with asyncio.timeout(10):  # the end reaches the log with the final update
        while not any(s.conversation_id == "done" and s.ended for s in (
                await b.stub.ListConversations(pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)
    assert await _refusal(b.stub, pb.OpenConversation(
        conversation_id="done", resume=True)) == grpc.StatusCode.INVALID_ARGUMENT
    live = Caller(a.stub)
    await live.open("live-here")
    await _ingest(live, call_words()[:2])
    # Live on A itself: nothing to continue there.
    assert await _refusal(a.stub, pb.OpenConversation(
        conversation_id="live-here", resume=True)) == grpc.StatusCode.ALREADY_EXISTS
    await live.close()


async def test_a_replica_with_other_decoder_settings_refuses_to_continue(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    other = await start_server(limits=LIMITS, shared_log=shared, max_open_words=3)
    caller = Caller(a.stub)
    await caller.open("lagged")
    await _ingest(caller, call_words()[:4])
    await _until_logged(other.stub, "lagged", caller.updates[-1].seq)
    assert await _refusal(other.stub, pb.OpenConversation(
        conversation_id="lagged", resume=True)) == grpc.StatusCode.FAILED_PRECONDITION
    await caller.close()


async def test_the_client_library_continues_a_conversation_and_the_old_replica_is_fenced_off(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """A replica cut off rather than dead: once the conversation is continued elsewhere,
    nothing the old replica publishes reaches the log, and followers see one sequence."""
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:16]
    old = Caller(a.stub)
    await old.open("moved")
    await _ingest(old, words[:10])
    await _until_logged(b.stub, "moved", old.updates[-1].seq)
    async with (Client(f"127.0.0.1:{b.server.port}") as client,
                client.feed("moved", resume=True, epoch=old.updates[0].epoch) as stream):
        assert stream.welcome.events_logged == 10
        assert stream.welcome.next_seq == old.updates[-1].seq + 1
        assert stream.welcome.epoch == old.updates[0].epoch
        # The old replica goes on a little (its caller has not noticed): it is fenced off.
        await _ingest(old, words[10:12])
        old.call.cancel()
        for word in words[10:]:
            await stream.send_words([AddWord(word_id=word.word_id, word=Word(
                text=word.text, speaker=word.speaker, start=word.start_s, end=word.end_s))])
    messages = await follow_all(b.stub, "moved", from_seq=1)
    last = messages[-1].ended.last_seq
    assert gaps_told(messages, last) == 0
    assert messages[-1].ended.reason == pb.END_REASON_CLOSED
    followed = [m.update for m in messages if m.WhichOneof("body") == "update"]
    # The first ten updates are A's, the rest B's: one sequence, every word once.
    assert [u.SerializeToString() for u in followed[:10]] == [
        u.SerializeToString() for u in old.updates[:10]]
    assert {w.word_id for u in followed for w in u.words} == {w.word_id for w in words}


async def test_a_replica_stopping_writes_its_conversations_ends_for_followers_elsewhere(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, call_words()[:12])
    await _until_logged(b.stub, conversation_id, caller.updates[-1].seq)
    live = asyncio.ensure_future(follow_all(b.stub, conversation_id, from_seq=1))
    await asyncio.sleep(0.2)
    await a.server.stop(2)  # SIGTERM's path: every live conversation finished and written
    messages = await asyncio.wait_for(live, 20)
    assert messages[-1].ended.reason == pb.END_REASON_SERVER_SHUTDOWN
    assert gaps_told(messages, messages[-1].ended.last_seq) == 0
    final = messages[-2].update
    assert final.conversation_final and all(w.final for w in final.words)


async def test_updates_older_than_max_age_are_trimmed_at_the_next_write(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url, max_age_s=3.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:14]
    caller = Caller(a.stub)
    conversation_id = await caller.open()
    await _ingest(caller, words[:6])
    await asyncio.sleep(1.6)
    await _ingest(caller, words[6:12])  # keeps the keys alive (they expire 3 s after a write)
    await asyncio.sleep(1.6)  # the first words are now older than max_age_s
    await _ingest(caller, words[12:])
    await _until_logged(b.stub, conversation_id, caller.updates[-1].seq)
    stream = b.stub.Follow(pb.FollowRequest(conversation_id=conversation_id, from_seq=1))
    first = await stream.read()
    stream.cancel()
    assert first.gap.reason == pb.GAP_REASON_EVICTED and first.gap.first_missing == 1
    assert 1 < first.gap.oldest_kept <= 7  # trimmed by age, never past the newer words
    await caller.close()


async def _collect(stub: object, conversation_id: str, into: list[pb.ServerMessage],
                   from_seq: int = 1, epoch: int = 0) -> None:
    request = pb.FollowRequest(conversation_id=conversation_id, from_seq=from_seq, epoch=epoch)
    async for message in stub.Follow(request):  # type: ignore[attr-defined]
        into.append(message)


async def test_followers_of_a_fenced_off_replica_carry_on_from_the_log_seamlessly(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """The conversation is continued on B while A's caller has gone quiet: A learns it at its
    next lease renewal (no write of its own is refused) and its follower, sent only what the
    log holds, goes on from the log with B's updates and B's end, with no gap."""
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:12]
    old = Caller(a.stub)
    await old.open("handed-over")
    await _ingest(old, words[:6])
    await _until_logged(b.stub, "handed-over", old.updates[-1].seq)
    on_a: list[pb.ServerMessage] = []
    following = asyncio.ensure_future(_collect(a.stub, "handed-over", on_a))
    # A second follower asks for live updates only (it holds the first six from elsewhere).
    live_on_a: list[pb.ServerMessage] = []
    following_live = asyncio.ensure_future(
        _collect(a.stub, "handed-over", live_on_a, old.updates[-1].seq + 1, old.epoch))
    new = Caller(b.stub)
    await new.call.write(pb.ClientEvent(open=pb.OpenConversation(
        conversation_id="handed-over", resume=True, epoch=old.epoch)))
    assert (await new.call.read()).welcome.events_logged == 6
    await _ingest(new, words[6:])
    await new.close()
    await asyncio.wait_for(following, 60)
    assert on_a[-1].ended.reason == pb.END_REASON_CLOSED
    assert gaps_told(on_a, new.updates[-1].seq) == 0
    assert [m.update.seq for m in on_a[:-1]] == list(range(1, new.updates[-1].seq + 1))
    assert [m.update.SerializeToString() for m in on_a[6:-1]] == [
        u.SerializeToString() for u in new.updates]
    await asyncio.wait_for(following_live, 60)
    assert live_on_a == on_a[6:]  # from where it asked: nothing again, nothing missed
    # A lists and serves it from the log now, not from its stale copy.
    listing = await a.stub.ListConversations(pb.ListConversationsRequest())
    [summary] = [s for s in listing.conversations if s.conversation_id == "handed-over"]
    assert summary.ended and summary.last_seq == new.updates[-1].seq
    old.call.cancel()


async def test_a_follower_sent_stale_updates_by_a_fenced_off_replica_is_told_and_resynced(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """A's caller goes on after the conversation was continued on B, and A's follower is sent
    A's own update before A learns (its write is refused): the follower gets ``gap``
    (``OWNER_CHANGED``) from that update on, a snapshot of the log, then B's updates."""
    shared = SharedLogConfig(url=redis_server.url, lease_s=1.0)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:12]
    old = Caller(a.stub)
    await old.open("forked")
    await _ingest(old, words[:6])
    await _until_logged(b.stub, "forked", old.updates[-1].seq)
    log = a.server._shared
    assert log is not None and log._task is not None and log._keeper is not None
    assert log._keeper._task is not None
    # A learns only from a refused write, and writes only when let (below).
    log._keeper._task.cancel()
    log._task.cancel()
    on_a: list[pb.ServerMessage] = []
    following = asyncio.ensure_future(_collect(a.stub, "forked", on_a))
    new = Caller(b.stub)
    await new.call.write(pb.ClientEvent(open=pb.OpenConversation(
        conversation_id="forked", resume=True, epoch=old.epoch)))
    assert (await new.call.read()).welcome.events_logged == 6
    stale = await old.send(words_event(call_words()[20]))  # a word B never gets
    async with asyncio.timeout(30):
        while not any(m.update.seq == stale.seq for m in on_a):
            await asyncio.sleep(0.01)
    log._task = asyncio.create_task(log._run())  # its write is refused: it learns
    await _ingest(new, words[6:])
    await new.close()
    await asyncio.wait_for(following, 60)
    kinds = [m.WhichOneof("body") for m in on_a]
    at = kinds.index("gap")
    assert kinds[:at] == ["update"] * 7 and kinds[at + 1] == "snapshot"
    gap, snapshot = on_a[at].gap, on_a[at + 1].snapshot
    assert gap.reason == pb.GAP_REASON_OWNER_CHANGED and gap.first_missing == stale.seq
    assert snapshot.epoch == old.epoch
    after = [m.update.seq for m in on_a[at + 2:-1]]
    assert after == list(range(snapshot.seq + 1, new.updates[-1].seq + 1))
    assert on_a[-1].ended.reason == pb.END_REASON_CLOSED
    # Snapshot and what follows give the final state B holds; the stale word is not in it.
    [snapshot_b] = [m.snapshot for m in await follow_all(b.stub, "forked")
                    if m.WhichOneof("body") == "snapshot"]
    folded = {w.word_id: w.SerializeToString() for w in snapshot.words}
    for message in on_a[at + 2:-1]:
        folded.update((w.word_id, w.SerializeToString()) for w in message.update.words)
    assert folded == {w.word_id: w.SerializeToString() for w in snapshot_b.words}
    assert set(folded) == {w.word_id for w in words}
    old.call.cancel()
