"""``FeedMany`` on replicas sharing one real Redis: a channel continues a conversation with
``open.resume`` as ``Feed`` does, and a caller-chosen id live in the log is refused.

The words are the demo's invented phone call, one per event.
"""

from __future__ import annotations

import asyncio
import dataclasses

import grpc
from midstream.server import SharedLogConfig
from midstream.wire import midstream_pb2 as pb
from redis_kit import LIMITS, RedisProcess, call_words, comparable, gaps_told, redis_server_fixture
from server_kit import (
    CLOSE,
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    start_server_fixture,
    words_event,
)

__all__ = ["bundle_fixture", "models_dir_fixture", "redis_server_fixture",
           "start_server_fixture"]

Reply = tuple[int, pb.ServerMessage | pb.ChannelError]


class Mux:
    """The caller side of one ``FeedMany`` stream: a frame out, its reply frame in."""

    def __init__(self, running: Running) -> None:
        self.call = running.stub.FeedMany()

    async def send(self, *events: tuple[int, pb.ClientEvent]) -> list[Reply]:
        await self.call.write(pb.ClientFrame(
            events=[pb.ChannelEvent(channel=c, event=e) for c, e in events]))
        frame = await asyncio.wait_for(self.call.read(), 30)
        assert frame is not grpc.aio.EOF
        return [(r.channel, r.error if r.WhichOneof("body") == "error" else r.message)
                for r in frame.replies]


def _resume(conversation_id: str, epoch: int = 0) -> pb.ClientEvent:
    return pb.ClientEvent(open=pb.OpenConversation(conversation_id=conversation_id,
                                                   resume=True, epoch=epoch))


