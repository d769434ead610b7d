"""``midstream train functions`` end to end on invented transcripts in JSON Lines."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from function_kit import invented_corpus
from midstream import InputError
from midstream.client.cli._cmd_train_functions import (
    MIN_SCORED_SUPPORT,
    cv_subset,
    supported_macro_f1,
)
from midstream.client.cli._main import main
from midstream.corpora import write_jsonl
from midstream.models._artifact import load_artifact
from midstream.models.functions._eval import classification_figures
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._views import UtteranceView
from setting_kit import SETTINGS, write_setting_transcripts
from sklearn.metrics import f1_score


@pytest.fixture
def transcripts(tmp_path: Path) -> Path:
    path = tmp_path / "calls.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl(invented_corpus(12), stream)
    return path


def test_trains_a_coarse_model_users_can_load(transcripts: Path, tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "functions.tagger"
    code = main(["train", "functions", str(transcripts), "--scheme", "coarse",
                 "--min-freq", "1", "--max-iterations", "40", "--augment", "0.5",
                 "--out", str(out)])
    assert code == 0
    assert f"wrote {out}" in capsys.readouterr().out
    artifact = load_artifact(out, expected_kind="utterance_functions")
    assert artifact.hyper_parameters["augment"] == 0.5
    tagger = FunctionTagger.from_artifact(artifact)
    question = UtteranceView(speaker="A", words=("do", "you", "have", "kids"))
    guess = tagger.label_partial([question], UtteranceView(speaker="B", words=("yes",)))
    assert guess.function.value == "answer"


def test_several_weights_are_chosen_by_cross_validation(
        transcripts: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "functions.tagger"
    code = main(["train", "functions", str(transcripts), "--scheme", "swbd42",
                 "--c1", "0.01", "5.0", "--min-freq", "1", "--max-iterations", "30",
                 "--cv-folds", "2", "--cv-subset", "0", "--out", str(out)])
    assert code == 0
    printed = capsys.readouterr().out
    assert "cv c1=0.01" in printed and "cv c1=5.0" in printed and "chosen c1=" in printed
    grid = load_artifact(out).metadata["cross_validation"]["grid"]
    assert set(grid) == {"c1=0.01,c2=0.01", "c1=5.0,c2=0.01"}


def test_the_opening_feature_is_compared_by_cross_validation_and_stored(
        transcripts: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The invented transcripts open some utterances with a filler, so the feature has data.
    out = tmp_path / "functions.tagger"
    code = main(["train", "functions", str(transcripts), "--scheme", "coarse",
                 "--partner-features", "--opening-features", "off", "on", "--min-freq", "1",
                 "--max-iterations", "30", "--cv-folds", "2", "--cv-subset", "0",
                 "--out", str(out)])
    assert code == 0
    printed = capsys.readouterr().out
    assert "cv c1=0.1,c2=0.01:" in printed and "cv c1=0.1,c2=0.01,opening=on:" in printed
    artifact = load_artifact(out, expected_kind="utterance_functions")
    grid = artifact.metadata["cross_validation"]["grid"]
    assert set(grid) == {"c1=0.1,c2=0.01", "c1=0.1,c2=0.01,opening=on"}
    # The model holds the setting the grid chose (the first of equal scores), so serving
    # builds the features it learned.
    scores = {name: figures["score"] for name, figures in grid.items()}
    chosen_on = max(scores, key=scores.__getitem__).endswith("opening=on")
    assert FunctionTagger.from_artifact(artifact).config.opening is chosen_on


def test_the_timing_features_are_compared_by_cross_validation_and_stored(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Timed transcripts: JSON Lines keeps each word's times, and training reads the gaps.
    transcripts = tmp_path / "timed.jsonl"
    with transcripts.open("w", encoding="utf-8") as stream:
        write_jsonl(invented_corpus(12, timed=True), stream)
    out = tmp_path / "functions.tagger"
    code = main(["train", "functions", str(transcripts), "--scheme", "coarse",
                 "--timing-features", "off", "on", "--min-freq", "1", "--max-iterations", "30",
                 "--cv-folds", "2", "--cv-subset", "0", "--out", str(out)])
    assert code == 0
    printed = capsys.readouterr().out
    assert "cv c1=0.1,c2=0.01:" in printed and "cv c1=0.1,c2=0.01,timing=on:" in printed
    artifact = load_artifact(out, expected_kind="utterance_functions")
    grid = artifact.metadata["cross_validation"]["grid"]
    scores = {name: figures["score"] for name, figures in grid.items()}
    chosen_on = max(scores, key=scores.__getitem__).endswith("timing=on")
    assert FunctionTagger.from_artifact(artifact).config.timing is chosen_on
    # Trained with them, the model has learned timing features from the file's word times.
    assert main(["train", "functions", str(transcripts), "--scheme", "coarse",
                 "--timing-features", "on", "--min-freq", "1", "--max-iterations", "30",
                 "--out", str(out)]) == 0
    tagger = FunctionTagger.from_artifact(load_artifact(out, expected_kind="utterance_functions"))
    assert tagger.config.timing
    timing = {name for name in tagger._chain.attributes if name.startswith("tg")}
    assert "tg=ov" in timing and len(timing) > 1


def test_swbd42_on_other_labels_is_a_one_line_error(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    conversations = invented_corpus(3)
    path = tmp_path / "odd.jsonl"
    odd = [dataclasses.replace(c, utterances=tuple(
        dataclasses.replace(u, fine_class="instruct") for u in c.utterances))
        for c in conversations]
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl(odd, stream)
    code = main(["train", "functions", str(path), "--scheme", "swbd42",
                 "--out", str(tmp_path / "x.tagger")])
    assert code == 1
    assert "instruct" in capsys.readouterr().err


def test_the_grid_score_leaves_out_classes_a_fold_hardly_has() -> None:
    # Reference: scikit-learn's macro F1 restricted to the well-supported classes
    # (f1_score(labels=...)); the plain macro F1 still reports every class.
    common = MIN_SCORED_SUPPORT
    gold = ["statement"] * (2 * common) + ["question"] * common + ["clarification_request"] * 2
    predicted = (["statement"] * (2 * common - 3) + ["question"] * 3 + ["question"] * (common - 1)
                 + ["clarification_request"] + ["statement", "clarification_request"])
    figures = classification_figures(gold, predicted, "x")
    well_supported = ["question", "statement"]
    assert supported_macro_f1(figures, "x") == pytest.approx(
        f1_score(gold, predicted, labels=well_supported, average="macro"))
    assert figures["x.macro_f1"] == pytest.approx(f1_score(gold, predicted, average="macro"))
    # Two clarification requests move the plain macro F1; the grid's score does not see them.
    assert supported_macro_f1(figures, "x") != pytest.approx(figures["x.macro_f1"])


def test_a_cv_share_keeps_each_corpus_in_proportion() -> None:
    long = [dataclasses.replace(c, id=f"meeting{i}", corpus="meetings")
            for i, c in enumerate(invented_corpus(4))]
    short = invented_corpus(20, start=4)
    share = cv_subset(long + short, count=0, share=0.25)
    assert [c.id for c in share if c.corpus == "meetings"] == ["meeting0"]
    assert len([c for c in share if c.corpus == "demo"]) == 5
    assert len(cv_subset(long + short, count=3, share=None)) == 6
    with pytest.raises(InputError, match="--cv-share"):
        cv_subset(short, count=0, share=1.5)


def test_settings_are_compared_by_cross_validation_each_corpus_scored_in_its_own(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Two invented corpora that code the same lone "right" apart (setting_kit): a model that
    # learns them as settings can label both right, a pooled one only one of them.
    transcripts = write_setting_transcripts(tmp_path / "calls.jsonl", count=12)
    out = tmp_path / "functions.tagger"
    code = main(["train", "functions", str(transcripts), "--scheme", "coarse", "--min-freq", "1",
                 "--max-iterations", "30", "--setting-features", "off", "on",
                 "--cv-folds", "2", "--cv-subset", "0", "--out", str(out)])
    assert code == 0
    assert "settings=on" in capsys.readouterr().out
    artifact = load_artifact(out, expected_kind="utterance_functions")
    grid = artifact.metadata["cross_validation"]["grid"]
    on, off = grid["c1=0.1,c2=0.01,settings=on"], grid["c1=0.1,c2=0.01"]
    # The shared weights alone are reported beside the setting's own figures.
    assert "choir.shared_accuracy" in on and "choir.shared_accuracy" not in off
    assert on["score"] > off["score"]
    assert FunctionTagger.from_artifact(artifact).settings == SETTINGS
