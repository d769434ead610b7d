"""The utterance-function features and tagger: purity, bounds, streaming/batch agreement, models.

Tiny models are trained on invented conversations (``function_kit``); the corpus-backed quality
checks live in ``test_eval_functions.py``.
"""

from __future__ import annotations

import dataclasses

import pytest
from function_kit import invented_conversation, invented_corpus, tiny_model
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import Conversation, InputError, ModelError, UtteranceFunction
from midstream._schemes import coarse_function
from midstream.models._artifact import ModelArtifact
from midstream.models.functions._features import (
    MAX_FEATURE_WORDS,
    FunctionFeatureConfig,
    sequence_features,
    utterance_features,
)
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._train import (
    FunctionTrainingOptions,
    build_sequences,
    conversation_folds,
    train_function_model,
)
from midstream.models.functions._views import UtteranceView, clean_view, conversation_views


@pytest.fixture(scope="module")
def fine_artifact() -> ModelArtifact:
    return tiny_model("swbd42")


@pytest.fixture(scope="module")
def coarse_artifact() -> ModelArtifact:
    return tiny_model("coarse")


@pytest.fixture
def tagger(fine_artifact: ModelArtifact) -> FunctionTagger:
    return FunctionTagger.from_artifact(fine_artifact)


def view(speaker: str, text: str, *, removed: int = 0, complete: bool = True) -> UtteranceView:
    return UtteranceView(speaker=speaker, words=tuple(text.split()), removed=removed,
                         complete=complete)


# --- features -----------------------------------------------------------------------------


def test_features_mark_begin_end_and_first_last_words() -> None:
    feats = utterance_features(view("A", "do you know"), None)
    for name in ("w0=do", "wl=know", "b=<s>|do", "b=know|</s>", "t=<s>|do|you", "b0=do|you",
                 "bl=you|know", "len=3", "rm=0", "prev=none"):
        assert feats[name] == 1.0, name
    assert "incomplete" not in feats


def test_features_see_the_previous_utterance_and_speaker_change() -> None:
    question = view("A", "do you like it")
    answer = utterance_features(view("B", "yeah"), question)
    assert answer["spk=change"] == 1.0
    assert answer["pow0=do"] == 1.0
    assert answer["x=do|yeah"] == 1.0
    same = utterance_features(view("A", "yeah"), question)
    assert same["spk=same"] == 1.0 and "x=do|yeah" not in same


def test_filler_only_and_partial_utterances_are_told_apart() -> None:
    empty = utterance_features(view("A", "", removed=2), None)
    assert empty["empty"] == 1.0 and empty["only_disfluent"] == 1.0 and empty["rm=2"] == 1.0
    partial = utterance_features(view("A", "do you", complete=False), None)
    assert partial["incomplete"] == 1.0
    off = utterance_features(view("A", "do you", complete=False), None,
                             FunctionFeatureConfig(complete_flag=False))
    assert "incomplete" not in off


def test_a_removed_opening_word_is_a_feature_only_when_configured() -> None:
    sorry = UtteranceView(speaker="B", words=("which", "day"), removed=1, opening="sorry")
    on = FunctionFeatureConfig(partner=True, opening=True)
    assert utterance_features(sorry, None, on)["rw0=sorry"] == 1.0
    # Models trained before the feature existed read no such setting and see no such feature.
    assert not any(k.startswith("rw0=") for k in utterance_features(sorry, None))
    assert FunctionFeatureConfig.from_json({"partner": True}) == FunctionFeatureConfig(
        partner=True)
    assert FunctionFeatureConfig.from_json(on.to_json()) == on


def test_feature_count_is_bounded_however_long_the_utterance() -> None:
    # Per-word cost bound: n-grams come from at most MAX_FEATURE_WORDS leading words.
    long = UtteranceView(speaker="A", words=tuple(f"w{i}" for i in range(5000)))
    feats = utterance_features(long, None)
    assert len(feats) < 4 * MAX_FEATURE_WORDS + 20
    assert feats["wl=w4999"] == 1.0


