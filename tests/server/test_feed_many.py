"""FeedMany: many conversations over one stream, each channel behaving like Feed."""

from __future__ import annotations

import asyncio
import logging
from dataclasses import replace
from pathlib import Path

import grpc
import pytest
from midstream import InputError
from midstream.corpora import read_corpus
from midstream.server import ServerLimits
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    TEST_LIMITS,
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

#: The kit's one-second idle timeout is reachable on a loaded machine; only the idle test uses it.
_PATIENT = replace(TEST_LIMITS, idle_timeout_s=60.0)
#: How long a follower may take to see a conversation's end: generous, since the machine may be
#: busy with other test processes and a follower's end is what is asserted, not its speed.
_FOLLOWER_S = 60.0

Reply = tuple[int, str, pb.ServerMessage | pb.ChannelError]


def _frame(*events: tuple[int, pb.ClientEvent]) -> pb.ClientFrame:
    return pb.ClientFrame(events=[pb.ChannelEvent(channel=c, event=e) for c, e in events])


def _replies(frame: pb.ServerFrame) -> list[Reply]:
    out: list[Reply] = []
    for reply in frame.replies:
        if reply.WhichOneof("body") == "error":
            out.append((reply.channel, "error", reply.error))
        else:
            out.append((reply.channel, reply.message.WhichOneof("body") or "", reply.message))
    return out


class Mux:
    """The caller side of one FeedMany stream: one frame out, its reply frame in."""

    def __init__(self, running: Running, metadata: tuple[tuple[str, str], ...] = ()) -> None:
        self.call = running.stub.FeedMany(metadata=metadata)

    async def send(self, *events: tuple[int, pb.ClientEvent]) -> list[Reply]:
        await self.call.write(_frame(*events))
        frame = await asyncio.wait_for(self.call.read(), 10)
        assert frame is not grpc.aio.EOF
        return _replies(frame)

    async def rest(self) -> list[Reply]:
        """Every reply until the stream ends (its status is then on ``call.code()``)."""
        out: list[Reply] = []
        try:
            while (frame := await asyncio.wait_for(self.call.read(), 10)) is not grpc.aio.EOF:
                out.extend(_replies(frame))
        except grpc.aio.AioRpcError:
            pass
        return out


def _of(replies: list[Reply], channel: int) -> list[Reply]:
    return [r for r in replies if r[0] == channel]


def _kinds(replies: list[Reply], channel: int) -> list[str]:
    return [kind for _, kind, _ in _of(replies, channel)]


def _id(replies: list[Reply], channel: int) -> str:
    (welcome,) = [m for c, k, m in replies if c == channel and k == "welcome"]
    assert isinstance(welcome, pb.ServerMessage)
    return str(welcome.welcome.conversation_id)


def _error(replies: list[Reply], channel: int) -> pb.ChannelError:
    (error,) = [m for c, k, m in replies if c == channel and k == "error"]
    assert isinstance(error, pb.ChannelError)
    return error


def _comparable(messages: list[pb.ServerMessage]) -> list[pb.ServerMessage]:
    """Updates and ended without server times, epochs or conversation ids (which differ per
    conversation)."""
    out = []
    for message in messages:
        kind = message.WhichOneof("body")
        if kind == "update":
            copy = pb.ServerMessage()
            copy.CopyFrom(message)
            copy.update.server_time = 0.0
            copy.update.epoch = 0
            out.append(copy)
        elif kind == "ended":
            out.append(message)
    return out


@pytest.mark.corpus
async def test_each_channel_gets_exactly_what_feed_gives(
    start_server: ServerFactory, swda_dir: Path,
) -> None:
    # Three SwDA val conversations (val is for reporting, never tuning) interleaved word by
    # word on one stream must produce, per channel, the very updates Feed produces.
    running = await start_server(limits=_PATIENT)
    conversations = [c for c in read_corpus(swda_dir, split="val") if len(c.words) >= 60][:3]
    scripts = [[cv.spoken_word_to_wire(f"w{i}", w) for i, w in enumerate(c.words[:120])]
               for c in conversations]
    expected = []
    for script in scripts:
        events = [open_event(), *(words_event(w) for w in script), CLOSE]
        expected.append(_comparable([m async for m in running.stub.Feed(iter(events))]))
    mux = Mux(running)
    got = await mux.send(*((n, open_event()) for n in (1, 2, 3)))
    assert [k for _, k, _ in got] == ["welcome"] * 3
    seen: list[Reply] = []
    for index in range(max(len(s) for s in scripts)):
        # Three words per frame, one per channel (the load generator's shape).
        due = [(n + 1, words_event(s[index])) for n, s in enumerate(scripts)
               if index < len(s)]
        await mux.call.write(_frame(*due))
        frame = await asyncio.wait_for(mux.call.read(), 10)
        seen.extend(_replies(frame))
    await mux.call.write(_frame(*((n, CLOSE) for n in (1, 2, 3))))
    await mux.call.done_writing()
    seen.extend(await mux.rest())
    assert await mux.call.code() == grpc.StatusCode.OK
    for n in (1, 2, 3):
        messages = [m for _, _, m in _of(seen, n)]
        assert all(isinstance(m, pb.ServerMessage) for m in messages)
        assert _comparable(messages) == expected[n - 1]  # type: ignore[arg-type]
        assert len(expected[n - 1]) > 50


