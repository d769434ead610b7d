"""Abandoned units judged live: the decision at a predicted end, its revision and finality.

Restart of the second kind as the corpus defines it (``corpora/_restarts.py``, after Shriberg
1994 and the SwDA ``-/`` convention). The conversations here are invented for the tests.
"""

from __future__ import annotations

import dataclasses

import pytest
from midstream import DisfluencyLabel, InputError, Word
from midstream.models.words._abandon import AbandonCues, abandon_features
from midstream.models.words._decoder import ChannelDecoder, TokenState
from midstream.models.words._features import FeatureConfig
from midstream.models.words._model import WordModel
from midstream.models.words._train import (
    ABANDON_MIN_PRECISION,
    ABANDON_THRESHOLDS,
    abandon_examples,
    train_abandon_cues,
    train_word_artifact,
)
from word_kit import TINY, invented_abandoning, invented_conversation

_FRESH = "my brother lives in texas we went to the store last week"


def _with_cues(model: WordModel, cues: AbandonCues) -> WordModel:
    features = dict(model.artifact.features)
    features["abandon"] = cues.to_json()
    return WordModel.from_artifact(dataclasses.replace(model.artifact, features=features))


def _feed(decoder: ChannelDecoder, text: str) -> dict[int, list[TokenState]]:
    """Feed speaker A's words; the other speaker backchannels ("uh-huh") before the 6th."""
    seen: dict[int, list[TokenState]] = {}
    for key, token in enumerate(text.split()):
        for state in decoder.append(key, Word(text=token, speaker="A"),
                                    after_other_speaker=key == 5, other_words=int(key == 5)):
            seen.setdefault(state.key, []).append(state)
    return seen


@pytest.fixture(scope="module")
def model() -> WordModel:
    # The word kit's conversations and some where a speaker abandons a unit, so the CRF knows
    # that a restart's last word may end an utterance.
    conversations = [invented_conversation(seed) for seed in range(8)]
    conversations += [invented_abandoning(seed) for seed in range(3)]
    return WordModel.from_artifact(train_word_artifact(conversations, TINY))


def test_an_abandoned_unit_is_revised_to_restart_when_its_speaker_starts_afresh(
        model: WordModel) -> None:
    # Invented cues: a unit that stops at "texas" is abandoned, any other is not.
    cues = AbandonCues(weights={"b": -8.0, "w=texas": 16.0}, threshold=0.5)
    decoder = ChannelDecoder(_with_cues(model, cues))
    seen = _feed(decoder, _FRESH)
    for state in decoder.finish():
        seen.setdefault(state.key, []).append(state)
    final = {key: states[-1] for key, states in seen.items()}
    assert [final[k].label for k in range(5)] == [DisfluencyLabel.RESTART] * 5
    assert final[4].interruption_point and final[4].ends_utterance
    # First published with another label, revised once the fresh start's first word came.
    assert seen[4][0].label is not DisfluencyLabel.RESTART
    assert all(not s.final for s in seen[4] if s.label is not DisfluencyLabel.RESTART)
    assert all(final[k].label is not DisfluencyLabel.RESTART for k in range(5, 11))


def test_no_revision_below_the_threshold_or_after_a_callers_close(model: WordModel) -> None:
    never = ChannelDecoder(_with_cues(model, AbandonCues(
        weights={"b": -8.0, "w=texas": 16.0}, threshold=1.0)))
    # Cues that never reach their threshold leave every state as the CRF alone gives it.
    assert _feed(never, _FRESH) == _feed(ChannelDecoder(model), _FRESH)
    # The caller closed the unit: its words are final before any fresh start is heard.
    closed = ChannelDecoder(_with_cues(model, AbandonCues(
        weights={"b": -8.0, "w=texas": 16.0}, threshold=0.5)))
    _feed(closed, "my brother lives in texas")
    states = closed.close_utterance()
    assert all(s.final and s.label is not DisfluencyLabel.RESTART for s in states)


def test_cues_round_trip_through_the_feature_configuration() -> None:
    cues = AbandonCues(weights={"b": -2.0, "c=R": 1.5}, threshold=0.2)
    config = FeatureConfig(abandon=cues)
    again = FeatureConfig.from_json(config.to_json())
    assert again.abandon == cues
    assert FeatureConfig.from_json(FeatureConfig().to_json()).abandon is None
    features = abandon_features(["going", "to"], fragment=False, whole=True, length=2,
                                next_text="we", other_words=0, classes={"to": "R"})
    assert cues.probability(features) == pytest.approx(1 / (1 + 2.718281828459045 ** 0.5))


def test_training_learns_where_units_stop_and_chooses_a_threshold_by_cross_validation() -> None:
    conversations = [invented_abandoning(seed) for seed in range(9)]
    examples = list(abandon_examples(conversations))
    assert any(e.abandoned for e in examples) and not all(e.abandoned for e in examples)
    cues, report = train_abandon_cues(conversations)
    assert cues.threshold in ABANDON_THRESHOLDS and report["chosen"] == cues.threshold
    assert [r["threshold"] for r in report["results"]] == list(ABANDON_THRESHOLDS)
    chosen = next(r for r in report["results"] if r["threshold"] == cues.threshold)
    assert chosen["precision"] >= ABANDON_MIN_PRECISION
    stopped = abandon_features(["i", "was", "going", "to"], fragment=False, whole=True,
                               length=4, next_text="we", other_words=0, classes={})
    finished = abandon_features(["we", "went", "to", "the", "store"], fragment=False,
                                whole=True, length=5, next_text="we", other_words=0,
                                classes={})
    assert cues.probability(stopped) > cues.threshold > cues.probability(finished)


def test_training_data_without_abandoned_units_is_a_clear_error() -> None:
    with pytest.raises(InputError, match="no abandoned utterances"):
        train_abandon_cues([invented_conversation(seed) for seed in range(3)])
