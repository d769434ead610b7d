"""Corpus statistics and the ``midstream corpus stats`` command.

Repair types follow Shriberg (1994): repetition (the repair repeats the reparandum), substitution
(it replaces it), deletion (no repair: a restart). Corpus figures come from the corpora README.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from midstream import Conversation, DisfluencyLabel, Repair, Utterance, UtteranceFunction, Word
from midstream.client.cli._main import main
from midstream.corpora._stats import corpus_stats, repair_type
from midstream.corpora._swda import parse_conversation, read_swda

L = DisfluencyLabel
HEADER = "FILENAME:\t0000_0000_0000\n" + "=" * 40 + "\n"


def _swda(body: str) -> Conversation:
    return parse_conversation(HEADER + body, conversation_id="sw0", source="test")


@pytest.mark.parametrize(
    ("markup", "kind"),
    [
        ("[ I, + I ] think so", "repetition"),
        ("[ the car, + {F uh, } the car ] left", "repetition"),  # interregnum skipped
        ("[ th-, + the ] car", "repetition"),  # a fragment begun again
        ("[ I, + {F uh } we ] went", "substitution"),
        ("[ the red, + the blue ] car", "substitution"),
        ("[ I think, + ] {C and } so", "deletion"),
    ],
)
def test_repairs_are_typed_as_in_shriberg(markup: str, kind: str) -> None:
    conversation = _swda(f"sd  A.1 utt1: {markup} /\n")
    assert conversation.labels is not None
    (repair,) = conversation.repairs
    assert repair_type(repair, conversation.words, conversation.labels) == kind


def test_the_repair_is_read_from_the_same_speaker_only() -> None:
    conversation = _swda(
        "sd  A.1 utt1: [ we went, + we --\n"
        "b   B.2 utt1: went /\n"
        "+   A.3 utt1: -- went ] home /\n"
    )
    assert conversation.labels is not None
    (repair,) = conversation.repairs
    assert repair_type(repair, conversation.words, conversation.labels) == "repetition"


def test_counts_leave_unannotated_conversations_out_of_disfluency_figures() -> None:
    annotated = _swda("sd  A.1 utt1: {F uh } [ I, + I ] think so /\nb  B.2 utt1: Uh-huh. /\n")
    unannotated = Conversation(
        id="plain", corpus="demo",
        words=(Word(text="hello", speaker="A"), Word(text="s", speaker="B", fragment=True)),
        utterances=(Utterance(speaker="A", words=(0,), function=UtteranceFunction.OTHER,
                              fine_tag="fp", fine_class="fp"),),
    )
    stats = corpus_stats([annotated, unannotated])
    assert (stats.conversations, stats.disfluency_annotated) == (2, 1)
    assert (stats.words, stats.annotated_words, stats.fragments) == (8, 6, 1)
    assert stats.speakers == 4
    assert stats.utterances == 3
    assert stats.labels == {"fluent": 3, "filler": 1, "edit_term": 0, "discourse_marker": 0,
                            "reparandum": 1, "repair": 1, "restart": 0}
    assert stats.repairs == {"repetition": 1, "substitution": 0, "deletion": 0}
    assert stats.functions["statement"] == 1
    assert stats.functions["acknowledgement"] == 1
    assert stats.functions["other"] == 1
    assert stats.fine_classes == {"sd": 1, "b": 1, "fp": 1}
    assert json.loads(json.dumps(stats.to_json())) == stats.to_json()


def test_no_conversations_give_zero_counts() -> None:
    stats = corpus_stats([])
    assert stats.conversations == 0
    assert set(stats.labels.values()) == {0}
    assert stats.repairs == {"repetition": 0, "substitution": 0, "deletion": 0}


def test_restart_labels_count_as_deletions() -> None:
    conversation = Conversation(
        id="c", corpus="demo",
        words=(Word(text="i", speaker="A"), Word(text="we", speaker="A")),
        utterances=(),
        labels=(L.RESTART, L.FLUENT),
        repairs=(Repair(reparandum=(0,)),),
    )
    assert corpus_stats([conversation]).repairs["deletion"] == 1


@pytest.mark.corpus
def test_val_split_figures(swda_dir: Path) -> None:
    stats = corpus_stats(read_swda(swda_dir, split="val"))
    # corpora README: val is 108 conversations, 89 of them with disfluency markup
    assert (stats.conversations, stats.disfluency_annotated) == (108, 89)
    assert stats.speakers == 2 * 108  # Switchboard calls have two speakers (A and B)
    # Shriberg (1994) reports repetitions as the most frequent repair type in Switchboard
    # (from memory), then substitutions, then deletions.
    assert stats.repairs["repetition"] > stats.repairs["substitution"] > stats.repairs["deletion"]
    assert sum(stats.fine_classes.values()) == stats.utterances


@pytest.mark.corpus
def test_the_command_prints_the_same_counts_as_json(
    swda_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["corpus", "stats", str(swda_dir), "--split", "val", "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == corpus_stats(read_swda(swda_dir, split="val")).to_json()
    assert main(["corpus", "stats", str(swda_dir), "--split", "val"]) == 0
    table = capsys.readouterr().out
    assert "disfluency-annotated" in table
    assert "repetition" in table


def test_the_command_names_a_missing_corpus(tmp_path: Path,
                                            capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["corpus", "stats", str(tmp_path / "nowhere")]) == 1
    assert "nowhere" in capsys.readouterr().err


@pytest.mark.corpus
def test_both_kinds_of_restart_are_counted_in_swda_val(swda_dir: Path) -> None:
    # SwDA val (corpus annotation): the "[ X + ]" brackets with an empty repair, and "-/" units
    # followed by the same speaker's fresh start (corpora/_restarts.py). The issue that asked
    # for them estimated "about 60" such units in val by its own count.
    stats = corpus_stats(read_swda(swda_dir, split="val"))
    assert stats.restarts["bracket"] == stats.repairs["deletion"]
    assert 30 <= stats.restarts["abandoned"] <= 70
    assert sum(stats.restart_words.values()) == stats.labels["restart"]
    assert stats.restart_words["abandoned"] > 0
