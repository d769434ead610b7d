"""Transcripts in inline disfluency markup (issue 28, item 5).

The markup is the Switchboard annotation manual's (Meteer et al. 1995: ``{F}`` filled pause,
``{E}`` editing term, ``{D}`` discourse marker, ``[ reparandum + repair ]``, ``[ restart + ]``,
``/`` and ``-/``); the roles it gives are Shriberg's (1994) reparandum, interregnum and repair
onset. The transcripts here are invented.
"""

from __future__ import annotations

import io

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
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
from midstream.corpora import write_inline
from midstream.corpora._inline import format_inline, parse_inline

_L = DisfluencyLabel

#: An invented help-desk call, written as an annotator would.
CALL = """\
@format midstream-inline 1
# an invented help-desk call
@conversation desk-1
A question: {F uh} can you [ reset + {F um} reset ] my password /
B answer: {D well} i can [ send + {E i mean} send ] you a link /
A acknowledgement: okay /
B question: what [ is + is ] your {F uh} user name /
A answer: [ it is + ] {F um} it is kim at home -/
B agreement: right /
"""


def _read(text: str) -> list[Conversation]:
    return list(parse_inline(text.splitlines(), "call.inline"))


def test_markup_gives_shribergs_roles_and_the_act_of_each_line() -> None:
    (conversation,) = _read(CALL)
    assert conversation.id == "desk-1" and conversation.corpus == "inline"
    labelled = [(w.text, label) for w, label in zip(conversation.words, conversation.labels or (),
                                                     strict=True)]
    assert labelled[:8] == [("uh", _L.FILLER), ("can", _L.FLUENT), ("you", _L.FLUENT),
                            ("reset", _L.REPARANDUM), ("um", _L.FILLER), ("reset", _L.REPAIR),
                            ("my", _L.FLUENT), ("password", _L.FLUENT)]
    assert conversation.repairs[0] == Repair(reparandum=(3,), interregnum=(4,), repair_onset=5)
    restart = next(r for r in conversation.repairs if r.is_restart)
    assert [conversation.words[i].text for i in restart.reparandum] == ["it", "is"]
    assert [u.function for u in conversation.utterances] == [
        UtteranceFunction.QUESTION, UtteranceFunction.ANSWER, UtteranceFunction.ACKNOWLEDGEMENT,
        UtteranceFunction.QUESTION, UtteranceFunction.ANSWER, UtteranceFunction.AGREEMENT]
    assert [u.complete for u in conversation.utterances] == [True] * 4 + [False, True]


@pytest.mark.parametrize(("line", "message"), [
    ("A statement: [ the + the /", r"call\.inline:3: unbalanced markup"),
    ("A statement: the ] the /", r"call\.inline:3: unbalanced markup"),
    ("A statement: [ the the ] /", r"call\.inline:3: unbalanced markup"),
    ("A musing: hm /", r"call\.inline:3: field 'act': unknown utterance function 'musing'"),
    ("A +: and then /", r"call\.inline:3: field 'act': speaker A continues"),
    ("just words", r"call\.inline:3: expected '<speaker> <act>: <text>'"),
])
def test_a_malformed_line_is_named(line: str, message: str) -> None:
    with pytest.raises(TranscriptFormatError, match=message):
        _read(f"@format midstream-inline 1\n@conversation c\n{line}\n")


def test_a_bracket_left_open_is_named_where_it_was_opened() -> None:
    with pytest.raises(TranscriptFormatError, match=r"call\.inline:3: speaker A's '\[' is still "
                                                    r"open when their utterance ends on line 5"):
        _read("@format midstream-inline 1\n@conversation c\nA statement: [ the + the\n"
              "B other: hm /\nA statement: so /\n")
    with pytest.raises(TranscriptFormatError, match=r"call\.inline:3: conversation 'c': this"):
        _read("@format midstream-inline 1\n@conversation c\nA statement: [ the + the\n")


def test_the_header_and_conversation_lines_are_required() -> None:
    with pytest.raises(TranscriptFormatError, match=r"call\.inline:1: the first line must be"):
        _read("@conversation c\nA statement: hi /\n")
    with pytest.raises(TranscriptFormatError, match=r"call\.inline:2: an utterance line before"):
        _read("@format midstream-inline 1\nA statement: hi /\n")
    with pytest.raises(TranscriptFormatError, match=r"call\.inline:4: conversation id 'c' used"):
        _read("@format midstream-inline 1\n@conversation c\nA other: hi /\n@conversation c\n")