@given(st.lists(st.text(alphabet="abcxyz'-", min_size=1, max_size=6), max_size=60),
       st.integers(min_value=0, max_value=9), st.booleans())
@settings(max_examples=60, deadline=None)
def test_features_are_pure_and_deterministic(words: list[str], removed: int,
                                             complete: bool) -> None:
    current = UtteranceView(speaker="B", words=tuple(words), removed=removed, complete=complete)
    previous = UtteranceView(speaker="A", words=tuple(reversed(words)))
    before = (dataclasses.replace(current), dataclasses.replace(previous))
    first = utterance_features(current, previous)
    assert first == utterance_features(current, previous)
    assert all(value == 1.0 for value in first.values())
    assert (current, previous) == before


def test_clean_view_removes_gold_disfluencies_and_counts_them() -> None:
    conversation = invented_conversation(3)
    for utterance in conversation.utterances:
        cleaned = clean_view(conversation, utterance)
        assert conversation.labels is not None
        dropped = [i for i in utterance.words if conversation.labels[i].value in
                   {"filler", "edit_term", "reparandum", "restart"}]
        assert cleaned.removed == len(dropped)
        assert len(cleaned.words) == len(utterance.words) - len(dropped)
        assert "uh" not in cleaned.words


def test_unannotated_conversation_keeps_every_word() -> None:
    conversation = invented_conversation(3, annotated=False)
    for utterance in conversation.utterances:
        cleaned = clean_view(conversation, utterance)
        assert cleaned.removed == 0
        assert cleaned.words == tuple(conversation.words[i].text for i in utterance.words)


def test_prefix_view_is_incomplete_until_the_last_word() -> None:
    conversation = invented_conversation(4)
    utterance = max(conversation.utterances, key=lambda u: len(u.words))
    n = len(utterance.words)
    assert not clean_view(conversation, utterance, upto=n - 1).complete
    assert clean_view(conversation, utterance, upto=n).complete
    assert clean_view(conversation, utterance, upto=1).words in {(), (conversation.words[
        utterance.words[0]].text,)}


# --- tagger -------------------------------------------------------------------------------


def test_tiny_model_learns_question_answer_and_agreement(tagger: FunctionTagger) -> None:
    question = view("A", "do you have bikes")
    assert tagger.label_partial([], question).function is UtteranceFunction.QUESTION
    answer = tagger.label_partial([question], view("B", "yes"))
    assert (answer.label, answer.function) == ("ny", UtteranceFunction.ANSWER)
    opinion = view("A", "i think dogs are great")
    agree = tagger.label_partial([opinion], view("B", "yeah"))
    assert agree.function is UtteranceFunction.AGREEMENT


def test_growing_utterance_is_labelled_a_question_after_two_words(
        tagger: FunctionTagger) -> None:
    statement = view("B", "we bought new cars last year")
    guess = tagger.label_partial([statement], view("A", "do you", complete=False))
    assert guess.function is UtteranceFunction.QUESTION


def test_label_partial_matches_whole_chain_decoding_within_the_window(
        tagger: FunctionTagger) -> None:
    views = conversation_views(invented_conversation(50))
    for i in range(len(views)):
        context = views[max(0, i - tagger.context):i]
        joint = tagger.label_conversation([*context, views[i]])[-1]
        assert tagger.label_partial(context, views[i]) == joint


def test_context_beyond_the_window_is_ignored(tagger: FunctionTagger) -> None:
    views = conversation_views(invented_conversation(51))
    current = views[-1]
    long = views[:-1]
    assert tagger.label_partial(long, current) == tagger.label_partial(
        long[-tagger.context:], current)


