"""Readers for timed transcripts with segment times: WebVTT captions and NIST STM.

Both give words with a speaker and times, as :class:`~midstream.client._inputs.TimedEvent`
values in arrival order, like the CTM and JSON Lines readers beside them.

**WebVTT** (W3C, *WebVTT: The Web Video Text Tracks Format*). The file starts with ``WEBVTT``;
blocks are separated by blank lines; ``NOTE``, ``STYLE`` and ``REGION`` blocks are skipped; a cue
is an optional identifier line, a timing line ``[hh:]mm:ss.ttt --> [hh:]mm:ss.ttt [settings]``
and its payload lines. The speaker of a word is the voice span it sits in (``<v Name>`` or
``<v.class Name>``, closed by ``</v>`` or the cue's end); words outside every voice span belong
to :data:`NO_VOICE`. Other tags (``<c>``, ``<i>``, ``<b>``, ``<u>``, ``<lang>``, ``<ruby>``,
``<rt>``) are dropped with their markup kept out of the words; the entities ``&amp;``, ``&lt;``,
``&gt;``, ``&nbsp;``, ``&lrm;``, ``&rlm;`` are decoded. Sound descriptions in square brackets or
parentheses (``[laughs]``, ``(music)``), a caption convention, are not words.

A cue's times are those of its text, not of each word: when the payload has no inner timestamps
the cue's words are spread evenly over the cue (word *k* of *n* from ``start + k*d/n`` to
``start + (k+1)*d/n``, ``d`` the cue's duration). Inner timestamps (``<00:00:01.500>``) start a
new stretch: the words after one are spread from it to the next timestamp or the cue's end.
So word times from captions are estimates, and ``docs/formats.md`` says so.

**NIST STM** (segment time marks, the reference format of NIST's scoring tools):
``<file> <channel> <speaker> <begin> <end> [<label>] <transcript>`` a line, ``;;`` starting a
comment. The optional label is one ``<...>`` field. Words are spread over the segment as for a
cue; ``(word)`` (optionally deletable) gives the word, ``{ a / b }`` (alternatives) gives the
first alternative, and a segment whose transcript is ``ignore_time_segment_in_scoring`` gives no
words.

Neither reader sends utterance-end hints: a cue or segment ends where a captioner or scorer
chose, not necessarily where an utterance does; the server segments.

Every malformed line raises :class:`~midstream.TranscriptFormatError` naming the file and the
line (counted from 1). Tokens with no speech content (punctuation, a dash) are dropped here so
the server never refuses them.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from midstream import AddWord, TranscriptFormatError, Word, normalise_token
from midstream.client._inputs import MAX_ID_CHARS, MAX_LINE_CHARS, MAX_WORD_CHARS, TimedEvent

__all__ = ["NO_VOICE", "parse_stm", "parse_webvtt", "recordings_of_stm"]

#: The speaker of caption words outside every ``<v>`` voice span.
NO_VOICE = "unknown"

_TIMESTAMP = r"(?:(\d{2,}):)?([0-5]\d):([0-5]\d)\.(\d{3})"
_TIMING = re.compile(rf"^{_TIMESTAMP}[ \t]+-->[ \t]+{_TIMESTAMP}(?:[ \t].*)?$")
_INNER_TIME = re.compile(rf"^{_TIMESTAMP}$")
_ENTITIES = {"&amp;": "&", "&lt;": "<", "&gt;": ">", "&nbsp;": " ", "&lrm;": "", "&rlm;": ""}
_ENTITY = re.compile(r"&(?:amp|lt|gt|nbsp|lrm|rlm);")
#: A tag, or the text between tags.
_PIECE = re.compile(r"<([^>]*)>|([^<]+)|(<)")
#: Caption sound descriptions: not words.
_SOUND = re.compile(r"\[[^\]]*\]|\([^)]*\)")


def _seconds(groups: tuple[str | None, ...]) -> float:
    hours, minutes, seconds, millis = groups
    return (int(hours or 0) * 3600 + int(minutes or 0) * 60 + int(seconds or 0)
            + int(millis or 0) / 1000)


@dataclass(slots=True)
class _Stretch:
    """Words of one timed stretch of a cue, with their speakers."""

    start: float
    words: list[tuple[str, str]]


def _spread(stretches: list[_Stretch], end: float) -> Iterator[tuple[str, str, float, float]]:
    """``(speaker, text, start, end)`` for each word, spread evenly over its stretch."""
    for position, stretch in enumerate(stretches):
        stop = stretches[position + 1].start if position + 1 < len(stretches) else end
        stop = max(stop, stretch.start)
        n = len(stretch.words)
        step = (stop - stretch.start) / n if n else 0.0
        for k, (speaker, text) in enumerate(stretch.words):
            yield speaker, text, stretch.start + k * step, stretch.start + (k + 1) * step


def _spoken(text: str) -> list[str]:
    """The spoken tokens of caption text (sound descriptions and punctuation dropped)."""
    return [token for token in _SOUND.sub(" ", text).split() if normalise_token(token) is not None]


class _Ids:
    """Word ids ``<speaker>-<n>`` counted per speaker from 1."""

    def __init__(self) -> None:
        self._counts: dict[str, int] = {}

    def next(self, speaker: str) -> str:
        count = self._counts.get(speaker, 0) + 1
        self._counts[speaker] = count
        return f"{speaker}-{count}"


def _check_word(token: str, source: str, line: int) -> str:
    if len(token) > MAX_WORD_CHARS:
        raise TranscriptFormatError(f"a word longer than {MAX_WORD_CHARS} characters",
                                    source=source, line=line)
    return token


def _check_speaker(name: str, source: str, line: int) -> str:
    speaker = "_".join(name.split())
    if not speaker:
        raise TranscriptFormatError("a voice tag <v> without a name", source=source, line=line)
    if len(speaker) > MAX_ID_CHARS:
        raise TranscriptFormatError(f"a speaker name longer than {MAX_ID_CHARS} characters",
                                    source=source, line=line)
    return speaker


def _cue_stretches(payload: list[tuple[int, str]], start: float, end: float,
                   source: str) -> list[_Stretch]:
    """Parse a cue's payload lines into timed stretches of ``(speaker, word)``."""
    stretches = [_Stretch(start=start, words=[])]
    voice = NO_VOICE
    for number, line in payload:
        for match in _PIECE.finditer(line):
            tag, text, stray = match.groups()
            if stray is not None:
                raise TranscriptFormatError("a '<' that opens no tag (write &lt;)",
                                            source=source, line=number)
            if text is not None:
                plain = _ENTITY.sub(lambda m: _ENTITIES[m.group(0)], text)
                stretches[-1].words.extend(
                    (voice, _check_word(token, source, number)) for token in _spoken(plain))
                continue
            assert tag is not None
            timestamp = _INNER_TIME.match(tag)
            if timestamp is not None:
                at = _seconds(timestamp.groups())
                if not start <= at <= end:
                    raise TranscriptFormatError(
                        f"timestamp <{tag}> outside its cue ({start:.3f} to {end:.3f} s)",
                        source=source, line=number)
                stretches.append(_Stretch(start=at, words=[]))
            elif tag == "v" or tag.startswith(("v ", "v\t", "v.")):
                name = tag.split(None, 1)[1] if len(tag.split(None, 1)) == 2 else ""
                voice = _check_speaker(name, source, number)
            elif tag == "/v":
                voice = NO_VOICE
            # Every other tag (class, italics, bold, underline, ruby, language) is style.
    return stretches


