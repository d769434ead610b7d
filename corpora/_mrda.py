"""Reader for the ICSI Meeting Recorder Dialog Act corpus (MRDA; Shriberg et al. 2004).

One meeting is two files: ``database/MEETING.dadb`` (one segment a line, 14 comma-separated
columns, per-word times) and ``transcripts/MEETING.trans`` (segment id, the text with the
labellers' markup, the same text normalised). The reader takes words and times from the
``.dadb`` file and the markup from the ``.trans`` file, aligning the two token by token.

What the reader gives
---------------------
- **Words**: every timed word of the meeting, all speakers, sorted by start time. Words the
  forced aligner left untimed (written ``XXXX+XXXX+{word}``) keep their place in their segment
  and have no times; rejected stretches (``{@reject@}``), laughter (``{@@}``) and breaths
  (``{hhh}``) are not words. Fragments (``w-``) are flagged.
- **Utterances**: one per dialogue act. The manual (§3.3) lets a pipe bar ``|`` split a segment
  into parts with different acts ("an utterance divided by a pipe bar behaves in some ways as two
  separate utterances"), so a segment labelled ``fg|s`` becomes two utterances when the
  transcript's pipe can be placed between its words. ``fine_tag`` is the original label of that
  part as written (column 9); ``fine_class`` is the part's *deciding tag* in the normalised label
  (column 6), see :func:`mrda_class`; ``complete`` is false for an interrupted or abandoned act
  (disruption forms ``%-``/``%--``, §3.4, or the transcript's ``==``).
- **Disfluency layer**: MRDA marks self-interruptions (`` - `` after a word) and abandoned
  segments but never the extent of a reparandum or a repair, so no faithful per-word label can
  be given: ``labels`` is ``None``. The interruption marks are kept as
  ``Conversation.interruption_points`` (the word index each `` - `` follows), abandonment as
  ``Utterance.complete``, fragments as ``Word.fragment``. A segment the transcript ends with
  ``==`` (the speaker "trails off or is interrupted": ``doc/mrda_manual.pdf``, Section 2)
  after which its speaker starts afresh is ``Utterance.abandoned`` (a restart,
  ``corpora/_restarts.py``); its words carry no label, as the layer is partial. Fillers are
  transcribed as ordinary words (``uh``, ``um``) with no tag of their own, so they are left in
  the words.

Segments without any word (``DIGIT_TASK``, ``BLEEPED``: digit reading and cut audio) give no
utterance. Nothing here logs words.
"""

from __future__ import annotations

import re
from collections.abc import Collection, Iterator
from dataclasses import dataclass
from pathlib import Path

from midstream import (
    Conversation,
    CorpusNotFoundError,
    TranscriptFormatError,
    Utterance,
    Word,
    coarse_function,
    normalise_token,
)
from midstream.corpora._restarts import abandoned_utterances
from midstream.corpora._text import read_lines

#: Columns of a ``.dadb`` line (corpora README; the last five hold adjacency pairs and comments).
_COLUMNS = 14
_UNTIMED = "XXXX"
#: Untimed brace words that are not speech: the aligner's rejected stretches, laughter, breath.
_BRACE_NON_SPEECH = re.compile(r"@|^hhh$")
#: Transcript tokens that carry no word: sentence ends, overlap and uncertainty marks.
_TRANS_SKIP = frozenset({".", "?", "!", "@@", "**"})
_DISRUPTED = frozenset({"%-", "%--"})

#: Specific tags that decide an act's function over its general tag, in priority order
#: (MRDA manual §1.3 groups): talk not addressed to the meeting (group 11: t1, t3), checks
#: (group 7), answers then agreement responses (group 5; answers first, as the SWBD-DAMSL
#: clustering lets the answer code win over a part-rejection), acknowledgements (group 4),
#: restated information (group 8), collaborative completion (group 9), action motivators
#: (group 6) and politeness mechanisms (group 10). Other specific tags (d, g, rt, e, df, fe, t,
#: tc, j, and r, bsc whose restated words keep the function of the act they restate) describe
#: form, topic or manner and leave the general tag in charge (``data/mrda_coarse.tsv`` lists why).
DECIDING_TAGS: tuple[str, ...] = (
    "t1", "t3",
    "br", "bu", "f",
    "na", "ng", "nd", "no", "aa", "aap", "ar", "arp", "am",
    "bk", "ba", "bh",
    "m", "bs", "bc",
    "2",
    "co", "cs", "cc",
    "bd", "by", "fa", "ft", "fw",
)
_DECIDING_RANK = {tag: rank for rank, tag in enumerate(DECIDING_TAGS)}
#: Obsolete tag the normalised column already rewrote (manual footnote 7: ``sj`` became ``s``).
_OBSOLETE = {"sj": "s"}


