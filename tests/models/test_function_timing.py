"""Timing features of the function model: how an utterance starts against the other speakers'
talk (models/functions/_views.py ``partner_gap``, _features.py ``timing_names``).

The conversations here are invented (demo data); the corpus check that the engine computes the
same gaps live as training does offline is in test_utterance_views.py.
"""

from __future__ import annotations

import math
import random

import pytest
from function_kit import invented_conversation
from midstream import Conversation, InputError, Utterance, UtteranceFunction, Word
from midstream.models.functions._features import FunctionFeatureConfig, utterance_features
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._train import FunctionTrainingOptions, train_function_model
from midstream.models.functions._views import (
    NO_PARTNER_YET,
    UtteranceView,
    check_view,
    conversation_views,
)


def test_offline_views_read_overlaps_and_the_conversations_first_words() -> None:
    conversation = invented_conversation(3, timed=True)
    views = conversation_views(conversation)
    # The first utterance: nobody else has spoken yet.
    assert views[0].partner_gap == NO_PARTNER_YET
    backchannels = [view for view, utterance in zip(views, conversation.utterances, strict=True)
                    if utterance.fine_class == "b"]
    assert backchannels
    for view in backchannels:
        # The kit starts a backchannel 0.1 s before the partner's last word, inside the
        # word before it (0.25 s long, begun 0.3 s before the last): it ends 0.05 s later.
        assert view.partner_gap == pytest.approx(-0.05)
    # Untimed words: nothing is read from timing.
    assert all(v.partner_gap is None for v in conversation_views(invented_conversation(3)))


def test_the_gap_is_to_the_closest_other_speaker_in_a_meeting() -> None:
    words = (Word(text="so", speaker="A", start=0.0, end=2.0),
             Word(text="right", speaker="B", start=2.5, end=2.8),
             Word(text="okay", speaker="C", start=3.0, end=3.2))
    utterances = tuple(Utterance(speaker=w.speaker, words=(i,),
                                 function=UtteranceFunction.OTHER, fine_tag="x", fine_class="x")
                       for i, w in enumerate(words))
    views = conversation_views(Conversation(id="m", corpus="demo", words=words,
                                            utterances=utterances))
    # C's gap is to B, who stopped last, not to A.
    assert [v.partner_gap for v in views] == [math.inf, 0.5, 0.2]


def test_timing_features_only_when_the_model_has_them_and_the_words_are_timed() -> None:
    on = FunctionFeatureConfig(timing=True)
    short = UtteranceView(speaker="B", words=("yeah",), partner_gap=-0.3)
    assert {"tg=ov", "tgw=ov|yeah"} <= set(utterance_features(short, None, on))
    assert not any(n.startswith("tg") for n in utterance_features(short, None))
    untimed = UtteranceView(speaker="B", words=("yeah",))
    assert not any(n.startswith("tg") for n in utterance_features(untimed, None, on))
    longer = UtteranceView(speaker="B", words=("we", "went", "there"), partner_gap=NO_PARTNER_YET)
    names = [n for n in utterance_features(longer, None, on) if n.startswith("tg")]
    assert names == ["tg=none"]


def test_a_malformed_partner_gap_is_refused_by_name() -> None:
    for gap in (math.nan, -math.inf, "0.3", True):
        with pytest.raises(InputError, match="partner_gap"):
            check_view(UtteranceView(speaker="A", words=("so",), partner_gap=gap))  # type: ignore[arg-type]


def test_feature_settings_without_timing_load_as_before() -> None:
    old = {k: v for k, v in FunctionFeatureConfig().to_json().items() if k != "timing"}
    assert FunctionFeatureConfig.from_json(old).timing is False
    assert FunctionFeatureConfig.from_json(
        FunctionFeatureConfig(timing=True).to_json()).timing is True


def _yeah_corpus(n: int) -> list[Conversation]:
    """The same words, told apart only by timing: "yeah" over the partner's last word is a
    backchannel, "yeah" after the partner has stopped agrees."""
    rng = random.Random(5)
    out = []
    for k in range(n):
        words: list[Word] = []
        utterances: list[Utterance] = []
        clock = 0.0
        for _ in range(8):
            overlap = rng.random() < 0.5
            first = len(words)
            for text in ("we", "bought", "new", "bikes"):
                words.append(Word(text=text, speaker="A", start=clock, end=clock + 0.25))
                clock += 0.3
            clock += -0.2 if overlap else 0.7
            words.append(Word(text="yeah", speaker="B", start=clock, end=clock + 0.25))
            clock += 1.0
            fine = "b" if overlap else "aa"
            utterances += [
                Utterance(speaker="A", words=tuple(range(first, first + 4)),
                          function=UtteranceFunction.STATEMENT, fine_tag="sd", fine_class="sd"),
                Utterance(speaker="B", words=(first + 4,),
                          function=(UtteranceFunction.ACKNOWLEDGEMENT if overlap
                                    else UtteranceFunction.AGREEMENT),
                          fine_tag=fine, fine_class=fine)]
        out.append(Conversation(id=f"yeah{k}", corpus="demo", words=tuple(words),
                                utterances=tuple(utterances)))
    return out


def test_timing_decides_what_the_same_words_do() -> None:
    def tagger(timing: bool) -> FunctionTagger:
        options = FunctionTrainingOptions(scheme="coarse", c1=0.01, c2=0.01, min_freq=1,
                                          max_iterations=60, augment=0.0,
                                          config=FunctionFeatureConfig(timing=timing))
        return FunctionTagger.from_artifact(train_function_model(_yeah_corpus(10), options))

    statement = UtteranceView(speaker="A", words=("we", "bought", "new", "bikes"),
                              partner_gap=0.8)
    over = UtteranceView(speaker="B", words=("yeah",), partner_gap=-0.2)
    after = UtteranceView(speaker="B", words=("yeah",), partner_gap=0.7)
    timed = tagger(True)
    assert timed.label_partial([statement], over).function is UtteranceFunction.ACKNOWLEDGEMENT
    assert timed.label_partial([statement], after).function is UtteranceFunction.AGREEMENT
    # Without the timing features the two are the same utterance to the model.
    untimed = tagger(False)
    assert untimed.label_partial([statement], over) == untimed.label_partial([statement], after)
