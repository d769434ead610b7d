"""Random event sequences against the servicer over real gRPC.

Each Hypothesis example is one Feed stream (mostly well-formed, some events malformed or out
of place) sent with a deadline to a real server, followed by a late ``Follow`` of the same
conversation from sequence number 1. Whatever the events, the server must:

- answer within the deadline, with OK or a status naming bad input (never UNKNOWN, INTERNAL or
  a hang), and keep serving the next stream;
- number updates 1, 2, 3... without a gap, ending with one ``conversation_final`` update;
- never change a final word or utterance, never finalise a withdrawn word, and leave every
  standing word final at the end;
- give the late follower exactly the updates the caller got, then ``ended`` with the reason
  that matches the caller's outcome.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import grpc
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from midstream.models import ModelBundle
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from reliability_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    SMALL_LIMITS,
    WAIT_S,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    served_in_thread,
)

pytestmark = pytest.mark.corpus  # the models are trained from SwDA when none are shipped

#: Statuses a stream of bad input may end with; anything else is a server fault.
_INPUT_STATUSES = {grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.RESOURCE_EXHAUSTED}

_GOOD_TEXT = st.sampled_from(["i", "uh", "we", "the", "went", "to", "yeah", "so", "um", "no"])


@st.composite
def _spoken(draw: st.DrawFn, position: int, *, bad: bool = False) -> pb.SpokenWord:
    """A word that is well formed, or (``bad``) malformed in one random way."""
    word = pb.SpokenWord(word_id=f"w{position}", speaker=draw(st.sampled_from(["A", "B"])),
                         text=draw(_GOOD_TEXT))
    if draw(st.booleans()):
        word.start_s = position * 0.5
        word.end_s = position * 0.5 + 0.3
    if bad:
        flaw = draw(st.sampled_from(["text", "time", "confidence", "duplicate"]))
        if flaw == "text":
            word.text = draw(st.text(max_size=4))  # empty, punctuation, controls... or fine
        elif flaw == "time":
            word.start_s = draw(st.floats(allow_nan=True, allow_infinity=True))
        elif flaw == "confidence":
            word.confidence = draw(st.floats(allow_nan=True))
        else:
            word.word_id = f"w{draw(st.integers(0, position))}"
    return word


@st.composite
def _events(draw: st.DrawFn) -> list[pb.ClientEvent]:
    events: list[pb.ClientEvent] = []
    sent: list[str] = []  # word ids sent so far, to aim corrections at recent words
    for position in range(draw(st.integers(0, 40))):
        kind = draw(st.sampled_from([*["words"] * 8, "batch", "batch", "replace", "withdraw",
                                     "hint", "hint", "close", *["bad"] * (position % 2)]))
        if kind == "words":
            word = draw(_spoken(position))
            sent.append(word.word_id)
            events.append(pb.ClientEvent(words=pb.WordBatch(words=[word])))
        elif kind == "batch":
            batch = [draw(_spoken(position * 100 + i)) for i in range(draw(st.integers(1, 4)))]
            sent += [w.word_id for w in batch]
            events.append(pb.ClientEvent(words=pb.WordBatch(words=batch)))
        elif kind in ("replace", "withdraw"):
            # A recent word (often still open), sometimes one already final or never sent.
            target = draw(st.sampled_from(sent[-3:] or ["w999"]))
            if kind == "withdraw":
                events.append(pb.ClientEvent(withdraw=pb.WithdrawWord(word_id=target)))
            else:
                word = draw(_spoken(position))
                word.word_id = target
                word.ClearField("start_s")
                word.ClearField("end_s")
                events.append(pb.ClientEvent(replace=pb.ReplaceWord(word=word)))
        elif kind == "hint":
            events.append(pb.ClientEvent(hint=pb.SpeakerHint(
                speaker=draw(st.sampled_from(["A", "B", "C"])),
                kind=draw(st.sampled_from([pb.HINT_KIND_UTTERANCE_END,
                                           pb.HINT_KIND_TURN_END])))))
        elif kind == "close":
            events.append(CLOSE)
            if draw(st.integers(0, 3)):
                break  # usually the last event; sometimes more follow (and are refused)
        else:
            events.append(draw(st.sampled_from([
                pb.ClientEvent(words=pb.WordBatch(words=[draw(_spoken(position, bad=True))])),
                pb.ClientEvent(),
                pb.ClientEvent(words=pb.WordBatch()),
                pb.ClientEvent(hint=pb.SpeakerHint(speaker="A")),
                open_event(),
            ])))
    return events


def _feed(stub: pb_grpc.MidstreamStub, events: list[pb.ClientEvent],
              ) -> tuple[list[pb.ServerMessage], grpc.StatusCode, str]:
    messages: list[pb.ServerMessage] = []
    try:
        for message in stub.Feed(iter([open_event(), *events]), timeout=WAIT_S):
            messages.append(message)
    except grpc.RpcError as error:
        return messages, error.code(), error.details() or ""
    return messages, grpc.StatusCode.OK, ""


def _check_states(updates: list[pb.Update]) -> None:
    words: dict[str, pb.WordState] = {}
    utterances: dict[str, pb.UtteranceState] = {}
    withdrawn: set[str] = set()
    for update in updates:
        for word in update.words:
            assert word.word_id not in withdrawn, "a withdrawn word was published again"
            before = words.get(word.word_id)
            assert before is None or not before.final, "a final word changed"
            words[word.word_id] = word
        for utterance in update.utterances:
            before_u = utterances.get(utterance.utterance_id)
            # Dissolved utterances (final, no words) included: their ids are never reused.
            assert before_u is None or not before_u.final, "a final utterance changed"
            utterances[utterance.utterance_id] = utterance
        for word_id in update.withdrawn_word_ids:
            assert not words.pop(word_id).final, "a final word was withdrawn"
            withdrawn.add(word_id)
    assert all(w.final for w in words.values()), "a word was left open at the end"
    assert all(u.final for u in utterances.values()), "an utterance was left open at the end"


@pytest.fixture(name="stub")
def stub_fixture(bundle: ModelBundle) -> Iterator[pb_grpc.MidstreamStub]:
    """One server for every example of a test (fixtures are not re-run per example), so later
    streams also check that earlier ones left it serving."""
    with served_in_thread(bundle, SMALL_LIMITS) as server, \
            grpc.insecure_channel(f"127.0.0.1:{server.port}") as channel:
        yield pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_random_streams_over_grpc_keep_every_promise(stub: pb_grpc.MidstreamStub,
                                                      data: Any) -> None:
    events = data.draw(_events())
    messages, code, details = _feed(stub, events)
    event(f"status {code.name}")  # --hypothesis-show-statistics shows the mix
    assert code == grpc.StatusCode.OK or code in _INPUT_STATUSES, (code, details)
    assert code == grpc.StatusCode.OK or details, "a refusal must say what was wrong"
    assert messages[0].WhichOneof("body") == "welcome"
    conversation = messages[0].welcome.conversation_id
    updates = [m.update for m in messages if m.HasField("update")]
    assert [u.seq for u in updates] == list(range(1, len(updates) + 1))
    assert [u.conversation_final for u in updates].count(True) == 1
    assert updates[-1].conversation_final
    _check_states(updates)
    ended = [m.ended for m in messages if m.HasField("ended")]
    if code == grpc.StatusCode.OK:
        assert [e.reason for e in ended] == [pb.END_REASON_CLOSED]
    # The caller's own stream carries `ended` only when the conversation closed normally.
    # At most 40 events make at most 41 updates, all still in the replay buffer (50 updates
    # under SMALL_LIMITS), so the late follower gets every one rather than a gap.
    late = list(stub.Follow(pb.FollowRequest(conversation_id=conversation, from_seq=1),
                            timeout=WAIT_S))
    assert [m.update for m in late[:-1]] == updates
    expected = pb.END_REASON_CLOSED if ended else pb.END_REASON_REJECTED
    assert late[-1].ended.reason == expected
    assert late[-1].ended.last_seq == len(updates)