def parse_webvtt(text: str, source: str) -> list[TimedEvent]:
    """The words of a WebVTT file as events in arrival order (see the module docstring).

    Raises
    ------
    TranscriptFormatError
        When the file does not start with ``WEBVTT``, a timing line is malformed or ends
        before it starts, a line is too long, or a tag is broken (file and line named).

    Examples
    --------
    >>> events = parse_webvtt("WEBVTT\\n\\n00:01.000 --> 00:02.000\\n<v Ann>so um yes\\n", "x.vtt")
    >>> [(e.event.word.speaker, e.event.word.text, e.event.word.start) for e in events]
    [('Ann', 'so', 1.0), ('Ann', 'um', 1.333), ('Ann', 'yes', 1.667)]
    """
    lines = text.lstrip("\ufeff").splitlines()
    if not lines or not (lines[0] == "WEBVTT" or lines[0].startswith(("WEBVTT ", "WEBVTT\t"))):
        raise TranscriptFormatError("a WebVTT file starts with a line 'WEBVTT'",
                                    source=source, line=1)
    ids = _Ids()
    events: list[TimedEvent] = []
    number = 1
    # Skip the header block (up to the first blank line); a cue there lacks its blank line.
    while number < len(lines) and lines[number].strip():
        if "-->" in lines[number]:
            raise TranscriptFormatError("a blank line must separate the WEBVTT line from the "
                                        "first cue", source=source, line=number + 1)
        number += 1
    while number < len(lines):
        while number < len(lines) and not lines[number].strip():
            number += 1
        if number >= len(lines):
            break
        block: list[tuple[int, str]] = []
        while number < len(lines) and lines[number].strip():
            if len(lines[number]) > MAX_LINE_CHARS:
                raise TranscriptFormatError(f"line longer than {MAX_LINE_CHARS} characters",
                                            source=source, line=number + 1)
            block.append((number + 1, lines[number]))
            number += 1
        first = block[0][1]
        if first.startswith(("NOTE", "STYLE", "REGION")) and "-->" not in first:
            continue
        timing_at = 0 if "-->" in first else 1
        if timing_at >= len(block) or "-->" not in block[timing_at][1]:
            raise TranscriptFormatError(
                "a cue needs a timing line '[hh:]mm:ss.ttt --> [hh:]mm:ss.ttt'",
                source=source, line=block[min(timing_at, len(block) - 1)][0])
        line_number, timing = block[timing_at]
        match = _TIMING.match(timing.strip())
        if match is None:
            raise TranscriptFormatError(
                f"malformed timing line {timing.strip()[:60]!r}; expected "
                "'[hh:]mm:ss.ttt --> [hh:]mm:ss.ttt'", source=source, line=line_number)
        start, end = _seconds(match.groups()[:4]), _seconds(match.groups()[4:])
        if end < start:
            raise TranscriptFormatError(f"the cue ends ({end:.3f} s) before it starts "
                                        f"({start:.3f} s)", source=source, line=line_number)
        stretches = _cue_stretches(block[timing_at + 1:], start, end, source)
        for speaker, word, word_start, word_end in _spread(stretches, end):
            w = Word(text=word, speaker=speaker, start=round(word_start, 3),
                     end=round(word_end, 3))
            events.append(TimedEvent(event=AddWord(word_id=ids.next(speaker), word=w),
                                     time=w.end, line=line_number))
    return _in_time_order(events)


