"""Read the Switchboard Dialog Act Corpus (SwDA) into annotated conversations.

Each ``swNNutt/sw_IIII_CCCC.utt`` file holds one conversation: a header ending in a line of
``=``, then one tagged utterance a line, ``<tag>  <A|B>.<turn> utt<k>: <text>``. The text carries
the Switchboard disfluency markup (Meteer et al. 1995, summarised in the corpora README and the
coders' manual ``doc/manual.august1.html``):

``[ reparandum + interregnum repair ]``
    a repair; ``+`` is the interruption point, the interregnum is the ``{F}``/``{E}``/``{D}``
    material right after it, the repair onset is the first other word after it. Brackets nest.
``[ reparandum + ]``
    a restart: nothing repairs the abandoned words.
``{F ..}`` ``{E ..}`` ``{D ..}`` ``{C ..}`` ``{A ..}``
    filled pause, editing term, discourse marker, coordinating conjunction, aside.
``/`` and ``-/``
    the end of a complete and of a cut-off slash unit (Meteer et al. 1995, the stylebook's
    section on slash units, from memory; quoted in the coders' manual, §2 "Units to label").

How the reader resolves what the markup leaves open:

- One tagged line is one utterance. A line tagged ``+`` continues the same speaker's previous
  utterance (interrupted by the other speaker) and takes its tag: its words join that utterance,
  so ``Utterance.words`` need not be contiguous. Brackets may stay open into such a continuation
  but never cross speakers: each speaker has their own bracket state.
- Label precedence for a word in several roles: ``{F}`` and ``{E}`` words keep FILLER/EDIT_TERM
  even inside a reparandum (both leave the clean text either way, and the lexical label is what
  a tagger can see); every other reparandum word is REPARANDUM (or RESTART when its innermost
  enclosing bracket has no repair), which outranks REPAIR, DISCOURSE_MARKER and FLUENT because
  the word leaves the clean text. ``Repair.reparandum`` lists every word inside the brackets.
- ``{C}`` and ``{A}`` words are FLUENT: the manual marks conjunctions and asides to delimit slash
  units, not as disfluencies, and they stay in the speaker's clean text.
- Malformed markup never stops the reader. ``Conversation.unbalanced_brackets`` counts a ``]``
  with nothing open, a ``[`` still open when its slash unit ends (``/``, ``-/``) or when its
  speaker starts a new utterance or the conversation ends, and a ``[ ... ]`` without ``+``. An
  unclosed bracket is closed at those points so it cannot label the rest of the conversation; if
  it had its ``+`` its repair (or restart) is kept. (A bracket a transcriber carried over a ``/``
  thus counts twice: closed at the slash, then its ``]`` as stray.) An unclosed ``{F ...`` span
  likewise ends with its slash unit.
- A conversation with no ``{F}``/``{E}``/``{D}``/``{C}``/``{A}`` markup and no bracketed repair is
  unannotated (``labels=None``): part of ``sw13utt`` was never marked for disfluencies, and a
  stray bracket or ``{faint}`` comment there does not make it annotated.
- Non-speech (``<laughter>``, ``<<long pause>>``, ``{faint}``), transcriber comments
  (``*[[slash error]]``) and ``#`` overlap marks are dropped; words go through
  :func:`normalise_token`.
- Utterances keep lines with no words (a non-verbal ``x`` line of ``<laughter>`` only): the
  manual's class counts include them. ``complete`` is true when the utterance's last slash is
  ``/``, false for ``-/`` or no slash at all (cut off and never continued).
- An incomplete utterance after which the same speaker starts afresh is *abandoned*
  (``Utterance.abandoned``; the rules in :mod:`midstream.corpora._restarts`), a restart in
  Shriberg's (1994) sense: its words are RESTART (fillers and editing terms keep their labels,
  brackets inside it still label their own reparanda). ``--`` written before its ``-/`` or at
  the start of the speaker's next line links the two lines as one unit run on across a
  backchannel, so such a unit is not abandoned.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from enum import Enum
from functools import lru_cache
from pathlib import Path

from midstream import (
    Conversation,
    CorpusNotFoundError,
    DisfluencyLabel,
    InputError,
    Repair,
    TranscriptFormatError,
    Utterance,
    Word,
    coarse_function,
    normalise_token,
    swbd42_class,
)
from midstream.corpora._restarts import abandoned_utterances

CORPUS = "swda"
#: The tag of a line that continues its speaker's previous utterance ("+@" flags its segmentation).
_CONTINUATION = re.compile(r"^\+[@*]*$")

_HEADER_END = re.compile(r"^[ \t]*=+[ \t]*$", re.MULTILINE)
_LINE = re.compile(r"^\s*(?P<tag>\S+)\s+[@*]*(?P<speaker>[AB])\.\d+\s+utt\d+\s*:(?P<text>.*)$")
_FILE_NAME = re.compile(r"^sw_\d+_(\d+)\.utt$")
#: A split names a file in ``splits/``; anything else (a path) is refused.
_SPLIT_NAME = re.compile(r"[A-Za-z0-9_-]{1,64}")

# One lexer pass over a line's text, as strings (findall is much faster than match objects).
# Alternatives are tried in order at each position, so multi-character marks come before words;
# comments and non-speech match outside the group and come back as "". Comments and ``<<`` spans
# a transcriber left unterminated run to the end of the line. Characters no alternative matches
# (a lone "<" or ">") are skipped.
_TOKEN = re.compile(
    r"""
      \*\[\[.*?(?:\]\]|$)         # *[[transcriber comment]] ("[[" without "*" is two brackets)
    | <<[^>]*(?:>>|$)             # <<long pause>>
    | <[^<>]*>                    # <laughter>, <Very faint>
    | \{(?![FEDCA](?![^\s,}]))[^{}]*\}?  # {faint}: an untyped brace is a comment
    | (                           # the one group: what findall returns ("" for the above)
        \{[FEDCA](?![^\s,}])     # {F {E {D {C {A
      | -/ | [\[\]{}+/]
      | [^\s\[\]{}+/<>-]+(?:-(?!/)[^\s\[\]{}+/<>-]*)* | -
      )
    """,
    re.VERBOSE,
)


class _Mark(Enum):
    OPEN = "["
    CLOSE = "]"
    PLUS = "+"
    SLASH = "/"
    INCOMPLETE = "-/"
    CLOSE_CURLY = "}"
    CURLY = "{"


FLUENT = DisfluencyLabel.FLUENT

_CURLY_OPEN = {
    "{F": DisfluencyLabel.FILLER,
    "{E": DisfluencyLabel.EDIT_TERM,
    "{D": DisfluencyLabel.DISCOURSE_MARKER,
    # Conjunctions and asides delimit slash units; they are fluent speech (see module docstring).
    "{C": DisfluencyLabel.FLUENT,
    "{A": DisfluencyLabel.FLUENT,
}
#: Every token that is markup rather than a word; the braces with a type open a span.
_MARKS: dict[str, _Mark] = {m.value: m for m in _Mark if m is not _Mark.CURLY} | {
    key: _Mark.CURLY for key in _CURLY_OPEN
}
#: Labels a word inside a reparandum keeps instead of REPARANDUM/RESTART.
_KEEP_IN_REPARANDUM = frozenset({DisfluencyLabel.FILLER, DisfluencyLabel.EDIT_TERM})
#: Words right after ``+`` with these labels form the interregnum, not the repair. Shriberg
#: (1994) counts filled pauses, editing phrases and discourse markers there (from memory).
_INTERREGNUM = frozenset(
    {DisfluencyLabel.FILLER, DisfluencyLabel.EDIT_TERM, DisfluencyLabel.DISCOURSE_MARKER}
)


@dataclass(slots=True)
class _Frame:
    """One open ``[``: what it has collected so far."""

    reparandum: list[int] = field(default_factory=list)
    interregnum: list[int] = field(default_factory=list)
    onset: int | None = None
    plus: bool = False


@dataclass(slots=True)
class _OpenUtterance:
    speaker: str
    tag: str
    words: list[int] = field(default_factory=list)
    complete: bool = False
    #: ``--`` right before its ``-/``, or opening its first line: the transcribers' mark that
    #: one unit runs on across the other speaker's backchannel (not an abandoned start).
    dash_end: bool = False
    dash_start: bool = False


@dataclass(slots=True)
class _Speaker:
    frames: list[_Frame] = field(default_factory=list)
    curly: list[DisfluencyLabel] = field(default_factory=list)
    utterance: _OpenUtterance | None = None


class _Builder:
    """Accumulates one conversation's words, labels and repairs as lines arrive."""

    def __init__(self) -> None:
        self.words: list[Word] = []
        self.base: list[DisfluencyLabel] = []
        self.repairs: list[Repair] = []
        self.utterances: list[_OpenUtterance] = []
        self.speakers: dict[str, _Speaker] = {}
        self.unbalanced = 0
        self.marked = False

    def line(self, tag: str, speaker: str, text: str) -> None:
        state = self.speakers.setdefault(speaker, _Speaker())
        if not _CONTINUATION.match(tag) or state.utterance is None:
            # A new utterance: whatever the speaker left open cannot continue into it.
            self._close_all(state)
            state.utterance = _OpenUtterance(speaker=speaker, tag=tag)
            self.utterances.append(state.utterance)
        utterance = state.utterance
        # Per-word work is inlined: this loop runs for every word of the corpus.
        words, base, owned = self.words, self.base, utterance.words
        frames, curly, speaker = state.frames, state.curly, utterance.speaker
        opening = not owned  # the line opens its utterance
        previous = last_token = ""  # the tokens read before this one, overlap marks skipped
        for token in _TOKEN.findall(text):
            if token and token != "#":
                if opening and token == "-" and not previous:
                    utterance.dash_start = True
                last_token, previous = previous, token
            mark = _MARKS.get(token)
            if mark is None:
                if not token:  # a comment or non-speech span
                    continue
                word = _word(token, speaker)
                if word is None:
                    continue
                index = len(words)
                words.append(word)
                label = curly[-1] if curly else FLUENT
                base.append(label)
                owned.append(index)
                for frame in frames:
                    if not frame.plus:
                        frame.reparandum.append(index)
                    elif frame.onset is None:
                        if label in _INTERREGNUM:
                            frame.interregnum.append(index)
                        else:
                            frame.onset = index
            elif mark is _Mark.OPEN:
                frames.append(_Frame())
            elif mark is _Mark.PLUS:
                self._plus(state)
            elif mark is _Mark.CLOSE:
                self._close(state)
            elif mark is _Mark.CLOSE_CURLY:
                if curly:
                    curly.pop()
            elif mark is _Mark.SLASH or mark is _Mark.INCOMPLETE:
                utterance.complete = mark is _Mark.SLASH
                utterance.dash_end = mark is _Mark.INCOMPLETE and last_token == "-"
                self._close_all(state)
            else:
                curly.append(_CURLY_OPEN[token])
                self.marked = True

    def finish(self) -> None:
        for state in self.speakers.values():
            self._close_all(state)

    def _plus(self, state: _Speaker) -> None:
        # The innermost bracket without its "+" yet is the one this "+" interrupts; a "+" with no
        # such bracket (stray, or a second one) carries no structure and is ignored.
        for frame in reversed(state.frames):
            if not frame.plus:
                frame.plus = True
                return

    def _close(self, state: _Speaker) -> None:
        if not state.frames:
            self.unbalanced += 1
            return
        frame = state.frames.pop()
        if not frame.plus:
            self.unbalanced += 1
            return
        self._emit(frame)

    def _close_all(self, state: _Speaker) -> None:
        state.curly.clear()
        while state.frames:
            frame = state.frames.pop()
            self.unbalanced += 1
            if frame.plus:
                self._emit(frame)

    def _emit(self, frame: _Frame) -> None:
        # A bracket whose reparandum held only non-speech has nothing to go back on.
        if frame.reparandum:
            self.marked = True
            self.repairs.append(
                Repair(
                    reparandum=tuple(frame.reparandum),
                    interregnum=tuple(frame.interregnum),
                    repair_onset=frame.onset,
                )
            )

    def abandoned(self) -> set[int]:
        """Indices of the utterances abandoned for a fresh start (``corpora/_restarts.py``)."""
        units = self.utterances
        return abandoned_utterances(
            self.words,
            [u.words for u in units],
            [coarse_function("swbd42", swbd42_class(u.tag)) for u in units],
            [k for k, u in enumerate(units) if not u.complete and not u.dash_end],
            continued={k for k, u in enumerate(units) if u.dash_start},
        )

    def labels(self, abandoned: set[int]) -> tuple[DisfluencyLabel, ...]:
        labels = list(self.base)
        removed = {DisfluencyLabel.REPARANDUM, DisfluencyLabel.RESTART}
        # An abandoned utterance is the outermost restart: every word of it leaves the clean
        # text, except that fillers and editing terms keep their own label as inside brackets,
        # and the brackets inside it (applied next) still decide their own words.
        for k in abandoned:
            for index in self.utterances[k].words:
                if self.base[index] not in _KEEP_IN_REPARANDUM:
                    labels[index] = DisfluencyLabel.RESTART
        # Repairs are emitted innermost first; applying them outermost first lets the innermost
        # bracket decide between REPARANDUM and RESTART.
        for repair in reversed(self.repairs):
            label = DisfluencyLabel.RESTART if repair.is_restart else DisfluencyLabel.REPARANDUM
            for index in repair.reparandum:
                if self.base[index] not in _KEEP_IN_REPARANDUM:
                    labels[index] = label
        for repair in self.repairs:
            onset = repair.repair_onset
            if onset is not None and labels[onset] not in removed | _KEEP_IN_REPARANDUM:
                labels[onset] = DisfluencyLabel.REPAIR
        return tuple(labels)


@lru_cache(maxsize=65536)
def _word(raw: str, speaker: str) -> Word | None:
    # Words are immutable, so one object serves every occurrence of a token by a speaker.
    token = normalise_token(raw)
    if token is None:
        return None
    return Word(text=token.text, speaker=speaker, fragment=token.fragment)


def parse_conversation(text: str, *, conversation_id: str, source: str = "") -> Conversation:
    """Parse the text of one SwDA ``.utt`` file.

    Parameters
    ----------
    text : str
        The whole file, header included.
    conversation_id : str
        The id to give the conversation (``"sw2005"``).
    source : str
        Where the text came from, for error messages.

    Raises
    ------
    TranscriptFormatError
        When the header end is missing, a line is not ``<tag> <A|B>.<turn> utt<k>: <text>``, a
        tag is not SWBD-DAMSL, or a conversation opens with a continuation line.
    """
    header_end = _HEADER_END.search(text)
    if header_end is None:
        raise TranscriptFormatError("no line of '=' ends the header", source=source)
    first_line = text.count("\n", 0, header_end.end()) + 2
    builder = _Builder()
    for number, line in enumerate(text[header_end.end():].splitlines()[1:], start=first_line):
        if not line.strip():
            continue
        match = _LINE.match(line)
        if match is None:
            raise TranscriptFormatError(
                "expected '<tag> <A|B>.<turn> utt<k>: <text>'", source=source, line=number
            )
        tag, speaker = match.group("tag"), match.group("speaker")
        state = builder.speakers.get(speaker)
        continuation = _CONTINUATION.match(tag) is not None
        if continuation and (state is None or state.utterance is None):
            raise TranscriptFormatError(
                f"speaker {speaker} continues ('+') an utterance they never began",
                source=source, line=number, field="tag",
            )
        if not continuation:
            _check_tag(tag, source, number)
        builder.line(tag, speaker, match.group("text"))
    builder.finish()
    abandoned = builder.abandoned() if builder.marked else set()
    utterances = tuple(
        Utterance(
            speaker=u.speaker,
            words=tuple(u.words),
            function=coarse_function("swbd42", swbd42_class(u.tag)),
            fine_tag=u.tag,
            fine_class=swbd42_class(u.tag),
            complete=u.complete,
            abandoned=k in abandoned,
        )
        for k, u in enumerate(builder.utterances)
    )
    return Conversation(
        id=conversation_id,
        corpus=CORPUS,
        words=tuple(builder.words),
        utterances=utterances,
        labels=builder.labels(abandoned) if builder.marked else None,
        repairs=tuple(builder.repairs) if builder.marked else (),
        unbalanced_brackets=builder.unbalanced,
    )


def _check_tag(tag: str, source: str, line: int) -> None:
    try:
        swbd42_class(tag)
    except InputError as exc:
        raise TranscriptFormatError(str(exc), source=source, line=line, field="tag") from None


def conversation_files(root: Path) -> dict[int, Path]:
    """Map each conversation number in a SwDA folder to its ``.utt`` file.

    Raises
    ------
    CorpusNotFoundError
        When ``root`` is not a folder holding ``sw*utt/sw_*_*.utt`` files.
    """
    if not root.is_dir():
        raise CorpusNotFoundError(f"SwDA folder not found: {root}")
    files: dict[int, Path] = {}
    for path in root.glob("sw*utt/sw_*.utt"):
        match = _FILE_NAME.match(path.name)
        if match is not None:
            files[int(match.group(1))] = path
    if not files:
        raise CorpusNotFoundError(f"no SwDA conversations (sw*utt/sw_*_*.utt) under {root}")
    return files


def split_numbers(root: Path, split: str) -> tuple[int, ...]:
    """Conversation numbers listed in ``root/splits/<split>.txt``, in file order.

    Raises
    ------
    CorpusNotFoundError
        When the split is not a plain name or its file does not exist.
    TranscriptFormatError
        When a line is not a conversation number.
    """
    if not _SPLIT_NAME.fullmatch(split):
        raise CorpusNotFoundError(f"split {split!r} is not a plain name (letters, digits, _ -)")
    path = root / "splits" / f"{split}.txt"
    if not path.is_file():
        raise CorpusNotFoundError(f"split {split!r} not found: no file {path}")
    numbers: list[int] = []
    for number, line in enumerate(path.read_text(encoding="ascii", errors="replace").splitlines(),
                                  start=1):
        entry = line.strip()
        if not entry or entry.startswith("#"):
            continue
        if not entry.isdigit():
            raise TranscriptFormatError(f"expected a conversation number, got {entry!r}",
                                        source=str(path), line=number)
        numbers.append(int(entry))
    return tuple(numbers)


def read_swda(root: Path, *, split: str | None = None) -> Iterator[Conversation]:
    """Read SwDA conversations, one at a time.

    Parameters
    ----------
    root : Path
        The ``swda`` folder (holding ``sw00utt`` ... and ``splits/``).
    split : str or None
        Read only the conversations listed in ``root/splits/<split>.txt`` (blank lines and ``#``
        comments skipped), in that order; ``None`` reads every conversation in the folder, by
        conversation number.

    Returns
    -------
    Iterator[Conversation]
        Read lazily, one file per step. Each has id ``sw<number>``, corpus ``"swda"``,
        speakers ``"A"`` and ``"B"`` and no word times.

    Raises
    ------
    CorpusNotFoundError
        When the folder, the split file or a conversation the split lists is missing (raised by
        the call itself, before iteration).
    TranscriptFormatError
        When a file does not parse (file and line named).
    """
    files = conversation_files(root)
    numbers: Sequence[int] = sorted(files) if split is None else split_numbers(root, split)
    if split is not None:
        missing = [n for n in numbers if n not in files]
        if missing:
            raise CorpusNotFoundError(
                f"split {split!r} lists {len(missing)} conversation(s) not under {root}, "
                f"first sw{missing[0]}"
            )
    # Checked above, before the first conversation is asked for; reading is lazy.
    return (_read_file(files[number], number) for number in numbers)


def _read_file(path: Path, number: int) -> Conversation:
    text = path.read_text(encoding="latin-1")
    return parse_conversation(text, conversation_id=f"sw{number}", source=str(path))
