"""JSON records of server events and the revision log that ``replay --log`` writes.

One record per line (JSON Lines); ``"type"`` says what it is. The same update records are what
``midstream tag --json`` and ``midstream subscribe --json`` print, so a piped stream can be
saved and inspected later. The format is documented in ``docs/client.md``.

Record types, in the order a log holds them::

    {"type": "header", "format": 1, "conversation_id": ..., "source": ..., "server": ...}
    {"type": "word", "id": ..., "speaker": ..., "text": ..., "start": ..., "end": ...,
     "sent": <words sent so far, this one included>, "gold": {...} | absent}
    {"type": "update", "seq": ..., "epoch": ..., "server_time": ..., "final": bool, "words": [...],
     "utterances": [...], "withdrawn": [...], "sent": <words sent when it arrived>}
    {"type": "snapshot" | "gap" | "ended" | "reconnected", ...}

Word and update records interleave in the order the client saw them.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from midstream import (
    DisfluencyLabel,
    EndReason,
    GapReason,
    HypothesisDiff,
    HypothesisUpdate,
    TranscriptFormatError,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client._results import Ended, Gap, Reconnected, ServerEvent, Snapshot, Welcome

LOG_FORMAT = 1


@dataclass(frozen=True, slots=True, kw_only=True)
class GoldWord:
    """A word's gold annotation from a corpus (``None`` where the corpus has no such layer)."""

    label: DisfluencyLabel | None
    utterance: int | None
    function: UtteranceFunction | None
    fine_class: str | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class SentWord:
    """A word as the client sent it, with its gold annotation when it came from a corpus."""

    word_id: str
    speaker: str
    text: str
    start: float | None
    end: float | None
    sent: int
    gold: GoldWord | None = None


def word_state_record(state: WordHypothesis) -> dict[str, Any]:
    record: dict[str, Any] = {"id": state.word_id, "speaker": state.speaker,
                              "text": state.text,
                              "label": state.label.value, "confidence": round(state.confidence, 4),
                              "revision": state.revision, "final": state.final}
    if state.start is not None:
        record["start"] = state.start
    if state.end is not None:
        record["end"] = state.end
    if state.reparandum_of is not None:
        record["reparandum_of"] = state.reparandum_of
    if state.interruption_point:
        record["interruption_point"] = True
    return record


def utterance_state_record(state: UtteranceHypothesis) -> dict[str, Any]:
    return {"id": state.utterance_id, "speaker": state.speaker, "words": list(state.word_ids),
            "clean_text": state.clean_text, "function": state.function.value,
            "fine_class": state.fine_class, "confidence": round(state.confidence, 4),
            "revision": state.revision, "final": state.final}


def event_record(event: ServerEvent, *, sent: int | None = None) -> dict[str, Any]:
    """The JSON record of one server event (``sent``: words sent when it arrived)."""
    record: dict[str, Any]
    if isinstance(event, HypothesisUpdate):
        record = {"type": "update", "seq": event.seq, "epoch": event.epoch,
                  "server_time": event.server_time, "final": event.conversation_final,
                  "words": [word_state_record(w) for w in event.diff.words],
                  "utterances": [utterance_state_record(u) for u in event.diff.utterances],
                  "withdrawn": list(event.diff.withdrawn_word_ids)}
    elif isinstance(event, Snapshot):
        record = {"type": "snapshot", "seq": event.seq, "epoch": event.epoch,
                  "final": event.conversation_final,
                  "words": [word_state_record(w) for w in event.words],
                  "utterances": [utterance_state_record(u) for u in event.utterances]}
    elif isinstance(event, Welcome):
        record = {"type": "welcome", "conversation_id": event.conversation_id,
                  "next_seq": event.next_seq, "epoch": event.epoch}
    elif isinstance(event, Gap):
        record = {"type": "gap", "first_missing": event.first_missing,
                  "oldest_kept": event.oldest_kept, "reason": event.reason.value}
    elif isinstance(event, Ended):
        record = {"type": "ended", "reason": event.reason.value, "last_seq": event.last_seq}
    else:
        record = {"type": "reconnected", "from_seq": event.from_seq, "attempt": event.attempt}
    if sent is not None:
        record["sent"] = sent
    return record


