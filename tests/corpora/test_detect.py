"""Corpus detection, dispatch and splits."""

from __future__ import annotations

import io
from pathlib import Path

import pytest
from midstream import Conversation, CorpusNotFoundError, Word
from midstream.corpora import CorpusKind, detect_kind, read_corpus, write_jsonl
from midstream.corpora._detect import split_names


@pytest.mark.corpus
@pytest.mark.parametrize(("folder", "kind"), [
    ("swda", CorpusKind.SWDA), ("mrda", CorpusKind.MRDA), ("maptask", CorpusKind.MAPTASK),
    ("disfl_qa", CorpusKind.DISFL_QA),
])
def test_each_shipped_corpus_is_recognised(corpora_dir: Path, folder: str,
                                           kind: CorpusKind) -> None:
    assert detect_kind(corpora_dir / folder) is kind


@pytest.mark.parametrize(("files", "kind"), [
    (["sw00utt/sw_0001_4325.utt"], CorpusKind.SWDA),
    (["database/Bed002.dadb"], CorpusKind.MRDA),
    (["moves/q1ec1.g.moves.xml"], CorpusKind.MAPTASK),
    (["dev.json"], CorpusKind.DISFL_QA),
    (["calls.jsonl"], CorpusKind.JSONL),
])
def test_kinds_are_recognised_by_their_files(tmp_path: Path, files: list[str],
                                             kind: CorpusKind) -> None:
    for name in files:
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("", encoding="utf-8")
    assert detect_kind(tmp_path) is kind


def test_unknown_folder_names_path_and_what_was_looked_for(tmp_path: Path) -> None:
    (tmp_path / "notes.txt").write_text("", encoding="utf-8")
    with pytest.raises(CorpusNotFoundError, match=r"no corpus of a known kind; looked for .*dadb"):
        detect_kind(tmp_path)
    with pytest.raises(CorpusNotFoundError, match="no such file or folder"):
        read_corpus(tmp_path / "missing")
    with pytest.raises(CorpusNotFoundError, match=r"not a \.jsonl file"):
        detect_kind(tmp_path / "notes.txt")


def _write(path: Path, ids: list[str]) -> None:
    buffer = io.StringIO()
    write_jsonl([Conversation(id=i, corpus="mine", words=(Word(text="hi", speaker="A"),),
                              utterances=()) for i in ids], buffer)
    path.write_text(buffer.getvalue(), encoding="utf-8")


def test_jsonl_file_and_folder_with_splits(tmp_path: Path) -> None:
    _write(tmp_path / "b.jsonl", ["c3"])
    _write(tmp_path / "a.jsonl", ["c1", "c2"])
    assert detect_kind(tmp_path / "a.jsonl") is CorpusKind.JSONL
    assert [c.id for c in read_corpus(tmp_path / "a.jsonl")] == ["c1", "c2"]
    assert [c.id for c in read_corpus(tmp_path)] == ["c1", "c2", "c3"]
    (tmp_path / "splits").mkdir()
    (tmp_path / "splits" / "val.txt").write_text("# held-out calls\nc3\n\nc1\n", encoding="utf-8")
    assert [c.id for c in read_corpus(tmp_path, split="val")] == ["c1", "c3"]
    with pytest.raises(CorpusNotFoundError, match="a single file has no splits"):
        read_corpus(tmp_path / "a.jsonl", split="val")


def test_missing_split_fails_at_once_and_names_the_file(tmp_path: Path) -> None:
    _write(tmp_path / "a.jsonl", ["c1"])
    with pytest.raises(CorpusNotFoundError, match=r"splits/test\.txt.*held back"):
        read_corpus(tmp_path, split="test")
    with pytest.raises(CorpusNotFoundError, match="not a plain name"):
        split_names(tmp_path, "../../etc/passwd")


@pytest.mark.corpus
@pytest.mark.parametrize("folder", ["swda", "mrda", "maptask", "disfl_qa"])
def test_test_splits_are_held_back(corpora_dir: Path, folder: str) -> None:
    with pytest.raises(CorpusNotFoundError, match="held back"):
        read_corpus(corpora_dir / folder, split="test")


@pytest.mark.corpus
@pytest.mark.parametrize(("folder", "split", "count"), [
    # Corpora README: MRDA 51 train / 12 val meetings, Map Task 102 / 13 dialogues.
    ("mrda", "train", 51), ("mrda", "val", 12), ("maptask", "train", 102), ("maptask", "val", 13),
])
def test_split_lists_have_the_documented_sizes(corpora_dir: Path, folder: str, split: str,
                                               count: int) -> None:
    assert len(split_names(corpora_dir / folder, split)) == count


@pytest.mark.corpus
def test_mrda_split_reads_only_listed_meetings(mrda_dir: Path) -> None:
    listed = split_names(mrda_dir, "val")
    first = next(read_corpus(mrda_dir, split="val"))
    assert first.id == sorted(listed)[0] and first.corpus == "mrda"


@pytest.mark.corpus
def test_disfl_qa_val_is_the_dev_file(disfl_qa_dir: Path) -> None:
    first = next(read_corpus(disfl_qa_dir, split="val"))
    assert first.corpus == "disfl_qa"
    with pytest.raises(CorpusNotFoundError, match=r"train .*val"):
        read_corpus(disfl_qa_dir, split="dev")
