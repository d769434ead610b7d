"""The contract every Midstream tagger keeps, run against each tagger through a small adapter.

A tagger adapter says how to build the tagger from model bytes, how to tag a conversation and
how to stream one; the checks are shared: inputs are not mutated, model bytes round-trip to
identical output, unseen words and missing times do not crash, decoding is deterministic, and a
final streamed label never changes. Add another tagger by adding an adapter to ``ADAPTERS``.
"""

from __future__ import annotations

import copy
import functools
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import pytest
from function_kit import tiny_model as tiny_function_model
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import Conversation, EventError, Utterance, UtteranceFunction, Word
from midstream.models._artifact import ModelArtifact
from midstream.models.boundaries._model import BoundaryModel, overlap_flags
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._views import clean_view
from midstream.models.words._decoder import ChannelDecoder, DecoderConfig, TokenState
from midstream.models.words._model import WordModel
from midstream.models.words._tags import channel_sequences
from word_kit import invented_conversation, tiny_artifact_bytes, tiny_boundary_bytes


@dataclass(frozen=True, slots=True)
class Adapter:
    """How the shared checks drive one kind of tagger."""

    name: str
    model_bytes: Callable[[], bytes]
    load: Callable[[bytes], object]
    tag: Callable[[object, Conversation], list[object]]


def _load_words(data: bytes) -> object:
    return WordModel.from_artifact(ModelArtifact.from_bytes(data, expected_kind="words"))


def _tag_words(model: object, conversation: Conversation) -> list[object]:
    assert isinstance(model, WordModel)
    out: list[object] = []
    for channel in channel_sequences(conversation):
        decoder = ChannelDecoder(model)
        for key, word in enumerate(channel.words):
            out += decoder.append(key, word,
                                  after_other_speaker=channel.after_other_speaker[key])
        out += decoder.finish()
    return out


@functools.cache
def _function_model_bytes() -> bytes:
    return tiny_function_model("swbd42").to_bytes()


def _load_functions(data: bytes) -> object:
    artifact = ModelArtifact.from_bytes(data, expected_kind="utterance_functions")
    return FunctionTagger.from_artifact(artifact)


def _tag_functions(model: object, conversation: Conversation) -> list[object]:
    # Whole-chain labels, then every utterance replayed word by word as a stream would.
    assert isinstance(model, FunctionTagger)
    utterances = conversation.utterances or (
        (Utterance(speaker=conversation.words[0].speaker,
                   words=tuple(range(len(conversation.words))),
                   function=UtteranceFunction.OTHER, fine_tag="", fine_class=""),)
        if conversation.words else ())
    views = [clean_view(conversation, u) for u in utterances]
    out: list[object] = list(model.label_conversation(views))
    for i, utterance in enumerate(utterances):
        context = views[max(0, i - model.context):i]
        out += [model.label_partial(context, clean_view(conversation, utterance, upto=k))
                for k in range(1, len(utterance.words) + 1)]
    return out


def _load_boundaries(data: bytes) -> object:
    return BoundaryModel.from_artifact(ModelArtifact.from_bytes(data, expected_kind="boundaries"))


def _tag_boundaries(model: object, conversation: Conversation) -> list[object]:
    # The word decoder with the boundary model's evidence joined, overlaps as a stream shows.
    assert isinstance(model, BoundaryModel)
    words = _load_words(tiny_artifact_bytes())
    assert isinstance(words, WordModel)
    overlap = overlap_flags(conversation)
    out: list[object] = []
    for channel in channel_sequences(conversation):
        decoder = ChannelDecoder(words, boundary=model)
        for key, word in enumerate(channel.words):
            out += decoder.append(key, word,
                                  after_other_speaker=channel.after_other_speaker[key],
                                  overlap=overlap[channel.indices[key]])
        out += decoder.finish()
    return out


ADAPTERS = [
    Adapter("words", tiny_artifact_bytes, _load_words, _tag_words),
    Adapter("functions", _function_model_bytes, _load_functions, _tag_functions),
    Adapter("boundaries", tiny_boundary_bytes, _load_boundaries, _tag_boundaries),
]


@pytest.fixture(params=ADAPTERS, ids=lambda a: a.name)
def adapter(request: pytest.FixtureRequest) -> Adapter:
    result: Adapter = request.param
    return result


def test_inputs_are_not_mutated(adapter: Adapter) -> None:
    conversation = invented_conversation(500)
    before = copy.deepcopy(conversation)
    adapter.tag(adapter.load(adapter.model_bytes()), conversation)
    assert conversation == before


def test_model_bytes_round_trip_to_identical_output(adapter: Adapter) -> None:
    data = adapter.model_bytes()
    artifact = ModelArtifact.from_bytes(data)
    again = ModelArtifact.from_bytes(artifact.to_bytes())
    assert again.to_bytes() == data
    conversation = invented_conversation(501)
    assert adapter.tag(adapter.load(data), conversation) == adapter.tag(
        adapter.load(again.to_bytes()), conversation)