def word_record(word: SentWord) -> dict[str, Any]:
    record: dict[str, Any] = {"type": "word", "id": word.word_id, "speaker": word.speaker,
                              "text": word.text, "start": word.start, "end": word.end,
                              "sent": word.sent}
    if word.gold is not None:
        gold = word.gold
        record["gold"] = {
            "label": gold.label.value if gold.label is not None else None,
            "utterance": gold.utterance,
            "function": gold.function.value if gold.function is not None else None,
            "fine_class": gold.fine_class,
        }
    return record


def dumps(record: dict[str, Any]) -> str:
    return json.dumps(record, ensure_ascii=False, separators=(",", ":"))


# --- reading a log back -------------------------------------------------------------------------


@dataclass(slots=True, kw_only=True)
class RevisionLog:
    """A revision log read back: the words sent and the server events received, in order."""

    conversation_id: str = ""
    source: str = ""
    server: str = ""
    words: list[SentWord] = field(default_factory=list)
    events: list[tuple[ServerEvent, int | None]] = field(default_factory=list)

    @property
    def has_gold(self) -> bool:
        return any(w.gold is not None and w.gold.label is not None for w in self.words)

    @property
    def has_gold_functions(self) -> bool:
        return any(w.gold is not None and w.gold.function is not None for w in self.words)


class _Reader:
    def __init__(self, source: str) -> None:
        self.source = source
        self.line = 0

    def error(self, message: str, field: str | None = None) -> TranscriptFormatError:
        return TranscriptFormatError(message, source=self.source, line=self.line, field=field)

    def get(self, record: dict[str, Any], name: str) -> Any:
        if name not in record:
            raise self.error("missing", name)
        return record[name]

    def word_state(self, record: Any) -> WordHypothesis:
        if not isinstance(record, dict):
            raise self.error("a word state must be an object", "words")
        try:
            # Logs written before word states carried their text have none: "" then.
            start, end = record.get("start"), record.get("end")
            return WordHypothesis(
                word_id=str(self.get(record, "id")), speaker=str(self.get(record, "speaker")),
                label=DisfluencyLabel(self.get(record, "label")),
                confidence=float(self.get(record, "confidence")),
                revision=int(self.get(record, "revision")), final=bool(self.get(record, "final")),
                reparandum_of=record.get("reparandum_of"),
                interruption_point=bool(record.get("interruption_point", False)),
                text=str(record.get("text", "")),
                start=None if start is None else float(start),
                end=None if end is None else float(end))
        except (ValueError, TypeError) as exc:
            raise self.error(f"bad word state: {exc}", "words") from None

    def utterance_state(self, record: Any) -> UtteranceHypothesis:
        if not isinstance(record, dict):
            raise self.error("an utterance state must be an object", "utterances")
        try:
            return UtteranceHypothesis(
                utterance_id=str(self.get(record, "id")),
                speaker=str(self.get(record, "speaker")),
                word_ids=tuple(str(w) for w in self.get(record, "words")),
                clean_text=str(self.get(record, "clean_text")),
                function=UtteranceFunction(self.get(record, "function")),
                fine_class=str(self.get(record, "fine_class")),
                confidence=float(self.get(record, "confidence")),
                revision=int(self.get(record, "revision")), final=bool(self.get(record, "final")))
        except (ValueError, TypeError) as exc:
            raise self.error(f"bad utterance state: {exc}", "utterances") from None

    def gold(self, record: Any) -> GoldWord | None:
        if record is None:
            return None
        if not isinstance(record, dict):
            raise self.error("must be an object", "gold")
        try:
            label = record.get("label")
            function = record.get("function")
            utterance = record.get("utterance")
            return GoldWord(
                label=DisfluencyLabel(label) if label is not None else None,
                utterance=int(utterance) if utterance is not None else None,
                function=UtteranceFunction(function) if function is not None else None,
                fine_class=record.get("fine_class"))
        except (ValueError, TypeError) as exc:
            raise self.error(f"bad gold annotation: {exc}", "gold") from None

    def event(self, record: dict[str, Any], kind: str) -> ServerEvent:
        try:
            if kind == "update":
                diff = HypothesisDiff(
                    words=tuple(self.word_state(w) for w in self.get(record, "words")),
                    utterances=tuple(self.utterance_state(u)
                                     for u in self.get(record, "utterances")),
                    withdrawn_word_ids=tuple(str(w) for w in record.get("withdrawn", ())))
                return HypothesisUpdate(seq=int(self.get(record, "seq")),
                                        server_time=float(self.get(record, "server_time")),
                                        diff=diff, conversation_final=bool(record.get("final")),
                                        epoch=int(record.get("epoch", 0)))
            if kind == "snapshot":
                return Snapshot(seq=int(self.get(record, "seq")),
                                words=tuple(self.word_state(w) for w in self.get(record, "words")),
                                utterances=tuple(self.utterance_state(u)
                                                 for u in self.get(record, "utterances")),
                                conversation_final=bool(record.get("final")),
                                epoch=int(record.get("epoch", 0)))
            if kind == "welcome":
                return Welcome(conversation_id=str(self.get(record, "conversation_id")),
                               next_seq=int(self.get(record, "next_seq")),
                               epoch=int(record.get("epoch", 0)))
            if kind == "gap":
                return Gap(first_missing=int(self.get(record, "first_missing")),
                           oldest_kept=int(self.get(record, "oldest_kept")),
                           reason=GapReason(self.get(record, "reason")))
            if kind == "ended":
                return Ended(reason=EndReason(self.get(record, "reason")),
                             last_seq=int(self.get(record, "last_seq")))
            from_seq = record.get("from_seq")
            return Reconnected(from_seq=None if from_seq is None else int(from_seq),
                               attempt=int(self.get(record, "attempt")))
        except (ValueError, TypeError) as exc:
            raise self.error(f"bad {kind} record: {exc}") from None