async def test_a_bad_event_finishes_only_its_channel(running: Running) -> None:
    mux = Mux(running)
    opened = await mux.send((1, open_event()), (2, open_event()))
    bad_id = _id(opened, 1)
    follower = asyncio.create_task(follow_all(running.stub, bad_id, from_seq=1))
    await until_followers(running, bad_id, 1)
    replies = await mux.send((1, words_event(spoken("a1", "so", start=0.0))),
                             (2, words_event(spoken("b1", "well", start=0.0))),
                             (1, words_event(spoken("a2", "   "))),
                             (2, words_event(spoken("b2", "okay", start=0.5))))
    # Channel 1: its update, the refusal, the final update, ended (REJECTED).
    assert _kinds(replies, 1) == ["update", "error", "update", "ended"]
    error = _error(replies, 1)
    assert error.code == "INVALID_ARGUMENT" and "'text' of word 'a2'" in error.message
    ended = _of(replies, 1)[-1][2]
    assert isinstance(ended, pb.ServerMessage)
    assert ended.ended.reason == pb.END_REASON_REJECTED
    # Channel 2 carried on, in the same frame and after it.
    assert _kinds(replies, 2) == ["update", "update"]
    again = await mux.send((2, words_event(spoken("b3", "yes", start=1.0))))
    assert _kinds(again, 2) == ["update"]
    # Channel 1 is gone: a later event for it is refused and changes nothing.
    late = await mux.send((1, words_event(spoken("a3", "so", start=2.0))))
    assert _kinds(late, 1) == ["error"]
    assert _error(late, 1).code == "INVALID_ARGUMENT"
    followed = await asyncio.wait_for(follower, _FOLLOWER_S)
    assert followed[-1].ended.reason == pb.END_REASON_REJECTED
    await mux.call.done_writing()
    rest = await mux.rest()
    assert _kinds(rest, 2) == ["update", "ended"]
    assert await mux.call.code() == grpc.StatusCode.OK


async def test_channel_numbering_mistakes_get_clear_errors(running: Running) -> None:
    mux = Mux(running)
    replies = await mux.send(
        (0, open_event()),                                   # unset channel number
        (5, words_event(spoken("w1", "so"))),                # never opened
        (7, open_event()),
        (7, CLOSE),
        (7, words_event(spoken("w1", "so"))),                # after its close
        (6, open_event()),                                   # below the highest opened (7)
        (7, open_event()),                                   # reused after close
    )
    assert _error(replies, 0).code == "INVALID_ARGUMENT"
    assert "'channel' is 0" in _error(replies, 0).message
    assert _error(replies, 5).code == "INVALID_ARGUMENT"
    assert "channel 5 is not open: its first event must be 'open', not 'words'" \
        in _error(replies, 5).message
    assert _kinds(replies, 7) == ["welcome", "update", "ended", "error", "error"]
    after_close, reused = (m for c, k, m in replies if c == 7 and k == "error")
    assert isinstance(after_close, pb.ChannelError) and isinstance(reused, pb.ChannelError)
    assert "channel 7 is not open" in after_close.message
    assert "not reused" in reused.message and "highest is 7" in reused.message
    assert "highest is 7" in _error(replies, 6).message
    # None of it ended the stream: a new channel above 7 opens.
    assert _kinds(await mux.send((8, open_event())), 8) == ["welcome"]
    assert running.server.servicer.registry.live_count == 1


