"""Random bytes into every transcript reader: each parses or raises ``TranscriptFormatError``.

The per-package suites already feed random *text* to the line parsers. Here the input is raw
bytes written to a file (invalid UTF-8, NUL bytes, stray carriage returns, XML that declares an
unknown encoding) and read through each reader's file entry point, the way a user's damaged file
reaches it, plus the same bytes decoded leniently into each line or record parser. Whatever the
bytes, the only acceptable failure is the package's own format error naming the file.
"""

from __future__ import annotations

import contextlib
import io
from collections.abc import Callable
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from midstream import TranscriptFormatError
from midstream.client._inputs import CtmParser, JsonlEventParser, read_events
from midstream.corpora import read_inline, read_jsonl
from midstream.corpora._maptask import parse_transcript_line, read_maptask_dialogue, read_moves
from midstream.corpora._mrda import parse_dadb_line, parse_trans_line, read_mrda_meeting
from midstream.corpora._swda import parse_conversation

# Bounded budgets keep the suite fast; the seeds vary from run to run.
_SETTINGS = settings(max_examples=60, deadline=None,
                     suppress_health_check=[HealthCheck.function_scoped_fixture])

# Raw bytes biased towards what breaks parsers: separators, quotes, brackets, bad UTF-8.
_PIECES = st.sampled_from([
    b"\t", b"\n", b"\r\n", b"\r", b" ", b"\x00", b"\xff", b"\xc3", b"\xe2\x80", b"{", b"}",
    b"[", b"]", b"\"", b"/", b",", b":", b"-", b"+", b"#", b";;", b"1e999", b"NaN", b"-0.5",
    b"g", b"f", b"A", b"B.1", b"<move", b"/>", b"<?xml version='1.0'?>",
    b"&#0;", b"{D", b"{F uh }", b"[ i, + i ]", b"sd", b"qy^d", b"WEBVTT\n", b"-->",
    b"00:01.000", b"<v A>", b"</v>", b"statement:",
])
_BYTES = st.one_of(
    st.binary(max_size=300),
    st.lists(st.one_of(_PIECES, st.binary(max_size=6)), max_size=60).map(b"".join),
)


def _decoded(data: bytes) -> str:
    return data.decode("utf-8", errors="replace")


def _utf8(data: bytes) -> bytes:
    return _decoded(data).encode("utf-8")


# --- line and record parsers ------------------------------------------------------------------

_LINE_PARSERS: dict[str, Callable[[str, int], object]] = {
    "maptask transcript line": lambda line, n: parse_transcript_line(
        line, source="fuzz", number=n),
    "mrda dadb line": lambda line, n: parse_dadb_line(line, source="fuzz", number=n),
    "mrda trans line": lambda line, n: parse_trans_line(line, source="fuzz", number=n),
    "word events jsonl line": lambda line, n: JsonlEventParser("fuzz").parse_line(line, n),
    "word events ctm line": lambda line, n: CtmParser("fuzz").parse_line(line, n),
}


@pytest.mark.parametrize("name", sorted(_LINE_PARSERS))
@_SETTINGS
@given(data=_BYTES)
def test_line_parsers_take_any_bytes(name: str, data: bytes) -> None:
    parse = _LINE_PARSERS[name]
    for number, line in enumerate(_decoded(data).splitlines() or [""], start=1):
        try:
            parse(line, number)
        except TranscriptFormatError as error:
            assert "fuzz" in str(error)


@_SETTINGS
@given(data=_BYTES)
def test_swda_markup_parser_takes_any_bytes(data: bytes) -> None:
    # SwDA files are read as Latin-1, so every byte string is some text for the markup parser.
    with_header = b"=" * 20 + b"\n" + data
    for payload in (data, with_header):
        try:
            parse_conversation(payload.decode("latin-1"), conversation_id="sw0", source="fuzz")
        except TranscriptFormatError as error:
            assert "fuzz" in str(error)


# --- file entry points ------------------------------------------------------------------------


@_SETTINGS
@given(data=_BYTES)
def test_jsonl_corpus_reader_takes_any_bytes(data: bytes) -> None:
    header = b'{"format": "midstream-transcripts", "version": 1}\n'
    for payload in (data, header + data):
        with contextlib.suppress(TranscriptFormatError):
            list(read_jsonl(io.BytesIO(payload)))


