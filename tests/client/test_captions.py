"""WebVTT, NIST STM and several-recording CTM input (issue 28, item 3).

The formats as their owners define them: WebVTT by the W3C (*WebVTT: The Web Video Text Tracks
Format*: the ``WEBVTT`` signature, ``-->`` timing lines, ``<v>`` voice spans, inner timestamps),
STM and CTM by NIST's scoring tools (SCTK documentation: ``file channel speaker begin end
[<label>] transcript`` and ``file channel begin duration word [confidence]``). The examples are
invented.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import TranscriptFormatError
from midstream.client import AddWord
from midstream.client._captions import NO_VOICE, parse_stm, parse_webvtt
from midstream.client._inputs import TimedEvent, parse_ctm, read_events, sort_by_time

TWO_VOICES = """WEBVTT - an invented call

NOTE two voices, one cue with inner timestamps

1
00:00:00.000 --> 00:00:02.000 align:start
<v Ann>I want to, uh, I need to book a repair.</v>

00:00:02.500 --> 00:00:04.000
<v.agent Bo Lee>Sure &amp; <00:00:03.000>what is <i>wrong</i> [typing] with it?
"""


def _words(events: list[TimedEvent]) -> list[tuple[str, str, float | None, float | None]]:
    out = []
    for e in events:
        assert isinstance(e.event, AddWord)
        w = e.event.word
        out.append((w.speaker, w.text, w.start, w.end))
    return out


def test_webvtt_voices_are_speakers_and_words_spread_over_their_cue() -> None:
    words = _words(parse_webvtt(TWO_VOICES, "call.vtt"))
    spoken = "I want to, uh, I need to book a repair. Sure what is wrong with it?"
    assert [w[1] for w in words] == spoken.split()
    assert {w[0] for w in words[:10]} == {"Ann"} and {w[0] for w in words[10:]} == {"Bo_Lee"}
    # Ten words over two seconds: 0.2 s each.
    assert words[0][2:] == (0.0, 0.2) and words[9][2:] == (1.8, 2.0)
    # The inner timestamp starts a stretch: "Sure" fills 2.5-3.0, the rest 3.0-4.0.
    assert words[10][2:] == (2.5, 3.0) and words[11][2] == 3.0 and words[-1][3] == 4.0


def test_webvtt_errors_name_the_file_and_line() -> None:
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:1: a WebVTT file starts with"):
        parse_webvtt("00:01.000 --> 00:02.000\nhi\n", "x.vtt")
    bad_timing = "WEBVTT\n\n1\n00:01.000 -> 00:02.000\nhi\n"
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:4: a cue needs a timing line"):
        parse_webvtt(bad_timing, "x.vtt")
    backwards = "WEBVTT\n\n00:03.000 --> 00:02.000\nhi\n"
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:3: the cue ends"):
        parse_webvtt(backwards, "x.vtt")
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:4: .*outside its cue"):
        parse_webvtt("WEBVTT\n\n00:01.000 --> 00:02.000\nhi <00:05.000> there\n", "x.vtt")
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:2: a blank line must separate"):
        parse_webvtt("WEBVTT\n00:01.000 --> 00:02.000\nhi\n", "x.vtt")
    with pytest.raises(TranscriptFormatError, match=r"^x\.vtt:5: a '<' that opens no tag"):
        parse_webvtt("WEBVTT\n\n00:01.000 --> 00:02.000\nhi\n<v Ann oops\n", "x.vtt")


def test_stm_segments_labels_and_ignored_segments() -> None:
    stm = [";; an invented call",
           "call1 1 ann 0.0 1.0 <o,f0,female> well (uh) yes",
           "call1 2 bo 1.0 2.0 { yeah / yes } okay",
           "call1 2 bo 2.0 3.0 ignore_time_segment_in_scoring"]
    words = _words(parse_stm(stm, "a.stm"))
    assert [(w[0], w[1]) for w in words] == [("ann", "well"), ("ann", "uh"), ("ann", "yes"),
                                              ("bo", "yeah"), ("bo", "okay")]
    assert words[3][2:] == (1.0, 1.5)


def test_stm_errors_name_the_file_line_and_field() -> None:
    with pytest.raises(TranscriptFormatError, match=r"^a\.stm:1: expected 'file channel"):
        parse_stm(["call1 1 ann 0.0"], "a.stm")
    with pytest.raises(TranscriptFormatError, match=r"^a\.stm:2: field 'end': not a number"):
        parse_stm(["call1 1 ann 0.0 1.0 hi", "call1 1 ann 1.0 soon hi"], "a.stm")
    with pytest.raises(TranscriptFormatError, match=r"^a\.stm:1: field 'label'"):
        parse_stm(["call1 1 ann 0.0 1.0 <o,f0 hi"], "a.stm")
    with pytest.raises(TranscriptFormatError, match=r"^a\.stm:2: field 'file': a second "
                                                    r"recording 'call2'.*--recording NAME"):
        parse_stm(["call1 1 ann 0.0 1.0 hi", "call2 1 ann 0.0 1.0 hi"], "a.stm")
    assert [w[1] for w in _words(parse_stm(
        ["call1 1 ann 0.0 1.0 hi", "call2 1 ann 0.0 1.0 bye"], "a.stm", recording="call2"))] \
        == ["bye"]
    with pytest.raises(TranscriptFormatError, match=r"no recording 'call3'; it holds: call1"):
        parse_stm(["call1 1 ann 0.0 1.0 hi"], "a.stm", recording="call3")


def test_a_ctm_of_several_recordings_is_read_one_recording_at_a_time(tmp_path: Path) -> None:
    lines = ["r1 A 0.0 0.2 hello", "r2 A 0.0 0.2 other", "r1 B 0.3 0.2 hi", "r2 B 0.3 0.2 there"]
    with pytest.raises(TranscriptFormatError,
                       match=r"^x\.ctm:2: field 'file': a second recording 'r2' after 'r1'; "
                             r"pick one with --recording NAME"):
        list(parse_ctm(lines, "x.ctm"))
    assert [w[1] for w in _words(list(parse_ctm(lines, "x.ctm", recording="r2")))] == \
        ["other", "there"]
    with pytest.raises(TranscriptFormatError, match=r"no recording 'r9'; it holds: r1, r2"):
        list(parse_ctm(lines, "x.ctm", recording="r9"))
    path = tmp_path / "calls.ctm"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert [w[1] for w in _words(read_events(path, recording="r1"))] == ["hello", "hi"]
    vtt = tmp_path / "call.vtt"
    vtt.write_text(TWO_VOICES, encoding="utf-8")
    assert len(read_events(vtt)) == 16
    with pytest.raises(TranscriptFormatError, match="--recording applies to CTM and STM"):
        read_events(vtt, recording="r1")


# --- properties -------------------------------------------------------------------------------

_WORD = st.text(alphabet="abcdefghij", min_size=1, max_size=6)
_VOICE = st.sampled_from(["Ann", "Bo", "Cy Dee"])


def _stamp(seconds: float) -> str:
    millis = round(seconds * 1000)
    hours, rest = divmod(millis, 3_600_000)
    minutes, rest = divmod(rest, 60_000)
    return f"{hours:02d}:{minutes:02d}:{rest // 1000:02d}.{rest % 1000:03d}"


_CUE = st.tuples(st.integers(0, 5000), st.integers(0, 3000), _VOICE,
                 st.lists(_WORD, min_size=1, max_size=8))


@settings(max_examples=60, deadline=None)
@given(st.lists(_CUE, max_size=6))
def test_webvtt_gives_every_cue_word_once_within_its_cue(
        cues: list[tuple[int, int, str, list[str]]]) -> None:
    # Cue start in ms, duration in ms, voice, words; cues in start order as the format wants.
    cues = sorted(cues, key=lambda c: c[0])
    blocks = ["WEBVTT", ""]
    for index, (start, duration, voice, words) in enumerate(cues):
        blocks += [f"cue-{index}", f"{_stamp(start / 1000)} --> "
                   f"{_stamp((start + duration) / 1000)}", f"<v {voice}>{' '.join(words)}", ""]
    got = _words(parse_webvtt("\n".join(blocks), "p.vtt"))
    expected = sorted(((voice.replace(" ", "_"), word, start, duration)
                       for start, duration, voice, words in cues for word in words),
                      key=lambda item: item[2])
    assert sorted((w[0], w[1]) for w in got) == sorted((e[0], e[1]) for e in expected)
    ends = [w[3] or 0.0 for w in got]
    assert ends == sorted(ends)  # arrival order
    for speaker, _, begin, finish in got:
        assert begin is not None and finish is not None and begin <= finish
        assert any(speaker == v.replace(" ", "_") and s / 1000 - 1e-3 <= begin
                   and finish <= (s + d) / 1000 + 1e-3 for s, d, v, _ in cues)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["r1", "r2"]), st.sampled_from(["ann", "bo"]),
                          st.integers(0, 5000), st.integers(0, 2000),
                          st.lists(_WORD, min_size=1, max_size=5)), max_size=8))
def test_stm_gives_the_picked_recordings_words(
        segments: list[tuple[str, str, int, int, list[str]]]) -> None:
    lines = [f"{r} 1 {who} {b / 1000:.3f} {(b + d) / 1000:.3f} {' '.join(words)}"
             for r, who, b, d, words in segments]
    got = _words(parse_stm(lines, "p.stm", recording="r1")) \
        if any(s[0] == "r1" for s in segments) else []
    wanted = [(who, w) for r, who, _, _, words in segments if r == "r1" for w in words]
    assert sorted((w[0], w[1]) for w in got) == sorted(wanted)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.text(alphabet=st.characters(codec="utf-8", exclude_characters="\r\n\x0b\x0c"
                                                "\x1c\x1d\x1e\x85\u2028\u2029"), max_size=40),
                max_size=8))
def test_any_text_is_read_or_refused_with_a_format_error(lines: list[str]) -> None:
    parsers: tuple[Callable[[], list[TimedEvent]], ...] = (
        lambda: parse_webvtt("\n".join(["WEBVTT", "", *lines]), "g.vtt"),
        lambda: parse_stm(lines, "g.stm"),
        lambda: sort_by_time(parse_ctm(lines, "g.ctm")))
    for parse in parsers:
        try:
            events = parse()
        except TranscriptFormatError as exc:
            assert str(exc).startswith(("g.vtt", "g.stm", "g.ctm"))
            continue
        for event in events:
            assert isinstance(event.event, AddWord)
            assert event.event.word.text.strip() and event.event.word.speaker


def test_words_outside_a_voice_span_have_the_no_voice_speaker() -> None:
    words = _words(parse_webvtt("WEBVTT\n\n00:00.000 --> 00:01.000\nhello <v Ann>there</v> you\n",
                                "n.vtt"))
    assert [(w[0], w[1]) for w in words] == [(NO_VOICE, "hello"), ("Ann", "there"),
                                              (NO_VOICE, "you")]


def test_docstring_examples_run() -> None:
    import doctest  # noqa: PLC0415

    import midstream.client._captions as module  # noqa: PLC0415

    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0
