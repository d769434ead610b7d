"""Conversation settings: one pooled function model that learnt its corpora's conventions apart.

A model trained with ``setting_features`` holds shared features and a copy of each per training
corpus; a tagger told a conversation's setting adds the copy's weights (folded into the shared
rows once, so the streamed path costs the same), one told none uses the shared weights. The
invented corpora of ``setting_kit`` code the same lone "right" apart, so the setting must
decide the label. The streamed path is held to crfsuite fed the names *with* their
copies, the reference, within ``TOLERANCE``, as ``test_functions_forward`` holds the plain path.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np
import pytest
from midstream import InputError, ModelError
from midstream.models._artifact import ModelArtifact
from midstream.models._crf import CrfTagger
from midstream.models.functions._features import (
    FunctionFeatureConfig,
    sequence_features,
    setting_copies,
)
from midstream.models.functions._inference import TOLERANCE, _folded
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._train import FunctionTrainingOptions, train_function_model
from midstream.models.functions._views import UtteranceView, conversation_views
from setting_kit import (
    DISPUTED,
    DISPUTED_FUNCTION,
    SETTINGS,
    setting_conversation,
    setting_corpora,
    setting_model,
)


@pytest.fixture(scope="module")
def artifact() -> ModelArtifact:
    # With the partner and opening features and prefix augmentation, as the shipped coarse
    # model: the streamed path must fold the copies of every kind of row.
    return setting_model(config=FunctionFeatureConfig(partner=True, opening=True), augment=0.5)


@pytest.fixture(scope="module")
def tagger(artifact: ModelArtifact) -> FunctionTagger:
    return FunctionTagger.from_artifact(artifact)


def test_the_model_records_the_corpora_it_learnt_as_settings(artifact: ModelArtifact,
                                                              tagger: FunctionTagger) -> None:
    assert tagger.settings == SETTINGS
    assert artifact.hyper_parameters["setting_features"] is True
    reloaded = FunctionFeatureConfig.from_json(artifact.features["config"])
    assert reloaded.settings == SETTINGS


def test_each_setting_labels_by_its_own_corpus_conventions(tagger: FunctionTagger) -> None:
    # Held-out invented conversations (seeds the model never saw): the lone "right" after a
    # statement is labelled by the named setting's annotation.
    disputed = 0
    for seed in range(100, 106):
        views = conversation_views(setting_conversation("workshop", seed))
        labelled = {s: tagger.for_setting(s).label_conversation(views) for s in SETTINGS}
        for i, view in enumerate(views):
            if view.words == (DISPUTED,):
                disputed += 1
                for setting in SETTINGS:
                    assert labelled[setting][i].function is DISPUTED_FUNCTION[setting]
    assert disputed >= 6


def test_no_setting_is_the_shared_weights_alone(tagger: FunctionTagger) -> None:
    assert tagger.setting is None
    assert tagger.for_setting(None) is tagger
    choir = tagger.for_setting("choir")
    assert choir.setting == "choir"
    assert choir.for_setting(None).setting is None


def test_an_unknown_setting_is_refused_naming_the_known_ones(tagger: FunctionTagger) -> None:
    with pytest.raises(InputError, match=r"no setting 'meeting'.*choir, workshop"):
        tagger.for_setting("meeting")


def test_a_model_without_settings_refuses_any_setting() -> None:
    plain = train_function_model(setting_corpora(3), FunctionTrainingOptions(
        scheme="coarse", max_iterations=20, min_freq=1))
    tagger = FunctionTagger.from_artifact(plain)
    assert tagger.settings == ()
    with pytest.raises(InputError, match="trained without --setting-features"):
        tagger.for_setting("choir")


def test_corpus_names_that_cannot_name_a_setting_are_refused() -> None:
    conversations = [dataclasses.replace(c, corpus="choir|2") for c in setting_corpora(2)]
    with pytest.raises(InputError, match=r"choir\|2"):
        train_function_model(conversations, FunctionTrainingOptions(
            scheme="coarse", max_iterations=5, setting_features=True))


@pytest.mark.parametrize("bad", [["desk", ""], ["a|b"], "desk", [3]])
def test_a_model_file_with_malformed_settings_is_refused(bad: object) -> None:
    with pytest.raises(ModelError, match="settings"):
        FunctionFeatureConfig.from_json({"partner": True, "settings": bad})


def reference(crf: CrfTagger, tagger: FunctionTagger, context: Sequence[UtteranceView],
              current: UtteranceView) -> tuple[str, dict[str, float]]:
    """crfsuite over the window with each position's setting copies, the last position."""
    window = list(context[-tagger.context:])
    xseq = sequence_features([*window, current], tagger.config)
    if tagger.setting is not None:
        xseq = [setting_copies(feats, tagger.setting) for feats in xseq]
    labels, marginals = crf.tag_with_marginals(xseq)
    return labels[-1], marginals


@pytest.mark.parametrize("setting", [None, *SETTINGS])
def test_streamed_labels_in_a_setting_agree_with_crfsuite(artifact: ModelArtifact,
                                                          setting: str | None) -> None:
    tagger = FunctionTagger.from_artifact(artifact).for_setting(setting)
    crf = CrfTagger.from_bytes(artifact.crf)
    views = conversation_views(setting_conversation("workshop", 200))
    calls = 0
    for i, view in enumerate(views):
        context = views[max(0, i - tagger.context):i]
        for n in range(len(view.words) + 1):
            current = view.prefix(n)
            label, marginals = reference(crf, tagger, context, current)
            step = tagger._decode_partial(context, current)
            scores = step.scores.tolist()
            tied = scores[step.label] - scores[tagger.labels.index(label)] <= TOLERANCE
            assert tagger.labels[step.label] == label or tied
            for name, p in zip(tagger.labels, step.marginals.tolist(), strict=True):
                assert abs(p - marginals[name]) <= TOLERANCE, (name, p, marginals[name])
            calls += 1
    assert calls > 20


def test_folding_adds_each_copy_to_its_shared_row_and_keeps_copies_alone() -> None:
    state = np.arange(12, dtype=float).reshape(6, 2)
    attributes = {"w=a": 0, "@desk|w=a": 1, "@yard|w=a": 2, "@desk|w=b": 3, "w=c": 4,
                  "@yard|w=c": 5}
    names, folded = _folded(attributes, state, "@desk|")
    assert sorted(names) == ["w=a", "w=b", "w=c"]
    assert folded[names["w=a"]].tolist() == (state[0] + state[1]).tolist()
    # A copy whose shared attribute L1 removed still counts, under the shared name.
    assert folded[names["w=b"]].tolist() == state[3].tolist()
    # Another setting's copy never reaches a desk conversation.
    assert folded[names["w=c"]].tolist() == state[4].tolist()
