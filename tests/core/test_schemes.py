"""Label schemes: the SWBD-DAMSL clustering and the coarse-function tables.

Source of the expected values: the SWBD-DAMSL coders' manual shipped with SwDA
(``doc/manual.august1.html``), §1c (clustering into 42 classes) and §1d (tag list).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from midstream import (
    SWBD42_CLASSES,
    InputError,
    UtteranceFunction,
    coarse_function,
    mapping_rows,
    swbd42_class,
)


def test_there_are_42_distinct_classes() -> None:
    # manual §1c: "the resulting 42 classes"
    assert len(SWBD42_CLASSES) == 42
    assert len(set(SWBD42_CLASSES)) == 42


def test_the_clustering_table_targets_exactly_the_42_classes() -> None:
    assert {row.target for row in mapping_rows("swbd_damsl")} == set(SWBD42_CLASSES)


@pytest.mark.parametrize(
    ("tag", "cls"),
    [
        ("sd", "sd"),
        ("sd^t", "sd"),  # §1c: secondary dimensions are removed
        ("sd^e", "sd"),
        ("sv^r", "sv"),
        ("qy^g", "qy"),  # ^g attached to a question goes; alone it is Tag-Question
        ("^g", "^g"),
        ("^q", "^q"),  # Quotation stands alone in the table
        ("sd(^q)", "sd"),  # quoted material inside a statement stays a statement
        ("^2", "^2"),
        ("^h", "^h"),
        ("qy^d", "qy^d"),  # §1c: the kept exceptions
        ("qy^d^t", "qy^d"),
        ("qw^d", "qw^d"),
        ("b^m", "b^m"),
        ("b^m^r", "b^m"),
        ("nn^e", "ng"),  # §1c: "folded the few examples of nn^e into ng"
        ("ny^e", "na"),  # §1c: "and ny^e into na"
        ("qr", "qy"),  # §1c grouped line "qr qy"
        ("fe", "ba"),  # "fe ba"
        ("cc", "oo_co_cc"),  # "oo co cc"
        ("fx", "sv"),  # "fx sv"
        ('"', "o"),  # 'fo o fw " by bc'
        ("bc", "o"),
        ("am", "aap_am"),  # "aap am"
        ("nd", "arp_nd"),  # "arp nd"
        ("sd,o@", "sd"),  # a combination counts as its first act; "@" is a segmentation flag
        ("x@", "x"),
        ("sd*", "sd"),
        ("%", "%"),
    ],
)
def test_tags_cluster_as_the_manual_says(tag: str, cls: str) -> None:
    assert swbd42_class(tag) == cls


@pytest.mark.parametrize("tag", ["+", "zz", "", "^", "^z", "(^q)"])
def test_an_unknown_tag_is_an_input_error_naming_it(tag: str) -> None:
    with pytest.raises(InputError, match=re.escape(repr(tag))):
        swbd42_class(tag)


def test_unknown_class_or_scheme_is_an_input_error() -> None:
    with pytest.raises(InputError, match=r"'nope'.*'swbd42'"):
        coarse_function("swbd42", "nope")
    with pytest.raises(InputError, match="'klingon'"):
        coarse_function("klingon", "sd")
    with pytest.raises(InputError, match="'klingon'"):
        mapping_rows("klingon")


def test_every_class_has_a_coarse_function() -> None:
    functions = {cls: coarse_function("swbd42", cls) for cls in SWBD42_CLASSES}
    assert {row.tag for row in mapping_rows("swbd42")} == set(SWBD42_CLASSES)
    # every coarse function is reachable from SwDA
    assert set(functions.values()) == set(UtteranceFunction)


@pytest.mark.parametrize(
    ("cls", "function"),
    [
        # §1d: Statement; Info-request; Answer; Agreement; Signal-understanding;
        # Signal-non-understanding
        ("sd", UtteranceFunction.STATEMENT),
        ("qy", UtteranceFunction.QUESTION),
        ("qy^d", UtteranceFunction.QUESTION),
        ("qw^d", UtteranceFunction.QUESTION),
        ("ny", UtteranceFunction.ANSWER),
        ("nn", UtteranceFunction.ANSWER),
        ("aa", UtteranceFunction.AGREEMENT),
        ("b", UtteranceFunction.ACKNOWLEDGEMENT),
        ("bk", UtteranceFunction.ACKNOWLEDGEMENT),
        ("br", UtteranceFunction.CLARIFICATION_REQUEST),
        ("%", UtteranceFunction.OTHER),
    ],
)
def test_coarse_functions_follow_the_manual(cls: str, function: UtteranceFunction) -> None:
    assert coarse_function("swbd42", cls) is function


@pytest.mark.parametrize("scheme", ["swbd42", "swbd_damsl", "mrda", "maptask"])
def test_every_row_names_its_source(scheme: str) -> None:
    rows = mapping_rows(scheme)
    assert rows
    for row in rows:
        assert row.tag and row.target
        assert len(row.source) >= 10, row
    assert len({row.tag for row in rows}) == len(rows)


@pytest.mark.parametrize("scheme", ["swbd42", "mrda", "maptask"])
def test_coarse_tables_map_to_coarse_functions(scheme: str) -> None:
    try:
        rows = mapping_rows(scheme)
    except InputError as exc:
        if "missing" in str(exc) and scheme != "swbd42":
            pytest.skip(f"{scheme} table not written yet: {exc}")
        raise
    for row in rows:
        assert coarse_function(scheme, row.tag) is UtteranceFunction(row.target)


_HEADER_END = re.compile(r"^\s*={20,}\s*$", re.MULTILINE)
_TAGGED_LINE = re.compile(r"^\s*(\S+)\s+[@*]*[AB]\.\d+\s+utt\d+\s*:", re.MULTILINE)


@pytest.mark.corpus
def test_every_tag_in_the_corpus_maps(swda_dir: Path) -> None:
    # the SwDA release itself: every tag written in any .utt file, counted independently here
    tags: set[str] = set()
    for path in swda_dir.glob("sw*utt/*.utt"):
        text = path.read_text(encoding="latin-1")
        header_end = _HEADER_END.search(text)
        assert header_end is not None, path
        tags.update(_TAGGED_LINE.findall(text[header_end.end() :]))
    assert len(tags) > 250  # the release writes about 300 distinct tags
    unmapped = sorted(t for t in tags if t.rstrip("@*") != "+" and not _maps(t))
    assert unmapped == []


def _maps(tag: str) -> bool:
    try:
        return swbd42_class(tag) in SWBD42_CLASSES
    except InputError:
        return False