async def _until_logged(running: Running, conversation_id: str, last_seq: int) -> None:
    async with asyncio.timeout(10):
        while not any(c.conversation_id == conversation_id and c.last_seq >= last_seq
                      for c in (await running.stub.ListConversations(
                          pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)


async def _reference(running: Running, words: list[pb.SpokenWord]) -> list[bytes]:
    """The updates of the words tagged in one uninterrupted conversation (times cleared)."""
    caller = Caller(running.stub)
    await caller.open()
    for word in words:
        await caller.send(words_event(word))
    await caller.close()
    return [comparable(u) for u in caller.updates]


async def test_a_channel_continues_a_conversation_from_the_log_and_loses_no_word(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    words = call_words()[:24]
    reference = await _reference(b, words)
    old = Caller(a.stub)
    await old.open("many-1")
    for word in words[:10]:
        await old.send(words_event(word))
    await _until_logged(b, "many-1", old.updates[-1].seq)
    # Continued on B over FeedMany (A cut off, as if its caller lost it); the frame's
    # next word on the same channel comes after the resume, and a new channel opens beside it.
    mux = Mux(b)
    replies = await mux.send((1, _resume("many-1", old.epoch)), (1, words_event(words[10])),
                             (2, pb.ClientEvent(open=pb.OpenConversation())))
    kinds = [(n, m.WhichOneof("body") if isinstance(m, pb.ServerMessage) else "error")
             for n, m in replies]
    assert kinds == [(1, "welcome"), (1, "update"), (2, "welcome")], replies
    welcome = replies[0][1]
    assert isinstance(welcome, pb.ServerMessage)
    assert welcome.welcome.conversation_id == "many-1"
    assert welcome.welcome.events_logged == 10
    assert welcome.welcome.next_seq == old.updates[-1].seq + 1
    assert welcome.welcome.epoch == old.epoch  # the same conversation goes on
    first = replies[1][1]
    assert isinstance(first, pb.ServerMessage)
    assert first.update.seq == welcome.welcome.next_seq
    old.call.cancel()
    for word in words[11:]:
        [(channel, message)] = await mux.send((1, words_event(word)))
        assert channel == 1 and isinstance(message, pb.ServerMessage)
        assert message.WhichOneof("body") == "update"
    closing = await mux.send((1, CLOSE), (2, CLOSE))
    ended = [m for n, m in closing if n == 1 and isinstance(m, pb.ServerMessage)
             and m.WhichOneof("body") == "ended"]
    assert [m.ended.reason for m in ended] == [pb.END_REASON_CLOSED]
    await mux.call.done_writing()
    # A follower from seq 1: one sequence, no gap, exactly the uninterrupted conversation's.
    messages = await follow_all(b.stub, "many-1", from_seq=1)
    assert gaps_told(messages, ended[0].ended.last_seq) == 0
    followed = [m.update for m in messages if m.WhichOneof("body") == "update"]
    assert [comparable(u) for u in followed] == reference
    assert [u.SerializeToString() for u in followed[:10]] == [
        u.SerializeToString() for u in old.updates[:10]]


async def test_a_channel_is_refused_what_feed_is_refused(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    alone = await start_server(limits=LIMITS)
    live = Caller(a.stub)
    await live.open("taken")
    await live.send(words_event(call_words()[0]))
    await _until_logged(b, "taken", 1)
    mux = Mux(b)
    replies = await mux.send(
        (1, pb.ClientEvent(open=pb.OpenConversation(conversation_id="taken"))),
        (2, _resume("never-opened")),
        (3, pb.ClientEvent(open=pb.OpenConversation(conversation_id="free"))))
    codes = {n: m.code for n, m in replies if isinstance(m, pb.ChannelError)}
    assert codes == {1: "ALREADY_EXISTS", 2: "NOT_FOUND"}
    assert [n for n, m in replies if isinstance(m, pb.ServerMessage)
            and m.WhichOneof("body") == "welcome"] == [3]
    # Live on the replica asked: nothing to continue there.
    on_a = Mux(a)
    [(_, refused)] = await on_a.send((1, _resume("taken")))
    assert isinstance(refused, pb.ChannelError) and refused.code == "ALREADY_EXISTS"
    # Without a shared log there is nothing to continue from.
    [(_, alone_refused)] = await Mux(alone).send((1, _resume("taken")))
    assert isinstance(alone_refused, pb.ChannelError)
    assert alone_refused.code == "INVALID_ARGUMENT"
    assert "midstream serve --redis" in alone_refused.message
    await live.close()
    for stream in (mux, on_a):
        stream.call.cancel()


async def _refusals(running: Running, request: pb.OpenConversation, *, same_text: bool = True
                    ) -> tuple[str, str]:
    """How ``Feed`` and a ``FeedMany`` channel refuse the same ``open``: they must
    agree (in the code only, with ``same_text=False``); returns the status code's name and
    ``Feed``'s message."""
    call = running.stub.Feed()
    await call.write(pb.ClientEvent(open=request))
    try:
        await call.read()
    except grpc.aio.AioRpcError as exc:
        code, details = exc.code().name, exc.details() or ""
    else:
        raise AssertionError(f"Feed took {request}")
    mux = Mux(running)
    [(channel, error)] = await mux.send((1, pb.ClientEvent(open=request)))
    mux.call.cancel()
    assert channel == 1 and isinstance(error, pb.ChannelError), error
    assert error.code == code
    if same_text:
        assert error.message == details
    return code, details


async def test_every_refusal_to_continue_names_what_was_wrong_on_both_rpcs(
        start_server: ServerFactory, redis_server: RedisProcess) -> None:
    """The rows of docs/bad-input.md on continuing a conversation (``open.resume``)."""
    shared = SharedLogConfig(url=redis_server.url)
    a = await start_server(limits=LIMITS, shared_log=shared)
    b = await start_server(limits=LIMITS, shared_log=shared)
    short = await start_server(limits=LIMITS, shared_log=dataclasses.replace(
        shared, max_events=2))
    other = await start_server(limits=LIMITS, shared_log=shared, max_open_words=3)
    alone = await start_server(limits=LIMITS)
    needs_log = ("INVALID_ARGUMENT", "open.resume continues a conversation by its id on "
                 "servers that share a log (midstream serve --redis)")
    assert await _refusals(alone, pb.OpenConversation(conversation_id="x",
                                                      resume=True)) == needs_log
    assert await _refusals(b, pb.OpenConversation(resume=True)) == needs_log
    assert await _refusals(b, pb.OpenConversation(conversation_id="x" * 200, resume=True)) == (
        "INVALID_ARGUMENT", f"field 'conversation_id' is 200 characters long; limit "
        f"max_id_chars is {LIMITS.max_id_chars}")
    assert await _refusals(b, pb.OpenConversation(conversation_id="never-opened",
                                                  resume=True)) == (
        "NOT_FOUND", "no live or kept conversation with id 'never-opened'")
    done = Caller(a.stub)
    await done.open("done")
    await done.send(words_event(call_words()[0]))
    await done.close()
    async with asyncio.timeout(10):  # the end reaches the log with the final update
        while not any(c.conversation_id == "done" and c.ended for c in (
                await b.stub.ListConversations(pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)
    assert await _refusals(b, pb.OpenConversation(conversation_id="done", resume=True)) == (
        "INVALID_ARGUMENT", "conversation 'done' has ended; open a new one to go on")
    live = Caller(a.stub)
    await live.open("live")
    await live.send(words_event(call_words()[0]))
    await _until_logged(b, "live", 1)
    assert await _refusals(a, pb.OpenConversation(conversation_id="live", resume=True)) == (
        "ALREADY_EXISTS", "conversation 'live' is live on this replica")
    assert await _refusals(other, pb.OpenConversation(conversation_id="live",
                                                      resume=True)) == (
        "FAILED_PRECONDITION", "conversation 'live' was decoded with other models, decoder "
        "settings or conversation setting than this replica serves; continue it on a replica "
        "serving the same")
    assert await _refusals(b, pb.OpenConversation(conversation_id="live")) == (
        "ALREADY_EXISTS", "conversation id 'live' is live in the shared log; continue it with "
        "open.resume, or choose another id")
    # Past max_events the log no longer holds all of a conversation's input.
    outgrown = Caller(short.stub)
    await outgrown.open("outgrown")
    for word in call_words()[:3]:
        await outgrown.send(words_event(word))
    await _until_logged(b, "outgrown", 3)
    assert await _refusals(b, pb.OpenConversation(conversation_id="outgrown", resume=True)) == (
        "INVALID_ARGUMENT", "conversation 'outgrown' cannot be continued: its logged input is "
        "incomplete (it outgrew max_events, or the shared log was unreachable longer than the "
        "local buffer held)")
    # An id taken over by a new conversation (the old one ended): continuing the old one by
    # its epoch is refused rather than spliced onto the new one.
    again = Caller(b.stub)
    await again.open("done")
    assert again.epoch != done.epoch
    await again.send(words_event(call_words()[0]))
    async with asyncio.timeout(10):  # A lists its own ended "done" too: wait for the new one
        while not any(c.conversation_id == "done" and c.epoch == again.epoch for c in (
                await a.stub.ListConversations(pb.ListConversationsRequest())).conversations):
            await asyncio.sleep(0.02)
    assert await _refusals(a, pb.OpenConversation(conversation_id="done", resume=True,
                                                  epoch=done.epoch)) == (
        "NOT_FOUND", f"no conversation with id 'done' in epoch {done.epoch}: another "
        "conversation has taken the id over since; open a new one to go on")
    redis_server.stop()
    # The message names the client library's exception, which depends on how the connection
    # failed (refused, reset, timed out): the two calls may meet different ones.
    code, message = await _refusals(b, pb.OpenConversation(conversation_id="live",
                                                           resume=True), same_text=False)
    assert code == "UNAVAILABLE"
    assert message.startswith("the shared log is unreachable (") and message.endswith(
        "); try again")
    for caller in (live, outgrown, again):
        caller.call.cancel()
