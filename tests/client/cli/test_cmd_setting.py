"""``--setting NAME`` on the commands that label utterance functions with local models.

The model is a tiny coarse one trained here on two invented corpora that annotate one utterance
differently (``setting_kit``), so a setting that is not applied shows in the figures.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from midstream.client.cli import main
from midstream.corpora import write_jsonl
from setting_kit import SETTINGS, setting_conversation, write_setting_models

_GOLD = "utterance_functions.gold_segmentation.coarse.accuracy"
_STREAMED = "utterance_functions.predicted_segmentation.word_accuracy"


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_setting_models(tmp_path_factory.mktemp("setting-models"))


@pytest.fixture(scope="module")
def workshop_calls(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Unseen conversations of the workshop setting only."""
    path = tmp_path_factory.mktemp("setting-calls") / "workshop.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl([setting_conversation("workshop", seed) for seed in range(100, 104)], stream)
    return path


def _evaluate(models: Path, corpus: Path, capsys: pytest.CaptureFixture[str],
              *extra: str) -> dict[str, object]:
    capsys.readouterr()
    assert main(["evaluate", str(corpus), "--functions-only", "--json",
                 "--model", str(models / "words.tagger"),
                 "--functions-model", str(models / "functions-coarse.tagger"), *extra]) == 0
    figures: dict[str, object] = json.loads(capsys.readouterr().out)
    return figures


def test_evaluate_labels_in_the_named_setting_and_records_it(
        models: Path, workshop_calls: Path, capsys: pytest.CaptureFixture[str]) -> None:
    shared = _evaluate(models, workshop_calls, capsys)
    own = _evaluate(models, workshop_calls, capsys, "--setting", "workshop")
    other = _evaluate(models, workshop_calls, capsys, "--setting", "choir")
    assert "setting" not in shared
    assert own["setting"] == "workshop" and other["setting"] == "choir"
    # Workshop calls are labelled best in their own setting, on gold utterances and streamed
    # alike: the choir's annotation of "right" is wrong for them by construction.
    for key in (_GOLD, _STREAMED):
        own_value, other_value = own[key], other[key]
        assert isinstance(own_value, float) and isinstance(other_value, float)
        assert own_value > other_value, key
    assert own[_GOLD] == 1.0


def test_evaluate_refuses_an_unknown_setting_naming_the_known_ones(
        models: Path, workshop_calls: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["evaluate", str(workshop_calls), "--functions-only",
                 "--functions-model", str(models / "functions-coarse.tagger"),
                 "--setting", "orchestra"])
    err = capsys.readouterr().err.strip()
    assert code == 1
    assert len(err.splitlines()) == 1 and "'orchestra'" in err
    assert all(name in err for name in SETTINGS), err


def test_evaluate_refuses_a_setting_without_function_figures(
        models: Path, workshop_calls: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["evaluate", str(workshop_calls), "--words-only",
                 "--model", str(models / "words.tagger"), "--setting", "workshop"])
    assert code == 1
    assert "--setting" in capsys.readouterr().err


def test_a_model_without_settings_refuses_any_setting(
        workshop_calls: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The shipped models (no settings) say so rather than silently using shared weights.
    code = main(["evaluate", str(workshop_calls), "--functions-only", "--setting", "workshop"])
    assert code == 1
    assert "no setting 'workshop'" in capsys.readouterr().err


def test_demo_refuses_an_unknown_setting(models: Path,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["demo", "--no-pause", "--models", str(models), "--setting", "orchestra"])
    err = capsys.readouterr().err
    assert code == 1
    assert all(name in err for name in SETTINGS), err


def test_demo_labels_in_a_known_setting(models: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["demo", "--no-pause", "--models", str(models), "--setting", "choir"]) == 0
    assert "words," in capsys.readouterr().out