def test_label_partial_keeps_no_state_between_calls(tagger: FunctionTagger) -> None:
    # The guess after k words depends only on (context, prefix): replaying a growing utterance
    # twice, or in reverse order, gives the same labels, so a label changes only when decoding
    # of the words so far changes it.
    conversation = invented_conversation(52)
    views = conversation_views(conversation)
    i = max(range(1, len(views)), key=lambda j: len(conversation.utterances[j].words))
    utterance = conversation.utterances[i]
    prefixes = [clean_view(conversation, utterance, upto=k)
                for k in range(1, len(utterance.words) + 1)]
    context = views[max(0, i - tagger.context):i]
    forward = [tagger.label_partial(context, p) for p in prefixes]
    backward = [tagger.label_partial(context, p) for p in reversed(prefixes)]
    assert forward == list(reversed(backward))


def test_inputs_are_not_mutated(tagger: FunctionTagger) -> None:
    views = conversation_views(invented_conversation(53))
    context = list(views[:-1])
    snapshot = list(context)
    tagger.label_partial(context, views[-1])
    tagger.label_conversation(context)
    assert context == snapshot


def test_unseen_words_and_empty_utterances_get_a_valid_label(tagger: FunctionTagger) -> None:
    odd = [view("A", "zyzzyva quokka"), view("B", "", removed=3), view("B", "")]
    for guess in tagger.label_conversation(odd):
        assert guess.label in tagger.labels
        assert 0.0 <= guess.confidence <= guess.function_confidence <= 1.0 + 1e-9


def test_fine_guess_sums_marginals_within_its_coarse_group(tagger: FunctionTagger) -> None:
    guess = tagger.label_partial([view("A", "do you have kids")], view("B", "yes"))
    assert guess.function_confidence >= guess.confidence
    assert coarse_function("swbd42", guess.label) is guess.function


def test_coarse_model_labels_are_coarse_functions(coarse_artifact: ModelArtifact) -> None:
    tagger = FunctionTagger.from_artifact(coarse_artifact)
    assert tagger.scheme == "coarse"
    assert set(tagger.labels) <= {f.value for f in UtteranceFunction}
    guess = tagger.label_partial([view("A", "do you have kids")], view("B", "yes"))
    assert guess.function is UtteranceFunction.ANSWER
    assert guess.confidence == guess.function_confidence


def test_artifact_round_trips_with_identical_labels(fine_artifact: ModelArtifact) -> None:
    again = ModelArtifact.from_bytes(fine_artifact.to_bytes())
    views = conversation_views(invented_conversation(54))
    assert (FunctionTagger.from_artifact(again).label_conversation(views)
            == FunctionTagger.from_artifact(fine_artifact).label_conversation(views))
    assert again.kind == "utterance_functions"
    assert again.features["scheme"] == "swbd42"


def test_training_is_deterministic() -> None:
    options = FunctionTrainingOptions(scheme="coarse", min_freq=1, max_iterations=20,
                                      augment=0.5, seed=7)
    first = train_function_model(invented_corpus(6), options)
    second = train_function_model(invented_corpus(6), options)
    assert first.crf == second.crf


def test_wrong_model_kind_is_refused(fine_artifact: ModelArtifact) -> None:
    words_model = dataclasses.replace(fine_artifact, kind="words")
    with pytest.raises(ModelError, match="expected 'utterance_functions'"):
        FunctionTagger.from_artifact(words_model)
    no_scheme = dataclasses.replace(fine_artifact, features={})
    with pytest.raises(ModelError, match="label scheme"):
        FunctionTagger.from_artifact(no_scheme)
    bad_setting = dataclasses.replace(
        fine_artifact, features={"scheme": "swbd42", "config": {"colour": True}})
    with pytest.raises(ModelError, match="colour"):
        FunctionTagger.from_artifact(bad_setting)


def test_bad_views_are_refused_with_input_error(tagger: FunctionTagger) -> None:
    with pytest.raises(InputError, match="UtteranceView"):
        tagger.label_partial([], "do you know")  # type: ignore[arg-type]
    with pytest.raises(InputError, match="removed"):
        tagger.label_partial([], UtteranceView(speaker="A", words=("x",), removed=-1))
    with pytest.raises(InputError, match="tuple of strings"):
        tagger.label_partial([], UtteranceView(speaker="A", words=["x"]))  # type: ignore[arg-type]