@dataclass(frozen=True, slots=True, kw_only=True)
class DadbSegment:
    """One parsed ``.dadb`` line: a segment of one speaker with its timed words."""

    segment_id: str
    start: float
    end: float
    speaker: str
    words: tuple[tuple[str, float | None, float | None], ...]
    """(raw token, start, end) in the segment's order; times ``None`` when not aligned."""
    label: str
    """The normalised dialogue-act label (column 6)."""
    original_label: str
    """The label as the labellers wrote it (column 9)."""


def mrda_class(label: str) -> str:
    """The fine class of one MRDA dialogue act (one pipe-bar part of a label).

    The quoted act after ``:`` (manual §3.5) and the disruption form after ``.`` (§3.4) are
    dropped. The class is the highest-priority tag of :data:`DECIDING_TAGS` the act carries,
    else its general tag; a label of only a disruption form (``%``, ``%-``, ``%--``, ``x``) or
    ``z`` (not labelled) is its own class.

    Examples
    --------
    >>> mrda_class("s^aa^rt"), mrda_class("qy^bu^d^rt"), mrda_class("s.%--"), mrda_class("%-")
    ('aa', 'bu', 's', '%-')
    >>> mrda_class("s:qw"), mrda_class("sj^ba")
    ('s', 'ba')
    """
    act = label.strip()
    if act in {"%", "%-", "%--", "x", "z"}:
        return act
    act = act.split(":", 1)[0].split(".", 1)[0]
    general, *specific = act.split("^")
    general = _OBSOLETE.get(general, general)
    deciding = [tag for tag in specific if tag in _DECIDING_RANK]
    if deciding:
        return min(deciding, key=_DECIDING_RANK.__getitem__)
    return general


def _disruption(label: str) -> str | None:
    act = label.strip()
    if act in _DISRUPTED:
        return act
    _, _, form = act.partition(".")
    return form if form in _DISRUPTED else None


def parse_dadb_line(line: str, *, source: str = "", number: int | None = None) -> DadbSegment:
    """Parse one line of a ``.dadb`` file.

    Raises
    ------
    TranscriptFormatError
        When the line has not 14 columns, a time is not a number, or a word is not written
        ``start+end+word``; the message names file, line and column.
    """
    fields = line.rstrip("\r\n").split(",")
    if len(fields) != _COLUMNS:
        raise TranscriptFormatError(f"expected {_COLUMNS} comma-separated columns, got "
                                    f"{len(fields)}", source=source, line=number)
    try:
        start, end = float(fields[0]), float(fields[1])
    except ValueError:
        raise TranscriptFormatError("segment start/end is not a number", source=source,
                                    line=number, field="start/end") from None
    words: list[tuple[str, float | None, float | None]] = []
    if fields[4]:
        for item in fields[4].split("|"):
            parts = item.split("+", 2)
            if len(parts) != 3 or not parts[2]:
                raise TranscriptFormatError(f"word {item!r} is not start+end+word",
                                            source=source, line=number, field="words")
            words.append((parts[2], _time(parts[0], source, number),
                          _time(parts[1], source, number)))
    segment_id, speaker = fields[2], fields[7]
    if not segment_id or (words and not speaker):
        raise TranscriptFormatError("segment id or speaker is empty", source=source,
                                    line=number, field="segment id/speaker")
    return DadbSegment(segment_id=segment_id, start=start, end=end, speaker=speaker,
                       words=tuple(words), label=fields[5], original_label=fields[8])