def test_deterministic(adapter: Adapter) -> None:
    model = adapter.load(adapter.model_bytes())
    conversation = invented_conversation(502)
    assert adapter.tag(model, conversation) == adapter.tag(model, conversation)


def test_unseen_words_and_missing_or_present_times(adapter: Adapter) -> None:
    model = adapter.load(adapter.model_bytes())
    strange = Conversation(
        id="strange", corpus="invented",
        words=tuple(Word(text=t, speaker="A") for t in
                    ("zyzzyva", "qwfp", "zyzzyva", "", "ünïcode", "a" * 200)),
        utterances=(), labels=None)
    assert len(adapter.tag(model, strange)) >= len(strange.words)
    timed = invented_conversation(503, times=True)
    assert adapter.tag(model, timed)


# -- the streaming decoder's finality guarantee ------------------------------------------

_VOCAB = ["i", "the", "uh", "think", "we", "went", "to", "store", "kids", "mean", "well"]

_event = st.one_of(
    st.tuples(st.just("append"), st.sampled_from(_VOCAB), st.booleans()),
    st.tuples(st.just("replace"), st.sampled_from(_VOCAB), st.integers(0, 8)),
    st.tuples(st.just("withdraw"), st.just(""), st.integers(0, 8)),
    st.tuples(st.just("close"), st.just(""), st.just(0)),
)


@settings(max_examples=60, deadline=None)
@given(events=st.lists(_event, max_size=60), lag=st.integers(0, 24), settle=st.booleans())
def test_a_final_label_never_changes(events: Sequence[tuple[str, str, object]],
                                     lag: int, settle: bool) -> None:
    model = _load_words(tiny_artifact_bytes())
    assert isinstance(model, WordModel)
    decoder = ChannelDecoder(model, DecoderConfig(lag=lag, settle=settle))
    final: set[int] = set()
    reported: set[int] = set()
    withdrawn: set[int] = set()
    next_key = 0

    def check(states: list[TokenState]) -> None:
        for state in states:
            key = state.key
            assert key not in final, f"word {key} reported again after it was final"
            assert key not in withdrawn
            reported.add(key)
            if state.final:
                final.add(key)

    for kind, text, arg in events:
        if kind == "append":
            check(decoder.append(next_key, Word(text=text, speaker="A"),
                                 after_other_speaker=bool(arg)))
            next_key += 1
        elif kind == "close":
            check(decoder.close_utterance())
        else:
            key = next_key - 1 - int(str(arg)) if next_key else -1
            is_open = key in decoder.open_keys
            try:
                if kind == "replace":
                    check(decoder.replace(key, Word(text=text, speaker="A")))
                else:
                    check(decoder.withdraw(key))
                    withdrawn.add(key)
            except EventError:
                assert not is_open
            else:
                assert is_open
    check(decoder.finish())
    assert final == set(range(next_key)) - withdrawn


_timed_event = st.one_of(
    st.tuples(st.just("append"), st.sampled_from(_VOCAB), st.floats(0.0, 3.0)),
    st.tuples(st.just("tick"), st.just(""), st.floats(0.0, 4.0)),
    st.tuples(st.just("withdraw"), st.just(""), st.floats(0.0, 0.0)),
)


@settings(max_examples=40, deadline=None)
@given(events=st.lists(_timed_event, max_size=50), other=st.booleans())
def test_a_final_label_never_changes_with_timed_words_and_ticks(
        events: Sequence[tuple[str, str, float]], other: bool) -> None:
    model = _load_words(tiny_artifact_bytes())
    boundary = _load_boundaries(tiny_boundary_bytes())
    assert isinstance(model, WordModel) and isinstance(boundary, BoundaryModel)
    decoder = ChannelDecoder(model, boundary=boundary)
    final: set[int] = set()
    withdrawn: set[int] = set()
    next_key = 0
    clock = 0.0

    def check(states: list[TokenState]) -> None:
        for state in states:
            assert state.key not in final and state.key not in withdrawn
            if state.final:
                final.add(state.key)

    for kind, text, seconds in events:
        if kind == "append":
            clock += seconds  # the silence before the word
            check(decoder.append(next_key, Word(text=text, speaker="A", start=clock,
                                                end=clock + 0.25)))
            clock += 0.25
            next_key += 1
        elif kind == "tick":
            check(decoder.tick(clock + seconds, other_spoke=other))
        elif next_key - 1 in decoder.open_keys:
            check(decoder.withdraw(next_key - 1))
            withdrawn.add(next_key - 1)
    check(decoder.finish())
    assert final == set(range(next_key)) - withdrawn