@_SETTINGS
@given(data=_BYTES)
def test_inline_markup_reader_takes_any_bytes(tmp_path: Path, data: bytes) -> None:
    path = tmp_path / "calls.inline"
    for payload in (data, b"@format midstream-inline 1\n@conversation c\n" + data):
        path.write_bytes(payload)
        try:
            list(read_inline(path))
        except TranscriptFormatError as error:
            assert str(path) in str(error)


@pytest.mark.parametrize("suffix", [".ctm", ".jsonl", ".vtt", ".stm"])
@_SETTINGS
@given(data=_BYTES)
def test_word_event_files_take_any_bytes(tmp_path: Path, suffix: str, data: bytes) -> None:
    path = tmp_path / f"input{suffix}"
    path.write_bytes(data)
    try:
        read_events(path)
    except TranscriptFormatError as error:
        assert str(path) in str(error)


@_SETTINGS
@given(dadb=_BYTES, trans=_BYTES)
def test_mrda_meeting_files_take_any_bytes(tmp_path: Path, dadb: bytes, trans: bytes) -> None:
    dadb_path, trans_path = tmp_path / "Bxx.dadb", tmp_path / "Bxx.trans"
    # Valid UTF-8 here; undecodable bytes are the known failure pinned below.
    dadb_path.write_bytes(_utf8(dadb))
    trans_path.write_bytes(_utf8(trans))
    try:
        read_mrda_meeting(dadb_path, trans_path)
    except TranscriptFormatError as error:
        assert "Bxx." in str(error)


@_SETTINGS
@given(moves=_BYTES, transcript=_BYTES)
def test_maptask_dialogue_files_take_any_bytes(tmp_path: Path, moves: bytes,
                                               transcript: bytes) -> None:
    moves_dir = tmp_path / "moves"
    moves_dir.mkdir(exist_ok=True)
    valid = b'<moves><move id="m1" label="instruct"/></moves>'
    (moves_dir / "bad.g.moves.xml").write_bytes(moves)
    for speaker in "gf":
        (moves_dir / f"q0.{speaker}.moves.xml").write_bytes(valid)
    path = tmp_path / "q0.txt"
    path.write_bytes(_utf8(transcript))
    try:
        read_moves(moves_dir / "bad.g.moves.xml")
    except TranscriptFormatError as error:
        assert "bad.g.moves.xml" in str(error)
    try:
        read_maptask_dialogue(moves_dir, path)
    except TranscriptFormatError as error:
        assert "q0." in str(error)


def _write_mrda(folder: Path, trans: bytes) -> tuple[Path, Path]:
    dadb, trans_path = folder / "Bxx.dadb", folder / "Bxx.trans"
    dadb.write_bytes(b"")
    trans_path.write_bytes(trans)
    return dadb, trans_path


def _write_maptask(folder: Path, transcript: bytes) -> tuple[Path, Path]:
    moves = folder / "moves"
    moves.mkdir()
    for speaker in "gf":
        (moves / f"q0.{speaker}.moves.xml").write_bytes(b"<moves/>")
    path = folder / "q0.txt"
    path.write_bytes(transcript)
    return moves, path


# A Latin-1 byte in a UTF-8 transcript is a format error naming the file, never a crash.
@pytest.mark.parametrize("reader", ["mrda", "maptask"])
def test_undecodable_transcript_is_a_format_error(tmp_path: Path, reader: str) -> None:
    latin1 = "caf\u00e9 fa\u00e7ade\n".encode("latin-1")
    if reader == "mrda":
        dadb, trans = _write_mrda(tmp_path, b"Bxx_A_0001\t" + latin1)
        with pytest.raises(TranscriptFormatError, match=r"Bxx\.trans"):
            read_mrda_meeting(dadb, trans)
    else:
        moves, transcript = _write_maptask(tmp_path, latin1)
        with pytest.raises(TranscriptFormatError, match=r"q0\.txt"):
            read_maptask_dialogue(moves, transcript)


# An XML declaration naming an encoding Python does not know is a format error too.
def test_moves_file_with_unknown_encoding_is_a_format_error(tmp_path: Path) -> None:
    path = tmp_path / "q0.g.moves.xml"
    path.write_bytes(b"<?xml version='1.0' encoding='bogus'?><moves/>")
    with pytest.raises(TranscriptFormatError, match=r"q0\.g\.moves\.xml"):
        read_moves(path)
