"""The streaming channel decoder and the lattice under it."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
from midstream import DisfluencyLabel, EventError, ModelError, Word
from midstream.models._artifact import ModelArtifact
from midstream.models._lattice import decode_lattice, decode_window
from midstream.models.words._decoder import ChannelDecoder, DecoderConfig, TokenState
from midstream.models.words._features import features_at, tokens_from_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import channel_sequences
from midstream.models.words._train import train_word_artifact
from word_kit import TINY, invented_conversation, tiny_model


@pytest.fixture(scope="module")
def model() -> WordModel:
    return tiny_model()


def _words(text: str, speaker: str = "A") -> list[Word]:
    return [Word(text=t, speaker=speaker) for t in text.split()]


def _stream(decoder: ChannelDecoder, words: list[Word]) -> dict[int, list[TokenState]]:
    seen: dict[int, list[TokenState]] = {}
    for key, word in enumerate(words):
        for state in decoder.append(key, word):
            seen.setdefault(state.key, []).append(state)
    for state in decoder.finish():
        seen.setdefault(state.key, []).append(state)
    return seen


def test_lattice_matches_brute_force() -> None:
    rng = np.random.default_rng(0)
    size = 3
    for trial in range(60):
        n = int(rng.integers(1, 6))
        emissions = rng.normal(0, 3, (n, size))
        transitions = rng.normal(0, 2, (size, size))
        first = int(rng.integers(size)) if trial % 2 else None
        path, marginals = decode_lattice(emissions, np.exp(transitions), first=first)
        scores = {}
        for labels in itertools.product(range(size), repeat=n):
            if first is not None and labels[0] != first:
                continue
            scores[labels] = sum(emissions[t, y] for t, y in enumerate(labels)) + sum(
                transitions[a, b] for a, b in itertools.pairwise(labels))
        assert tuple(path) == max(scores, key=scores.__getitem__)
        z = sum(np.exp(s) for s in scores.values())
        for t in range(n):
            for y in range(size):
                expected = sum(np.exp(s) for ls, s in scores.items() if ls[t] == y) / z
                assert marginals[t, y] == pytest.approx(expected, abs=1e-9)


def test_numpy_decoding_agrees_with_crfsuite(model: WordModel) -> None:
    for seed in (100, 101):
        for channel in channel_sequences(invented_conversation(seed)):
            tokens = tokens_from_words(channel.words, channel.after_other_speaker)
            path, _ = model.decode_tokens(tokens)
            assert [model.tags[k] for k in path] == model.tag_tokens(tokens)


def test_every_word_ends_final_exactly_once(model: WordModel) -> None:
    words = _words("i think i think uh that we went to the store last week it was nice")
    seen = _stream(ChannelDecoder(model), words)
    assert sorted(seen) == list(range(len(words)))
    for states in seen.values():
        assert [s.final for s in states].count(True) == 1
        assert states[-1].final
        assert [s.revision for s in states] == list(range(len(states)))
        assert all(0.0 <= s.confidence <= 1.0 and 0.0 <= s.boundary_confidence <= 1.0
                   for s in states)


def test_a_word_is_final_once_lag_words_follow(model: WordModel) -> None:
    decoder = ChannelDecoder(model, DecoderConfig(lag=3))
    finals = []
    for key, word in enumerate(_words("we went to the store last week")):
        finals += [s.key for s in decoder.append(key, word) if s.final]
        assert len(decoder.open_keys) <= 3
    assert finals == [0, 1, 2, 3]


def test_repetition_is_labelled_and_linked(model: WordModel) -> None:
    words = _words("the kids the kids like to play outside")
    seen = _stream(ChannelDecoder(model), words)
    final = {k: states[-1] for k, states in seen.items()}
    assert final[0].label == DisfluencyLabel.REPARANDUM
    assert final[1].label == DisfluencyLabel.REPARANDUM
    assert final[1].interruption_point
    assert final[0].reparandum_onset_key == 2 and final[1].reparandum_onset_key == 2
    assert final[2].label == DisfluencyLabel.REPAIR
    # The link can only be made once the onset has arrived.
    assert seen[1][0].reparandum_onset_key is None


def test_close_utterance_finalises_and_ends(model: WordModel) -> None:
    decoder = ChannelDecoder(model)
    for key, word in enumerate(_words("we went to the")):
        decoder.append(key, word)
    states = decoder.close_utterance()
    assert {s.key for s in states} == {0, 1, 2, 3}
    assert all(s.final for s in states)
    assert next(s for s in states if s.key == 3).ends_utterance
    assert decoder.open_keys == ()
    assert decoder.close_utterance() == []


def test_memory_is_bounded_however_long_the_speaker_talks(model: WordModel) -> None:
    decoder = ChannelDecoder(model, DecoderConfig(lag=6))
    words = _words("we went to the store last week and it was a really nice day " * 300)
    for key, word in enumerate(words):
        decoder.append(key, word)
        assert decoder.held_words <= model.config.left + 6 + 1


def test_replace_and_withdraw_open_words(model: WordModel) -> None:
    decoder = ChannelDecoder(model)
    for key, word in enumerate(_words("the kids the")):
        decoder.append(key, word)
    states = decoder.replace(2, Word(text="dogs", speaker="A"))
    assert all(s.key in (0, 1, 2) for s in states)
    decoder.withdraw(2)
    assert decoder.open_keys == (0, 1)
    with pytest.raises(EventError, match="not an open word"):
        decoder.withdraw(2)


def test_protocol_errors(model: WordModel) -> None:
    decoder = ChannelDecoder(model, DecoderConfig(lag=1))
    for key, word in enumerate(_words("we went to")):
        decoder.append(key, word)
    with pytest.raises(EventError, match="already final"):
        decoder.replace(0, Word(text="you", speaker="A"))
    with pytest.raises(EventError, match="already final"):
        decoder.withdraw(1)
    with pytest.raises(EventError, match="key already used"):
        decoder.append(2, Word(text="x", speaker="A"))
    decoder.finish()
    with pytest.raises(EventError, match="finished"):
        decoder.append(9, Word(text="x", speaker="A"))


def test_decoder_config_limits() -> None:
    with pytest.raises(ValueError, match="lag"):
        DecoderConfig(lag=-1)
    with pytest.raises(ValueError, match="confidence_step"):
        DecoderConfig(confidence_step=2.0)


def test_tag_bias_shifts_decoding_towards_the_biased_tag(model: WordModel) -> None:
    features = dict(model.artifact.features)
    features["tag_bias"] = {"rp": 50.0}
    biased = WordModel.from_artifact(dataclasses.replace(model.artifact, features=features))
    tokens = tokens_from_words(_words("i think i think that we went"), [False] * 7)
    # A bias far above any trained weight decides every word but the channel's last.
    assert {biased.tags[k] for k in biased.decode_tokens(tokens)[0][:-1]} == {"rp"}
    assert biased.tag_tokens(tokens) == [biased.tags[k] for k in biased.decode_tokens(tokens)[0]]
    with pytest.raises(ModelError, match="unknown tags"):
        features["tag_bias"] = {"nope": 1.0}
        WordModel.from_artifact(dataclasses.replace(model.artifact, features=features))


def test_window_summary_sums_the_marginals_of_each_label_group() -> None:
    rng = np.random.default_rng(1)
    size = 6
    groups = np.array([0, 0, 1, 2, 2, 2], dtype=np.int64)
    ends = np.array([False, True, False, False, True, True])
    for trial in range(30):
        scores = rng.normal(0, 3, (9, size))
        transitions = np.exp(rng.normal(0, 2, (size, size)))
        lo, hi = int(rng.integers(0, 4)), int(rng.integers(5, 10))
        first = int(rng.integers(size)) if trial % 2 else -1
        mask = np.array([0.0, 1.0, 0.0, 0.0, 1.0, 1.0]) if trial % 3 == 0 else None
        result = decode_window(scores, lo, hi, transitions, first=first, last_mask=mask,
                               tag_group=groups, tag_end=ends)
        path, marginals = decode_lattice(scores[lo:hi], transitions,
                                         first=None if first < 0 else first, last_mask=mask)
        assert result.path == path
        for t, tag in enumerate(path):
            assert result.confidence[t] == pytest.approx(marginals[t, groups == groups[tag]].sum())
            assert result.end_probability[t] == pytest.approx(marginals[t, ends].sum())


@pytest.mark.parametrize("settle", [False, True])
def test_a_word_stays_open_until_its_features_are_complete(settle: bool) -> None:
    # A word's features read `right` words ahead; finalising it earlier would fix a label the
    # model never saw its full evidence for. Without settling the default lag follows the
    # model; settling never finalises before that either.
    conversations = [invented_conversation(seed) for seed in range(4)]
    for right in (3, 6):
        config = dataclasses.replace(TINY, right=right, left=8)
        model = WordModel.from_artifact(
            ModelArtifact.from_bytes(train_word_artifact(conversations, config).to_bytes()))
        decoder = ChannelDecoder(model, DecoderConfig(settle=settle))
        words = _words("we went to the store last week and it was nice so we stayed there")
        final_at = None
        for key, word in enumerate(words):
            if any(s.key == 0 and s.final for s in decoder.append(key, word)):
                final_at = key
                break
        assert final_at is not None
        if settle:
            assert final_at >= right + 1
        else:
            assert final_at == right + 1  # right + 1 newer words had arrived


def _offline_labels(model: WordModel, words: list[Word]) -> list[DisfluencyLabel]:
    """Labels of crfsuite-style Viterbi over the whole channel, ending an utterance."""
    tokens = tokens_from_words(words, [False] * len(words))
    emissions = np.stack([model.score(features_at(tokens, i, model.config))
                          for i in range(len(tokens))])
    path, _ = decode_lattice(emissions, model.exp_transitions, last_mask=model.end_mask)
    return [model.tag_label[t] for t in path]


def test_settled_final_labels_are_those_of_decoding_the_whole_channel(model: WordModel) -> None:
    # Online Viterbi: a word is final only once every path through the newest complete word
    # agrees on it, so with no lag forcing a decision the stream ends where offline decoding
    # of the whole channel does (what the offline figure of the evaluation measures).
    rng = np.random.default_rng(3)
    vocab = ["i", "the", "uh", "um", "think", "we", "went", "to", "store", "kids", "mean",
             "well", "i", "i", "the", "you", "know", "yeah", "so", "it", "was"]
    settled_early = total = 0
    for _ in range(40):
        words = [Word(text=str(rng.choice(vocab)), speaker="A")
                 for _ in range(int(rng.integers(1, 80)))]
        decoder = ChannelDecoder(model, DecoderConfig(lag=1000))
        final: dict[int, DisfluencyLabel] = {}
        for key, word in enumerate(words):
            for state in decoder.append(key, word):
                if state.final:
                    final[state.key] = state.label
        settled_early += len(final)
        total += len(words)
        for state in decoder.finish():
            assert state.final
            final[state.key] = state.label
        assert [final[k] for k in range(len(words))] == _offline_labels(model, words)
    assert settled_early > total / 2  # paths do meet: most words settle before the end

