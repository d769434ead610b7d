"""Word-model training helpers: the decoding tag bias, its cross-validated choice, its flag."""

from __future__ import annotations

from dataclasses import replace

import pytest
from midstream import DisfluencyLabel, InputError
from midstream.client.cli._cmd_train import parse_tag_bias
from midstream.models._artifact import ModelArtifact
from midstream.models.words._eval import BinaryCounts
from midstream.models.words._features import tokens_from_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import channel_sequences, decode_tag
from midstream.models.words._train import (
    expand_tag_bias,
    held_out_channels,
    sweep_tag_bias,
    train_word_artifact,
    tune_tag_bias,
)
from word_kit import TINY, invented_conversation, tiny_model

_HELD_OUT = [invented_conversation(seed) for seed in (500, 501, 502)]


def test_a_disfluency_tag_bias_covers_its_utterance_end_variant() -> None:
    tags = ("fl", "fl/end", "rp", "rp.ip", "rp.ip/end", "ro")
    assert expand_tag_bias({"rp.ip": 0.3, "ro": 0.0}, tags) == {"rp.ip": 0.3, "rp.ip/end": 0.3}
    with pytest.raises(InputError, match="unknown tags"):
        expand_tag_bias({"rp.ip/end": 0.3}, tags)


def test_unbiased_sweep_scores_what_crfsuite_viterbi_decodes() -> None:
    # The sweep's own Viterbi over stored state scores must agree with crfsuite's decoder.
    model = tiny_model()
    counts = BinaryCounts()
    for conversation in _HELD_OUT:
        for channel in channel_sequences(conversation):
            assert channel.tags is not None
            tokens = tokens_from_words(channel.words, channel.after_other_speaker)
            for word, gold, tag in zip(channel.words, channel.tags, model.tag_tokens(tokens),
                                       strict=True):
                if not word.fragment:
                    counts.add(decode_tag(tag)[1] == DisfluencyLabel.REPARANDUM,
                               decode_tag(gold)[1] == DisfluencyLabel.REPARANDUM)
    [result] = sweep_tag_bias([(model, held_out_channels(_HELD_OUT, model))], [{}])
    assert (result.precision, result.recall, result.f1) == pytest.approx(
        (counts.precision, counts.recall, counts.f1))
    assert result.f1 > 0.5


def test_a_large_reparandum_bias_labels_every_word_reparandum() -> None:
    model = tiny_model()
    channels = held_out_channels(_HELD_OUT, model)
    plain, forced = sweep_tag_bias([(model, channels)], [{}, {"rp": 60.0, "rp.ip": 60.0}])
    assert forced.recall == 1.0
    assert forced.precision < plain.precision


def test_a_trained_bias_is_stored_and_applied_when_decoding() -> None:
    conversations = [invented_conversation(seed) for seed in range(8)]
    biased = replace(TINY, tag_bias=(("rp", 60.0), ("rp.ip", 60.0)))
    artifact = ModelArtifact.from_bytes(
        train_word_artifact(conversations, biased).to_bytes())
    model = WordModel.from_artifact(artifact)
    assert model.config.tag_bias["rp"] == 60.0
    assert artifact.hyper_parameters["tag_bias"] == {"rp": 60.0, "rp.ip": 60.0}
    channel = channel_sequences(_HELD_OUT[0])[0]
    tags = model.tag_tokens(tokens_from_words(channel.words, channel.after_other_speaker))
    assert {decode_tag(t)[1] for t in tags} == {DisfluencyLabel.REPARANDUM}


def test_tuning_scores_every_candidate_on_held_out_folds() -> None:
    conversations = [invented_conversation(seed) for seed in range(6)]
    candidates = [{}, {"rp.ip": 0.3}, {"rp": 60.0, "rp.ip": 60.0}]
    results = tune_tag_bias(conversations, TINY, candidates, folds=2, subset=None,
                            progress=False)
    assert [dict(r.bias) for r in results] == candidates
    assert results[2].recall == 1.0
    assert max(results, key=lambda r: r.f1).bias != results[2].bias


@pytest.mark.parametrize(("text", "message"), [
    ("rp.ip", "not TAG=VALUE"),
    ("rp.x=0.3", "unknown tag"),
    ("rp=0.1,rp=0.2", "given twice"),
    ("rp=high", "not a number"),
    ("rp=nan", "not a finite number"),
])
def test_bad_tag_bias_flags_are_named(text: str, message: str) -> None:
    with pytest.raises(InputError, match=message):
        parse_tag_bias(text)


def test_tag_bias_flag_parses_to_sorted_pairs() -> None:
    assert parse_tag_bias("rp.ip=0.3, rp=-0.1") == (("rp", -0.1), ("rp.ip", 0.3))
