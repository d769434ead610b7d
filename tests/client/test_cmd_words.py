"""``midstream train words`` and ``midstream evaluate`` end to end on invented transcripts."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from midstream.client._cli import main
from midstream.corpora import write_jsonl
from midstream.models._artifact import load_artifact
from midstream.models._wordmodel import WordModel

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "models"))
from word_kit import invented_conversation


@pytest.fixture
def transcripts(tmp_path: Path) -> Path:
    path = tmp_path / "calls.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl([invented_conversation(seed) for seed in range(9)], stream)
    return path


def test_train_then_evaluate(transcripts: Path, tmp_path: Path,
                             capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "words.msm"
    code = main(["train", "words", str(transcripts), "--min-freq", "1",
                 "--max-iterations", "40", "--out", str(out)])
    assert code == 0
    assert f"wrote {out}" in capsys.readouterr().out
    artifact = load_artifact(out, expected_kind="words")
    assert artifact.hyper_parameters["min_freq"] == 1
    assert artifact.metadata["training_data"]["conversations"] == 9
    assert "train words" in artifact.metadata["created_by"]
    WordModel.from_artifact(artifact)

    code = main(["evaluate", str(transcripts), "--model", str(out), "--json", "--limit", "3"])
    assert code == 0
    figures = json.loads(capsys.readouterr().out)
    assert 0.0 <= figures["disfluency.reparandum.f1"] <= 1.0
    assert 0.0 <= figures["segmentation.f1"] <= 1.0
    assert "incremental.edit_overhead" in figures


def test_cross_validation_only(transcripts: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["train", "words", str(transcripts), "--cv-only", "--cv-folds", "3",
                 "--cv-subset", "0", "--min-freq", "1", "--max-iterations", "30"])
    assert code == 0
    assert "cv c1=" in capsys.readouterr().out


def test_missing_out_is_a_clear_error(transcripts: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["train", "words", str(transcripts)]) == 1
    assert "--out is required" in capsys.readouterr().err
    assert main(["train", "words", str(transcripts), "--right", "-1", "--out", "x.msm"]) == 1
    assert "--right must be >= 0, got -1" in capsys.readouterr().err


def test_evaluate_functions_only_scores_the_shipped_coarse_model(
        transcripts: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["evaluate", str(transcripts), "--functions-only", "--json", "--limit", "3"])
    assert code == 0
    figures = json.loads(capsys.readouterr().out)
    assert not any(k.startswith(("disfluency.", "segmentation.")) for k in figures)
    assert 0.0 <= figures["utterance_functions.gold_segmentation.coarse.accuracy"] <= 1.0
    assert "utterance_functions.predicted_segmentation.word_accuracy" in figures
    assert main(["evaluate", str(transcripts), "--functions-only", "--words-only"]) == 1
