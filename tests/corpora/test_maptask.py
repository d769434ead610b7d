"""Map Task reader: checked against the corpus files (HCRC Map Task, Anderson et al. 1991) and
the move definitions of the HCRC Dialogue Structure Coding Manual (Carletta et al. 1996)."""

from __future__ import annotations

import contextlib
import re
import tempfile
from functools import cache
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import (
    Conversation,
    CorpusNotFoundError,
    TranscriptFormatError,
    UtteranceFunction,
    coarse_function,
    mapping_rows,
)
from midstream.corpora import read_corpus
from midstream.corpora._maptask import parse_transcript_line, read_maptask, read_moves

MOVE_LABELS = {"instruct", "explain", "check", "align", "query_yn", "query_w", "acknowledge",
               "clarify", "reply_y", "reply_n", "reply_w", "ready", "uncodable"}


@cache
def _all(root: Path) -> tuple[Conversation, ...]:
    return tuple(read_maptask(root))


def _transcript_lines(root: Path, name: str) -> list[tuple[str, str]]:
    lines = (root / "transcripts" / f"{name}.txt").read_text(encoding="utf-8").splitlines()[3:]
    return [(line.split("\t")[0], line.split("\t")[1]) for line in lines if line.strip()]


@pytest.mark.corpus
def test_one_utterance_per_move_element(maptask_dir: Path) -> None:
    # Source: the moves XML files; every <move ...> element is one move (13 labels, 24,296
    # moves in the 115 dialogues of this copy).
    conversations = _all(maptask_dir)
    assert len(conversations) == 115
    for conversation in conversations:
        elements = sum(
            len(re.findall(r"<move ", (maptask_dir / "moves" / f"{conversation.id}.{s}.moves.xml")
                           .read_text(encoding="utf-8")))
            for s in ("g", "f"))
        assert len(conversation.utterances) == elements, conversation.id


@pytest.mark.corpus
def test_abandoned_moves_are_incomplete(maptask_dir: Path) -> None:
    # Source: aban="true_aban" attributes in the moves files.
    flagged = sum(path.read_text(encoding="utf-8").count('aban="true_aban"')
                  for path in (maptask_dir / "moves").glob("*.moves.xml"))
    incomplete = sum(not u.complete for c in _all(maptask_dir) for u in c.utterances)
    assert incomplete == flagged


@pytest.mark.corpus
@pytest.mark.parametrize("name", ["q1ec1", "q6nc5", "q8nc8"])
def test_words_and_speakers_follow_the_transcript(maptask_dir: Path, name: str) -> None:
    # Source: transcripts/NAME.txt, tokens split on white space (every token here holds a letter
    # or digit); the speaker of each move line is its first column.
    conversation = next(c for c in _all(maptask_dir) if c.id == name)
    lines = _transcript_lines(maptask_dir, name)
    tokens = [(speaker, token) for speaker, text in lines for token in text.split()]
    assert len(conversation.words) == len(tokens)
    assert [w.speaker for w in conversation.words] == [s for s, _ in tokens]
    assert [u.speaker for u in conversation.utterances] == [s for s, _ in lines]
    assert sum(w.fragment for w in conversation.words) == sum(
        t.endswith("--") for _, t in tokens)


@pytest.mark.corpus
def test_first_moves_of_q1ec1(maptask_dir: Path) -> None:
    # Source: q1ec1.g.moves.xml moves 1-2 (ready, instruct) and transcript lines 4-6
    # ("okay", "starting off we are above a caravan park", f: "mmhmm").
    conversation = next(c for c in _all(maptask_dir) if c.id == "q1ec1")
    words = conversation.words
    first, second, third = conversation.utterances[:3]
    assert (first.fine_class, [words[i].text for i in first.words]) == ("ready", ["okay"])
    assert first.function is UtteranceFunction.OTHER
    assert second.fine_class == "instruct"
    assert [words[i].text for i in second.words][:3] == ["starting", "off", "we"]
    assert third.speaker == "f"
    # Source: q1ec1.g.moves.xml move 12, label="instruct" cont="true_cont".
    giver = [u for u in conversation.utterances if u.speaker == "g"]
    assert giver[7].fine_tag == "instruct+cont"


