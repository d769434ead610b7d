"""Scoring of function taggers: metrics cross-checked with scikit-learn, replay rules, and the
shipped model's quality on SwDA validation conversations.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from function_kit import invented_conversation, invented_corpus, tiny_model
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream.corpora import read_corpus
from midstream.models.functions._eval import (
    AFTER_WORDS,
    classification_figures,
    evaluate_functions,
    replay_labels,
)
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._views import clean_view
from sklearn.metrics import accuracy_score, f1_score, precision_recall_fscore_support

WEIGHTS = Path(__file__).resolve().parents[2] / "models" / "weights"

_labels = st.sampled_from(["statement", "question", "answer", "other"])


@given(st.lists(st.tuples(_labels, _labels), min_size=1, max_size=80))
@settings(max_examples=80, deadline=None)
def test_figures_agree_with_scikit_learn(pairs: list[tuple[str, str]]) -> None:
    # Source: scikit-learn's accuracy_score / f1_score(average="macro") /
    # precision_recall_fscore_support, zero_division=0 (classes never predicted score 0).
    gold = [g for g, _ in pairs]
    pred = [p for _, p in pairs]
    figures = classification_figures(gold, pred, "t")
    assert figures["t.accuracy"] == pytest.approx(accuracy_score(gold, pred))
    assert figures["t.macro_f1"] == pytest.approx(
        f1_score(gold, pred, average="macro", zero_division=0))
    labels = sorted(set(gold) | set(pred))
    precision, recall, f1, support = precision_recall_fscore_support(
        gold, pred, labels=labels, zero_division=0)
    for i, label in enumerate(labels):
        assert figures[f"t.per_class.{label}.precision"] == pytest.approx(precision[i])
        assert figures[f"t.per_class.{label}.recall"] == pytest.approx(recall[i])
        assert figures[f"t.per_class.{label}.f1"] == pytest.approx(f1[i])
        assert figures[f"t.per_class.{label}.support"] == support[i]


def test_mismatched_lengths_are_refused() -> None:
    with pytest.raises(ValueError, match="2 gold labels but 1"):
        classification_figures(["a", "b"], ["a"], "t")


@pytest.fixture(scope="module")
def tagger() -> FunctionTagger:
    return FunctionTagger.from_artifact(tiny_model("swbd42"))


def test_evaluate_reports_every_documented_key(tagger: FunctionTagger) -> None:
    figures = evaluate_functions(invented_corpus(3, start=100), tagger)
    base = "utterance_functions."
    for scheme in ("coarse", "swbd42"):
        for figure in ("accuracy", "macro_f1"):
            assert 0.0 <= figures[f"{base}gold_segmentation.{scheme}.{figure}"] <= 1.0
    for k in (*[str(k) for k in AFTER_WORDS], "end"):
        assert 0.0 <= figures[f"{base}accuracy_after_words.{k}"] <= 1.0
    assert figures[f"{base}gold_segmentation.coarse.per_class.question.recall"] > 0.5
    quick = evaluate_functions(invented_corpus(3, start=100), tagger, replay=False)
    assert not any("after_words" in name for name in quick)


def test_coarse_tagger_gets_no_fine_figures() -> None:
    coarse = FunctionTagger.from_artifact(tiny_model("coarse"))
    figures = evaluate_functions(invented_corpus(2, start=100), coarse, replay=False)
    assert "utterance_functions.gold_segmentation.coarse.accuracy" in figures
    assert not any(".swbd42." in name for name in figures)


def test_short_utterances_count_with_their_end_label(tagger: FunctionTagger) -> None:
    conversation = invented_conversation(101)
    views = [clean_view(conversation, u) for u in conversation.utterances]
    one_word = next(i for i, u in enumerate(conversation.utterances) if len(u.words) == 1)
    context = views[max(0, one_word - tagger.context):one_word]
    labels = replay_labels(tagger, conversation, one_word, context)
    assert len(labels) == 1
    assert labels[0] == tagger.label_partial(context, views[one_word]).function.value
    figures = evaluate_functions([conversation], tagger)
    after = "utterance_functions.accuracy_after_words."
    # Every utterance of the invented data has at most 6 words: after 5 words is nearly the end.
    assert figures[f"{after}5"] <= figures[f"{after}end"] + 0.2


@pytest.fixture(scope="module")
def shipped_val_figures(swda_dir: Path) -> dict[str, float]:
    """The shipped model scored on SwDA validation (gold segmentation, gold cleaning); ~1 min."""
    tagger = FunctionTagger.load(WEIGHTS / "functions-swbd42.tagger")
    return evaluate_functions(read_corpus(swda_dir, split="val"), tagger)


_GS = "utterance_functions.gold_segmentation."


@pytest.mark.corpus
@pytest.mark.slow
def test_shipped_model_meets_its_targets_on_swda_val(
        shipped_val_figures: dict[str, float]) -> None:
    figures = shipped_val_figures
    # 42-class target 0.74: above the 0.71 of the HMM tagger of Stolcke et al. (Computational
    # Linguistics 26(3), 2000) on SwDA's test split, below their 0.84 human agreement.
    assert figures[f"{_GS}swbd42.accuracy"] >= 0.74
    # Project targets (no outside source): coarse accuracy 0.85, after 3 received words 0.75.
    assert figures[f"{_GS}coarse.accuracy"] >= 0.85
    assert figures["utterance_functions.accuracy_after_words.3"] >= 0.75
    # Rare class (SWBD-DAMSL "br", 18 in val): reported in functions.md, not a bar to pass.
    assert f"{_GS}coarse.per_class.clarification_request.recall" in figures