def test_the_writer_gives_back_what_it_was_given() -> None:
    (conversation,) = _read(CALL)
    stream = io.StringIO()
    write_inline([conversation], stream)
    assert list(parse_inline(stream.getvalue().splitlines(), "again")) == [conversation]


def test_the_writer_refuses_what_the_markup_cannot_say() -> None:
    word = Word(text="Hello", speaker="A")
    conversation = Conversation(id="c", corpus="x", words=(word,), utterances=(Utterance(
        speaker="A", words=(0,), function=UtteranceFunction.OTHER, fine_tag="",
        fine_class=""),), labels=(_L.FLUENT,))
    with pytest.raises(InputError, match="cannot be written in inline markup"):
        format_inline(conversation)


# --- property: write then read gives the same conversation -------------------------------------

_TEXT = st.sampled_from(["the", "we", "went", "to", "see", "it", "a", "b"])
_FRAGMENT = st.booleans()


@st.composite
def _utterance_spans(draw: st.DrawFn) -> tuple[list[tuple[str, str]], list[Repair], list[int]]:
    """Tokens ``(text, brace)`` of one utterance with non-crossing repairs (word offsets)."""
    tokens: list[tuple[str, str]] = []
    repairs: list[Repair] = []
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["fluent", "filler", "edit", "repair", "restart"]))
        if kind == "fluent":
            tokens.append((draw(_TEXT), ""))
        elif kind == "filler":
            tokens.append((draw(st.sampled_from(["uh", "um"])), "F"))
        elif kind == "edit":
            tokens.append(("sorry", "E"))
        else:
            start = len(tokens)
            span = draw(st.lists(_TEXT, min_size=1, max_size=3))
            tokens += [(t, "") for t in span]
            reparandum = tuple(range(start, start + len(span)))
            if kind == "restart":
                repairs.append(Repair(reparandum=reparandum))
            else:
                interregnum: tuple[int, ...] = ()
                if draw(st.booleans()):
                    tokens.append(("uh", "F"))
                    interregnum = (len(tokens) - 1,)
                tokens.append((draw(_TEXT), ""))
                repairs.append(Repair(reparandum=reparandum, interregnum=interregnum,
                                      repair_onset=len(tokens) - 1))
    return tokens, repairs, []


def _markup(tokens: list[tuple[str, str]], repairs: list[Repair]) -> str:
    out: list[str] = []
    for position, (text, brace) in enumerate(tokens):
        out += ["["] * sum(1 for r in repairs if r.reparandum[0] == position)
        out.append(f"{{{brace} {text} }}" if brace else text)
        for r in repairs:
            if r.reparandum[-1] == position:
                out += ["+", "]"] if r.is_restart else ["+"]
            if r.repair_onset == position:
                out.append("]")
    return " ".join(out)


@settings(max_examples=80, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["A", "B"]),
                          st.sampled_from(list(UtteranceFunction)), _utterance_spans(),
                          st.booleans()), min_size=1, max_size=5))
def test_written_markup_reads_back_equal(
        lines: list[tuple[str, UtteranceFunction,
                          tuple[list[tuple[str, str]], list[Repair], list[int]], bool]]) -> None:
    text = ["@format midstream-inline 1", "@conversation gen"]
    for speaker, function, (tokens, repairs, _), complete in lines:
        end = "/" if complete else "-/"
        text.append(f"{speaker} {function.value}: {_markup(tokens, repairs)} {end}")
    (first,) = list(parse_inline(text, "gen.inline"))
    stream = io.StringIO()
    write_inline([first], stream)
    (again,) = list(parse_inline(stream.getvalue().splitlines(), "again.inline"))
    assert again == first


@settings(max_examples=100, deadline=None)
@given(st.lists(st.text(alphabet="AB +:/-[]{}FEDquh statement", max_size=30), max_size=6))
def test_any_line_is_read_or_refused_with_a_format_error(lines: list[str]) -> None:
    try:
        list(parse_inline(["@format midstream-inline 1", "@conversation c", *lines], "g.inline"))
    except TranscriptFormatError as exc:
        assert str(exc).startswith("g.inline:")


def test_docstring_examples_run() -> None:
    import doctest  # noqa: PLC0415

    import midstream.corpora._inline as module  # noqa: PLC0415

    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0
