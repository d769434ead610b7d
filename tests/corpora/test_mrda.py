"""MRDA reader: checked against the corpus files themselves (ICSI MRDA, Shriberg et al. 2004)
and against the examples of its labelling manual (doc/mrda_manual.pdf)."""

from __future__ import annotations

import contextlib
from functools import cache
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import (
    Conversation,
    TranscriptFormatError,
    UtteranceFunction,
    coarse_function,
    mapping_rows,
)
from midstream.corpora._mrda import (
    DECIDING_TAGS,
    DadbSegment,
    mrda_class,
    parse_dadb_line,
    parse_trans_line,
    read_mrda,
)

#: Meetings of three series (Bed, Bmr, Bro) with fragments, pipes and untimed words.
MEETINGS = ("Bed002", "Bmr012", "Bro004")


@cache
def _meeting(root: Path, name: str) -> Conversation:
    return next(read_mrda(root, ids=[name]))


def _dadb_rows(root: Path, name: str) -> list[list[str]]:
    text = (root / "database" / f"{name}.dadb").read_text(encoding="utf-8")
    return [line.split(",") for line in text.splitlines() if line.strip()]


def _is_speech(item: str) -> bool:
    """A .dadb word item that is speech: not a rejected stretch, laughter or breath in braces,
    and not a word in angle brackets (absent from the original transcript column)."""
    word = item.split("+", 2)[2]
    if word.startswith("{") and ("@" in word or word == "{hhh}"):
        return False
    return not word.startswith("<")


@pytest.mark.corpus
@pytest.mark.parametrize("name", MEETINGS)
def test_word_count_matches_the_dadb_word_column(mrda_dir: Path, name: str) -> None:
    # Source: the .dadb word column (start+end+word|...), counted by a plain split.
    items = [item for row in _dadb_rows(mrda_dir, name) if row[4] for item in row[4].split("|")]
    assert len(_meeting(mrda_dir, name).words) == sum(_is_speech(i) for i in items)


@pytest.mark.corpus
@pytest.mark.parametrize("name", MEETINGS)
def test_one_utterance_per_dialogue_act(mrda_dir: Path, name: str) -> None:
    # Source: the .dadb label column; each pipe bar separates two acts (manual §3.3). Segments
    # with no speech word (DIGIT_TASK, BLEEPED, laughter only) carry no utterance.
    rows = [row for row in _dadb_rows(mrda_dir, name)
            if row[4] and any(_is_speech(i) for i in row[4].split("|"))]
    expected = sum(row[8].count("|") + 1 for row in rows)
    assert len(_meeting(mrda_dir, name).utterances) == expected


@pytest.mark.corpus
@pytest.mark.parametrize("name", MEETINGS)
def test_speakers_are_the_speaker_column(mrda_dir: Path, name: str) -> None:
    # Source: .dadb column 8 (speaker), e.g. me011.
    conversation = _meeting(mrda_dir, name)
    column = {row[7] for row in _dadb_rows(mrda_dir, name)
              if row[4] and any(_is_speech(i) for i in row[4].split("|"))}
    assert set(conversation.speakers) == column


@pytest.mark.corpus
def test_words_are_in_time_order_with_times_from_the_dadb(mrda_dir: Path) -> None:
    conversation = _meeting(mrda_dir, "Bed002")
    starts = [w.start for w in conversation.words if w.start is not None]
    assert starts == sorted(starts)
    assert all(w.end is not None and w.start <= w.end
               for w in conversation.words if w.start is not None)
    # Source: first line of Bed002.dadb after the header lines, "41.292+41.422+but|...".
    but = next(w for w in conversation.words if w.start == 41.292)
    assert (but.text, but.end, but.speaker) == ("but", 41.422, "me011")