def _time(text: str, source: str, number: int | None) -> float | None:
    if text == _UNTIMED:
        return None
    try:
        return float(text)
    except ValueError:
        raise TranscriptFormatError(f"word time {text!r} is not a number", source=source,
                                    line=number, field="words") from None


def parse_trans_line(line: str, *, source: str = "",
                     number: int | None = None) -> tuple[str, str]:
    """Parse one ``.trans`` line into (segment id, normalised text with markup).

    Raises
    ------
    TranscriptFormatError
        When the line has not three comma-separated columns.
    """
    fields = line.rstrip("\r\n").split(",")
    if len(fields) != 3 or not fields[0]:
        raise TranscriptFormatError("expected segment id, text and normalised text",
                                    source=source, line=number)
    return fields[0], fields[2]


@dataclass(frozen=True, slots=True, kw_only=True)
class _Marks:
    """Where the transcript's markup falls among a segment's words (positions in the segment)."""

    aligned: bool
    interruptions: tuple[int, ...] = ()
    """Segment word positions each `` - `` follows."""
    pipes: tuple[int, ...] = ()
    """Segment word positions each ``|`` comes before."""
    trailing_off: bool = False
    """The transcript ends the segment with ``==``."""


def _align_marks(raw_words: list[str], text: str) -> _Marks:
    """Place the transcript's markup between the ``.dadb`` words by walking both in order."""
    interruptions: list[int] = []
    pipes: list[int] = []
    j = 0
    tokens = text.split()
    for token in tokens:
        if token == "-":
            if j:
                interruptions.append(j - 1)
            continue
        if token == "|":
            pipes.append(j)
            continue
        if token in _TRANS_SKIP or token.lstrip("?!.") == "==" or token.isupper():
            continue
        word = token.removesuffix("==")
        if j < len(raw_words) and word in (raw_words[j], raw_words[j].strip("{}")):
            j += 1
        # A transcript token the .dadb lacks (a comment mark, an uncertain word) is skipped.
    trailing_off = bool(tokens) and tokens[-1].endswith("==")
    if j != len(raw_words):
        return _Marks(aligned=False, trailing_off=trailing_off)
    return _Marks(aligned=True, interruptions=tuple(interruptions), pipes=tuple(pipes),
                  trailing_off=trailing_off)


def _keep(raw: str) -> tuple[str, bool] | None:
    """The recogniser-like text and fragment flag of one ``.dadb`` word, or ``None``."""
    if raw.startswith("{") and raw.endswith("}"):
        inner = raw[1:-1]
        if _BRACE_NON_SPEECH.search(inner):
            return None
        raw = inner
    token = normalise_token(raw)
    return None if token is None else (token.text, token.fragment)


