"""Every limit and every malformed event gets a specific status code and names what was wrong."""

from __future__ import annotations

import asyncio
import math

import grpc
import pytest
from midstream.server import ServerLimits
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    open_event,
    running_fixture,
    spoken,
    start_server_fixture,
    until_followers,
    words_event,
)

INVALID = grpc.StatusCode.INVALID_ARGUMENT


def _word(**fields: object) -> pb.ClientEvent:
    base: dict[str, object] = {"word_id": "w9", "speaker": "A", "text": "hello"}
    base.update(fields)
    return words_event(pb.SpokenWord(**base))  # type: ignore[arg-type]


_W1 = words_event(spoken("w1", "so", start=5.0))
_THREE = words_event(spoken("w1", "a", start=0.0), spoken("w2", "b", start=1.0),
                     spoken("w3", "c", start=2.0), spoken("w4", "d", start=3.0))

MALFORMED: list[tuple[str, list[pb.ClientEvent], grpc.StatusCode, str]] = [
    ("empty text", [_word(text="")], INVALID, "'text'"),
    ("whitespace only", [_word(text=" \t ")], INVALID, "whitespace or control"),
    ("control characters only", [_word(text="\x00\x07")], INVALID, "whitespace or control"),
    ("no speech content", [_word(text="...")], INVALID, "no speech content"),
    ("text too long", [_word(text="a" * 101)], INVALID, "max_word_chars is 100"),
    ("empty word id", [_word(word_id="")], INVALID, "'word_id'"),
    ("word id too long", [_word(word_id="x" * 129)], INVALID, "max_id_chars is 128"),
    ("empty speaker", [_word(speaker=" ")], INVALID, "speaker"),
    ("end before start", [_word(start_s=2.0, end_s=1.0)], INVALID, "'end_s'"),
    ("negative time", [_word(start_s=-1.0)], INVALID, "'start_s'"),
    ("infinite time", [_word(end_s=math.inf)], INVALID, "'end_s'"),
    ("NaN confidence", [_word(confidence=math.nan)], INVALID, "'confidence'"),
    ("confidence over 1", [_word(confidence=1.5)], INVALID, "'confidence'"),
    ("negative confidence", [_word(confidence=-0.1)], INVALID, "'confidence'"),
    ("time going backwards", [_W1, _word(start_s=1.0)], INVALID, "goes back"),
    ("duplicate word id", [_W1, words_event(spoken("w1", "again", start=6.0))], INVALID,
     "already used"),
    ("empty batch", [words_event()], INVALID, "'words'"),
    ("batch too large", [words_event(*[spoken(f"w{i}", "a") for i in range(513)])], INVALID,
     "max_words_per_message is 512"),
    ("replace unknown word",
     [pb.ClientEvent(replace=pb.ReplaceWord(word=spoken("zz", "hi")))], INVALID, "zz"),
    ("withdraw unknown word", [pb.ClientEvent(withdraw=pb.WithdrawWord(word_id="zz"))],
     INVALID, "zz"),
    ("correct a final word", [_THREE, pb.ClientEvent(hint=pb.SpeakerHint(
        speaker="A", kind=pb.HINT_KIND_TURN_END)),
        pb.ClientEvent(withdraw=pb.WithdrawWord(word_id="w1"))], INVALID, "already final"),
    ("unspecified hint kind", [pb.ClientEvent(hint=pb.SpeakerHint(speaker="A"))], INVALID,
     "hint.kind"),
    ("empty event", [pb.ClientEvent()], INVALID, "empty"),
    ("open twice", [open_event()], grpc.StatusCode.INVALID_ARGUMENT, "'open'"),
    ("event after close", [CLOSE, _W1], grpc.StatusCode.INVALID_ARGUMENT, "after 'close'"),
    ("too many speakers",
     [words_event(*[spoken(f"w{i}", "a", speaker=f"s{i}") for i in range(17)])],
     grpc.StatusCode.RESOURCE_EXHAUSTED, "max_speakers_per_conversation is 16"),
]


@pytest.mark.parametrize(("events", "code", "named"), [m[1:] for m in MALFORMED],
                         ids=[m[0] for m in MALFORMED])
