"""Client.feed_many: many conversations over one stream, through the client library."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    Served,
    models_dir_fixture,
    served_fixture,
)
from midstream import EventError, HypothesisUpdate, InputError, MidstreamError, Word
from midstream.client import (
    AddWord,
    Client,
    Ended,
    EndReason,
    MultiplexedStream,
    SyncClient,
    Welcome,
)
from midstream.client._results import ServerEvent
from midstream.client.cli._demo_script import demo_events

pytestmark = pytest.mark.corpus

Received = ServerEvent | MidstreamError


def _timeless(events: Sequence[Received]) -> list[Received]:
    """Updates without their server time and epoch (they differ between conversations), and
    the rest as they are."""
    return [replace(e, server_time=0.0, epoch=0) if isinstance(e, HypothesisUpdate) else e
            for e in events]


async def _by_channel(mux: MultiplexedStream) -> dict[int, list[Received]]:
    out: dict[int, list[Received]] = {}
    async for channel, event in mux:
        out.setdefault(channel, []).append(event)
    return out


async def test_each_channel_yields_what_feed_yields(served: Served) -> None:
    events = [timed.event for timed in demo_events()]
    async with Client(served.target) as client:
        async with client.feed() as stream:
            for event in events:
                await stream.send(event)
            await stream.close()
            expected = [e async for e in stream]
        async with client.feed_many() as mux:
            first, second = mux.open(), mux.open("many-bike-2")
            assert (first, second) == (1, 2)
            await mux.flush()
            for event in events:
                # Both conversations' events in one frame per step.
                mux.send(first, event)
                mux.send(second, event)
                assert mux.queued == 2
                await mux.flush()
            mux.close_channel(first)
            await mux.close()  # half-closes: channel 2 is closed by the server
            got = await _by_channel(mux)
    assert isinstance(expected[0], Welcome) and isinstance(expected[-1], Ended)
    for channel in (first, second):
        welcome, *rest = got[channel]
        assert isinstance(welcome, Welcome) and welcome.next_seq == 1
        assert _timeless(rest) == _timeless(expected[1:])
    welcome = got[second][0]
    assert isinstance(welcome, Welcome) and welcome.conversation_id == "many-bike-2"


async def test_a_refused_event_arrives_as_an_error_on_its_channel(served: Served) -> None:
    word = Word(text="so", speaker="A")
    async with Client(served.target) as client, client.feed_many() as mux:
        good, bad = mux.open(), mux.open()
        await mux.flush()
        mux.send_words(good, [AddWord(word_id="w1", word=word)])
        mux.send_words(bad, [AddWord(word_id="w1", word=word)])
        mux.send_words(bad, [AddWord(word_id="w1", word=word)])  # a duplicate word id
        mux.send_words(good, [AddWord(word_id="w2", word=word)])
        mux.send_words(99, [AddWord(word_id="w1", word=word)])   # never opened
        await mux.close()
        got = await _by_channel(mux)
    refusal = next(e for e in got[bad] if isinstance(e, MidstreamError))
    assert isinstance(refusal, EventError) and "channel 2" in str(refusal)
    ended = got[bad][-1]
    assert isinstance(ended, Ended) and ended.reason is EndReason.REJECTED
    ended = got[good][-1]
    assert isinstance(ended, Ended) and ended.reason is EndReason.CLOSED
    assert not any(isinstance(e, MidstreamError) for e in got[good])
    (unopened,) = got[99]
    assert isinstance(unopened, EventError) and "INVALID_ARGUMENT" in str(unopened)


async def test_queue_bound_and_a_refused_frame(served: Served) -> None:
    async with Client(served.target) as client:
        with pytest.raises(InputError, match="frame_events"):
            client.feed_many(frame_events=0)
        async with client.feed_many(frame_events=2) as mux:
            mux.open()
            mux.open()
            with pytest.raises(InputError, match="flush"):
                mux.open()
            await mux.flush()
        # Over the server's max_events_per_frame (1024 by default): the stream ends with
        # INVALID_ARGUMENT naming the limit, raised while reading.
        async with client.feed_many(frame_events=2000) as mux:
            channel = mux.open()
            for index in range(1100):
                mux.send_words(channel, [AddWord(word_id=f"w{index}",
                                                 word=Word(text="so", speaker="A"))])
            await mux.flush()
            with pytest.raises(EventError, match="max_events_per_frame"):
                await _by_channel(mux)


def test_the_sync_wrapper_carries_many_conversations(served: Served) -> None:
    events = [timed.event for timed in demo_events()]
    word = Word(text="so", speaker="A")
    with SyncClient(served.target) as client:
        with pytest.raises(InputError, match="buffer"):
            client.feed_many(buffer=0)
        # A small buffer: the reader stops at two unread replies and resumes as they are taken.
        with client.feed_many(buffer=2) as mux:
            first, second, bad = mux.open(), mux.open("sync-many-2"), mux.open()
            mux.flush()
            for event in events:
                mux.send(first, event)
                mux.send(second, event)
                mux.flush()
            mux.send_words(bad, [AddWord(word_id="w1", word=word)])
            mux.send_words(bad, [AddWord(word_id="w1", word=word)])  # a duplicate word id
            mux.flush()
            # Nothing more is coming until the stream is closed: a timeout ends the iteration.
            early = list(mux.replies(timeout=2.0))
            assert list(mux.replies(timeout=0.05)) == []
            mux.close()
            got: dict[int, list[Received]] = {}
            for number, received in [*early, *mux.replies()]:
                got.setdefault(number, []).append(received)
    for channel in (first, second):
        assert isinstance(got[channel][0], Welcome)
        ended = got[channel][-1]
        assert isinstance(ended, Ended) and ended.reason is EndReason.CLOSED
    assert _timeless(got[first][1:]) == _timeless(got[second][1:])
    refusal = next(e for e in got[bad] if isinstance(e, MidstreamError))
    assert isinstance(refusal, EventError) and "channel 3" in str(refusal)
    ended = got[bad][-1]
    assert isinstance(ended, Ended) and ended.reason is EndReason.REJECTED


def test_leaving_the_sync_wrapper_early_discards_unread_replies(served: Served) -> None:
    with SyncClient(served.target) as client:
        with client.feed_many(buffer=1) as mux:
            channel = mux.open()
            mux.send_words(channel, [AddWord(word_id=f"w{i}", word=Word(text="so", speaker="A"))
                                     for i in range(20)])
            mux.flush()
        # The block closed the call and drained it; the client still works.
        assert client.describe_models()


def test_the_sync_conversation_yields_what_feed_yields(served: Served) -> None:
    events = [timed.event for timed in demo_events()]
    with SyncClient(served.target) as client:
        with pytest.raises(InputError, match="buffer"):
            client.feed(buffer=0)
        # A buffer of two: the reader waits for the caller, which reads only at the end.
        with client.feed("sync-one", buffer=2) as conversation:
            assert conversation.conversation_id == "sync-one"
            for event in events:
                conversation.send(event)
            conversation.close()
            got: list[Received] = list(conversation.events())
        with client.feed("sync-two") as conversation:
            conversation.send(events[0])
            # Welcome and one update, then a quiet spell ends the iteration; the stream stays
            # open and the block closes it, discarding what follows.
            early = list(conversation.events(timeout=1.0))
    assert isinstance(got[0], Welcome) and got[0].conversation_id == "sync-one"
    ended = got[-1]
    assert isinstance(ended, Ended) and ended.reason is EndReason.CLOSED
    updates = [e for e in got if isinstance(e, HypothesisUpdate)]
    assert [u.seq for u in updates] == list(range(1, len(updates) + 1))
    assert ended.last_seq == updates[-1].seq and updates[-1].conversation_final
    assert [type(e) for e in early] == [Welcome, HypothesisUpdate]