def read_mrda_meeting(dadb: Path, trans: Path) -> Conversation:
    """Read one meeting from its ``.dadb`` and ``.trans`` files.

    Raises
    ------
    TranscriptFormatError
        When a line of either file does not parse, or a ``.dadb`` segment has no transcript
        line (the message names file, line and segment).
    """
    texts: dict[str, str] = {}
    for number, line in enumerate(read_lines(trans), start=1):
        if line.strip():
            segment_id, text = parse_trans_line(line, source=str(trans), number=number)
            texts[segment_id] = text

    # Words are gathered per segment first, then sorted by time across speakers; each word
    # remembers its segment part so utterances can be rebuilt from the sorted order.
    pending: list[tuple[float, int, Word]] = []
    # segment, original, normalised, complete, ended by "=="
    parts: list[tuple[DadbSegment, str, str, bool, bool]] = []
    part_words: list[list[int]] = []  # sequence numbers of each part's words
    interrupted_after: set[int] = set()  # sequence numbers followed by " - "
    sequence = 0
    for number, line in enumerate(read_lines(dadb), start=1):
        if not line.strip():
            continue
        segment = parse_dadb_line(line, source=str(dadb), number=number)
        if not segment.words:
            continue
        if segment.segment_id not in texts:
            raise TranscriptFormatError(
                f"segment {segment.segment_id!r} has no line in {trans.name}",
                source=str(dadb), line=number, field="segment id")
        raw_words = [raw for raw, _, _ in segment.words]
        marks = _align_marks(raw_words, texts[segment.segment_id])
        originals = segment.original_label.split("|")
        normalised = segment.label.split("|")
        if marks.aligned and len(marks.pipes) + 1 == len(normalised) == len(originals):
            bounds = [0, *marks.pipes, len(raw_words)]
        else:
            # The transcript's pipes cannot be placed: keep the segment whole, under the
            # act that is not a floor mechanism (the segment's substance), if any.
            main = next((i for i, act in enumerate(normalised)
                         if mrda_class(act) not in {"fg", "fh", "h"}), 0)
            originals = [originals[min(main, len(originals) - 1)]]
            normalised = [normalised[main]]
            bounds = [0, len(raw_words)]
        last_start = segment.start
        positions: dict[int, int] = {}  # segment word position -> sequence number
        for position, (raw, start, end) in enumerate(segment.words):
            kept = _keep(raw)
            if start is not None:
                last_start = start
            if kept is None:
                continue
            text, fragment = kept
            word = Word(text=text, speaker=segment.speaker, start=start, end=end,
                        fragment=fragment)
            pending.append((last_start, sequence, word))
            positions[position] = sequence
            sequence += 1
        for position in marks.interruptions:
            # A " - " after a dropped token belongs to the last kept word before it.
            kept_before = [s for p, s in positions.items() if p <= position]
            if kept_before:
                interrupted_after.add(max(kept_before))
        for index, (original, label) in enumerate(zip(originals, normalised, strict=True)):
            members = [positions[p] for p in range(bounds[index], bounds[index + 1])
                       if p in positions]
            if not members:
                continue
            trailing = index == len(normalised) - 1 and marks.trailing_off
            complete = _disruption(label) is None and not trailing
            parts.append((segment, original, label, complete, trailing))
            part_words.append(members)

    pending.sort(key=lambda item: (item[0], item[1]))
    index_of = {seq: index for index, (_, seq, _) in enumerate(pending)}
    words = tuple(word for _, _, word in pending)
    indices = [tuple(sorted(index_of[s] for s in members)) for members in part_words]
    functions = [coarse_function("mrda", mrda_class(part[2])) for part in parts]
    # Utterances are in .dadb order; the abandonment rule reads them in time order.
    abandoned = abandoned_utterances(
        words, indices, functions, [k for k, part in enumerate(parts) if part[4]])
    utterances = []
    for k, (segment, original, label, complete, _) in enumerate(parts):
        utterances.append(Utterance(
            speaker=segment.speaker,
            words=indices[k],
            function=functions[k],
            fine_tag=original,
            fine_class=mrda_class(label),
            complete=complete,
            abandoned=k in abandoned,
        ))
    return Conversation(
        id=dadb.stem,
        corpus="mrda",
        words=words,
        utterances=tuple(utterances),
        labels=None,
        interruption_points=tuple(sorted(index_of[s] for s in interrupted_after)),
    )


def read_mrda(root: Path, *, ids: Collection[str] | None = None) -> Iterator[Conversation]:
    """Read MRDA meetings from the corpus folder ``root``, in name order.

    Parameters
    ----------
    root : Path
        The folder holding ``database/`` and ``transcripts/``.
    ids : collection of str, optional
        Meeting names to read (``Bed002``...); all meetings when ``None``.

    Raises
    ------
    CorpusNotFoundError
        When ``database/`` is missing or a requested meeting has no files.
    TranscriptFormatError
        When a file does not parse.
    """
    database = root / "database"
    if not database.is_dir():
        raise CorpusNotFoundError(f"{root}: no database/ folder of MRDA .dadb files")
    names = sorted(p.stem for p in database.glob("*.dadb")) if ids is None else sorted(ids)
    for name in names:
        dadb, trans = database / f"{name}.dadb", root / "transcripts" / f"{name}.trans"
        if not dadb.is_file() or not trans.is_file():
            raise CorpusNotFoundError(f"MRDA meeting {name!r} needs {dadb} and {trans}")
        yield read_mrda_meeting(dadb, trans)