async def test_malformed_event_gets_specific_status(
    running: Running, events: list[pb.ClientEvent], code: grpc.StatusCode, named: str,
) -> None:
    with pytest.raises(grpc.aio.AioRpcError) as info:
        _ = [m async for m in running.stub.Feed(iter([open_event(), *events]))]
    assert info.value.code() == code
    assert named in (info.value.details() or "")


async def test_first_event_must_be_open(running: Running) -> None:
    with pytest.raises(grpc.aio.AioRpcError) as info:
        _ = [m async for m in running.stub.Feed(iter([_W1]))]
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "first event must be 'open'" in (info.value.details() or "")


async def test_refused_event_finalises_the_conversation_for_followers(running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await caller.send(words_event(spoken("w1", "so", start=0.0)))
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    await until_followers(running, conversation, 1)
    await caller.call.write(_word(confidence=2.0))
    final = await caller.call.read()
    assert final.update.conversation_final and all(w.final for w in final.update.words)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await caller.call.read()
    assert info.value.code() == INVALID
    seen = await asyncio.wait_for(follower, 5)
    assert [m.update for m in seen[:-1]] == [*caller.updates, final.update]
    assert seen[-1].ended.reason == pb.END_REASON_REJECTED


async def test_capacity_limits_are_resource_exhausted(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(max_live_conversations=2,
                                                     max_followers_per_conversation=1))
    callers = [Caller(running.stub) for _ in range(2)]
    ids = [await c.open() for c in callers]
    with pytest.raises(grpc.aio.AioRpcError) as info:
        _ = [m async for m in running.stub.Feed(iter([open_event()]))]
    assert info.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert "max_live_conversations is 2" in (info.value.details() or "")
    first = running.stub.Follow(pb.FollowRequest(conversation_id=ids[0]))
    await first.read()  # the snapshot: registered
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await follow_all(running.stub, ids[0])
    assert info.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert "max_followers_per_conversation is 1" in (info.value.details() or "")
    first.cancel()
    # An ended conversation frees its place.
    await callers[0].close()
    assert await Caller(running.stub).open()


async def test_oversized_message_is_refused_by_the_transport(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(max_message_bytes=2048))
    batch = words_event(*[spoken(f"w{i}", "word", start=float(i)) for i in range(200)])
    with pytest.raises(grpc.aio.AioRpcError) as info:
        _ = [m async for m in running.stub.Feed(iter([open_event(), batch]))]
    assert info.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED


async def test_transcript_limits_and_validation(start_server: ServerFactory) -> None:
    running = await start_server(limits=ServerLimits(max_transcript_items=3))
    items = [pb.TranscriptItem(word=spoken(f"w{i}", "a")) for i in range(4)]
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.TagTranscript(pb.TagTranscriptRequest(items=items))
    assert info.value.code() == INVALID
    assert "max_transcript_items is 3" in (info.value.details() or "")
    bad = [pb.TranscriptItem(word=spoken("w1", "a", start=3.0)),
           pb.TranscriptItem(word=spoken("w2", "b", start=1.0))]
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.TagTranscript(pb.TagTranscriptRequest(items=bad))
    assert info.value.code() == INVALID
    assert "goes back" in (info.value.details() or "")


async def test_replies_built_from_kept_state_fit_one_message(start_server: ServerFactory) -> None:
    limit = 4096
    running = await start_server(limits=ServerLimits(max_message_bytes=limit))
    caller = Caller(running.stub)
    conversation = await caller.open()
    for i in range(60):
        await caller.send(words_event(spoken(f"w{i}", "so", start=float(i))))
    revisions = await running.stub.GetRevisions(
        pb.GetRevisionsRequest(conversation_id=conversation))
    assert revisions.ByteSize() <= limit and revisions.truncated
    assert revisions.revisions[-1].seq == caller.updates[-1].seq  # the newest are kept
    follower = running.stub.Follow(pb.FollowRequest(conversation_id=conversation))
    snapshot = (await follower.read()).snapshot
    assert snapshot.ByteSize() <= limit and snapshot.seq == caller.updates[-1].seq
    assert "w59" in {w.word_id for w in snapshot.words}
    follower.cancel()
    await caller.close()
    items = [pb.TranscriptItem(word=spoken(f"w{i}", "so")) for i in range(150)]
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.TagTranscript(pb.TagTranscriptRequest(items=items))
    assert info.value.code() == INVALID
    assert "max_message_bytes is 4096" in (info.value.details() or "")
