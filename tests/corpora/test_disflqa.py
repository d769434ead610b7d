"""Disfl-QA reader: checked against the dataset's own fluent originals (Gupta et al. 2021) and
alignments written out by hand with Shriberg's (1994) terms."""

from __future__ import annotations

import contextlib
import json
from functools import cache
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    CorpusNotFoundError,
    DisfluencyLabel,
    Repair,
    TranscriptFormatError,
    UtteranceFunction,
)
from midstream.corpora._disflqa import (
    EDIT_TERMS,
    FILLED_PAUSES,
    parse_item,
    read_disflqa,
    retained,
    tokens,
)

F, R, E, P, FP, RS = (DisfluencyLabel.FLUENT, DisfluencyLabel.REPARANDUM,
                      DisfluencyLabel.EDIT_TERM, DisfluencyLabel.REPAIR, DisfluencyLabel.FILLER,
                      DisfluencyLabel.RESTART)


@cache
def _split(root: Path, split: str) -> tuple[Conversation, ...]:
    return tuple(read_disflqa(root, split=split))


@cache
def _items(root: Path, name: str) -> dict[str, dict[str, str]]:
    data: dict[str, dict[str, str]] = json.loads((root / name).read_text(encoding="utf-8"))
    return data


def _item(original: str, disfluent: str) -> Conversation:
    conversation = parse_item("x", {"original": original, "disfluent": disfluent})
    assert conversation is not None
    return conversation


@pytest.mark.corpus
@pytest.mark.parametrize(("split", "name", "items"), [("train", "train.json", 7182),
                                                      ("val", "dev.json", 1000)])
def test_one_conversation_per_item(disfl_qa_dir: Path, split: str, name: str,
                                   items: int) -> None:
    # Source: corpora README and the dataset README: 7,182 train and 1,000 dev questions. Items
    # whose disfluent text holds no letter or digit (two in train.json) carry nothing to tag.
    data = _items(disfl_qa_dir, name)
    assert len(data) == items
    wordless = sum(not any(ch.isalnum() for ch in v["disfluent"]) for v in data.values())
    conversations = _split(disfl_qa_dir, split)
    assert len(conversations) == items - wordless
    assert all(c.utterances[0].function is UtteranceFunction.QUESTION for c in conversations)


@pytest.mark.corpus
@pytest.mark.parametrize(("split", "name"), [("train", "train.json"), ("val", "dev.json")])
def test_clean_text_is_the_fluent_original(disfl_qa_dir: Path, split: str, name: str) -> None:
    # Source: each item's "original" question is the annotators' fluent version: dropping the
    # removed labels must give it back exactly, for every item that has labels.
    data = _items(disfl_qa_dir, name)
    labelled = 0
    for conversation in _split(disfl_qa_dir, split):
        if conversation.labels is None:
            continue
        labelled += 1
        clean = [w.text for w, label in zip(conversation.words, conversation.labels, strict=True)
                 if label not in REMOVED_FROM_CLEAN_TEXT]
        assert clean == tokens(data[conversation.id]["original"]), conversation.id
    # Documented in the reader: about 18% of the items are rewrites, not in-place repairs.
    assert 0.75 < labelled / len(data) < 0.9


@pytest.mark.corpus
def test_edit_terms_meet_the_documented_rule_on_train(disfl_qa_dir: Path) -> None:
    # The rule in corpora/_disflqa.py: a listed phrase occurs in the deleted spans of >= 20
    # training questions and in >= 90% of the questions containing it at all.
    def grams(words: list[str]) -> set[str]:
        return {" ".join(words[i:i + n]) for n in (1, 2, 3) for i in range(len(words) - n + 1)}

    in_spans: dict[str, int] = {}
    in_fluent: dict[str, int] = {}
    for item in _items(disfl_qa_dir, "train.json").values():
        disfluent, fluent = tokens(item["disfluent"]), tokens(item["original"])
        for gram in grams(fluent):
            in_fluent[gram] = in_fluent.get(gram, 0) + 1
        keep, exact = retained(disfluent, fluent)
        if not exact:
            continue
        found: set[str] = set()
        start = None
        for i, kept in enumerate([*keep, True]):
            if not kept and start is None:
                start = i
            elif kept and start is not None:
                found |= grams(disfluent[start:i])
                start = None
        for gram in found:
            in_spans[gram] = in_spans.get(gram, 0) + 1
    for phrase in (*EDIT_TERMS, *FILLED_PAUSES):
        spans, fluent_count = in_spans.get(phrase, 0), in_fluent.get(phrase, 0)
        assert spans >= 20, phrase
        assert spans / (spans + fluent_count) >= 0.9, phrase


def test_hand_aligned_example_with_an_interregnum() -> None:
    # Source: train.json item 5a5918ff3e1742001a15cf7e, aligned by hand: "what do petrologists"
    # is the reparandum, "no" the interregnum, the second "what" the repair onset.
    conversation = _item("What do unstable isotope studies indicate?",
                         "What do petrologists no what do unstable isotope studies indicate?")
    assert conversation.labels == (R, R, R, E, P, F, F, F, F, F)
    assert conversation.repairs == (Repair(reparandum=(0, 1, 2), interregnum=(3,),
                                           repair_onset=4),)


