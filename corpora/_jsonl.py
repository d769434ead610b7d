"""Midstream's own JSON Lines format for annotated conversations (``docs/formats.md``).

A file is one header line, ``{"format": "midstream-transcript", "version": 1}``, then one JSON
object a line. Each object has a ``type``: ``"word"`` (the default, so a hand-written file can be
just words), ``"conversation"``, ``"utterance"`` or ``"repair"``, and names its conversation in
``conversation``. All lines of one conversation are consecutive; within them the order of the
word lines is the order of the words, and word indices (in utterance membership, repairs and
interruption points) count those word lines from 0.

The smallest useful file::

    {"format": "midstream-transcript", "version": 1}
    {"conversation": "call-1", "speaker": "A", "text": "so", "start": 0.0, "end": 0.21}
    {"conversation": "call-1", "speaker": "A", "text": "um", "start": 0.21, "end": 0.5}

Reading is streaming: one conversation is held in memory at a time, each line is read with a
bounded buffer. Every problem raises :class:`TranscriptFormatError` naming the file, the line and
the field. Limits: :data:`MAX_LINE_BYTES` per line, :data:`MAX_WORDS` words per conversation.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from midstream import (
    Conversation,
    DisfluencyLabel,
    InputError,
    Repair,
    TranscriptFormatError,
    Utterance,
    UtteranceFunction,
    Word,
)

FORMAT_NAME = "midstream-transcript"
FORMAT_VERSION = 1
#: Longest line accepted, in bytes of UTF-8 (newline included).
MAX_LINE_BYTES = 1 << 20
#: Most words accepted in one conversation (a long meeting holds about 20,000).
MAX_WORDS = 1_000_000
#: Corpus name given to conversations whose file has no conversation line.
DEFAULT_CORPUS = "jsonl"

_TYPES = ("conversation", "word", "utterance", "repair")
_LABELS = {label.value: label for label in DisfluencyLabel}
_FUNCTIONS = {function.value: function for function in UtteranceFunction}
_FIELDS: dict[str, frozenset[str]] = {
    "conversation": frozenset({"type", "conversation", "corpus", "disfluency_annotated",
                               "interruption_points", "unbalanced_brackets"}),
    "word": frozenset({"type", "conversation", "speaker", "text", "start", "end", "confidence",
                       "fragment", "label", "utterance"}),
    "utterance": frozenset({"type", "conversation", "index", "speaker", "function", "fine_tag",
                            "fine_class", "complete", "abandoned"}),
    "repair": frozenset({"type", "conversation", "reparandum", "interregnum", "repair_onset"}),
}


def _reject_constant(name: str) -> object:
    # JSON has no NaN or Infinity; Python's parser would accept them silently.
    raise ValueError(f"{name} is not a JSON number")


class _Line:
    """One parsed line: its object, and where it came from for error messages."""

    __slots__ = ("number", "record", "source")

    def __init__(self, record: dict[str, Any], source: str, number: int) -> None:
        self.record = record
        self.source = source
        self.number = number

    def error(self, message: str, name: str | None = None) -> TranscriptFormatError:
        return TranscriptFormatError(message, source=self.source, line=self.number, field=name)

    def text(self, name: str, *, required: bool = True, default: str = "") -> str:
        value = self.record.get(name)
        if value is None and not required and name not in self.record:
            return default
        if not isinstance(value, str) or (required and not value):
            raise self.error("expected a non-empty string" if required else "expected a string",
                             name)
        return value

    def flag(self, name: str, default: bool) -> bool:
        if name not in self.record:
            return default
        value = self.record[name]
        if not isinstance(value, bool):
            raise self.error("expected true or false", name)
        return value

    def count(self, name: str, default: int | None = None) -> int:
        if name not in self.record and default is not None:
            return default
        value = self.record.get(name)
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise self.error("expected a whole number >= 0", name)
        return value

    def number_or_none(self, name: str, *, upper: float = math.inf) -> float | None:
        value = self.record.get(name)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.error("expected a number or null", name)
        number = float(value)
        if not math.isfinite(number) or number < 0 or number > upper:
            bound = f"[0, {upper:g}]" if math.isfinite(upper) else ">= 0"
            raise self.error(f"expected a number {bound}", name)
        return number

    def indices(self, name: str, *, required: bool = True) -> tuple[int, ...]:
        if name not in self.record and not required:
            return ()
        value = self.record.get(name)
        if not isinstance(value, list) or not all(
                isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in value):
            raise self.error("expected a list of word indices (whole numbers >= 0)", name)
        return tuple(value)


@dataclass(slots=True)
class _Pending:
    """The lines of the conversation being read."""

    conversation_id: str
    source: str
    header: _Line | None = None
    words: list[tuple[Word, DisfluencyLabel | None, int | None]] = field(default_factory=list)
    utterances: dict[int, _Line] = field(default_factory=dict)
    repairs: list[_Line] = field(default_factory=list)
    first_line: int = 0
    last_line: int = 0


def _lines(stream: IO[bytes] | IO[str], source: str) -> Iterator[_Line]:
    """Non-blank lines as JSON objects, each read with a bounded buffer."""
    number = 0
    while True:
        raw = stream.readline(MAX_LINE_BYTES + 1)
        if not raw:
            return
        number += 1
        # Checked before decoding: a cut-off overlong line may end inside a character.
        if len(raw) > MAX_LINE_BYTES or (isinstance(raw, str) and len(
                raw.encode("utf-8", "surrogatepass")) > MAX_LINE_BYTES):
            raise TranscriptFormatError(f"line longer than the limit of {MAX_LINE_BYTES} bytes",
                                        source=source, line=number)
        if isinstance(raw, bytes):
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise TranscriptFormatError(f"not UTF-8 ({exc.reason} at byte {exc.start})",
                                            source=source, line=number) from None
        else:
            text = raw
        if not text.strip():
            continue
        try:
            record = json.loads(text, parse_constant=_reject_constant)
        except RecursionError:
            raise TranscriptFormatError("JSON nested too deeply", source=source,
                                        line=number) from None
        except ValueError as exc:
            raise TranscriptFormatError(f"not JSON: {exc}", source=source, line=number) from None
        if not isinstance(record, dict):
            raise TranscriptFormatError("expected a JSON object", source=source, line=number)
        yield _Line(record, source, number)


def _check_header(line: _Line) -> None:
    name = line.record.get("format")
    if name != FORMAT_NAME:
        raise line.error(f"the first line must be the header "
                         f'{{"format": "{FORMAT_NAME}", "version": {FORMAT_VERSION}}}', "format")
    version = line.record.get("version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise line.error("expected a whole number >= 1", "version")
    if version > FORMAT_VERSION:
        raise line.error(f"version {version} is newer than this reader's {FORMAT_VERSION}",
                         "version")


def read_jsonl(source: Path | IO[bytes] | IO[str]) -> Iterator[Conversation]:
    """Read conversations from a file in Midstream's JSON Lines format.

    Parameters
    ----------
    source : Path or stream
        A path, or an open stream of bytes (UTF-8) or text. A stream is not closed.

    Yields
    ------
    Conversation
        One per conversation, in file order, each as soon as its last line is read.

    Raises
    ------
    TranscriptFormatError
        For a missing or newer header, a line that is not a JSON object, an unknown type or
        field, a missing or ill-typed value, an index out of range, or a limit exceeded; the
        message names the file, the line and the field.

    Examples
    --------
    >>> import io
    >>> text = ('{"format": "midstream-transcript", "version": 1}\\n'
    ...         '{"conversation": "c1", "speaker": "A", "text": "hello", "start": 0.0}\\n')
    >>> [w.text for c in read_jsonl(io.StringIO(text)) for w in c.words]
    ['hello']
    """
    if isinstance(source, Path):
        try:
            with source.open("rb") as handle:
                yield from _read(handle, str(source))
        except OSError as exc:
            raise TranscriptFormatError(f"cannot read: {exc.strerror}",
                                        source=str(source)) from None
        return
    yield from _read(source, getattr(source, "name", "<stream>") or "<stream>")


def _read(stream: IO[bytes] | IO[str], source: str) -> Iterator[Conversation]:
    lines = _lines(stream, str(source))
    first = next(lines, None)
    if first is None:
        raise TranscriptFormatError("empty file: expected the header line", source=str(source),
                                    line=1, field="format")
    _check_header(first)
    pending: _Pending | None = None
    finished: set[str] = set()
    for line in lines:
        kind = line.record.get("type", "word")
        if kind not in _TYPES:
            raise line.error(f"unknown type {kind!r} (expected one of {', '.join(_TYPES)})",
                             "type")
        unknown = sorted(set(line.record) - _FIELDS[kind])
        if unknown:
            raise line.error(f"unknown field for a {kind} line", unknown[0])
        conversation_id = line.text("conversation")
        if pending is None or conversation_id != pending.conversation_id:
            if conversation_id in finished:
                raise line.error(f"conversation {conversation_id!r} continues after other "
                                 "conversations' lines; keep its lines together",
                                 "conversation")
            if pending is not None:
                finished.add(pending.conversation_id)
                yield _build(pending)
            pending = _Pending(conversation_id=conversation_id, source=line.source,
                               first_line=line.number)
        pending.last_line = line.number
        if kind == "word":
            if len(pending.words) >= MAX_WORDS:
                raise line.error(f"more than the limit of {MAX_WORDS} words in one "
                                 "conversation", "conversation")
            pending.words.append(_word(line))
        elif kind == "conversation":
            if pending.header is not None:
                raise line.error(f"second conversation line for {conversation_id!r}", "type")
            pending.header = line
        elif kind == "utterance":
            index = line.count("index")
            if index in pending.utterances:
                raise line.error(f"utterance {index} is given twice", "index")
            pending.utterances[index] = line
        else:
            pending.repairs.append(line)
    if pending is not None:
        yield _build(pending)


def _word(line: _Line) -> tuple[Word, DisfluencyLabel | None, int | None]:
    start = line.number_or_none("start")
    end = line.number_or_none("end")
    if start is not None and end is not None and end < start:
        raise line.error("end is before start", "end")
    word = Word(text=line.text("text"), speaker=line.text("speaker"), start=start, end=end,
                confidence=line.number_or_none("confidence", upper=1.0),
                fragment=line.flag("fragment", False))
    label = None
    if "label" in line.record:
        value = line.record["label"]
        if not isinstance(value, str) or value not in _LABELS:
            raise line.error(f"expected one of {', '.join(_LABELS)}", "label")
        label = _LABELS[value]
    utterance = line.count("utterance") if "utterance" in line.record else None
    return word, label, utterance


def _build(pending: _Pending) -> Conversation:
    words = tuple(word for word, _, _ in pending.words)
    count = len(words)
    header = pending.header
    corpus = DEFAULT_CORPUS
    interruption_points: tuple[int, ...] = ()
    unbalanced = 0
    labelled = [label for _, label, _ in pending.words if label is not None]
    annotated = bool(labelled)
    if header is not None:
        corpus = header.text("corpus", required=False, default=DEFAULT_CORPUS) or DEFAULT_CORPUS
        annotated = header.flag("disfluency_annotated", annotated)
        interruption_points = header.indices("interruption_points", required=False)
        unbalanced = header.count("unbalanced_brackets", 0)
        for index in interruption_points:
            if index >= count:
                raise header.error(f"word index {index} out of range ({count} words)",
                                   "interruption_points")
    if len(labelled) != (count if annotated else 0):
        raise TranscriptFormatError(
            f"conversation {pending.conversation_id!r}: either every word has a label or "
            f"none does ({len(labelled)} of {count} have one"
            f"{', and the conversation line says it is not annotated' if not annotated else ''})",
            source=pending.source, line=pending.first_line, field="label")
    members: dict[int, list[int]] = {}
    for position, (_, _, utterance) in enumerate(pending.words):
        if utterance is not None:
            members.setdefault(utterance, []).append(position)
    utterances = []
    for index in sorted(pending.utterances):
        line = pending.utterances[index]
        indices = members.pop(index, [])
        if not indices:
            raise line.error(f"utterance {index} has no word (set 'utterance': {index} on its "
                             "words)", "index")
        function = line.record.get("function")
        if not isinstance(function, str) or function not in _FUNCTIONS:
            raise line.error(f"expected one of {', '.join(_FUNCTIONS)}", "function")
        speaker = (line.text("speaker") if "speaker" in line.record
                   else words[indices[0]].speaker)
        utterances.append(Utterance(
            speaker=speaker, words=tuple(indices), function=_FUNCTIONS[function],
            fine_tag=line.text("fine_tag", required=False),
            fine_class=line.text("fine_class", required=False),
            complete=line.flag("complete", True),
            abandoned=line.flag("abandoned", False)))
    if members:
        missing = min(members)
        raise TranscriptFormatError(
            f"conversation {pending.conversation_id!r}: words name utterance {missing}, which "
            "has no utterance line", source=pending.source, line=pending.first_line,
            field="utterance")
    repairs = []
    for line in pending.repairs:
        reparandum = line.indices("reparandum")
        interregnum = line.indices("interregnum", required=False)
        onset_value = line.record.get("repair_onset")
        if onset_value is not None and (isinstance(onset_value, bool)
                                        or not isinstance(onset_value, int) or onset_value < 0):
            raise line.error("expected a word index or null", "repair_onset")
        if not reparandum:
            raise line.error("a repair needs at least one reparandum word", "reparandum")
        for name, values in (("reparandum", reparandum), ("interregnum", interregnum),
                             ("repair_onset", () if onset_value is None else (onset_value,))):
            for index in values:
                if index >= count:
                    raise line.error(f"word index {index} out of range ({count} words)", name)
        repairs.append(Repair(reparandum=reparandum, interregnum=interregnum,
                              repair_onset=onset_value))
    labels = tuple(label for _, label, _ in pending.words if label is not None)
    return Conversation(
        id=pending.conversation_id, corpus=corpus, words=words, utterances=tuple(utterances),
        labels=labels if annotated else None, repairs=tuple(repairs),
        unbalanced_brackets=unbalanced, interruption_points=interruption_points)


def _check_writable(conversation: Conversation) -> dict[int, int]:
    """Map each word to its utterance; refuse what the format cannot say."""
    owner: dict[int, int] = {}
    count = len(conversation.words)
    if not conversation.id:
        raise InputError("a conversation id must not be empty")
    for repair in conversation.repairs:
        onset = () if repair.repair_onset is None else (repair.repair_onset,)
        if not repair.reparandum or not all(0 <= i < count for i in (
                *repair.reparandum, *repair.interregnum, *onset)):
            raise InputError(f"conversation {conversation.id!r}: a repair names no reparandum "
                             "word or a word out of range")
    if not all(0 <= i < count for i in conversation.interruption_points):
        raise InputError(f"conversation {conversation.id!r}: an interruption point is out of "
                         "range")
    for index, utterance in enumerate(conversation.utterances):
        if not utterance.words:
            raise InputError(f"conversation {conversation.id!r}: utterance {index} has no word")
        for position in utterance.words:
            if not 0 <= position < count:
                raise InputError(f"conversation {conversation.id!r}: utterance {index} names "
                                 f"word {position}, out of range")
            if position in owner:
                raise InputError(f"conversation {conversation.id!r}: word {position} is in "
                                 f"utterances {owner[position]} and {index}")
            owner[position] = index
        if list(utterance.words) != sorted(utterance.words):
            raise InputError(f"conversation {conversation.id!r}: utterance {index}'s words are "
                             "not in ascending order")
    if conversation.labels is not None and len(conversation.labels) != count:
        raise InputError(f"conversation {conversation.id!r}: {len(conversation.labels)} labels "
                         f"for {count} words")
    return owner


def write_jsonl(conversations: Iterable[Conversation], stream: IO[str]) -> int:
    """Write conversations in Midstream's JSON Lines format; ``read_jsonl`` gives them back.

    Parameters
    ----------
    conversations : iterable of Conversation
        Written in order; ids must be distinct.
    stream : text stream
        Receives the header line and every conversation's lines (UTF-8 safe: non-ASCII text
        is escaped).

    Returns
    -------
    int
        The number of conversations written.

    Raises
    ------
    InputError
        For a conversation the format cannot carry: a word in two utterances, an utterance
        without words or with words out of order, labels not one per word, an index out of
        range, an empty or repeated id.
    """
    stream.write(_dump({"format": FORMAT_NAME, "version": FORMAT_VERSION}))
    seen: set[str] = set()
    written = 0
    for conversation in conversations:
        if conversation.id in seen:
            raise InputError(f"conversation id {conversation.id!r} is written twice")
        seen.add(conversation.id)
        owner = _check_writable(conversation)
        cid = conversation.id
        stream.write(_dump({
            "type": "conversation", "conversation": cid, "corpus": conversation.corpus,
            "disfluency_annotated": conversation.labels is not None,
            "interruption_points": list(conversation.interruption_points),
            "unbalanced_brackets": conversation.unbalanced_brackets,
        }))
        for position, word in enumerate(conversation.words):
            record: dict[str, object] = {"conversation": cid, "speaker": word.speaker,
                                         "text": word.text}
            for name, value in (("start", word.start), ("end", word.end),
                                ("confidence", word.confidence)):
                if value is not None:
                    record[name] = value
            if word.fragment:
                record["fragment"] = True
            if conversation.labels is not None:
                record["label"] = conversation.labels[position].value
            if position in owner:
                record["utterance"] = owner[position]
            stream.write(_dump(record))
        for index, utterance in enumerate(conversation.utterances):
            stream.write(_dump({
                "type": "utterance", "conversation": cid, "index": index,
                "speaker": utterance.speaker, "function": utterance.function.value,
                "fine_tag": utterance.fine_tag, "fine_class": utterance.fine_class,
                "complete": utterance.complete,
                # Written only when set, so files of corpora without the mark stay as they were.
                **({"abandoned": True} if utterance.abandoned else {}),
            }))
        for repair in conversation.repairs:
            stream.write(_dump({
                "type": "repair", "conversation": cid, "reparandum": list(repair.reparandum),
                "interregnum": list(repair.interregnum), "repair_onset": repair.repair_onset,
            }))
        written += 1
    return written


def _dump(record: dict[str, object]) -> str:
    return json.dumps(record, ensure_ascii=True, allow_nan=False) + "\n"