def _in_time_order(events: list[TimedEvent]) -> list[TimedEvent]:
    # Stable: words of one cue keep their order, cues listed out of order are merged.
    return sorted(events, key=lambda e: e.time if e.time is not None else 0.0)


_STM_IGNORE = "ignore_time_segment_in_scoring"


def _stm_words(transcript: str) -> list[str]:
    """Spoken words of an STM transcript: ``(w)`` gives ``w``, ``{ a / b }`` gives ``a``."""
    words: list[str] = []
    skipping = False
    in_alternatives = False
    for token in transcript.split():
        if token == "{":
            in_alternatives, skipping = True, False
            continue
        if in_alternatives and token == "/":
            skipping = True
            continue
        if token == "}":
            in_alternatives = skipping = False
            continue
        if skipping:
            continue
        bare = token[1:-1] if token.startswith("(") and token.endswith(")") else token
        if bare and bare != "@" and normalise_token(bare) is not None:
            words.append(bare)
    return words


def recordings_of_stm(lines: Iterable[str]) -> list[str]:
    """The recording (file) names an STM text holds, in order of first appearance."""
    names: dict[str, None] = {}
    for raw in lines:
        fields = raw.split(None, 1)
        if fields and not raw.lstrip().startswith(";;"):
            names[fields[0]] = None
    return list(names)


