"""The server's own clock (``open.server_ticks``), through a real server on port 0.

A caller that opted in sends timed words and then nothing: the server moves the conversation's
time on by its own clock, and the update that closes the utterance arrives without another
event (docs/service.md, "Silence without ticks"). A caller that did not opt in gets nothing
during the same silence. The words are an invented report to a caretaker.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable
from dataclasses import replace

import grpc
import pytest
from midstream import Ended, HypothesisUpdate, Word
from midstream.client import AddWord, Client
from midstream.server._published import PublishedUpdate
from midstream.server._session import Session
from midstream.server._status import ProtocolStateError
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    TEST_LIMITS,
    Caller,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    running_fixture,
    spoken,
    start_server_fixture,
    words_event,
)

_SAID = ("the", "boiler", "in", "the", "basement", "is", "making", "a", "loud", "noise")
# The caller is silent far longer than TEST_LIMITS' idle timeout would allow.
_PATIENT = replace(TEST_LIMITS, idle_timeout_s=60.0)
# Longer than the shipped boundary model's last silence mark (3 s): past it a tick decides
# nothing new, so a server that would close the utterance has done so by then.
_SILENCE_S = 4.0


async def _open(caller: Caller, *, server_ticks: bool) -> str:
    await caller.call.write(pb.ClientEvent(open=pb.OpenConversation(server_ticks=server_ticks)))
    message = await caller.call.read()
    assert message.WhichOneof("body") == "welcome"
    return str(message.welcome.conversation_id)


async def _say(caller: Caller) -> None:
    # One batch: a slow machine must not open a silence between two words of it.
    await caller.send(words_event(*(spoken(f"w{k}", token, "tenant", start=0.3 * k)
                                    for k, token in enumerate(_SAID))))


def _session(running: Running, conversation_id: str) -> Session:
    return running.server.servicer.registry.get(conversation_id)


async def test_an_opted_in_caller_gets_the_utterance_end_after_silence_without_sending(
        start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    caller = Caller(running.stub)
    conversation = await _open(caller, server_ticks=True)
    await _say(caller)
    words_only = _session(running, conversation).seq
    # Nothing more is sent: the next message is the server's own.
    message = await asyncio.wait_for(caller.call.read(), timeout=30)
    assert message.WhichOneof("body") == "update"
    assert message.update.seq == words_only + 1 and not message.update.conversation_final
    closed = [u for u in message.update.utterances if u.final and u.word_ids]
    assert [list(u.word_ids) for u in closed] == [[f"w{k}" for k in range(len(_SAID))]]
    assert all(w.final for w in message.update.words)
    session = _session(running, conversation)
    clock = session.server_ticks
    assert clock is not None
    # Past the last mark the clock stops until the next word: a silence costs a bounded
    # number of ticks.
    async with asyncio.timeout(10):
        while clock.armed:
            await asyncio.sleep(0.05)
    ended = await caller.close()
    assert ended.reason == pb.END_REASON_CLOSED
    assert session.server_ticks is None  # its timer went with the conversation


async def test_a_caller_that_did_not_opt_in_gets_nothing_during_the_same_silence(
        start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    caller = Caller(running.stub)
    conversation = await _open(caller, server_ticks=False)
    await _say(caller)
    session = _session(running, conversation)
    words_only = session.seq
    assert session.server_ticks is None
    await asyncio.sleep(_SILENCE_S)
    assert session.seq == words_only  # nothing was published during the silence
    await caller.call.write(pb.ClientEvent(close=pb.CloseConversation()))
    await caller.call.done_writing()
    final = await caller.call.read()
    # The first message after the silence is the one `close` produced.
    assert final.update.seq == words_only + 1 and final.update.conversation_final


async def test_untimed_words_never_arm_the_server_clock(start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    caller = Caller(running.stub)
    conversation = await _open(caller, server_ticks=True)
    for k, token in enumerate(_SAID):
        await caller.send(words_event(spoken(f"w{k}", token, "tenant")))
    clock = _session(running, conversation).server_ticks
    assert clock is not None and not clock.armed
    await caller.close()


async def test_the_client_library_opts_in_and_reads_the_servers_update(
        start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    final_words: set[str] = set()
    async with (Client(f"127.0.0.1:{running.server.port}") as client,
                client.feed(server_ticks=True) as stream):
        await stream.send_words([AddWord(word_id=f"w{k}", word=Word(
            text=token, speaker="tenant", start=0.3 * k, end=0.3 * k + 0.2))
            for k, token in enumerate(_SAID)])
        async with asyncio.timeout(30):
            async for update in stream:
                if not isinstance(update, HypothesisUpdate):
                    continue  # the welcome
                final_words |= {w.word_id for w in update.diff.words if w.final}
                if len(final_words) == len(_SAID):
                    break
    assert final_words == {f"w{k}" for k in range(len(_SAID))}


async def test_feed_many_refuses_server_ticks_naming_the_field(
        start_server: ServerFactory) -> None:
    running = await start_server(limits=_PATIENT)
    frame = pb.ClientFrame(events=[pb.ChannelEvent(
        channel=1, event=pb.ClientEvent(open=pb.OpenConversation(server_ticks=True)))])
    replies = [reply async for answer in running.stub.FeedMany(iter([frame]))
               for reply in answer.replies]
    assert [r.WhichOneof("body") for r in replies] == ["error"]
    assert replies[0].error.code == grpc.StatusCode.INVALID_ARGUMENT.name
    assert "open.server_ticks" in replies[0].error.message
    assert running.server.servicer.registry.live_count == 0


async def test_a_session_recorded_in_a_shared_log_refuses_the_server_clock(
        running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    session = _session(running, conversation)

    class _Log:
        def published(self, update: PublishedUpdate) -> None: ...
        def accepted(self, serialised: Callable[[], bytes]) -> None: ...
        def ended(self, ended: Ended) -> None: ...

    session.journal = _Log()
    with pytest.raises(ProtocolStateError, match="server_ticks"):
        session.tick_by_server(lambda: None)
    session.journal = None
    await caller.close()


def _paused_report(*, tick: bool) -> list[pb.TranscriptItem]:
    """One speaker, a 1 s pause before an afterthought; with ``tick``, the recogniser's clock
    ticks just before the afterthought starts (invented words)."""
    items: list[pb.TranscriptItem] = []

    def say(word_id: str, token: str, start: float) -> None:
        items.append(pb.TranscriptItem(word=pb.SpokenWord(
            word_id=word_id, speaker="tenant", text=token, start_s=start, end_s=start + 0.25)))

    for k, token in enumerate(["the", "boiler", "is", "making", "a", "loud", "noise"]):
        say(f"a{k}", token, 0.3 * k)
    last_end = 0.3 * 6 + 0.25
    if tick:
        items.append(pb.TranscriptItem(tick=cv.tick_to_wire(last_end + 0.99)))
    for k, token in enumerate(["in", "the", "basement"]):
        say(f"b{k}", token, last_end + 1.0 + 0.3 * k)
    return items


def _groups(utterances: list[pb.UtteranceState]) -> list[list[str]]:
    return [list(u.word_ids) for u in utterances if u.word_ids]


async def test_tag_transcript_weighs_a_tick_as_a_live_stream_does(running: Running) -> None:
    items = _paused_report(tick=True)
    reply = await running.stub.TagTranscript(pb.TagTranscriptRequest(items=items))
    # The tick weighed 0.99 s of silence after "noise" and closed the utterance there: the
    # afterthought cannot reopen it.
    assert _groups(list(reply.utterances)) == [[f"a{k}" for k in range(7)],
                                               [f"b{k}" for k in range(3)]]
    # The same events streamed live end the same way.
    events = [open_event(), *(pb.ClientEvent(tick=i.tick) if i.HasField("tick")
                              else words_event(i.word) for i in items), CLOSE]
    live: dict[str, pb.UtteranceState] = {}
    async for message in running.stub.Feed(iter(events)):
        for state in message.update.utterances:
            live[state.utterance_id] = state
    assert _groups(list(live.values())) == _groups(list(reply.utterances))
    # Without the tick the afterthought's own words weigh in, and the shipped models join it
    # to the report: the tick, not the pause alone, made the split above.
    untimed = await running.stub.TagTranscript(
        pb.TagTranscriptRequest(items=_paused_report(tick=False)))
    assert _groups(list(untimed.utterances)) == [[*(f"a{k}" for k in range(7)),
                                                  *(f"b{k}" for k in range(3))]]


@pytest.mark.parametrize("value", [math.nan, -1.0])
async def test_tag_transcript_refuses_a_bad_tick_naming_the_field(running: Running,
                                                                   value: float) -> None:
    items = [*_paused_report(tick=False)[:2], pb.TranscriptItem(tick=pb.TimeTick(time_s=value))]
    with pytest.raises(grpc.aio.AioRpcError) as raised:
        await running.stub.TagTranscript(pb.TagTranscriptRequest(items=items))
    assert raised.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "tick.time_s" in (raised.value.details() or "")
