"""Round trips of the hand-written wire conversion shared by server and client."""

from __future__ import annotations

import pytest
from midstream import (
    DisfluencyLabel,
    EventError,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
)
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb


@pytest.mark.parametrize("label", list(DisfluencyLabel))
def test_every_label_round_trips(label: DisfluencyLabel) -> None:
    assert cv.label_from_wire(cv.label_to_wire(label)) is label


@pytest.mark.parametrize("function", list(UtteranceFunction))
def test_every_function_round_trips(function: UtteranceFunction) -> None:
    assert cv.function_from_wire(cv.function_to_wire(function)) is function


def test_unspecified_enums_are_refused_naming_the_field() -> None:
    with pytest.raises(EventError, match="role"):
        cv.label_from_wire(pb.WORD_ROLE_UNSPECIFIED)
    with pytest.raises(EventError, match="function"):
        cv.function_from_wire(99)
    with pytest.raises(EventError, match=r"hint\.kind"):
        cv.hint_from_wire(pb.SpeakerHint(speaker="A"))


def test_spoken_word_keeps_absent_optionals_absent() -> None:
    word = Word(text="Uh,", speaker="A", start=0.0, end=None, confidence=0.5)
    message = cv.spoken_word_to_wire("w1", word)
    assert message.HasField("start_s") and not message.HasField("end_s")
    assert cv.spoken_word_from_wire(message) == ("w1", word)


def test_update_round_trips() -> None:
    word = WordHypothesis(word_id="w1", speaker="A", label=DisfluencyLabel.REPARANDUM,
                          confidence=0.75, revision=2, final=True, reparandum_of="w3",
                          interruption_point=True, text="went", start=0.0, end=0.25)
    utt = UtteranceHypothesis(utterance_id="u1", speaker="A", word_ids=("w1", "w3"),
                              clean_text="i went", function=UtteranceFunction.STATEMENT,
                              fine_class="sd", confidence=0.5, revision=1, final=False)
    update = HypothesisUpdate(seq=7, server_time=1.5e9,
                              diff=HypothesisDiff(words=(word,), utterances=(utt,),
                                                  withdrawn_word_ids=("w2",)),
                              conversation_final=True)
    assert cv.update_from_wire(cv.update_to_wire(update)) == update
    snap = cv.snapshot_to_wire(7, [word], [utt], conversation_final=False)
    assert cv.snapshot_from_wire(snap) == (7, (word,), (utt,), False)
    assert cv.snapshot_to_wire(7, [word], [utt], conversation_final=False, epoch=3).epoch == 3
    assert cv.hint_from_wire(cv.hint_to_wire("B", turn_end=True)) == ("B", True)


def test_update_built_in_place_matches_its_states_built_alone() -> None:
    # The update is written in place (inside a reply frame); its states must be exactly what
    # the standalone state conversions give, an unset repair link included.
    words = (
        WordHypothesis(word_id="w1", speaker="A", label=DisfluencyLabel.FILLER,
                       confidence=0.9, revision=0, final=False, text="uh", start=0.5),
        WordHypothesis(word_id="w2", speaker="A", label=DisfluencyLabel.REPARANDUM,
                       confidence=0.6, revision=3, final=True, reparandum_of="w4",
                       interruption_point=True, text="we", end=1.0),
    )
    utt = UtteranceHypothesis(utterance_id="u1", speaker="A", word_ids=("w1", "w2"),
                              clean_text="", function=UtteranceFunction.QUESTION,
                              fine_class="qy", confidence=0.25, revision=0, final=True)
    update = HypothesisUpdate(seq=3, server_time=2.0, diff=HypothesisDiff(
        words=words, utterances=(utt,)))
    frame = pb.ServerFrame()
    cv.update_into_wire(update, frame.replies.add(channel=5).message.update)
    built = frame.replies[0].message.update
    assert list(built.words) == [cv.word_state_to_wire(w) for w in words]
    assert list(built.utterances) == [cv.utterance_state_to_wire(utt)]
    assert (built.seq, built.server_time, list(built.withdrawn_word_ids)) == (3, 2.0, [])
    assert built == cv.update_to_wire(update)


@pytest.mark.parametrize("seconds", [0.0, 12.75])
def test_a_time_tick_round_trips(seconds: float) -> None:
    assert cv.tick_from_wire(cv.tick_to_wire(seconds)) == seconds


@pytest.mark.parametrize("seconds", [float("nan"), float("inf"), -0.5])
def test_a_time_tick_outside_the_clock_is_refused_naming_the_field(seconds: float) -> None:
    with pytest.raises(EventError, match=r"'tick\.time_s'"):
        cv.tick_from_wire(pb.TimeTick(time_s=seconds))