async def test_channel_and_frame_limits(start_server: ServerFactory) -> None:
    running = await start_server(limits=replace(_PATIENT, max_channels_per_stream=2,
                                                max_events_per_frame=4))
    mux = Mux(running)
    replies = await mux.send((1, open_event()), (2, open_event()), (3, open_event()))
    assert _kinds(replies, 3) == ["error"]
    error = _error(replies, 3)
    assert error.code == "RESOURCE_EXHAUSTED" and "max_channels_per_stream is 2" in error.message
    # Closing one makes room again.
    closed = await mux.send((1, CLOSE), (4, open_event()))
    assert _kinds(closed, 1)[-1] == "ended" and _kinds(closed, 4) == ["welcome"]
    follower = asyncio.create_task(follow_all(running.stub, _id(replies, 2), from_seq=1))
    await until_followers(running, _id(replies, 2), 1)
    # A frame over max_events_per_frame ends the stream; open conversations finish first.
    await mux.call.write(_frame(*((2, words_event(spoken(f"w{i}", "so"))) for i in range(5))))
    rest = await mux.rest()
    assert {c for c, _, _ in rest} == {2, 4}
    for channel in (2, 4):
        ended = _of(rest, channel)[-1][2]
        assert isinstance(ended, pb.ServerMessage)
        assert ended.ended.reason == pb.END_REASON_REJECTED
    assert await mux.call.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "max_events_per_frame is 4" in (await mux.call.details() or "")
    followed = await asyncio.wait_for(follower, _FOLLOWER_S)
    assert followed[-1].ended.reason == pb.END_REASON_REJECTED
    assert running.server.servicer.registry.live_count == 0


async def test_conversation_ids_and_live_limit_apply_per_channel(
    start_server: ServerFactory,
) -> None:
    running = await start_server(limits=replace(_PATIENT, max_live_conversations=1))
    mux = Mux(running)
    replies = await mux.send((1, open_event("call-9")), (2, open_event("call-9")),
                             (3, open_event()))
    assert _id(replies, 1) == "call-9"
    assert _error(replies, 2).code == "ALREADY_EXISTS"
    assert _error(replies, 3).code == "RESOURCE_EXHAUSTED"
    assert "max_live_conversations" in _error(replies, 3).message
    # A refused open does not use up its number: the caller may try it again.
    await mux.send((1, CLOSE))
    assert _kinds(await mux.send((3, open_event())), 3) == ["welcome"]


async def test_idle_channel_times_out_while_others_talk(start_server: ServerFactory) -> None:
    running = await start_server(limits=replace(TEST_LIMITS, idle_timeout_s=1.0))
    mux = Mux(running)
    opened = await mux.send((1, open_event()), (2, open_event()))
    quiet = _id(opened, 2)
    follower = asyncio.create_task(follow_all(running.stub, quiet, from_seq=1))
    await until_followers(running, quiet, 1)
    seen: list[Reply] = []
    # Channel 1 speaks every 0.2 s for about 2.4 s; channel 2 says nothing after its open.
    for index in range(12):
        await mux.call.write(_frame((1, words_event(spoken(f"w{index}", "so",
                                                           start=float(index))))))
        await asyncio.sleep(0.2)
    await mux.call.done_writing()
    seen.extend(await mux.rest())
    ended = _of(seen, 2)[-1][2]
    assert isinstance(ended, pb.ServerMessage)
    assert ended.ended.reason == pb.END_REASON_IDLE_TIMEOUT
    assert _kinds(seen, 2) == ["update", "ended"]  # the final update, then ended
    last = _of(seen, 1)[-1][2]
    assert isinstance(last, pb.ServerMessage)
    assert last.ended.reason == pb.END_REASON_CLOSED  # the talking channel never timed out
    assert (await asyncio.wait_for(follower, _FOLLOWER_S))[-1].ended.reason \
        == pb.END_REASON_IDLE_TIMEOUT


async def test_half_close_finishes_every_channel(start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    mux = Mux(running)
    await mux.send(*((n, open_event()) for n in (1, 2, 3)))
    await mux.send(*((n, words_event(spoken("w1", "i", start=0.0),
                                     spoken("w2", "i", start=0.3))) for n in (1, 2, 3)))
    await mux.call.done_writing()
    rest = await mux.rest()
    for n in (1, 2, 3):
        final, ended = (m for _, _, m in _of(rest, n))
        assert isinstance(final, pb.ServerMessage) and isinstance(ended, pb.ServerMessage)
        assert final.update.conversation_final
        assert all(w.final for w in final.update.words)
        assert ended.ended.reason == pb.END_REASON_CLOSED
    assert await mux.call.code() == grpc.StatusCode.OK
    assert running.server.servicer.registry.live_count == 0


async def test_followers_listing_and_revisions_see_channels(start_server: ServerFactory,
                                                            ) -> None:
    running = await start_server(limits=_PATIENT)
    mux = Mux(running)
    opened = await mux.send((1, open_event("mux-a")))
    assert _id(opened, 1) == "mux-a"
    follower = asyncio.create_task(follow_all(running.stub, "mux-a"))
    await until_followers(running, "mux-a", 1)
    sent = await mux.send((1, words_event(spoken("w1", "so", start=0.0))))
    sent += await mux.send((1, words_event(spoken("w2", "uh", start=0.4))))
    listed = await running.stub.ListConversations(pb.ListConversationsRequest())
    (summary,) = [c for c in listed.conversations if c.conversation_id == "mux-a"]
    assert summary.words == 2 and not summary.ended
    sent += await mux.send((1, CLOSE))
    followed = await asyncio.wait_for(follower, _FOLLOWER_S)
    # The follower got a snapshot, then the very updates (and ended) the caller got.
    assert followed[0].WhichOneof("body") == "snapshot"
    assert followed[1:] == [m for _, _, m in sent]
    revisions = await running.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id="mux-a"))
    assert {r.word.word_id for r in revisions.revisions if r.WhichOneof("state") == "word"} \
        == {"w1", "w2"}


