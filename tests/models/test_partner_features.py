"""Partner features (how an utterance echoes the partner's just before it) and rare-class
oversampling in training: what the coarse model needs to find clarification requests."""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence

import pytest
from function_kit import invented_corpus
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import Conversation, InputError, ModelError
from midstream.models.functions._features import (
    MAX_FEATURE_WORDS,
    PARTNER_LOOKBACK,
    FunctionFeatureConfig,
    chain_partners,
    earlier_partner,
    sequence_features,
    utterance_features,
)
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._train import (
    FunctionTrainingOptions,
    build_sequences,
    cross_validate_biases,
    train_function_model,
    with_decode_bias,
)
from midstream.models.functions._views import UtteranceView, conversation_views

PARTNER = FunctionFeatureConfig(partner=True)


def _features(previous: str, current: str, *, same: bool = False) -> dict[str, float]:
    before = UtteranceView(speaker="A", words=tuple(previous.split()))
    now = UtteranceView(speaker="A" if same else "B", words=tuple(current.split()))
    return utterance_features(now, before, PARTNER)


def test_an_alternative_echoing_the_partners_numbers_is_seen() -> None:
    # Invented: a delivery slot read out, and the caller unsure which time was said.
    feats = _features("the van comes at four fifteen", "four fifteen or four fifty")
    assert {"ovnum", "ovor", "ov0", "ov=most", "xlen=4-5"} <= feats.keys()


def test_a_short_repetition_request_right_after_the_partner() -> None:
    feats = _features("the van comes at four fifteen", "sorry which day")
    assert {"ov=0", "xlen=3", "xw0=sorry|short"} <= feats.keys()
    assert not {"ovnum", "ovor", "ov0"} & feats.keys()


def test_an_echo_check_repeats_the_partners_last_words() -> None:
    feats = _features("we meet at the north gate", "the north gate")
    assert {"ov=all", "ov=all|3", "ov0", "ovl"} <= feats.keys()


def test_partner_features_need_a_change_of_speaker_and_the_setting() -> None:
    assert not any(k.startswith(("ov", "xlen", "xw0"))
                   for k in _features("four fifteen", "four fifteen", same=True))
    before = UtteranceView(speaker="A", words=("four", "fifteen"))
    now = UtteranceView(speaker="B", words=("four", "fifteen"))
    assert not any(k.startswith(("ov", "xlen", "xw0")) for k in utterance_features(now, before))


_words = st.lists(st.sampled_from(("four", "fifteen", "or", "sorry", "what", "12", "the", "")),
                  max_size=MAX_FEATURE_WORDS + 5).map(tuple)


@settings(max_examples=80, deadline=None)
@given(previous=_words, current=_words)
def test_partner_features_are_pure_and_bounded(previous: tuple[str, ...],
                                               current: tuple[str, ...]) -> None:
    before = UtteranceView(speaker="A", words=previous)
    now = UtteranceView(speaker="B", words=current)
    first = utterance_features(now, before, PARTNER)
    assert first == utterance_features(now, before, PARTNER)
    assert before.words == previous and now.words == current
    # One echo bucket, whatever the words.
    assert sum(k.startswith("ov=") and "|" not in k for k in first) == (1 if current else 0)


def test_oversampling_adds_a_window_per_rare_utterance() -> None:
    conversations = invented_corpus(3)
    plain = FunctionTrainingOptions(scheme="coarse", augment=0.0)
    rare = FunctionTrainingOptions(scheme="coarse", augment=0.0,
                                   oversample=(("answer", 2),))
    for conversation in conversations:
        _, ys = build_sequences([conversation], plain)
        xs2, ys2 = build_sequences([conversation], rare)
        answers = sum(y == "answer" for y in ys[0])
        assert answers > 0
        assert ys2[0] == ys[0]
        extra = ys2[1:]
        assert len(extra) == 2 * answers
        # Each window holds the rare utterance, at most the streaming context before it and one
        # utterance after it (so that windows do not all end on the rare class).
        assert all(len(window) <= 6 and "answer" in window[-2:] for window in extra)
        assert any(window[-1] != "answer" for window in extra)
        assert all(len(x) == len(y) for x, y in zip(xs2, ys2, strict=True))


def test_oversampling_a_label_outside_the_scheme_is_refused() -> None:
    options = FunctionTrainingOptions(scheme="coarse", oversample=(("check", 3),))
    with pytest.raises(InputError, match="check"):
        build_sequences(invented_corpus(1), options)


LOOKBACK = FunctionFeatureConfig(partner=True, lookback=True)


