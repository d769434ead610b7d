"""Readers of users' own word streams: NIST CTM and Midstream's JSON Lines word events."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import TranscriptFormatError, Word
from midstream.client import AddWord, ReplaceWord, SpeakerHint, TimeTick, WithdrawWord
from midstream.client._inputs import (
    CtmParser,
    JsonlEventParser,
    parse_ctm,
    parse_jsonl_events,
    read_events,
)

# --- CTM -----------------------------------------------------------------------------------------


def test_ctm_channels_become_speakers_merged_in_time_order(tmp_path: Path) -> None:
    # sclite's CTM lists each channel as a block; a live stream interleaves them by time.
    path = tmp_path / "call.ctm"
    path.write_text(";; comment line\n"
                    "call A 0.10 0.30 hello 0.9\n"
                    "call A 1.00 0.20 there\n"
                    "\n"
                    "call B 0.50 0.20 hi\n", encoding="utf-8")
    events = read_events(path)
    words = [e.event for e in events]
    assert all(isinstance(w, AddWord) for w in words)
    assert [(w.word_id, w.word.speaker, w.word.text) for w in words  # type: ignore[union-attr]
            ] == [("A-1", "A", "hello"), ("B-1", "B", "hi"), ("A-2", "A", "there")]
    first = words[0]
    assert isinstance(first, AddWord)
    assert first.word == Word(text="hello", speaker="A", start=0.1, end=0.1 + 0.3,
                              confidence=0.9)
    assert [e.line for e in events] == [2, 5, 3]


@pytest.mark.parametrize(("line", "field", "fragment"), [
    ("call A 0.1 0.2", None, "expected 5 or 6 fields"),
    ("call A 0.1 0.2 word 0.5 extra", None, "expected 5 or 6 fields"),
    ("call A zero 0.2 word", "start", "not a number"),
    ("call A 0.1 -0.2 word", "duration", "at least 0"),
    ("call A 0.1 0.2 word 1.5", "confidence", "at most 1"),
    ("call A nan 0.2 word", "start", "at least 0"),
    ("call A 0.1 0.2 " + "x" * 101, "word", "longer than 100"),
])
def test_ctm_errors_name_file_line_and_field(line: str, field: str | None,
                                             fragment: str) -> None:
    with pytest.raises(TranscriptFormatError) as caught:
        list(parse_ctm([";; header", line], "calls/c1.ctm"))
    error = caught.value
    assert (error.source, error.line, error.field) == ("calls/c1.ctm", 2, field)
    assert str(error).startswith("calls/c1.ctm:2")
    assert fragment in str(error)


def test_ctm_refuses_a_second_recording() -> None:
    with pytest.raises(TranscriptFormatError, match="second recording 'other'") as caught:
        list(parse_ctm(["call A 0 1 a", "other A 1 1 b"], "x.ctm"))
    assert caught.value.field == "file"


# --- JSON Lines ----------------------------------------------------------------------------------

JSONL = [
    '{"speaker": "A", "text": "hello", "start": 0.1, "end": 0.4, "confidence": 0.9, "id": "w1"}',
    '{"speaker": "A", "text": "there"}',
    '{"kind": "replace", "id": "w1", "speaker": "A", "text": "hullo", "start": 0.1, "end": 0.4}',
    '{"kind": "withdraw", "id": "w2"}',
    "",
    '{"kind": "utterance_end", "speaker": "A"}',
    '{"kind": "turn_end", "speaker": "A"}',
    '{"kind": "tick", "time": 2.5}',
]


def test_jsonl_event_kinds() -> None:
    events = list(parse_jsonl_events(JSONL, "in.jsonl"))
    assert [e.event for e in events] == [
        AddWord(word_id="w1", word=Word(text="hello", speaker="A", start=0.1, end=0.4,
                                        confidence=0.9)),
        AddWord(word_id="w2", word=Word(text="there", speaker="A")),
        ReplaceWord(word_id="w1", word=Word(text="hullo", speaker="A", start=0.1, end=0.4)),
        WithdrawWord(word_id="w2"),
        SpeakerHint(speaker="A", turn_end=False),
        SpeakerHint(speaker="A", turn_end=True),
        TimeTick(time=2.5),
    ]
    # A tick arrives at the time it carries, like a word at its end.
    assert [e.time for e in events] == [0.4, None, 0.4, None, None, None, 2.5]
    assert [e.line for e in events] == [1, 2, 3, 4, 6, 7, 8]


@pytest.mark.parametrize(("line", "field", "fragment"), [
    ("not json", None, "not a JSON object"),
    ("[1, 2]", None, "must be a JSON object"),
    ('{"kind": "shout", "speaker": "A"}', "kind", "must be one of"),
    ('{"speaker": "A", "text": "hi", "colour": "red"}', "colour", "unknown field"),
    ('{"text": "hi"}', "speaker", "must be a string"),
    ('{"speaker": "A", "text": "   "}', "text", "must not be empty"),
    ('{"speaker": "A", "text": "hi", "start": 2, "end": 1}', "end", "before it starts"),
    ('{"speaker": "A", "text": "hi", "start": true}', "start", "must be a number"),
    ('{"speaker": "A", "text": "hi", "confidence": 1.2}', "confidence", "at most 1"),
    ('{"speaker": "A B", "text": "hi"}', "speaker", "white space"),
    ('{"speaker": "A", "text": "hi", "id": "w1"}', "id", "used twice"),
    ('{"kind": "withdraw", "id": "w9"}', "id", "no earlier word"),
    ('{"kind": "replace", "speaker": "A", "text": "x"}', "id", "must name the word"),
    ('{"kind": "tick"}', "time", "must say what the recogniser's clock reads"),
    ('{"kind": "tick", "time": -0.5}', "time", "must be at least 0"),
    ('{"kind": "tick", "time": "soon"}', "time", "must be a number"),
    ('{"kind": "tick", "time": null}', "time", "must be a number"),
    ('{"kind": "tick", "time": 3, "speaker": "A"}', "speaker", "unknown field"),
])
def test_jsonl_errors_name_file_line_and_field(line: str, field: str | None,
                                               fragment: str) -> None:
    lines = ['{"speaker": "A", "text": "first", "id": "w1"}', line]
    with pytest.raises(TranscriptFormatError) as caught:
        list(parse_jsonl_events(lines, "live.jsonl"))
    error = caught.value
    assert (error.source, error.line, error.field) == ("live.jsonl", 2, field)
    assert fragment in str(error)


def test_read_events_errors_name_the_file(tmp_path: Path) -> None:
    with pytest.raises(TranscriptFormatError, match="no such file"):
        read_events(tmp_path / "missing.ctm")
    odd = tmp_path / "words.txt"
    odd.write_text("x", encoding="utf-8")
    with pytest.raises(TranscriptFormatError, match="pass --format") as caught:
        read_events(odd)
    assert caught.value.source == str(odd)
    # With the format given, the same file is read (and its bad line reported).
    with pytest.raises(TranscriptFormatError, match=r"words\.txt:1"):
        read_events(odd, "jsonl")


# --- properties: never crash, parse or raise TranscriptFormatError -----------------------------

_json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=6), inner,
                                                                max_size=4),
    max_leaves=8)
_jsonl_keys = st.sampled_from(["kind", "id", "speaker", "text", "start", "end", "confidence",
                               "time", "other"])
_kinds = st.sampled_from(["word", "replace", "withdraw", "utterance_end", "turn_end", "tick",
                          "x"])


@st.composite
def _jsonl_lines(draw: st.DrawFn) -> str:
    if draw(st.booleans()):
        return draw(st.text(max_size=40))
    record = draw(st.dictionaries(_jsonl_keys, _json_values | _kinds, max_size=7))
    return json.dumps(record)


@settings(max_examples=60, deadline=None)
@given(st.lists(_jsonl_lines(), max_size=8))
def test_jsonl_parser_parses_or_raises_format_error(lines: list[str]) -> None:
    parser = JsonlEventParser("prop.jsonl")
    for number, line in enumerate(lines, start=1):
        try:
            event = parser.parse_line(line, number)
        except TranscriptFormatError as error:
            assert error.source == "prop.jsonl" and error.line == number
            continue
        if event is not None and isinstance(event.event, AddWord | ReplaceWord):
            word = event.event.word
            assert word.text.strip() and word.speaker.strip()
            assert word.confidence is None or 0.0 <= word.confidence <= 1.0
        if event is not None and isinstance(event.event, TimeTick):
            assert event.time == event.event.time and 0.0 <= event.time < float("inf")


_ctm_field = st.one_of(st.text(max_size=10), st.floats().map(str), st.integers().map(str),
                       st.sampled_from(["A", "B", "call", "0.5", "-1", "inf", "nan", "1e309"]))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.lists(_ctm_field, max_size=7).map(" ".join) | st.text(max_size=40),
                max_size=8))
def test_ctm_parser_parses_or_raises_format_error(lines: list[str]) -> None:
    parser = CtmParser("prop.ctm")
    for number, line in enumerate(lines, start=1):
        try:
            event = parser.parse_line(line, number)
        except TranscriptFormatError as error:
            assert error.source == "prop.ctm" and error.line == number
            continue
        if event is not None:
            assert isinstance(event.event, AddWord)
            word = event.event.word
            assert word.start is not None and word.end is not None
            assert 0.0 <= word.start <= word.end


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["A", "B", "spk_3"]),
                          st.text(alphabet="abcdefghij'-", min_size=1, max_size=8),
                          st.floats(0, 1e4), st.floats(0, 10),
                          st.none() | st.floats(0, 1)), min_size=1, max_size=10))
def test_valid_ctm_lines_round_trip(rows: list[tuple[str, str, float, float, float | None]]
                                    ) -> None:
    lines = [f"rec {s} {start!r} {dur!r} {text}" + ("" if c is None else f" {c!r}")
             for s, text, start, dur, c in rows]
    events = list(parse_ctm(lines, "ok.ctm"))
    assert len(events) == len(rows)
    for event, (speaker, text, start, _, confidence) in zip(events, rows, strict=True):
        assert isinstance(event.event, AddWord)
        assert event.event.word.text == text and event.event.word.speaker == speaker
        assert event.event.word.start == start
        assert event.event.word.confidence == confidence