@pytest.mark.corpus
def test_every_label_in_the_corpus_has_a_row(maptask_dir: Path) -> None:
    labels = {u.fine_class for c in _all(maptask_dir) for u in c.utterances}
    assert labels == MOVE_LABELS
    assert {row.tag for row in mapping_rows("maptask")} == MOVE_LABELS


def test_clarify_supplies_and_check_requests_clarification() -> None:
    # Coding manual §2.2.5: a clarify move is a reply giving more than was asked; §2.1.3: a
    # check asks the partner to confirm what the speaker is unsure of.
    assert coarse_function("maptask", "clarify") is UtteranceFunction.ANSWER
    assert coarse_function("maptask", "check") is UtteranceFunction.CLARIFICATION_REQUEST
    assert coarse_function("maptask", "acknowledge") is UtteranceFunction.ACKNOWLEDGEMENT


@pytest.mark.corpus
def test_val_split_reads_the_listed_dialogues(maptask_dir: Path) -> None:
    listed = (maptask_dir / "splits" / "val.txt").read_text(encoding="utf-8").split()
    assert len(listed) == 13  # corpora README: 13 validation dialogues
    assert [c.id for c in read_corpus(maptask_dir, split="val")] == sorted(listed)


def _write_dialogue(root: Path, lines: str, g_moves: str, f_moves: str) -> None:
    (root / "moves").mkdir()
    (root / "transcripts").mkdir()
    (root / "transcripts" / "d1.txt").write_text("h1\nh2\nwho\t$m\t\n" + lines, encoding="utf-8")
    for speaker, moves in (("g", g_moves), ("f", f_moves)):
        (root / "moves" / f"d1.{speaker}.moves.xml").write_text(
            f'<?xml version="1.0"?><root>{moves}</root>', encoding="utf-8")


def test_move_count_mismatch_is_a_format_error(tmp_path: Path) -> None:
    # Invented data: two giver lines but one giver move.
    _write_dialogue(tmp_path, "g\tgo left \ng\tthen up \n", '<move label="instruct"/>', "")
    with pytest.raises(TranscriptFormatError, match="more 'g' lines than moves"):
        list(read_maptask(tmp_path))


def test_broken_xml_is_a_format_error(tmp_path: Path) -> None:
    _write_dialogue(tmp_path, "g\tgo \n", "<move label=", "")
    with pytest.raises(TranscriptFormatError, match="not well-formed XML"):
        list(read_maptask(tmp_path))


def test_missing_dialogue_files_are_named(tmp_path: Path) -> None:
    _write_dialogue(tmp_path, "g\tgo \n", '<move label="instruct"/>', "")
    (tmp_path / "moves" / "d1.f.moves.xml").unlink()
    with pytest.raises(CorpusNotFoundError, match=r"d1\.f\.moves\.xml"):
        list(read_maptask(tmp_path))


def test_flags_and_fragments_of_a_made_up_dialogue(tmp_path: Path) -> None:
    _write_dialogue(tmp_path, "g\tgo to the s-- shop \nf\tright \n",
                    '<move label="instruct" aban="true_aban" rep="self"/>',
                    '<move label="acknowledge" interj="true_interj"/>')
    (conversation,) = read_maptask(tmp_path)
    assert [w.text for w in conversation.words] == ["go", "to", "the", "s", "shop", "right"]
    assert conversation.words[3].fragment
    assert [u.fine_tag for u in conversation.utterances] == ["instruct+aban+rep-self",
                                                             "acknowledge+interj"]
    assert not conversation.utterances[0].complete
    assert conversation.labels is None


@given(st.text(max_size=200))
def test_transcript_line_parser_never_crashes(line: str) -> None:
    with contextlib.suppress(TranscriptFormatError):
        speaker, _ = parse_transcript_line(line)
        assert speaker in ("g", "f")


@given(st.binary(max_size=200))
def test_transcript_line_parser_on_random_bytes(data: bytes) -> None:
    with contextlib.suppress(TranscriptFormatError):
        parse_transcript_line(data.decode("utf-8", errors="replace"))


@given(st.binary(max_size=300))
def test_moves_file_of_random_bytes(data: bytes) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "d.g.moves.xml"
        path.write_bytes(data)
        with contextlib.suppress(TranscriptFormatError):
            assert all(move.label for move in read_moves(path))