# --- training data ------------------------------------------------------------------------


def test_augmentation_adds_one_cut_copy_per_conversation() -> None:
    corpus = invented_corpus(4)
    plain_x, plain_y = build_sequences(corpus, FunctionTrainingOptions(augment=0.0))
    aug_x, aug_y = build_sequences(corpus, FunctionTrainingOptions(augment=1.0))
    assert len(plain_x) == 4 and len(aug_x) == 8
    assert aug_y[0] == aug_y[1] == plain_y[0]
    assert aug_x[0] == plain_x[0]
    cut = sum("incomplete" in f for f in aug_x[1])
    multiword = sum(len(u.words) >= 2 for u in corpus[0].utterances)
    assert cut == multiword > 0


def test_balance_repeats_a_small_corpus_with_fresh_cuts() -> None:
    # Six conversations of one invented corpus pooled with two of another: the small one is
    # trained on three times, each repeat cut afresh, and nothing changes without balance.
    big = invented_corpus(6)
    small = [dataclasses.replace(c, id=f"small{i}", corpus="small")
             for i, c in enumerate(invented_corpus(2, start=6))]
    sizes = {"demo": sum(len(c.utterances) for c in big),
             "small": sum(len(c.utterances) for c in small)}
    copies = round(sizes["demo"] / sizes["small"])
    assert copies > 1
    plain_x, plain_y = build_sequences(big + small, FunctionTrainingOptions(scheme="coarse"))
    even_x, even_y = build_sequences(big + small,
                                     FunctionTrainingOptions(scheme="coarse", balance=True))
    assert len(plain_x) == 2 * 8
    assert len(even_x) == 2 * (6 + 2 * copies)
    assert even_x[:12] == plain_x[:12]  # the large corpus once, as before
    first_small = [x for x, y in zip(even_x, even_y, strict=True)
                   if y == plain_y[12]]
    assert len(first_small) == 2 * copies
    whole = [x for x in first_small if x == plain_x[12]]
    cuts = [x for x in first_small if x != plain_x[12]]
    assert len(whole) == copies
    assert len({str(x) for x in cuts}) > 1  # the repeats' cuts differ


def test_swbd42_scheme_refuses_other_corpora_classes() -> None:
    conversation = invented_conversation(1)
    utterance = dataclasses.replace(conversation.utterances[0], fine_class="instruct")
    odd = Conversation(id="odd", corpus="maptask", words=conversation.words,
                       utterances=(utterance,), labels=conversation.labels)
    with pytest.raises(InputError, match="instruct"):
        build_sequences([odd], FunctionTrainingOptions(scheme="swbd42"))
    with pytest.raises(InputError, match="unknown function scheme"):
        build_sequences([odd], FunctionTrainingOptions(scheme="iso"))
    with pytest.raises(InputError, match="no utterances"):
        train_function_model([], FunctionTrainingOptions())


def test_folds_hold_whole_conversations_reproducibly() -> None:
    corpus = invented_corpus(10)
    folds = conversation_folds(corpus, 3)
    flat = sorted(i for fold in folds for i in fold)
    assert flat == list(range(10))
    shuffled = list(reversed(corpus))
    again = conversation_folds(shuffled, 3)
    ids = [{corpus[i].id for i in f} for f in folds]
    assert ids == [{shuffled[i].id for i in f} for f in again]
    with pytest.raises(InputError, match="at least 2 folds"):
        conversation_folds(corpus, 1)


def test_sequence_features_chain_each_utterance_to_its_predecessor() -> None:
    views = [view("A", "do you"), view("B", "yes")]
    feats = sequence_features(views)
    assert feats[0]["prev=none"] == 1.0
    assert feats[1]["pow0=do"] == 1.0
