"""The examples ``scripts/restart_heldout_check.py`` judges: which words a decision would revise
and what counts as a gold restart (the corpus' restart labels, ``docs/labels.md``).

The channel is invented: one bracket restart ("and [i] uh because ...", the CRF calling it a
reparandum) and one abandoned unit ("so i was going to" before a fresh start).
"""

from __future__ import annotations

import importlib.util
import sys
from collections import Counter
from pathlib import Path
from types import ModuleType

import numpy as np

REPO = Path(__file__).resolve().parents[2]

TEXTS = ["and", "i", "uh", "because", "we", "went", "home", "so", "i", "was", "going", "to",
         "we", "left"]
PREDICTED = ["fl", "rp.ip", "fil", "fl", "fl", "fl", "fl", "fl", "fl", "fl", "fl", "fl", "fl",
             "fl"]
GOLD = ["fl", "rs.ip", "fil", "fl", "fl", "fl", "fl", "rs", "rs", "rs", "rs", "rs.ip", "fl", "fl"]
ENDS = {6, 11, 13}


def _script() -> ModuleType:
    spec = importlib.util.spec_from_file_location(
        "restart_heldout_check", REPO / "scripts" / "restart_heldout_check.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["restart_heldout_check"] = module
    spec.loader.exec_module(module)
    return module


def _channel(script: ModuleType) -> object:
    n = len(TEXTS)
    return script.Held(
        conversation="invented", texts=TEXTS, fragment=[False] * n, gold=GOLD,
        predicted=PREDICTED, predicted_end=[i in ENDS for i in range(n)],
        marginals=np.full((n, 2), 0.5), emissions=np.zeros((n, 2)),
        abandoned=[7 <= i <= 11 for i in range(n)], other_words=[0] * n)


def test_a_predicted_reparandum_span_is_one_example_gold_when_its_words_are_restarts() -> None:
    script = _script()
    examples = list(script.span_examples(_channel(script), 0, [0], [1]))
    assert len(examples) == 1
    channel, features, gold, words = examples[0]
    assert (channel, gold, words) == (0, True, [1])
    assert {"len=1", "w1=i", "int=fil", "prev=and", "r1=because", "nocopy1"} <= set(features)


def test_a_predicted_end_revises_only_its_last_open_words_and_keeps_interregnum_labels() -> None:
    script = _script()
    examples = list(script.unit_examples(_channel(script), 0, 7))
    # The channel's last word has no next word: only the ends after "home" and "to" are judged.
    assert [(gold, words) for _, _, gold, words in examples] == [
        (False, [0, 3, 4, 5, 6]),  # "i" (reparandum) and "uh" (filler) keep their label
        (True, [7, 8, 9, 10, 11]),
    ]
    short = list(script.unit_examples(_channel(script), 0, 3))
    assert [words for _, _, _, words in short] == [[4, 5, 6], [9, 10, 11]]


def test_scores_count_restart_words_and_edited_words_as_the_evaluation_does() -> None:
    script = _script()
    channel = _channel(script)
    assert script._score([[channel]], [[GOLD]]).startswith("1.0000 (1.000 / 1.000) | 1.0000")
    revised = ["rs" if i == 1 else t for i, t in enumerate(PREDICTED)]
    # Revising the reparandum "i" to restart finds one of six restart words and leaves EDITED
    # as it was (both labels are EDITED words); reparandum loses its one false positive.
    restart, edited, reparandum = script._score([[channel]], [[revised]]).split(" | ")
    before = script._score([[channel]], [[PREDICTED]]).split(" | ")
    assert restart == "0.2857 (1.000 / 0.167)"
    assert before[0].startswith("0.0000")
    assert edited == before[1] == "0.2857 (1.000 / 0.167)"
    assert reparandum == "0.0000 (0.000 / 0.000)"
    assert before[2] == "0.0000 (0.000 / 0.000)"


def test_fluent_words_are_judged_with_how_often_their_pair_was_seen() -> None:
    script = _script()
    unigrams = Counter({"was": 8, "going": 4})
    bigrams = Counter({("was", "going"): 4})
    examples = list(script.word_examples(_channel(script), 0, unigrams=unigrams,
                                         bigrams=bigrams, restart_columns=[0],
                                         edited_columns=[0, 1]))
    judged = {words[0]: (gold, set(features)) for _, features, gold, words in examples}
    # Not judged: the reparandum "i", the filler, and the words an utterance end follows.
    assert sorted(judged) == [0, 3, 4, 5, 7, 8, 9, 10, 12]
    assert [i for i, (gold, _) in judged.items() if gold] == [7, 8, 9, 10]
    # "was going": seen 4 times, after half of the "was" (0.2 and more is the top bucket).
    assert {"bc=2", "cond=9"} <= judged[9][1]
    assert "bc=0" in judged[10][1]  # "going to": never seen here
