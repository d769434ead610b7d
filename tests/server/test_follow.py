"""Follow: identical sequences for every subscriber, lossless resume, gaps, snapshots."""

from __future__ import annotations

import asyncio

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc
from midstream.server import ServerLimits
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    running_fixture,
    spoken,
    start_server_fixture,
    until_followers,
    words_event,
)


def _updates(messages: list[pb.ServerMessage]) -> list[pb.Update]:
    return [m.update for m in messages if m.WhichOneof("body") == "update"]


async def _stream_words(caller: Caller, count: int, offset: int = 0) -> None:
    for i in range(offset, offset + count):
        speaker = "AB"[i % 2]
        await caller.send(words_event(spoken(f"w{i}", ["so", "uh", "we", "we"][i % 4],
                                             speaker=speaker, start=float(i))))


async def test_two_followers_and_the_caller_see_identical_sequences(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    followers = [asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
                 for _ in range(2)]
    await until_followers(running, conversation, 2)  # both attached before the first word
    await _stream_words(caller, 30)
    ended = await caller.close()
    seen = [await asyncio.wait_for(f, 10) for f in followers]
    for messages in seen:
        assert _updates(messages) == caller.updates
        assert messages[-1].ended.reason == pb.END_REASON_CLOSED
        assert messages[-1].ended.last_seq == ended.last_seq == len(caller.updates)
    assert [u.seq for u in caller.updates] == list(range(1, len(caller.updates) + 1))


async def test_resume_from_last_seq_misses_and_repeats_nothing(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 5)
    first = running.stub.Follow(pb.FollowRequest(conversation_id=conversation, from_seq=1))
    got = [(await first.read()).update for _ in range(3)]
    first.cancel()  # the follower disconnects mid-stream
    await _stream_words(caller, 5, offset=5)
    resumed = running.stub.Follow(
        pb.FollowRequest(conversation_id=conversation, from_seq=got[-1].seq + 1,
                         epoch=got[-1].epoch))
    await _stream_words(caller, 5, offset=10)
    await caller.close()
    got += _updates([m async for m in resumed])
    assert got == caller.updates


async def test_a_position_of_another_epoch_gives_gap_and_snapshot(running: Running) -> None:
    # A sequence number means something only within its epoch: with another epoch (or with
    # none, beyond seq 1) the follower is told and given the state, never replayed updates.
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 4)
    assert caller.epoch and all(u.epoch == caller.epoch for u in caller.updates)
    for epoch in (caller.epoch + 1, 0):
        follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation,
                                                        from_seq=3, epoch=epoch))
        gap = (await follower.read()).gap
        assert (gap.first_missing, gap.reason) == (3, pb.GAP_REASON_EPOCH_MISMATCH)
        snapshot = (await follower.read()).snapshot
        assert (snapshot.seq, snapshot.epoch) == (4, caller.epoch)
        follower.cancel()
    # Even a position beyond this epoch's next sequence number: told, not OUT_OF_RANGE.
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation,
                                                    from_seq=99, epoch=caller.epoch + 1))
    assert (await follower.read()).gap.reason == pb.GAP_REASON_EPOCH_MISMATCH
    follower.cancel()
    # Seq 1 is the start of any epoch: nothing seen, nothing to splice onto.
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation, from_seq=1))
    assert (await follower.read()).update == caller.updates[0]
    follower.cancel()
    listed = await running.stub.ListConversations(pb.ListConversationsRequest())
    assert [c.epoch for c in listed.conversations] == [caller.epoch]
    await caller.close()


async def test_absent_position_gives_snapshot_then_live(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 6)
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation))
    snapshot = (await follower.read()).snapshot
    assert snapshot.seq == 6
    assert sorted(w.word_id for w in snapshot.words) == [f"w{i}" for i in range(6)]
    assert not snapshot.conversation_final
    await _stream_words(caller, 1, offset=6)
    assert (await follower.read()).update == caller.updates[-1]
    follower.cancel()
    await caller.close()


async def test_evicted_position_gives_gap_and_snapshot(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(replay_updates=10, idle_timeout_s=5))
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 15)
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation, from_seq=2,
                                                    epoch=caller.epoch))
    gap = (await follower.read()).gap
    assert (gap.first_missing, gap.oldest_kept, gap.reason) == (2, 6, pb.GAP_REASON_EVICTED)
    snapshot = (await follower.read()).snapshot
    assert snapshot.seq == 15
    await _stream_words(caller, 1, offset=15)
    assert (await follower.read()).update.seq == 16  # then live, without a hole
    follower.cancel()
    await caller.close()