def parse_stm(lines: Iterable[str], source: str, *,
              recording: str | None = None) -> list[TimedEvent]:
    """The words of an NIST STM text as events in arrival order.

    Parameters
    ----------
    lines
        The file's lines.
    source
        The file name, for error messages.
    recording
        Read only the segments of this recording (file field); ``None`` requires the text to
        hold one recording.

    Raises
    ------
    TranscriptFormatError
        For a malformed line (too few fields, a time that is not a number or ends before it
        starts, an unclosed label), a second recording when none was picked, or a picked
        recording the text does not hold.

    Examples
    --------
    >>> stm = ["call1 1 ann 0.0 1.0 <o,f0,female> well (uh) yes"]
    >>> [(e.event.word.speaker, e.event.word.text, e.event.word.end) for e in parse_stm(stm, "x")]
    [('ann', 'well', 0.333), ('ann', 'uh', 0.667), ('ann', 'yes', 1.0)]
    """
    ids = _Ids()
    events: list[TimedEvent] = []
    first: str | None = None
    seen: set[str] = set()
    for number, raw in enumerate(lines, start=1):
        if len(raw) > MAX_LINE_CHARS:
            raise TranscriptFormatError(f"line longer than {MAX_LINE_CHARS} characters",
                                        source=source, line=number)
        stripped = raw.strip()
        if not stripped or stripped.startswith(";;"):
            continue
        fields = stripped.split(None, 5)
        if len(fields) < 5:
            raise TranscriptFormatError(
                f"expected 'file channel speaker begin end [<label>] transcript', got "
                f"{len(fields)} field(s)", source=source, line=number)
        name, _channel, speaker, begin_text, end_text = fields[:5]
        rest = fields[5] if len(fields) == 6 else ""
        seen.add(name)
        if recording is not None and name != recording:
            continue
        if recording is None:
            if first is None:
                first = name
            elif name != first:
                raise TranscriptFormatError(
                    f"a second recording {name!r} after {first!r}; pick one with "
                    "--recording NAME", source=source, line=number, field="file")
        times = []
        for label, value in (("begin", begin_text), ("end", end_text)):
            try:
                seconds = float(value)
            except ValueError:
                raise TranscriptFormatError(f"not a number: {value!r}", source=source,
                                            line=number, field=label) from None
            if not 0.0 <= seconds < float("inf"):
                raise TranscriptFormatError(f"must be a time of at least 0, got {value!r}",
                                            source=source, line=number, field=label)
            times.append(seconds)
        begin, end = times
        if end < begin:
            raise TranscriptFormatError(f"ends ({end:g}) before it begins ({begin:g})",
                                        source=source, line=number, field="end")
        if rest.startswith("<"):
            close = rest.find(">")
            if close < 0:
                raise TranscriptFormatError("a label '<...' without its '>'", source=source,
                                            line=number, field="label")
            rest = rest[close + 1:]
        if rest.strip() == _STM_IGNORE:
            continue
        who = _check_speaker(speaker, source, number)
        words = [_check_word(w, source, number) for w in _stm_words(rest)]
        stretch = _Stretch(start=begin, words=[(who, w) for w in words])
        for _, word, word_start, word_end in _spread([stretch], end):
            w = Word(text=word, speaker=who, start=round(word_start, 3), end=round(word_end, 3))
            events.append(TimedEvent(event=AddWord(word_id=ids.next(who), word=w),
                                     time=w.end, line=number))
    if recording is not None and recording not in seen:
        held = ", ".join(sorted(seen)) or "none"
        raise TranscriptFormatError(f"no recording {recording!r}; it holds: {held}",
                                    source=source)
    return _in_time_order(events)