_EVENT_TYPES = frozenset({"update", "snapshot", "welcome", "gap", "ended", "reconnected"})


def parse_log(lines: Iterable[str], source: str) -> RevisionLog:
    """Read a revision log (or the output of ``--json``) back.

    Raises
    ------
    TranscriptFormatError
        Naming the file, line and field of the first malformed record.
    """
    reader = _Reader(source)
    log = RevisionLog(source=source)
    for number, raw in enumerate(lines, start=1):
        reader.line = number
        if not raw.strip():
            continue
        try:
            record = json.loads(raw)
        except (json.JSONDecodeError, RecursionError):
            raise reader.error("not a JSON object") from None
        if not isinstance(record, dict):
            raise reader.error("must be a JSON object")
        kind = record.get("type")
        if kind == "header":
            log.conversation_id = str(record.get("conversation_id", ""))
            log.source = str(record.get("source", source))
            log.server = str(record.get("server", ""))
        elif kind == "word":
            start, end = record.get("start"), record.get("end")
            try:
                log.words.append(SentWord(
                    word_id=str(reader.get(record, "id")),
                    speaker=str(reader.get(record, "speaker")),
                    text=str(reader.get(record, "text")),
                    start=None if start is None else float(start),
                    end=None if end is None else float(end),
                    sent=int(record.get("sent", len(log.words) + 1)),
                    gold=reader.gold(record.get("gold"))))
            except (ValueError, TypeError) as exc:
                raise reader.error(f"bad word record: {exc}") from None
        elif kind == "rates":
            continue  # a summary ``--rates`` printed at the end; nothing to inspect
        elif kind in _EVENT_TYPES:
            sent = record.get("sent")
            event = reader.event(record, kind)
            if isinstance(event, Welcome) and not log.conversation_id:
                log.conversation_id = event.conversation_id
            log.events.append((event, int(sent) if isinstance(sent, int) else None))
        else:
            raise reader.error(f"unknown record type {kind!r}", "type")
    return log


def read_log(path: Path) -> RevisionLog:
    """Read a revision log file (see :func:`parse_log`)."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TranscriptFormatError("no such file", source=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise TranscriptFormatError(f"cannot read: {exc}", source=str(path)) from None
    return parse_log(text.splitlines(), str(path))