async def test_cancel_finishes_every_channel_as_vanished(running: Running) -> None:
    mux = Mux(running)
    opened = await mux.send((1, open_event()), (2, open_event()))
    ids = [_id(opened, 1), _id(opened, 2)]
    followers = [asyncio.create_task(follow_all(running.stub, i, from_seq=1)) for i in ids]
    for conversation in ids:
        await until_followers(running, conversation, 1)
    mux.call.cancel()
    for follower in followers:
        assert (await asyncio.wait_for(follower, _FOLLOWER_S))[-1].ended.reason \
            == pb.END_REASON_CALLER_VANISHED
    assert running.server.servicer.registry.live_count == 0


async def test_server_stop_ends_every_channel_and_delivers(start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    mux = Mux(running)
    await mux.send((1, open_event()), (2, open_event()))
    await mux.send((1, words_event(spoken("w1", "so"))), (2, words_event(spoken("w1", "so"))))
    stopping = asyncio.create_task(running.server.stop(5))
    rest = await mux.rest()
    for n in (1, 2):
        final, ended = (m for _, _, m in _of(rest, n))
        assert isinstance(final, pb.ServerMessage) and isinstance(ended, pb.ServerMessage)
        assert final.update.conversation_final
        assert ended.ended.reason == pb.END_REASON_SERVER_SHUTDOWN
    await stopping


async def test_big_replies_are_split_to_fit_the_message_limit(start_server: ServerFactory,
                                                              ) -> None:
    # 16 KiB messages (replies may use 90 % of it). Eight channels each given the same 56-word
    # batch: the request is about 6.5 KB, the eight updates about 16 KB (measured once while
    # this was written), so they cannot share one reply frame.
    limits = replace(_PATIENT, max_message_bytes=16 * 1024)
    running = await start_server(limits=limits)
    mux = Mux(running)
    await mux.send(*((n, open_event()) for n in range(1, 9)))
    text = ("i i mean we uh we went to the the store and uh so " * 4).split()
    batch = words_event(*(spoken(f"w{i}", t, start=float(i)) for i, t in enumerate(text)))
    await mux.call.write(_frame(*((n, batch) for n in range(1, 9))))
    await mux.call.done_writing()
    frames = []
    while (frame := await asyncio.wait_for(mux.call.read(), 10)) is not grpc.aio.EOF:
        assert frame.ByteSize() <= limits.max_message_bytes
        frames.append(frame)
    replies = [r for f in frames for r in _replies(f)]
    # The eight updates of the one request frame did not fit one reply frame.
    assert 0 < len(frames[0].replies) < 8
    for n in range(1, 9):
        assert _kinds(replies, n) == ["update", "update", "ended"]
        first = _of(replies, n)[0][2]
        assert isinstance(first, pb.ServerMessage)
        assert {w.word_id for w in first.update.words} == {f"w{i}" for i in range(len(text))}


def test_new_limits_are_checked() -> None:
    with pytest.raises(InputError, match="max_events_per_frame"):
        ServerLimits(max_events_per_frame=0)
    with pytest.raises(InputError, match="max_channels_per_stream"):
        ServerLimits(max_channels_per_stream=0)


async def test_refusals_are_logged_without_words(running: Running,
                                                 caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.INFO)
    mux = Mux(running)
    await mux.send((1, open_event()))
    await mux.send((1, words_event(spoken("w0", "marmalade", start=1.0))))
    # Times going backwards: refused, and the engine-free message names only ids and times.
    replies = await mux.send((1, words_event(spoken("w1", "zanzibar", start=0.0))))
    assert _kinds(replies, 1) == ["error", "update", "ended"]
    logged = " ".join(r.getMessage() for r in caplog.records if r.levelno >= logging.INFO)
    assert "channel 1 refused with INVALID_ARGUMENT" in logged
    assert "marmalade" not in logged and "zanzibar" not in logged