def test_a_check_after_ones_own_okay_sees_the_partners_words() -> None:
    # Invented: the caller acknowledges, then checks the time in a second utterance of their
    # own; the check repeats the agent's numbers, not the caller's "okay".
    agent = UtteranceView(speaker="A", words=("the", "van", "comes", "at", "four", "fifteen"))
    okay = UtteranceView(speaker="B", words=("okay",))
    check = UtteranceView(speaker="B", words=("four", "fifteen"))
    chain = [agent, okay, check]
    # "okay" follows the partner itself: no earlier partner to look back to.
    assert chain_partners(chain) == [None, None, agent]
    feats = sequence_features(chain, LOOKBACK)[2]
    assert {"yov=all", "yovnum", "yov0", "yxlen=2", "yxw0=four|short"} <= feats.keys()
    assert not any(k.startswith(("ov", "xlen")) for k in feats)
    # Without the setting, or right after the partner, no look-back features.
    assert not any(k.startswith("y") for k in sequence_features(chain, PARTNER)[2])
    assert not any(k.startswith("y") for k in sequence_features([agent, check], LOOKBACK)[1])


def test_the_look_back_stops_at_the_streaming_context() -> None:
    agent = UtteranceView(speaker="A", words=("four", "fifteen"))
    own = [UtteranceView(speaker="B", words=(w,)) for w in ("okay", "so", "right", "and")]
    assert earlier_partner([agent, *own[:PARTNER_LOOKBACK - 1]], "B") is agent
    assert earlier_partner([agent, *own[:PARTNER_LOOKBACK]], "B") is None
    assert earlier_partner([agent], "B") is None  # the previous one is the partner itself
    assert earlier_partner([], "B") is None


def test_a_decode_bias_shifts_one_labels_score_everywhere_and_is_recorded() -> None:
    # The bias goes into the model's weights, so crfsuite (label_conversation) and the
    # streaming tagger (label_partial) both see it: the fine label's marginal can only grow.
    conversations = invented_corpus(6)
    # No L1 term, so that no label's bias weight is zero (a zero weight has no place in
    # crfsuite's file to shift; shift_state_weights refuses it).
    plain = FunctionTrainingOptions(scheme="coarse", augment=0.0, max_iterations=30, c1=0.0)
    artifact = train_function_model(conversations, plain)
    shifted = with_decode_bias(artifact, (("answer", 2.0),))
    assert shifted.hyper_parameters["decode_bias"] == {"answer": 2.0}
    before, after = (FunctionTagger.from_artifact(a) for a in (artifact, shifted))
    row = before._chain.attributes["bias"]
    column = before.labels.index("answer")
    assert after._chain._state[row, column] == before._chain._state[row, column] + 2.0
    views = conversation_views(conversations[0])
    for old, new in zip(before.label_conversation(views), after.label_conversation(views),
                        strict=True):
        if old.label == "answer":
            assert new.label == "answer" and new.confidence >= old.confidence


def test_cross_validation_scores_every_decode_bias_on_the_same_folds() -> None:
    conversations = invented_corpus(6)
    options = FunctionTrainingOptions(scheme="coarse", augment=0.0, max_iterations=20, c1=0.0)
    seen: list[float] = []

    def score(tagger: FunctionTagger, held: Sequence[Conversation]) -> dict[str, float]:
        chain = tagger._chain
        seen.append(chain._state[chain.attributes["bias"], tagger.labels.index("answer")])
        return {"score": float(len(held))}

    results = cross_validate_biases(conversations, options, [(), (("answer", 1.0),)],
                                    folds=2, score=score)
    assert results == [{"score": 3.0}, {"score": 3.0}]
    # Each fold's model scored without, then with, the bias: one training per fold.
    assert [b - a for a, b in zip(seen[::2], seen[1::2], strict=True)] == pytest.approx(
        [1.0, 1.0])


def test_a_decode_bias_that_l1_left_nothing_to_shift_is_left_out_not_fatal(
        caplog: pytest.LogCaptureFixture) -> None:
    # With strong L1 the small invented corpus keeps no bias weight for 'answer': that grid
    # cell cannot be scored, and a long grid search must still give its other cells.
    conversations = invented_corpus(6)
    options = FunctionTrainingOptions(scheme="coarse", augment=0.0, max_iterations=20, c1=1.0)

    def score(tagger: FunctionTagger, held: Sequence[Conversation]) -> dict[str, float]:
        return {"score": float(len(held))}

    with caplog.at_level(logging.WARNING):
        results = cross_validate_biases(conversations, options, [(), (("answer", 1.0),)],
                                        folds=2, score=score)
    assert results[0] == {"score": 3.0}
    assert math.isnan(results[1]["score"]) and set(results[1]) == {"score"}
    assert "decode bias (('answer', 1.0),) left out of the grid" in caplog.text
    artifact = train_function_model(conversations, options)
    with pytest.raises(ModelError, match="L1 regularisation removed it"):
        with_decode_bias(artifact, (("answer", 1.0),))
