"""Utterance ends from recogniser timing, through a real server: CTM input and time ticks.

The call is invented for this test (a tenant reports a leaking tap to a building's caretaker):
two CTM channels, at least 1.2 s of silence before every utterance, the other speaker's whole
turn between a speaker's turns, and two utterances of one speaker separated by 3 s of silence
alone (a shorter pause inside one speaker's turn is weighed with the words around it, see
``models/weights/boundaries.md``). No caller hint is sent: the server must find the ends from
the times.
"""

from __future__ import annotations

import math

import grpc
import pytest
from midstream.client import AddWord, parse_ctm
from midstream.client._inputs import sort_by_time
from midstream.models import ModelBundle
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Caller,
    Running,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    running_fixture,
    spoken,
    start_server_fixture,
    words_event,
)

#: ``(channel, silence before in seconds, words)``, one utterance each, in order (invented).
_CALL = (
    ("tenant", 0.4, "hello is that the caretaker"),
    ("caretaker", 1.3, "yes speaking"),
    ("tenant", 1.4, "the tap in my kitchen has been dripping all night"),
    ("tenant", 3.0, "could someone come and look at it today"),
    ("caretaker", 1.2, "which flat are you in"),
    ("tenant", 1.5, "flat twelve on the second floor"),
    ("caretaker", 1.3, "okay i can come round at four"),
    ("tenant", 1.2, "thank you"),
)
_WORD_S = 0.3  # per word, of which 0.27 s is the word itself


def _ctm() -> list[str]:
    lines: dict[str, list[str]] = {}
    clock = 0.0
    for channel, silence, text in _CALL:
        clock += silence
        for token in text.split():
            lines.setdefault(channel, []).append(
                f"tap-call {channel} {clock:.2f} {_WORD_S * 0.9:.2f} {token} 0.9")
            clock += _WORD_S
        clock -= _WORD_S * 0.1
    return [line for block in lines.values() for line in block]  # one block per channel


def _expected_ends() -> set[str]:
    """Word ids (CTM ids: channel-n) of the last word of every utterance of the call."""
    counts: dict[str, int] = {}
    ends = set()
    for channel, _, text in _CALL:
        counts[channel] = counts.get(channel, 0) + len(text.split())
        ends.add(f"{channel}-{counts[channel]}")
    return ends


def test_the_shipped_models_weigh_word_times(bundle: ModelBundle) -> None:
    # The server test below needs the boundary model the server loads by default.
    assert bundle.boundary_model is not None


async def test_a_ctm_call_is_split_at_its_silences_and_speaker_changes(
        running: Running) -> None:
    events = sort_by_time(parse_ctm(_ctm(), "tap-call.ctm"))
    words = [e.event for e in events if isinstance(e.event, AddWord)]
    # One event per word, as a live recogniser sends them.
    sent = [open_event(), *(words_event(cv.spoken_word_to_wire(w.word_id, w.word))
                            for w in words), CLOSE]
    utterances: dict[str, pb.UtteranceState] = {}
    async for message in running.stub.Feed(iter(sent)):
        if message.WhichOneof("body") == "update":
            for state in message.update.utterances:
                utterances[state.utterance_id] = state
    final = [u for u in utterances.values() if u.word_ids]
    assert all(u.final for u in final)
    last_words = {u.word_ids[-1] for u in final}
    # Every silence of 1.2 s or more and every speaker change ends an utterance ...
    assert _expected_ends() <= last_words
    # ... and no utterance reaches across one.
    end_of = {w: u.utterance_id for u in final for w in u.word_ids}
    assert {word.word_id for word in words} == set(end_of)
    for expected in _expected_ends():
        channel, number = expected.rsplit("-", 1)
        following = f"{channel}-{int(number) + 1}"
        if following in end_of:
            assert end_of[following] != end_of[expected]


async def test_a_tick_closes_an_utterance_during_the_silence_after_it(running: Running) -> None:
    caller = Caller(running.stub)
    await caller.open()
    said = "the boiler in the basement is making a loud noise"
    text = said.split()
    for k, token in enumerate(text):
        await caller.send(words_event(spoken(f"w{k}", token, "tenant", start=0.3 * k)))
    last_end = 0.3 * (len(text) - 1) + 0.2
    # The recogniser's clock moves on while nobody speaks; no word, no hint.
    await caller.call.write(pb.ClientEvent(tick=cv.tick_to_wire(last_end + 2.5)))
    message = await caller.call.read()
    assert message.WhichOneof("body") == "update"
    closed = [u for u in message.update.utterances if u.final and u.word_ids]
    assert [list(u.word_ids) for u in closed] == [[f"w{k}" for k in range(len(text))]]
    assert all(w.final for w in message.update.words)
    await caller.close()


@pytest.mark.parametrize("value", [math.nan, math.inf, -1.0])
async def test_a_tick_with_a_bad_time_is_refused_naming_the_field(running: Running,
                                                                  value: float) -> None:
    events = [open_event(), pb.ClientEvent(tick=pb.TimeTick(time_s=value))]
    with pytest.raises(grpc.aio.AioRpcError) as raised:
        _ = [m async for m in running.stub.Feed(iter(events))]
    assert raised.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "tick.time_s" in (raised.value.details() or "")