async def test_bad_positions_and_unknown_conversations_are_refused(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 3)
    cases = [
        (pb.FollowRequest(conversation_id=conversation, from_seq=5, epoch=caller.epoch),
         grpc.StatusCode.OUT_OF_RANGE, "from_seq"),
        (pb.FollowRequest(conversation_id=conversation, from_seq=0),
         grpc.StatusCode.INVALID_ARGUMENT, "from_seq"),
        (pb.FollowRequest(conversation_id="nope"), grpc.StatusCode.NOT_FOUND, "nope"),
        (pb.FollowRequest(conversation_id="x" * 5000), grpc.StatusCode.INVALID_ARGUMENT,
         "field 'conversation_id' is 5000 characters long; limit max_id_chars is 128"),
        (pb.FollowRequest(conversation_id=""), grpc.StatusCode.INVALID_ARGUMENT,
         "field 'conversation_id' is empty"),
    ]
    for request, code, named in cases:
        with pytest.raises(grpc.aio.AioRpcError) as info:
            _ = [m async for m in running.stub.Follow(request)]
        assert info.value.code() == code
        assert named in (info.value.details() or "")
        assert "xxxxxxxx" not in (info.value.details() or "")  # the id is never echoed
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id="x" * 5000))
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert info.value.details() == ("field 'conversation_id' is 5000 characters long; "
                                    "limit max_id_chars is 128")
    # The next sequence number itself is a valid place to start: live updates only.
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation, from_seq=4,
                                                    epoch=caller.epoch))
    await _stream_words(caller, 1, offset=3)
    assert (await follower.read()).update.seq == 4
    follower.cancel()
    await caller.close()


async def test_ended_conversation_stays_for_late_followers(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 4)
    await caller.close()
    late = await follow_all(running.stub, conversation, from_seq=1)
    assert _updates(late) == caller.updates
    assert late[-1].ended.reason == pb.END_REASON_CLOSED
    listed = await running.stub.ListConversations(pb.ListConversationsRequest())
    (summary,) = [c for c in listed.conversations if c.conversation_id == conversation]
    assert summary.ended and summary.words == 4 and summary.last_seq == len(caller.updates)
    assert list(summary.speakers) == ["A", "B"]


async def test_revisions_list_every_published_state(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 12)
    await caller.close()
    reply = await running.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=conversation))
    published: list[tuple[int, float, str, object]] = [
        (u.seq, u.server_time, "word", w) for u in caller.updates for w in u.words]
    published += [(u.seq, u.server_time, "utterance", x)
                  for u in caller.updates for x in u.utterances]
    kept = [(r.seq, r.server_time, r.WhichOneof("state"), getattr(r, r.WhichOneof("state")))
            for r in reply.revisions]
    assert sorted(kept, key=lambda k: (k[0], k[2])) == sorted(published,
                                                              key=lambda k: (k[0], k[2]))
    assert not reply.truncated
    by_word: dict[str, list[pb.WordState]] = {}
    for revision in reply.revisions:
        if revision.WhichOneof("state") == "word":
            by_word.setdefault(revision.word.word_id, []).append(revision.word)
    for states in by_word.values():
        assert states[-1].final
        assert [s.revision for s in states] == sorted(s.revision for s in states)


async def test_revision_history_is_bounded_and_says_so(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(history_revisions=8))
    caller = Caller(running.stub)
    conversation = await caller.open()
    await _stream_words(caller, 10)
    await caller.close()
    reply = await running.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id=conversation))
    assert len(reply.revisions) == 8 and reply.truncated
    assert reply.revisions[-1].seq == len(caller.updates)


async def test_health_serving_and_reflection_lists_the_service(running: Running) -> None:
    health = health_pb2_grpc.HealthStub(running.channel)
    for service in ("", "midstream.v1.Midstream"):
        reply = await health.Check(health_pb2.HealthCheckRequest(service=service))
        assert reply.status == health_pb2.HealthCheckResponse.SERVING
    reflect = reflection_pb2_grpc.ServerReflectionStub(running.channel)
    request = reflection_pb2.ServerReflectionRequest(list_services="")
    replies = [r async for r in reflect.ServerReflectionInfo(iter([request]))]
    names = {s.name for s in replies[0].list_services_response.service}
    assert {"midstream.v1.Midstream", "grpc.health.v1.Health"} <= names