@pytest.mark.corpus
def test_interruption_marks_and_fragments_follow_the_transcript(mrda_dir: Path) -> None:
    conversation = _meeting(mrda_dir, "Bdb001")
    words = conversation.words
    points = set(conversation.interruption_points)
    # Source: Bdb001.trans, "yeah we had a long discussion about how much w- - how easy ..."
    first = conversation.utterances[0]
    texts = [words[i].text for i in first.words]
    assert texts[:10] == ["yeah", "we", "had", "a", "long", "discussion", "about", "how", "much",
                          "w"]
    fragment = first.words[9]
    assert words[fragment].fragment and fragment in points
    assert not any(i in points for i in first.words[:9])
    # Source: Bdb001.trans, "did - did - did it ?==" (two interruptions, then trailing off).
    did = next(u for u in conversation.utterances
               if [words[i].text for i in u.words] == ["did", "did", "did", "it"])
    assert [i in points for i in did.words] == [True, True, False, False]
    assert not did.complete


@pytest.mark.corpus
@pytest.mark.parametrize("name", MEETINGS)
def test_interruption_points_count_the_transcript_dashes(mrda_dir: Path, name: str) -> None:
    # Source: the .trans normalised column; a lone "-" token marks a self-interruption. A dash
    # can only be lost where the dadb words and the transcript do not align.
    text = (mrda_dir / "transcripts" / f"{name}.trans").read_text(encoding="utf-8")
    dashes = sum(line.split(",")[2].split().count("-") for line in text.splitlines())
    got = len(_meeting(mrda_dir, name).interruption_points)
    assert got <= dashes
    assert got >= 0.99 * dashes


@pytest.mark.corpus
def test_a_pipe_bar_splits_a_segment_into_two_acts(mrda_dir: Path) -> None:
    # Source: Bed002.dadb segment Bed002-c0_0058903_0062003 labelled "fg|s", transcript
    # "um | so the first thing you'd want to do is just say which transcript you're on ."
    conversation = _meeting(mrda_dir, "Bed002")
    words = conversation.words
    index = next(i for i, u in enumerate(conversation.utterances)
                 if [words[w].text for w in u.words] == ["um"] and u.fine_tag == "fg")
    floor, statement = conversation.utterances[index:index + 2]
    assert (floor.fine_class, floor.function) == ("fg", UtteranceFunction.OTHER)
    assert [words[w].text for w in statement.words][:4] == ["so", "the", "first", "thing"]
    assert (statement.fine_tag, statement.fine_class) == ("s", "s")
    assert statement.function is UtteranceFunction.STATEMENT


@pytest.mark.corpus
@pytest.mark.parametrize("name", MEETINGS)
def test_every_fine_class_has_a_row_in_the_mapping_table(mrda_dir: Path, name: str) -> None:
    tags = {row.tag for row in mapping_rows("mrda")}
    assert {u.fine_class for u in _meeting(mrda_dir, name).utterances} <= tags
    assert _meeting(mrda_dir, name).labels is None  # MRDA has no full disfluency layer


def test_mapping_table_covers_every_class_the_reader_can_give() -> None:
    # Source: MRDA manual §1.3 (general tags), §3.2 Set 3 (disruption forms), §5.14 (z).
    general = {"s", "qy", "qw", "qr", "qrr", "qo", "qh", "b", "fg", "fh", "h"}
    alone = {"%", "%-", "%--", "x", "z"}
    assert {row.tag for row in mapping_rows("mrda")} == general | alone | set(DECIDING_TAGS)


@pytest.mark.parametrize(("label", "fine_class"), [
    # Labels from the manual's lists of acceptable labels (§3.2) and examples (§3.4, §3.5).
    ("s^aa^rt.%--", "aa"),
    ("qy^d^f^g^rt", "f"),
    ("qy^bu.%-", "bu"),
    ("b.%", "b"),
    ("qrr.%--", "qrr"),
    ("%--", "%--"),
    ("z", "z"),
    ("s^cs:qw", "cs"),
    ("s:qy", "s"),
    ("sj^ba", "ba"),
    ("s^df", "s"),
])
def test_fine_class_of_manual_labels(label: str, fine_class: str) -> None:
    assert mrda_class(label) == fine_class


