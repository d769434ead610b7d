"""``midstream evaluate`` prints tables a person can read; ``--json`` keeps every key."""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import pytest
from midstream.client.cli._figures import format_figures
from midstream.client.cli._main import main
from midstream.corpora import write_jsonl
from word_kit import invented_conversation

#: Shaped like evaluate's keys (values invented).
_FIGURES = {
    "disfluency.filler.precision": 0.98, "disfluency.filler.recall": 0.97,
    "disfluency.filler.f1": 0.975, "disfluency.reparandum.precision": 0.8,
    "disfluency.reparandum.recall": 0.7, "disfluency.reparandum.f1": 0.746,
    "disfluency.reparandum_no_fragments.f1": 0.78,
    "incremental.edit_overhead": 0.1, "incremental.final_decision_delay_words.mean": 7.5,
    "incremental.reparandum_f1_at_delay.0": 0.5, "incremental.reparandum_f1_at_delay.1": 0.6,
    "segmentation.precision": 0.9, "segmentation.recall": 0.8, "segmentation.f1": 0.847,
    "utterance_functions.accuracy_after_words.1": 0.7,
    "utterance_functions.accuracy_after_words.10": 0.88,
    "utterance_functions.accuracy_after_words.end": 0.9,
    "utterance_functions.gold_segmentation.coarse.count": 536.0,
    "utterance_functions.gold_segmentation.coarse.accuracy": 0.873,
    "utterance_functions.gold_segmentation.coarse.per_class.statement.precision": 0.93,
    "utterance_functions.gold_segmentation.coarse.per_class.statement.recall": 0.95,
    "utterance_functions.gold_segmentation.coarse.per_class.statement.f1": 0.94,
    "utterance_functions.gold_segmentation.coarse.per_class.statement.support": 335.0,
    "utterance_functions.gold_segmentation.coarse.per_class.answer.precision": 0.0,
    "utterance_functions.gold_segmentation.coarse.per_class.answer.recall": 0.0,
    "utterance_functions.gold_segmentation.coarse.per_class.answer.f1": 0.0,
    "utterance_functions.gold_segmentation.coarse.per_class.answer.support": 0.0,
    "utterance_functions.predicted_segmentation.words": 3809.0,
    "incremental.detection_rate": math.nan,
}


def _row(text: str, first: str) -> list[str]:
    """The cells of the table line whose first cell is ``first``."""
    for line in text.splitlines():
        cells = line.split()
        if cells and " ".join(cells[: len(first.split())]) == first:
            return cells[len(first.split()):]
    raise AssertionError(f"no line starting {first!r} in:\n{text}")


def test_metric_keys_become_rows_of_one_table_with_integer_counts() -> None:
    text = format_figures(_FIGURES)
    assert _row(text, "filler") == ["0.980", "0.970", "0.975"]
    assert _row(text, "reparandum") == ["0.800", "0.700", "0.746"]
    assert _row(text, "statement") == ["0.930", "0.950", "0.940", "335"]
    assert _row(text, "count") == ["536"]
    assert _row(text, "words") == ["3809"]
    # Steps in numeric order (10 after 1, not between 1 and 2), "end" last.
    afters = [line.split()[1:] for line in text.splitlines() if line.split()[:1] == ["after"]]
    assert afters == [["0", "1"], ["1", "10", "end"]]
    assert _row(text, "final_decision_delay_words (mean)") == ["7.500"]
    assert _row(text, "detection_rate") == ["n/a"]
    # A class without gold examples is left out and the table says so.
    assert "answer" not in text
    assert "(1 classes with no gold example left out)" in text
    # No dotted keys and no counts with decimals.
    assert "disfluency.filler" not in text
    assert not re.search(r"\b\d+\.0000\b", text)


@pytest.fixture
def transcripts(tmp_path: Path) -> Path:
    path = tmp_path / "calls.jsonl"
    with path.open("w", encoding="utf-8") as stream:
        write_jsonl([invented_conversation(seed) for seed in range(6)], stream)
    return path


def test_evaluate_prints_tables_holding_every_figure_json_gives(
        transcripts: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = tmp_path / "words.tagger"
    assert main(["train", "words", str(transcripts), "--min-freq", "1",
                 "--max-iterations", "30", "--out", str(model)]) == 0
    capsys.readouterr()
    argv = ["evaluate", str(transcripts), "--model", str(model), "--limit", "3"]
    assert main([*argv, "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "disfluency." not in text and not re.search(r"\b\d+\.0000\b", text)
    cells = set(text.split())
    for key, value in figures.items():
        if value is None:
            expected = "n/a"
        elif key.endswith((".count", ".support", ".words")):
            expected = str(round(value))
            assert value == round(value), key  # a count really is whole
        else:
            expected = f"{value:.3f}"
        if figures.get(key.rsplit(".", 1)[0] + ".support") == 0:
            continue  # a class without gold examples: left out, and said so
        assert expected in cells, f"{key} = {value} is missing from:\n{text}"
