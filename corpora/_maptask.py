"""Reader for the HCRC Map Task corpus (Anderson et al. 1991), conversational-move layer.

A dialogue is three files: ``moves/DIALOGUE.g.moves.xml`` and ``moves/DIALOGUE.f.moves.xml``
(the giver's and the follower's moves, each with a ``label`` and flags) and
``transcripts/DIALOGUE.txt`` (three header lines, then one move a line, ``g|f<TAB>text``, in the
order the moves were spoken). The n-th ``g`` line of the transcript is the n-th move of the
giver's file, and likewise for ``f``: the reader checks the counts agree.

What the reader gives
---------------------
- **Words**: the transcript's words in line order, speakers ``"g"`` (route giver) and ``"f"``
  (route follower); no times (the timed-unit files are not part of this copy). Fragments written
  ``xx--`` are flagged.
- **Utterances**: one per move. ``fine_class`` is the move label; ``fine_tag`` the label with
  its set flags appended after ``+`` in a fixed order (``aban`` abandoned, ``rep-self`` /
  ``rep-other`` repeated, ``interj`` interjected, ``cont`` continued, ``meta`` about the task
  itself), e.g. ``instruct+cont``; ``complete`` is false for an abandoned move, and
  ``abandoned`` true when the same speaker then starts afresh (``corpora/_restarts.py``; a
  ``cont`` move carries on an earlier one and is never such a fresh start).
- **Disfluency layer**: none in this copy beyond fragments and abandoned moves, so ``labels`` is
  ``None``.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Collection, Iterator
from dataclasses import dataclass, replace
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

_HEADER_LINES = 3
_SPEAKERS = ("g", "f")
#: Move flags in the order they are appended to ``fine_tag``: (attribute, value meaning "set",
#: suffix). The files write unset flags as ``false_<name>`` and ``rep="none"``.
_FLAGS: tuple[tuple[str, str, str], ...] = (
    ("aban", "true_aban", "aban"),
    ("rep", "self", "rep-self"),
    ("rep", "other", "rep-other"),
    ("interj", "true_interj", "interj"),
    ("cont", "true_cont", "cont"),
    ("meta", "true_meta", "meta"),
)


@dataclass(frozen=True, slots=True, kw_only=True)
class Move:
    """One conversational move as its XML element gives it."""

    move_id: str
    label: str
    flags: tuple[str, ...]

    @property
    def fine_tag(self) -> str:
        return "+".join((self.label, *self.flags))

    @property
    def abandoned(self) -> bool:
        return "aban" in self.flags

    @property
    def continued(self) -> bool:
        return "cont" in self.flags


def read_moves(path: Path) -> tuple[Move, ...]:
    """The ``<move>`` elements of one moves file, in file order (``<ims>`` gaps are skipped).

    Raises
    ------
    TranscriptFormatError
        When the file is not well-formed XML or a move has no ``label``.
    """
    try:
        root = ET.parse(path).getroot()
    except ET.ParseError as exc:
        line = exc.position[0] if exc.position else None
        raise TranscriptFormatError(f"not well-formed XML: {exc}", source=str(path),
                                    line=line) from None
    except LookupError as exc:
        # The XML declaration names an encoding Python does not know.
        raise TranscriptFormatError(f"unknown text encoding: {exc}", source=str(path),
                                    line=1) from None
    moves = []
    for element in root.iter("move"):
        label = element.get("label", "")
        move_id = element.get("id", "")
        if not label:
            raise TranscriptFormatError(f"move {move_id!r} has no label", source=str(path),
                                        field="label")
        flags = tuple(suffix for attribute, value, suffix in _FLAGS
                      if element.get(attribute) == value)
        moves.append(Move(move_id=move_id, label=label, flags=flags))
    return tuple(moves)


def parse_transcript_line(line: str, *, source: str = "",
                          number: int | None = None) -> tuple[str, str]:
    """Parse one move line of a transcript into (speaker, text).

    Raises
    ------
    TranscriptFormatError
        When the line does not start with ``g`` or ``f`` and a tab.
    """
    speaker, tab, text = line.rstrip("\r\n").partition("\t")
    if not tab or speaker not in _SPEAKERS:
        raise TranscriptFormatError("expected 'g' or 'f', a tab, then the move's words",
                                    source=source, line=number, field="speaker")
    return speaker, text


def read_maptask_dialogue(moves_dir: Path, transcript: Path) -> Conversation:
    """Read one dialogue from its two moves files and its transcript.

    Raises
    ------
    TranscriptFormatError
        When a file does not parse, or the transcript's lines of one speaker do not match that
        speaker's moves in number.
    """
    name = transcript.stem
    moves = {speaker: read_moves(moves_dir / f"{name}.{speaker}.moves.xml")
             for speaker in _SPEAKERS}
    taken = dict.fromkeys(_SPEAKERS, 0)
    words: list[Word] = []
    utterances: list[Utterance] = []
    spoken: list[Move] = []  # the move of each utterance
    for number, line in enumerate(read_lines(transcript), start=1):
        if number <= _HEADER_LINES or not line.strip():
            continue
        speaker, text = parse_transcript_line(line, source=str(transcript), number=number)
        index = taken[speaker]
        if index >= len(moves[speaker]):
            raise TranscriptFormatError(
                f"more {speaker!r} lines than moves in {name}.{speaker}.moves.xml "
                f"({len(moves[speaker])})", source=str(transcript), line=number)
        taken[speaker] += 1
        move = moves[speaker][index]
        first = len(words)
        for raw in text.split():
            token = normalise_token(raw)
            if token is not None:
                words.append(Word(text=token.text, speaker=speaker,
                                  fragment=token.fragment))
        if len(words) == first:
            continue
        utterances.append(Utterance(
            speaker=speaker,
            words=tuple(range(first, len(words))),
            function=coarse_function("maptask", move.label),
            fine_tag=move.fine_tag,
            fine_class=move.label,
            complete=not move.abandoned,
        ))
        spoken.append(move)
    for speaker in _SPEAKERS:
        if taken[speaker] != len(moves[speaker]):
            raise TranscriptFormatError(
                f"{taken[speaker]} {speaker!r} lines but {len(moves[speaker])} moves in "
                f"{name}.{speaker}.moves.xml", source=str(transcript))
    abandoned = abandoned_utterances(
        words, [u.words for u in utterances], [u.function for u in utterances],
        [k for k, move in enumerate(spoken) if move.abandoned],
        continued={k for k, move in enumerate(spoken) if move.continued})
    return Conversation(id=name, corpus="maptask", words=tuple(words),
                        utterances=tuple(replace(u, abandoned=True) if k in abandoned else u
                                         for k, u in enumerate(utterances)),
                        labels=None)


def read_maptask(root: Path, *, ids: Collection[str] | None = None) -> Iterator[Conversation]:
    """Read Map Task dialogues from the corpus folder ``root``, in name order.

    Parameters
    ----------
    root : Path
        The folder holding ``moves/`` and ``transcripts/``.
    ids : collection of str, optional
        Dialogue names to read (``q1ec1``...); all dialogues when ``None``.

    Raises
    ------
    CorpusNotFoundError
        When ``transcripts/`` is missing or a requested dialogue has no files.
    TranscriptFormatError
        When a file does not parse.
    """
    transcripts, moves_dir = root / "transcripts", root / "moves"
    if not transcripts.is_dir() or not moves_dir.is_dir():
        raise CorpusNotFoundError(f"{root}: no transcripts/ and moves/ folders of Map Task")
    names = sorted(p.stem for p in transcripts.glob("*.txt")) if ids is None else sorted(ids)
    for name in names:
        transcript = transcripts / f"{name}.txt"
        needed = [transcript, *(moves_dir / f"{name}.{s}.moves.xml" for s in _SPEAKERS)]
        missing = [str(p) for p in needed if not p.is_file()]
        if missing:
            raise CorpusNotFoundError(f"Map Task dialogue {name!r} is missing {', '.join(missing)}")
        yield read_maptask_dialogue(moves_dir, transcript)