def test_feedback_and_response_classes_map_as_documented() -> None:
    # Manual §5.6 (responses), §5.5 (acknowledgements), §5.8 (checks).
    assert coarse_function("mrda", "na") is UtteranceFunction.ANSWER
    assert coarse_function("mrda", "aa") is UtteranceFunction.AGREEMENT
    assert coarse_function("mrda", "bk") is UtteranceFunction.ACKNOWLEDGEMENT
    assert coarse_function("mrda", "br") is UtteranceFunction.CLARIFICATION_REQUEST
    assert coarse_function("mrda", "qw") is UtteranceFunction.QUESTION


def test_dadb_line_parses_words_and_untimed_words() -> None:
    line = ("1.0,2.5,M-c1_1,A,1.0+1.2+so|XXXX+XXXX+{uhhuh}|1.3+2.5+w-,s.%--,M-c1,me011,"
            "s.%--,,,,,")
    segment = parse_dadb_line(line)
    assert segment.words == (("so", 1.0, 1.2), ("{uhhuh}", None, None), ("w-", 1.3, 2.5))
    assert (segment.speaker, segment.label) == ("me011", "s.%--")


def test_bad_dadb_line_names_file_line_and_field() -> None:
    with pytest.raises(TranscriptFormatError, match=r"m\.dadb:7: field 'words'"):
        parse_dadb_line("1,2,id,A,1.0+so,s,c,me,s,,,,,", source="m.dadb", number=7)
    with pytest.raises(TranscriptFormatError, match="14 comma-separated columns"):
        parse_dadb_line("1,2,3", source="m.dadb", number=1)


@given(st.text(max_size=300))
def test_dadb_line_parser_never_crashes(line: str) -> None:
    try:
        segment = parse_dadb_line(line)
    except TranscriptFormatError:
        return
    assert isinstance(segment, DadbSegment)


@given(st.binary(max_size=300))
def test_dadb_and_trans_parsers_on_random_bytes(data: bytes) -> None:
    line = data.decode("utf-8", errors="replace")
    for parse in (parse_dadb_line, parse_trans_line):
        with contextlib.suppress(TranscriptFormatError):
            parse(line)


def test_read_mrda_on_a_small_made_up_meeting(tmp_path: Path) -> None:
    # Invented data (demo only): two speakers overlapping in time.
    (tmp_path / "database").mkdir()
    (tmp_path / "transcripts").mkdir()
    (tmp_path / "database" / "M1.dadb").write_text(
        "0.0,1.0,M1-c1_a,A,0.0+0.4+i|0.4+0.6+i-|0.7+1.0+think,s,M1-c1,me1,s,,,,,\n"
        "0.5,0.8,M1-c2_b,A,0.5+0.8+yeah,b,M1-c2,fe2,b,,,,,\n", encoding="utf-8")
    (tmp_path / "transcripts" / "M1.trans").write_text(
        "M1-c1_a,i i- - think .,i i- - think .\nM1-c2_b,yeah .,yeah .\n", encoding="utf-8")
    (conversation,) = read_mrda(tmp_path)
    assert [w.text for w in conversation.words] == ["i", "i", "yeah", "think"]
    assert conversation.utterances[0].words == (0, 1, 3)
    assert conversation.utterances[1].words == (2,)
    assert conversation.interruption_points == (1,)
    assert conversation.words[1].fragment


def test_missing_transcript_line_is_a_format_error(tmp_path: Path) -> None:
    (tmp_path / "database").mkdir()
    (tmp_path / "transcripts").mkdir()
    (tmp_path / "database" / "M1.dadb").write_text(
        "0.0,1.0,M1-c1_a,A,0.0+0.4+i,s,M1-c1,me1,s,,,,,\n", encoding="utf-8")
    (tmp_path / "transcripts" / "M1.trans").write_text("", encoding="utf-8")
    with pytest.raises(TranscriptFormatError, match="M1-c1_a"):
        list(read_mrda(tmp_path))
