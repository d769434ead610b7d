"""Transcripts in the trade's inline disfluency markup, one utterance a line (``docs/formats.md``).

People who annotate disfluencies write them inline, in the bracket conventions of the
Switchboard annotation manual (Meteer et al. 1995): ``{F uh}`` filled pause, ``{E I mean}``
editing term, ``{D well}`` discourse marker, ``[ the + the ]`` reparandum, interruption point and
repair, ``[ we went + ]`` restart, ``/`` and ``-/`` the end of a complete and an incomplete
utterance. This module reads and writes them in a line format of Midstream's own (``.inline``)::

    @format midstream-inline 1
    # comments start with '#'
    @conversation call-7
    A statement: {F uh} I want to [ the + {F um} the ] meeting moved /
    B question/qy: is it {D well} tomorrow -/
    A +: or today /

A line is ``<speaker> <act>: <text>``. The act is a coarse utterance function (``statement``,
``question``, ``answer``, ``agreement``, ``acknowledgement``, ``clarification_request``,
``other``), optionally followed by ``/`` and a fine class of your scheme (``question/qy``); an act
of ``+`` continues the speaker's previous utterance after the other speaker broke in.
``@conversation <id> unannotated`` marks a conversation whose words carry no disfluency layer.

The markup is parsed by the SwDA reader's own parser (:class:`midstream.corpora._swda._Builder`),
so both readers resolve it the same way (label precedence, interregnum, repair onset). Unlike the
corpus reader, this one is strict: markup that does not balance (a ``]`` with nothing open, a
``[`` without its ``+``, a ``[`` still open when its utterance ends) is an error naming the line,
since a hand-written transcript can be fixed where a published corpus cannot.

:func:`write_inline` writes a :class:`~midstream.Conversation` back in the same format, so a
tagged conversation (``midstream export LOG --format inline``) becomes a pre-annotated transcript
to correct by hand and train on.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO

from midstream import (
    Conversation,
    DisfluencyLabel,
    InputError,
    Repair,
    TranscriptFormatError,
    Utterance,
    UtteranceFunction,
    normalise_token,
)
from midstream.corpora._restarts import abandoned_utterances
from midstream.corpora._swda import _TOKEN, _Builder

FORMAT_LINE = "@format midstream-inline 1"
#: Corpus name of conversations read from this format.
CORPUS = "inline"
#: File name ending :func:`midstream.corpora.read_corpus` recognises.
SUFFIX = ".inline"
#: Longest accepted line (characters).
MAX_LINE_CHARS = 100_000

_FUNCTIONS = {function.value: function for function in UtteranceFunction}
_LINE = re.compile(r"^(?P<speaker>[^\s:#@]+)\s+(?P<act>[^\s:]+)\s*:(?P<text>.*)$")
_ID = re.compile(r"^[^\s]{1,256}$")
_BRACES = {
    DisfluencyLabel.FILLER: "{F",
    DisfluencyLabel.EDIT_TERM: "{E",
    DisfluencyLabel.DISCOURSE_MARKER: "{D",
}


@dataclass(slots=True)
class _Pending:
    id: str
    line: int
    annotated: bool
    builder: _Builder = field(default_factory=_Builder)
    acts: list[tuple[UtteranceFunction, str]] = field(default_factory=list)
    #: Per speaker, the line where their outermost open '[' was written.
    opened: dict[str, int] = field(default_factory=dict)


def _error(message: str, source: str, line: int, field: str | None = None) -> TranscriptFormatError:
    return TranscriptFormatError(message, source=source, line=line, field=field)


def _act(text: str, source: str, line: int) -> tuple[UtteranceFunction, str]:
    name, slash, fine = text.partition("/")
    function = _FUNCTIONS.get(name)
    if function is None:
        raise _error(f"unknown utterance function {name!r}; one of "
                     f"{', '.join(_FUNCTIONS)} (or '+' to continue)", source, line, "act")
    if slash and not fine:
        raise _error("a '/' after the function needs a fine class after it", source, line,
                     "act")
    return function, fine


def _finish(pending: _Pending, source: str, last_line: int) -> Conversation:
    builder = pending.builder
    before = builder.unbalanced
    builder.finish()
    if builder.unbalanced != before:
        line = min(pending.opened.values(), default=last_line)
        raise _error(f"conversation {pending.id!r}: this '[' is still open at its end",
                     source, line)
    units = builder.utterances
    # The same rule as the corpus reader: a '-/' unit after which its speaker starts afresh.
    abandoned = abandoned_utterances(
        builder.words, [u.words for u in units], [function for function, _ in pending.acts],
        [k for k, u in enumerate(units) if not u.complete and not u.dash_end],
        continued={k for k, u in enumerate(units) if u.dash_start},
    ) if pending.annotated else set()
    utterances = tuple(
        Utterance(speaker=u.speaker, words=tuple(u.words), function=function, fine_tag=fine,
                  fine_class=fine, complete=u.complete, abandoned=k in abandoned)
        for k, (u, (function, fine)) in enumerate(zip(units, pending.acts, strict=True)))
    return Conversation(
        id=pending.id, corpus=CORPUS, words=tuple(builder.words), utterances=utterances,
        labels=builder.labels(abandoned) if pending.annotated else None,
        repairs=tuple(builder.repairs) if pending.annotated else ())


def parse_inline(lines: Iterable[str], source: str) -> Iterator[Conversation]:
    """Yield the conversations of inline-markup text, one at a time (see the module docstring).

    Raises
    ------
    TranscriptFormatError
        Naming the file and line: a missing or unknown ``@format`` line, a line before the first
        ``@conversation``, a repeated conversation id, a line that is not ``<speaker> <act>:
        <text>``, an unknown function, a continuation with nothing to continue, or markup that
        does not balance.

    Examples
    --------
    >>> text = ["@format midstream-inline 1", "@conversation c1",
    ...         "A statement: {F uh} I want [ the + the ] tea /"]
    >>> conversation = next(parse_inline(text, "x.inline"))
    >>> [(w.text, label.value) for w, label in zip(conversation.words, conversation.labels)]
    ... # doctest: +NORMALIZE_WHITESPACE
    [('uh', 'filler'), ('i', 'fluent'), ('want', 'fluent'), ('the', 'reparandum'),
     ('the', 'repair'), ('tea', 'fluent')]
    """
    header = False
    pending: _Pending | None = None
    seen: set[str] = set()
    number = 0
    for number, raw in enumerate(lines, start=1):
        if len(raw) > MAX_LINE_CHARS:
            raise _error(f"line longer than {MAX_LINE_CHARS} characters", source, number)
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if not header:
            if line.split() != FORMAT_LINE.split():
                raise _error(f"the first line must be '{FORMAT_LINE}'", source, number)
            header = True
            continue
        if line.startswith("@"):
            fields = line.split()
            if fields[0] != "@conversation" or len(fields) not in (2, 3) or (
                    len(fields) == 3 and fields[2] != "unannotated"):
                raise _error("expected '@conversation <id>' or '@conversation <id> unannotated'",
                             source, number)
            if fields[1] in seen or not _ID.match(fields[1]):
                raise _error(f"conversation id {fields[1]!r} used twice or too long", source,
                             number)
            if pending is not None:
                yield _finish(pending, source, number)
            seen.add(fields[1])
            pending = _Pending(id=fields[1], line=number, annotated=len(fields) == 2)
            continue
        if pending is None:
            raise _error("an utterance line before the first '@conversation <id>'", source,
                         number)
        match = _LINE.match(line)
        if match is None:
            raise _error("expected '<speaker> <act>: <text>'", source, number)
        speaker, act, text = match.group("speaker", "act", "text")
        builder = pending.builder
        if act == "+":
            state = builder.speakers.get(speaker)
            if state is None or state.utterance is None:
                raise _error(f"speaker {speaker} continues ('+') an utterance they never began",
                             source, number, "act")
        else:
            pending.acts.append(_act(act, source, number))
        before = builder.unbalanced
        builder.line(act, speaker, text)
        if builder.unbalanced != before:
            opened = pending.opened.get(speaker)
            if opened is not None and opened < number:
                raise _error(f"speaker {speaker}'s '[' is still open when their utterance "
                             f"ends on line {number}", source, opened)
            raise _error("unbalanced markup: a ']' with nothing open, a '[ ... ]' without '+', "
                         "or a '[' still open when its utterance ends", source, number)
        if builder.speakers[speaker].frames:
            pending.opened.setdefault(speaker, number)
        else:
            pending.opened.pop(speaker, None)
    if not header:
        raise _error(f"empty: the first line must be '{FORMAT_LINE}'", source, max(number, 1))
    if pending is not None:
        yield _finish(pending, source, number)


def read_inline(path: Path) -> Iterator[Conversation]:
    """Read an ``.inline`` file (see :func:`parse_inline`).

    Raises
    ------
    TranscriptFormatError
        For a missing or undecodable file, or any malformed line.
    """
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TranscriptFormatError("no such file", source=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise TranscriptFormatError(f"cannot read: {exc}", source=str(path)) from None
    return parse_inline(text.splitlines(), str(path))


# --- writing -----------------------------------------------------------------------------------


def _check_word(text: str, fragment: bool, conversation: str, index: int) -> str:
    token = text + "-" if fragment else text
    normal = normalise_token(token)
    if normal is None or normal.text != text or _TOKEN.findall(token) != [token]:
        raise InputError(f"conversation {conversation!r}, word {index} ({text!r}): not a "
                         "recogniser-like word (lower case, no markup or punctuation); it "
                         "cannot be written in inline markup")
    return token


@dataclass(slots=True)
class _Bracket:
    repair: Repair
    plus_after: int
    close_after: int
    plus: bool = False


class _UtteranceWriter:
    """Writes one utterance's words with braces and brackets, across its continuation lines.

    Brackets nest in the written text as a stack: a bracket closes once it has its ``+`` and
    its repair onset has been written, and only when every bracket opened inside it has closed.
    Words are written in index order, so a word index is its position.
    """

    def __init__(self, conversation: Conversation, repairs: list[Repair]) -> None:
        self.conversation = conversation
        self.stack: list[_Bracket] = []
        self.opening: dict[int, list[_Bracket]] = {}
        for repair in repairs:
            plus = repair.reparandum[-1]
            close = repair.repair_onset if repair.repair_onset is not None else plus
            self.opening.setdefault(repair.reparandum[0], []).append(
                _Bracket(repair=repair, plus_after=plus, close_after=close))
        for brackets in self.opening.values():
            # Outermost first: the bracket that closes (then has its "+") last opens first.
            brackets.sort(key=lambda b: (b.close_after, b.plus_after), reverse=True)

    def segment(self, indices: list[int]) -> list[str]:
        tokens: list[str] = []
        brace: DisfluencyLabel | None = None
        labels = self.conversation.labels
        for index in indices:
            opens = self.opening.get(index, [])
            label = labels[index] if labels is not None else DisfluencyLabel.FLUENT
            wanted = label if label in _BRACES else None
            if brace is not None and (opens or wanted is not brace):
                tokens.append("}")
                brace = None
            for bracket in opens:
                tokens.append("[")
                self.stack.append(bracket)
            if wanted is not None and brace is None:
                tokens.append(_BRACES[wanted])
                brace = wanted
            word = self.conversation.words[index]
            tokens.append(_check_word(word.text, word.fragment, self.conversation.id, index))
            marks = self._after(index)
            if marks and brace is not None:
                tokens.append("}")
                brace = None
            tokens.extend(marks)
        if brace is not None:
            tokens.append("}")
        return tokens

    def _after(self, index: int) -> list[str]:
        marks: list[str] = []
        while self.stack:
            top = self.stack[-1]
            if not top.plus and top.plus_after <= index:
                marks.append("+")
                top.plus = True
            elif top.plus and top.close_after <= index:
                marks.append("]")
                self.stack.pop()
            else:
                break
        return marks

    def close(self) -> list[str]:
        marks: list[str] = []
        while self.stack:
            if not self.stack.pop().plus:
                marks.append("+")
            marks.append("]")
        return marks


def _repairs_by_utterance(conversation: Conversation,
                          utterance_of: dict[int, int]) -> dict[int, list[Repair]]:
    by_utterance: dict[int, list[Repair]] = {}
    for repair in conversation.repairs:
        words = [*repair.reparandum, *repair.interregnum]
        if repair.repair_onset is not None:
            words.append(repair.repair_onset)
        owners = {utterance_of.get(i) for i in words}
        if len(owners) != 1 or None in owners:
            raise InputError(f"conversation {conversation.id!r}: a repair over words "
                             f"{words} crosses utterances; inline markup cannot say so")
        owner = owners.pop()
        assert owner is not None
        by_utterance.setdefault(owner, []).append(repair)
    return by_utterance


def format_inline(conversation: Conversation) -> list[str]:
    """The lines of one conversation in inline markup (no ``@format`` line).

    Raises
    ------
    InputError
        When the conversation cannot be written: a word that is not recogniser-like text, a
        speaker name with white space or ``:``, a word in no utterance or in two, a repair that
        crosses utterances, or an utterance interrupted by another of the same speaker.
    """
    if not _ID.match(conversation.id):
        raise InputError(f"conversation id {conversation.id!r} is empty, too long or has "
                         "white space")
    utterance_of: dict[int, int] = {}
    for number, utterance in enumerate(conversation.utterances):
        if not re.fullmatch(r"[^\s:#@]+", utterance.speaker):
            raise InputError(f"conversation {conversation.id!r}: speaker "
                             f"{utterance.speaker!r} has white space, ':', '#' or '@'")
        for index in utterance.words:
            if index in utterance_of or not 0 <= index < len(conversation.words):
                raise InputError(f"conversation {conversation.id!r}: word {index} is in two "
                                 "utterances or out of range")
            utterance_of[index] = number
    missing = [i for i in range(len(conversation.words)) if i not in utterance_of]
    if missing:
        raise InputError(f"conversation {conversation.id!r}: word {missing[0]} is in no "
                         "utterance; inline markup writes words only inside utterances")
    repairs = _repairs_by_utterance(conversation, utterance_of)
    writers: dict[int, _UtteranceWriter] = {}
    last_started: dict[str, int] = {}
    remaining = {n: len(u.words) for n, u in enumerate(conversation.utterances)}
    lines = [f"@conversation {conversation.id}"
             + ("" if conversation.disfluency_annotated else " unannotated")]
    # Utterances without words are written before the next utterance in the list.
    empty_before: dict[int, list[int]] = {}
    for number, utterance in enumerate(conversation.utterances):
        if not utterance.words:
            following = next((n for n in range(number + 1, len(conversation.utterances))
                              if conversation.utterances[n].words), -1)
            empty_before.setdefault(following, []).append(number)

    def head(number: int) -> str:
        utterance = conversation.utterances[number]
        fine = f"/{utterance.fine_class}" if utterance.fine_class else ""
        if fine and not re.fullmatch(r"/[^\s:/]+", fine):
            raise InputError(f"conversation {conversation.id!r}: fine class "
                             f"{utterance.fine_class!r} has white space, ':' or '/'")
        return f"{utterance.speaker} {utterance.function.value}{fine}:"

    def ending(number: int) -> str:
        return "/" if conversation.utterances[number].complete else "-/"

    index = 0
    while index < len(conversation.words):
        number = utterance_of[index]
        run = [index]
        while index + len(run) < len(conversation.words) and \
                utterance_of[index + len(run)] == number:
            run.append(index + len(run))
        index += len(run)
        utterance = conversation.utterances[number]
        for empty in empty_before.pop(number, []):
            lines.append(f"{head(empty)} {ending(empty)}")
            last_started[conversation.utterances[empty].speaker] = empty
        writer = writers.get(number)
        if writer is None:
            writer = writers[number] = _UtteranceWriter(conversation, repairs.get(number, []))
            start = head(number)
            last_started[utterance.speaker] = number
        elif last_started.get(utterance.speaker) != number:
            raise InputError(f"conversation {conversation.id!r}: speaker {utterance.speaker}'s "
                             f"utterance {number} resumes after another of theirs began")
        else:
            start = f"{utterance.speaker} +:"
        tokens = writer.segment(run)
        remaining[number] -= len(run)
        if remaining[number] == 0:
            tokens.extend(writer.close())
            tokens.append(ending(number))
        lines.append(f"{start} {' '.join(tokens)}")
    for empty in empty_before.pop(-1, []):
        lines.append(f"{head(empty)} {ending(empty)}")
    return lines


def write_inline(conversations: Iterable[Conversation], stream: IO[str]) -> int:
    """Write conversations in inline markup (header line first); returns how many.

    Raises
    ------
    InputError
        As :func:`format_inline`, or for a conversation id used twice.
    """
    stream.write(FORMAT_LINE + "\n")
    seen: set[str] = set()
    count = 0
    for conversation in conversations:
        if conversation.id in seen:
            raise InputError(f"conversation id {conversation.id!r} used twice")
        seen.add(conversation.id)
        stream.write("\n".join(format_inline(conversation)) + "\n")
        count += 1
    return count
