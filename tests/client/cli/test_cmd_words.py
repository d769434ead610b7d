"""``midstream train words`` and ``midstream evaluate`` end to end on invented transcripts."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from midstream import Conversation, Utterance, UtteranceFunction, Word
from midstream.client.cli._cmd_train import RESTART_GUARD, choose_restart_bias
from midstream.client.cli._main import main
from midstream.corpora import write_jsonl
from midstream.models._artifact import load_artifact
from midstream.models.words._model import WordModel
from midstream.models.words._train import RESTART_BIAS_CANDIDATES, BiasResult
from word_kit import invented_abandoning, invented_conversation


@pytest.fixture
def transcripts(tmp_path: Path) -> Path:
    path = tmp_path / "calls.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl([invented_conversation(seed) for seed in range(9)], stream)
    return path


def test_train_then_evaluate(transcripts: Path, tmp_path: Path,
                             capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "words.tagger"
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
    assert main(["train", "words", str(transcripts), "--right", "-1", "--out", "x.tagger"]) == 1
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


def test_evaluate_as_recognised_with_word_errors(transcripts: Path, tmp_path: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "words.tagger"
    assert main(["train", "words", str(transcripts), "--min-freq", "1",
                 "--max-iterations", "30", "--out", str(out)]) == 0
    capsys.readouterr()
    runs = []
    for rate in ("0", "0.2", "0.2"):
        assert main(["evaluate", str(transcripts), "--model", str(out), "--words-only",
                     "--as-recognised", "--word-error-rate", rate, "--json"]) == 0
        runs.append(json.loads(capsys.readouterr().out))
    clean, noisy, again = runs
    assert noisy == again  # seeded: the same errors every run
    assert noisy["disfluency.reparandum.f1"] != clean["disfluency.reparandum.f1"]
    assert 0.0 <= noisy["disfluency.edited_no_fragments.f1"] <= 1.0


def test_evaluate_as_recognised_ticks_through_the_silences(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Invented: a report, a 1 s pause, an afterthought of the same speaker (two utterances).
    # Fed as a recogniser would, the clock ticks through the pause and the report's end is
    # found there; fed without, the afterthought's words join it (the shipped models).
    words: list[Word] = []
    utterances = []
    clock = 0.0
    for text in ("the boiler is making a loud noise", "in the basement"):
        first = len(words)
        for token in text.split():
            words.append(Word(text=token, speaker="tenant", start=round(clock, 2),
                              end=round(clock + 0.25, 2)))
            clock += 0.3
        clock += 0.95
        utterances.append(Utterance(speaker="tenant", words=tuple(range(first, len(words))),
                                    function=UtteranceFunction.STATEMENT, fine_tag="sd",
                                    fine_class="sd"))
    path = tmp_path / "boiler.jsonl"
    with path.open("w", encoding="utf-8") as out:
        write_jsonl([Conversation(id="boiler", corpus="demo", words=tuple(words),
                                  utterances=tuple(utterances))], out)
    recall: dict[str | None, float] = {}
    for fed in ("--as-recognised", None):
        argv = ["evaluate", str(path), "--words-only", "--json"]
        assert main([*argv, fed] if fed else argv) == 0
        recall[fed] = json.loads(capsys.readouterr().out)["segmentation.recall"]
    assert recall == {"--as-recognised": 1.0, None: 0.5}


def test_tuning_the_restart_bias_by_cross_validation(
        transcripts: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["train", "words", str(transcripts), "--cv-only", "--cv-folds", "3",
                 "--cv-subset", "0", "--min-freq", "1", "--max-iterations", "30",
                 "--tag-bias", "rp=-0.3", "--tune-restart-bias"])
    assert code == 0
    printed = capsys.readouterr().out
    assert printed.count("restart precision=") == len(RESTART_BIAS_CANDIDATES)
    assert "chosen bias rp=-0.3" in printed


@pytest.mark.parametrize(("argv", "message"), [
    (["--word-error-rate", "0.1"], "--word-error-rate needs --as-recognised"),
    (["--as-recognised", "--word-error-rate", "1.5"], "--word-error-rate must be in [0, 1]"),
])
def test_bad_recogniser_options_are_clear_errors(transcripts: Path, argv: list[str],
                                                 message: str,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["evaluate", str(transcripts), *argv]) == 1
    assert message in capsys.readouterr().err


def test_the_restart_bias_never_trades_away_the_other_figures() -> None:
    def result(restart: float, rp: float, edited: float, seg: float) -> BiasResult:
        return BiasResult(bias=(("rs.ip", restart),), precision=0.0, recall=0.0, f1=rp,
                          restart_f1=restart, edited_f1=edited, segmentation_f1=seg)

    reference = result(0.01, 0.75, 0.70, 0.83)
    costly = [result(0.20, 0.75 - 2 * RESTART_GUARD, 0.70, 0.83),
              result(0.19, 0.75, 0.70 - 2 * RESTART_GUARD, 0.83),
              result(0.18, 0.75, 0.70, 0.83 - 2 * RESTART_GUARD)]
    fair = result(0.05, 0.75 - RESTART_GUARD / 2, 0.70, 0.83)
    assert choose_restart_bias([reference, *costly, fair]) is fair
    assert choose_restart_bias([reference, *costly]) is reference


def test_abandon_cues_are_trained_into_the_model_and_named_in_its_command(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "abandoning.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl([invented_abandoning(seed) for seed in range(6)], stream)
    out = tmp_path / "words.tagger"
    assert main(["train", "words", str(path), "--min-freq", "1", "--max-iterations", "30",
                 "--abandon-cues", "--out", str(out)]) == 0
    artifact = load_artifact(out, expected_kind="words")
    assert "--abandon-cues" in artifact.metadata["created_by"]
    report = artifact.metadata["abandon_cross_validation"]
    cues = WordModel.from_artifact(artifact).config.abandon
    assert cues is not None and cues.threshold == report["chosen"]


def test_abandon_cues_without_abandoned_units_is_a_clear_error(
        transcripts: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["train", "words", str(transcripts), "--min-freq", "1", "--max-iterations", "20",
                 "--abandon-cues", "--out", str(tmp_path / "words.tagger")])
    assert code == 1
    assert "no abandoned utterances" in capsys.readouterr().err
