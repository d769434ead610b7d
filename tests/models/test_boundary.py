"""The boundary model: timing features, how its evidence joins the decoder, ticks, untimed input.

Conversations here are invented (``word_kit``): one utterance per turn, 0.05 s between words and
0.8 s of silence before every turn, so the silences and speaker changes are where the
utterances end.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
from midstream import Conversation, ModelError, Utterance, UtteranceFunction, Word
from midstream.models._artifact import ModelArtifact
from midstream.models.boundaries._model import (
    BoundaryModel,
    boundary_features,
    overlap_flags,
)
from midstream.models.words._decoder import ChannelDecoder, TokenState
from midstream.models.words._eval import evaluate_words
from midstream.models.words._features import Token
from midstream.models.words._model import WordModel
from word_kit import invented_conversation, one_speaker, tiny_boundary_bytes, tiny_model


@pytest.fixture(scope="module")
def boundary() -> BoundaryModel:
    return BoundaryModel.from_artifact(ModelArtifact.from_bytes(tiny_boundary_bytes()))


@pytest.fixture(scope="module")
def model() -> WordModel:
    return tiny_model()


def _tokens(*texts: str) -> list[Token]:
    return [Token(text=t, start=0.4 * k, end=0.4 * k + 0.3) for k, t in enumerate(texts)]


def test_silence_indicators_are_cumulative_so_a_running_silence_is_a_lower_bound() -> None:
    tokens = _tokens("okay", "so")
    short = boundary_features(tokens, 0, silence=0.6, other_spoke=False)
    assert [f for f in short if f.startswith("sa>=")] == ["sa>=0.1", "sa>=0.2", "sa>=0.3",
                                                          "sa>=0.5"]
    longer = boundary_features(tokens, 0, silence=2.0, other_spoke=False)
    assert set(short) <= set(longer) and "sa>=2.0" in longer and "sa>=3.0" not in longer


def test_features_name_the_speaker_change_and_the_next_word_only_when_known() -> None:
    tokens = _tokens("right", "well")
    with_next = boundary_features(tokens, 0, silence=0.2, other_spoke=True)
    assert {"oth", "w=right", "w+1=well", "ww+1=right|well"} <= set(with_next)
    last = boundary_features(tokens, 1, silence=0.2, other_spoke=False)
    assert "oth" not in last and not any(f.startswith("w+1=") for f in last)
    assert "ov" in boundary_features([replace(tokens[0], overlap=True)], 0, silence=0.0,
                                     other_spoke=False)


def test_overlap_flags_mark_words_starting_inside_another_speakers_word() -> None:
    words = (Word(text="so", speaker="A", start=0.0, end=0.5),
             Word(text="yeah", speaker="B", start=0.3, end=0.6),  # inside A's "so"
             Word(text="we", speaker="A", start=0.55, end=0.7),  # inside B's "yeah"
             Word(text="go", speaker="A", start=0.8, end=1.0),
             Word(text="ok", speaker="B"))  # untimed: never overlaps
    conversation = Conversation(id="c", corpus="invented", words=words, utterances=(
        Utterance(speaker="A", words=(0, 2, 3), function=UtteranceFunction.STATEMENT,
                  fine_tag="s", fine_class="s"),))
    assert overlap_flags(conversation) == [False, True, True, False, False]


def test_long_silence_and_speaker_change_raise_the_log_odds_of_an_end(
        boundary: BoundaryModel) -> None:
    tokens = _tokens("we", "went")
    within = boundary.log_odds(boundary_features(tokens, 0, silence=0.05, other_spoke=False))
    across = boundary.log_odds(boundary_features(tokens, 0, silence=2.5, other_spoke=True))
    assert across > 0 > within


def _states(decoder: ChannelDecoder, words: list[Word]) -> list[TokenState]:
    states: list[TokenState] = []
    for key, word in enumerate(words):
        states += decoder.append(key, word)
    return states + decoder.finish()


def test_untimed_words_decode_exactly_as_without_a_boundary_model(
        model: WordModel, boundary: BoundaryModel) -> None:
    # A conversation without times must work no worse than before: it is not touched at all.
    said = "we went to the store last week uh i think that is a good idea"
    words = [Word(text=t, speaker="A") for t in said.split()]
    assert _states(ChannelDecoder(model, boundary=boundary), words) == _states(
        ChannelDecoder(model), words)


def test_timed_silences_end_utterances_the_word_model_alone_runs_on(
        model: WordModel, boundary: BoundaryModel) -> None:
    merged = [one_speaker(invented_conversation(seed, times=True)) for seed in (20, 21, 22)]
    alone = evaluate_words(merged, model)["segmentation.f1"]
    joined = evaluate_words(merged, model, boundary=boundary)["segmentation.f1"]
    assert joined > alone and joined > 0.9


def test_a_tick_closes_the_open_utterance_once_the_silence_is_long_enough(
        model: WordModel, boundary: BoundaryModel) -> None:
    decoder = ChannelDecoder(model, boundary=boundary)
    said = "they bought a new car"
    words = [Word(text=t, speaker="A", start=0.35 * k, end=0.35 * k + 0.3)
             for k, t in enumerate(said.split())]
    for key, word in enumerate(words):
        decoder.append(key, word)
    end = 0.35 * 4 + 0.3
    assert decoder.tick(end - 0.1, other_spoke=False) == []  # before the last word ended
    assert decoder.tick(end + 0.02, other_spoke=False) == []  # no real silence yet
    assert decoder.open_keys  # nothing was closed or kept by the ticks above
    states = decoder.tick(end + 3.0, other_spoke=True)
    assert states and all(s.final for s in states) and states[-1].ends_utterance
    assert decoder.open_keys == ()


def test_ticks_never_close_untimed_words_or_a_decoder_without_a_boundary_model(
        model: WordModel, boundary: BoundaryModel) -> None:
    untimed = ChannelDecoder(model, boundary=boundary)
    untimed.append(0, Word(text="okay", speaker="A"))
    assert untimed.tick(100.0, other_spoke=True) == []
    plain = ChannelDecoder(model)
    plain.append(0, Word(text="okay", speaker="A", start=0.0, end=0.3))
    assert plain.tick(100.0, other_spoke=True) == []


def test_a_model_of_another_kind_is_refused(boundary: BoundaryModel) -> None:
    artifact = ModelArtifact.from_bytes(tiny_boundary_bytes())
    with pytest.raises(ModelError, match="expected 'boundaries'"):
        BoundaryModel.from_artifact(replace(artifact, kind="words"))
    with pytest.raises(ModelError, match="configuration is malformed"):
        BoundaryModel.from_artifact(replace(artifact, features={"weight": "heavy"}))
