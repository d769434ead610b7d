"""Readers for the word streams a user already has: JSON Lines word events and NIST CTM.

WebVTT captions and NIST STM, which time segments rather than words, are read by
``_captions.py``; :func:`read_events` dispatches to all four.

Both readers yield :class:`TimedEvent` values in the order to send them; ``time`` is when a live
recogniser would have delivered the event (a word's end time, else its start; ``None`` when the
input carries no times). The JSON Lines schema is documented in ``docs/word-events.md``.

Readers are incremental (one line at a time) so ``midstream tag`` can follow a live pipe; the
``read_*`` helpers read a whole file and, for CTM, merge the channels into time order.

Every malformed line raises :class:`midstream.TranscriptFormatError` naming the file, the line
(counted from 1) and the field.

Limits: a line may hold at most :data:`MAX_LINE_CHARS` characters and a word at most
:data:`MAX_WORD_CHARS`; ids at most :data:`MAX_ID_CHARS`.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from midstream import (
    AddWord,
    InputEvent,
    ReplaceWord,
    SpeakerHint,
    TimeTick,
    TranscriptFormatError,
    WithdrawWord,
    Word,
)

#: Longest accepted input line (characters); a longer one is an error, not a silent cut.
MAX_LINE_CHARS = 10_000
#: Longest accepted word text (characters); the server's default limit too.
MAX_WORD_CHARS = 100
#: Longest accepted word id or speaker name (characters).
MAX_ID_CHARS = 128

_WORD_FIELDS = frozenset({"kind", "id", "speaker", "text", "start", "end", "confidence"})
_KIND_FIELDS: dict[str, frozenset[str]] = {
    "word": _WORD_FIELDS,
    "replace": _WORD_FIELDS,
    "withdraw": frozenset({"kind", "id"}),
    "utterance_end": frozenset({"kind", "speaker"}),
    "turn_end": frozenset({"kind", "speaker"}),
    "tick": frozenset({"kind", "time"}),
}


@dataclass(frozen=True, slots=True, kw_only=True)
class TimedEvent:
    """An input event with the time (seconds) it would have arrived, and where it came from."""

    event: InputEvent
    time: float | None
    line: int


class _Line:
    """Error-raising helpers bound to one input line."""

    __slots__ = ("number", "source")

    def __init__(self, source: str, number: int) -> None:
        self.source = source
        self.number = number

    def error(self, message: str, field: str | None = None) -> TranscriptFormatError:
        return TranscriptFormatError(message, source=self.source, line=self.number, field=field)

    def text(self, value: object, field: str, limit: int) -> str:
        if not isinstance(value, str):
            raise self.error(f"must be a string, got {type(value).__name__}", field)
        stripped = value.strip()
        if not stripped:
            raise self.error("must not be empty", field)
        if len(stripped) > limit:
            raise self.error(f"longer than {limit} characters", field)
        if any(ch.isspace() for ch in stripped) and field != "text":
            raise self.error("must not contain white space", field)
        return stripped

    def number_field(self, value: object, field: str, *, low: float = 0.0,
                     high: float = math.inf) -> float:
        # bool is an int subclass; "true" as a time is a mistake, not 1.0.
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.error(f"must be a number, got {type(value).__name__}", field)
        number = float(value)
        if not math.isfinite(number) or not low <= number <= high:
            upper = "" if math.isinf(high) else f" and at most {high:g}"
            raise self.error(f"must be at least {low:g}{upper}, got {value!r}", field)
        return number


def _json_word(record: dict[str, Any], where: _Line) -> tuple[str | None, Word]:
    speaker = where.text(record.get("speaker"), "speaker", MAX_ID_CHARS)
    text = where.text(record.get("text"), "text", MAX_WORD_CHARS)
    times: dict[str, float | None] = {}
    for name in ("start", "end", "confidence"):
        value = record.get(name)
        times[name] = None if value is None else where.number_field(
            value, name, high=1.0 if name == "confidence" else math.inf)
    start, end = times["start"], times["end"]
    if start is not None and end is not None and end < start:
        raise where.error(f"ends ({end:g}) before it starts ({start:g})", "end")
    word_id = None if record.get("id") is None else where.text(record["id"], "id", MAX_ID_CHARS)
    return word_id, Word(text=text, speaker=speaker, start=start, end=end,
                         confidence=times["confidence"])


class JsonlEventParser:
    """Parse JSON Lines word events one line at a time (see ``docs/word-events.md``).

    Words without an ``id`` get ``w1``, ``w2``... in arrival order; an id used twice for a new
    word, or a replacement or withdrawal of an unknown id, is an error.

    Examples
    --------
    >>> parser = JsonlEventParser("example.jsonl")
    >>> parser.parse_line('{"speaker": "A", "text": "hello", "start": 0.1, "end": 0.4}', 1)
    TimedEvent(event=AddWord(word_id='w1', word=Word(text='hello', speaker='A', start=0.1, \
end=0.4, confidence=None, fragment=False)), time=0.4, line=1)
    >>> parser.parse_line("", 2) is None
    True
    """

    def __init__(self, source: str) -> None:
        self.source = source
        self._ids: set[str] = set()
        self._count = 0

    def parse_line(self, raw: str, number: int) -> TimedEvent | None:
        """The event on one line, or ``None`` for a blank line."""
        where = _Line(self.source, number)
        if len(raw) > MAX_LINE_CHARS:
            raise where.error(f"line longer than {MAX_LINE_CHARS} characters")
        if not raw.strip():
            return None
        try:
            record = json.loads(raw)
        except (json.JSONDecodeError, RecursionError) as exc:
            raise where.error(f"not a JSON object ({getattr(exc, 'msg', 'too deeply nested')})") \
                from None
        if not isinstance(record, dict):
            raise where.error(f"must be a JSON object, got {type(record).__name__}")
        kind = record.get("kind", "word")
        if not isinstance(kind, str) or kind not in _KIND_FIELDS:
            raise where.error(f"must be one of {', '.join(_KIND_FIELDS)}; got {kind!r}", "kind")
        unknown = sorted(str(k) for k in record if k not in _KIND_FIELDS[kind])
        if unknown:
            raise where.error(f"unknown field for a {kind!r} event", unknown[0])
        if kind == "word":
            word_id, word = _json_word(record, where)
            self._count += 1
            if word_id is None:
                word_id = f"w{self._count}"
            if word_id in self._ids:
                raise where.error(f"word id {word_id!r} used twice", "id")
            self._ids.add(word_id)
            return TimedEvent(event=AddWord(word_id=word_id, word=word),
                              time=_arrival(word), line=number)
        if kind == "replace":
            word_id, word = _json_word(record, where)
            if word_id is None:
                raise where.error("a replacement must name the word it replaces", "id")
            self._known(word_id, where)
            return TimedEvent(event=ReplaceWord(word_id=word_id, word=word),
                              time=_arrival(word), line=number)
        if kind == "withdraw":
            word_id = where.text(record.get("id"), "id", MAX_ID_CHARS)
            self._known(word_id, where)
            return TimedEvent(event=WithdrawWord(word_id=word_id), time=None, line=number)
        if kind == "tick":
            if "time" not in record:
                raise where.error("a tick must say what the recogniser's clock reads", "time")
            time = where.number_field(record["time"], "time")
            return TimedEvent(event=TimeTick(time=time), time=time, line=number)
        speaker = where.text(record.get("speaker"), "speaker", MAX_ID_CHARS)
        return TimedEvent(event=SpeakerHint(speaker=speaker, turn_end=kind == "turn_end"),
                          time=None, line=number)

    def _known(self, word_id: str, where: _Line) -> None:
        if word_id not in self._ids:
            raise where.error(f"no earlier word has id {word_id!r}", "id")


def _arrival(word: Word) -> float | None:
    return word.end if word.end is not None else word.start


def parse_jsonl_events(lines: Iterable[str], source: str) -> Iterator[TimedEvent]:
    """Yield the events of JSON Lines text, one line at a time, in input order."""
    parser = JsonlEventParser(source)
    for number, raw in enumerate(lines, start=1):
        event = parser.parse_line(raw, number)
        if event is not None:
            yield event


class CtmParser:
    """Parse NIST CTM lines: ``<file> <channel> <start> <duration> <word> [<confidence>]``.

    The channel names the speaker. Lines starting with ``;;`` are comments. A CTM file may hold
    several recordings (its first field); a conversation is one of them: ``recording`` picks
    it (other recordings' lines are skipped, still checked for their field count), and without
    it a second file name is an error that says how to pick one.
    Word ids are ``<channel>-<n>``, counted per channel from 1.

    Examples
    --------
    >>> CtmParser("call.ctm").parse_line("call1 A 0.50 0.25 hello 0.93", 1)
    TimedEvent(event=AddWord(word_id='A-1', word=Word(text='hello', speaker='A', start=0.5, \
end=0.75, confidence=0.93, fragment=False)), time=0.75, line=1)
    """

    def __init__(self, source: str, *, recording: str | None = None) -> None:
        self.source = source
        self._picked = recording is not None
        self._recording: str | None = recording
        self._counts: dict[str, int] = {}
        #: Every recording name seen, picked or not (to say what a file holds).
        self.recordings: dict[str, None] = {}

    def parse_line(self, raw: str, number: int) -> TimedEvent | None:
        """The word on one line, or ``None`` for a blank or comment line."""
        where = _Line(self.source, number)
        if len(raw) > MAX_LINE_CHARS:
            raise where.error(f"line longer than {MAX_LINE_CHARS} characters")
        stripped = raw.strip()
        if not stripped or stripped.startswith(";;"):
            return None
        fields = stripped.split()
        if len(fields) not in (5, 6):
            raise where.error(
                f"expected 5 or 6 fields (file channel start duration word [confidence]), "
                f"got {len(fields)}")
        recording, channel, start_text, duration_text, text = fields[:5]
        self.recordings[recording] = None
        if self._recording is None:
            self._recording = recording
        elif recording != self._recording:
            if self._picked:
                return None
            raise where.error(
                f"a second recording {recording!r} after {self._recording!r}; "
                "pick one with --recording NAME", "file")
        speaker = where.text(channel, "channel", MAX_ID_CHARS)
        start = where.number_field(_float(start_text, "start", where), "start")
        duration = where.number_field(_float(duration_text, "duration", where), "duration")
        word_text = where.text(text, "word", MAX_WORD_CHARS)
        confidence = None
        if len(fields) == 6:
            confidence = where.number_field(_float(fields[5], "confidence", where), "confidence",
                                            high=1.0)
        count = self._counts.get(speaker, 0) + 1
        self._counts[speaker] = count
        word = Word(text=word_text, speaker=speaker, start=start, end=start + duration,
                    confidence=confidence)
        return TimedEvent(event=AddWord(word_id=f"{speaker}-{count}", word=word),
                          time=word.end, line=number)


def _float(text: str, field: str, where: _Line) -> float:
    try:
        return float(text)
    except ValueError:
        raise where.error(f"not a number: {text!r}", field) from None


def parse_ctm(lines: Iterable[str], source: str, *,
              recording: str | None = None) -> Iterator[TimedEvent]:
    """Yield the words of CTM text in input order (one line at a time).

    Raises
    ------
    TranscriptFormatError
        For a malformed line, a second recording when none was picked, or (at the end) a
        picked recording the text does not hold.
    """
    parser = CtmParser(source, recording=recording)
    for number, raw in enumerate(lines, start=1):
        event = parser.parse_line(raw, number)
        if event is not None:
            yield event
    if recording is not None and recording not in parser.recordings:
        held = ", ".join(parser.recordings) or "none"
        raise TranscriptFormatError(f"no recording {recording!r}; it holds: {held}",
                                    source=source)


def ctm_recordings(lines: Iterable[str]) -> list[str]:
    """The recording names a CTM text holds, in order of first appearance."""
    names: dict[str, None] = {}
    for raw in lines:
        stripped = raw.strip()
        if stripped and not stripped.startswith(";;"):
            names[stripped.split(None, 1)[0]] = None
    return list(names)


def sort_by_time(events: Iterable[TimedEvent]) -> list[TimedEvent]:
    """Events merged into arrival order (stable; events without a time keep their place after
    the timed event before them). CTM files list each channel in a block; this interleaves them.
    """
    ordered: list[TimedEvent] = []
    last = 0.0
    keyed: list[tuple[float, int, TimedEvent]] = []
    for index, event in enumerate(events):
        if event.time is not None:
            last = event.time
        keyed.append((last, index, event))
    keyed.sort(key=lambda item: (item[0], item[1]))
    ordered.extend(item[2] for item in keyed)
    return ordered


#: Word-stream formats and the file name endings that name them.
FORMAT_SUFFIXES: dict[str, tuple[str, ...]] = {
    "ctm": (".ctm",),
    "jsonl": (".jsonl", ".ndjson", ".json"),
    "vtt": (".vtt",),
    "stm": (".stm",),
}


def detect_format(path: Path) -> str:
    """The format named by a file's ending (:data:`FORMAT_SUFFIXES`); anything else is an
    error naming the file."""
    suffix = path.suffix.lower()
    for fmt, suffixes in FORMAT_SUFFIXES.items():
        if suffix in suffixes:
            return fmt
    raise TranscriptFormatError(
        "cannot tell the format from the file name (.ctm, .jsonl, .vtt or .stm); pass --format",
        source=str(path))


def read_events(path: Path, fmt: str = "auto", *,
                recording: str | None = None) -> list[TimedEvent]:
    """All events of a CTM, JSON Lines, WebVTT or STM file, in arrival order.

    ``recording`` picks one recording of a CTM or STM file that holds several.

    Raises
    ------
    TranscriptFormatError
        For a missing or undecodable file or any malformed line.
    """
    kind = detect_format(path) if fmt == "auto" else fmt
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TranscriptFormatError("no such file", source=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise TranscriptFormatError(f"cannot read: {exc}", source=str(path)) from None
    lines = text.splitlines()
    if recording is not None and kind not in ("ctm", "stm"):
        raise TranscriptFormatError(f"--recording applies to CTM and STM files, not {kind}",
                                    source=str(path))
    if kind == "ctm":
        return sort_by_time(parse_ctm(lines, str(path), recording=recording))
    if kind == "jsonl":
        return list(parse_jsonl_events(lines, str(path)))
    # Imported here: _captions builds on this module's event types.
    from midstream.client._captions import parse_stm, parse_webvtt  # noqa: PLC0415

    if kind == "vtt":
        return parse_webvtt(text, str(path))
    if kind == "stm":
        return parse_stm(lines, str(path), recording=recording)
    raise TranscriptFormatError(f"unknown format {fmt!r} (ctm, jsonl, vtt or stm)",
                                source=str(path))