def test_hand_aligned_example_with_a_phrase_interregnum() -> None:
    # Source: train.json item 5ad4f40c5b96ef001a10a774; "no make that" is the interregnum.
    conversation = _item(
        "What is the basic unit of territorial division in Warsaw?",
        "What is the second level of territorial division in Poland no make that the basic "
        "unit of territorial division in Warsaw?")
    words = [w.text for w in conversation.words]
    assert words[2:13] == ["the", "second", "level", "of", "territorial", "division", "in",
                           "poland", "no", "make", "that"]
    assert conversation.labels == (F, F, *[R] * 8, E, E, E, P, *[F] * 7)
    assert conversation.repairs == (Repair(reparandum=tuple(range(2, 10)),
                                           interregnum=(10, 11, 12), repair_onset=13),)


def test_dataset_readme_example_and_filled_pause() -> None:
    # Source: the Disfl-QA README example 56ddde6b9a695914005b962c, plus a filled pause.
    conversation = _item("What century did the Normans first gain their separate identity?",
                         "When no what century did the Normans first gain their separate "
                         "identity?")
    assert conversation.labels is not None
    assert conversation.labels[:3] == (R, E, P)
    filled = _item("Who wrote it?", "Who read uh wrote it?")
    assert filled.labels == (F, R, FP, P, F)
    assert filled.repairs == (Repair(reparandum=(1,), interregnum=(2,), repair_onset=3),)


def test_trailing_span_is_a_restart_and_a_rewrite_is_unlabelled() -> None:
    # Invented: a stretch added after the end and abandoned is a restart (no repair onset);
    # editing terms alone, with no reparandum, make no repair structure.
    restart = _item("Who wrote it?", "Who wrote it or rather the")
    assert restart.labels == (F, F, F, RS, RS, RS)
    assert restart.repairs == (Repair(reparandum=(3, 4, 5)),)
    assert restart.repairs[0].is_restart
    only_terms = _item("Who wrote it?", "Who uh wrote it")
    assert only_terms.labels == (F, FP, F, F) and only_terms.repairs == ()
    # Source: the Disfl-QA README example 56ddde6b9a695914005b9628: "located" is not in the
    # disfluent question, so no in-place structure exists; never scored as fluent.
    rewrite = _item("In what country is Normandy located?",
                    "In what country is Norse found no wait Normandy not Norse?")
    assert rewrite.labels is None and rewrite.repairs == ()


@pytest.mark.corpus
def test_test_split_is_held_back(disfl_qa_dir: Path) -> None:
    with pytest.raises(CorpusNotFoundError, match="held back"):
        list(read_disflqa(disfl_qa_dir, split="test"))
    with pytest.raises(CorpusNotFoundError, match="unknown Disfl-QA split"):
        list(read_disflqa(disfl_qa_dir, split="dev"))


def test_bad_items_name_the_field(tmp_path: Path) -> None:
    path = tmp_path / "train.json"
    path.write_text(json.dumps({"q1": {"original": "Who?", "disfluent": 3}}), encoding="utf-8")
    with pytest.raises(TranscriptFormatError, match="field 'disfluent'"):
        list(read_disflqa(tmp_path, split="train"))
    path.write_text("[1, 2]", encoding="utf-8")
    with pytest.raises(TranscriptFormatError, match="JSON object of items"):
        list(read_disflqa(tmp_path, split="train"))


_WORDS = st.lists(st.sampled_from(["what", "is", "the", "no", "uh", "i", "mean", "x", "y"]),
                  max_size=12)


@given(_WORDS, _WORDS, st.lists(st.integers(0, 12), max_size=6))
def test_fluent_subsequence_always_aligns_exactly(fluent: list[str], extra: list[str],
                                                  where: list[int]) -> None:
    disfluent = list(fluent)
    for word, position in zip(extra, where, strict=False):
        disfluent.insert(min(position, len(disfluent)), word)
    keep, exact = retained(disfluent, fluent)
    assert exact
    assert [w for w, k in zip(disfluent, keep, strict=True) if k] == fluent


@given(st.dictionaries(st.sampled_from(["original", "disfluent", "other"]),
                       st.one_of(st.text(max_size=60), st.integers(), st.none()), max_size=3))
def test_item_parser_never_crashes(item: dict[str, object]) -> None:
    with contextlib.suppress(TranscriptFormatError):
        conversation = parse_item("q", item)
        if conversation is not None and conversation.labels is not None:
            assert len(conversation.labels) == len(conversation.words)


@given(st.binary(max_size=200))
def test_item_parser_on_random_bytes(data: bytes) -> None:
    text = data.decode("utf-8", errors="replace")
    with contextlib.suppress(TranscriptFormatError):
        parse_item("q", {"original": text[: len(text) // 2], "disfluent": text})
