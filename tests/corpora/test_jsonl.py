"""Midstream's JSON Lines format: exact round trips, hand-written files, and clear errors."""

from __future__ import annotations

import contextlib
import io
import json
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    DisfluencyLabel,
    InputError,
    Repair,
    TranscriptFormatError,
    Utterance,
    UtteranceFunction,
    Word,
)
from midstream.corpora import _jsonl as jsonl_module
from midstream.corpora import read_corpus, read_jsonl, write_jsonl
from midstream.corpora._mrda import read_mrda

HEADER = '{"format": "midstream-transcript", "version": 1}\n'

_times = st.one_of(st.none(), st.floats(min_value=0, max_value=1e6, allow_nan=False))
_names = st.text(min_size=1, max_size=8)


def _word(text: str, speaker: str, times: tuple[float | None, float | None],
          confidence: float | None, fragment: bool) -> Word:
    start, end = times
    if start is not None and end is not None and end < start:
        start, end = end, start
    return Word(text=text, speaker=speaker, start=start, end=end, confidence=confidence,
                fragment=fragment)


_words = st.lists(st.builds(_word, _names, st.sampled_from(["A", "B", "ü"]),
                            st.tuples(_times, _times),
                            st.one_of(st.none(), st.floats(0, 1)), st.booleans()),
                  max_size=6)


@st.composite
def conversations(draw: st.DrawFn) -> Conversation:
    """Any conversation the format promises to carry: utterances hold disjoint, ascending,
    non-empty sets of words; indices are in range."""
    words = tuple(draw(_words))
    count = len(words)
    owners = draw(st.lists(st.one_of(st.none(), st.integers(0, 3)), min_size=count,
                           max_size=count))
    groups = draw(st.permutations(sorted({o for o in owners if o is not None})))
    tags = draw(st.lists(st.tuples(_names, st.sampled_from(list(UtteranceFunction)),
                                   st.text(max_size=6), st.text(max_size=6), st.booleans()),
                         min_size=len(groups), max_size=len(groups)))
    utterances = tuple(
        Utterance(speaker=speaker, words=tuple(i for i, o in enumerate(owners) if o == group),
                  function=function, fine_tag=fine_tag, fine_class=fine_class,
                  complete=complete)
        for group, (speaker, function, fine_tag, fine_class, complete) in zip(
            groups, tags, strict=True))
    repairs: tuple[Repair, ...] = ()
    points: tuple[int, ...] = ()
    if count:
        index = st.integers(0, count - 1)
        repairs = tuple(draw(st.lists(st.builds(
            Repair, reparandum=st.lists(index, min_size=1, max_size=3).map(tuple),
            interregnum=st.lists(index, max_size=2).map(tuple),
            repair_onset=st.one_of(st.none(), index)), max_size=2)))
        points = tuple(draw(st.lists(index, max_size=3)))
    labels = draw(st.one_of(st.none(), st.lists(st.sampled_from(list(DisfluencyLabel)),
                                                min_size=count, max_size=count).map(tuple)))
    return Conversation(
        id=draw(_names), corpus=draw(_names), words=words, utterances=utterances,
        labels=labels, repairs=repairs, unbalanced_brackets=draw(st.integers(0, 5)),
        interruption_points=points)


@settings(max_examples=40, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(conversations(), max_size=3, unique_by=lambda c: c.id))
def test_round_trip_is_exact(items: list[Conversation]) -> None:
    buffer = io.StringIO()
    assert write_jsonl(items, buffer) == len(items)
    assert list(read_jsonl(io.BytesIO(buffer.getvalue().encode("utf-8")))) == items
    assert list(read_jsonl(io.StringIO(buffer.getvalue()))) == items


@given(st.binary(max_size=400))
def test_arbitrary_bytes_parse_or_raise_a_format_error(data: bytes) -> None:
    for payload in (data, HEADER.encode() + data):
        with contextlib.suppress(TranscriptFormatError):
            list(read_jsonl(io.BytesIO(payload)))


_json = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=False),
              st.text(max_size=5)),
    lambda inner: st.one_of(st.lists(inner, max_size=3),
                            st.dictionaries(st.text(max_size=5), inner, max_size=3)),
    max_leaves=8)
_record = st.fixed_dictionaries(
    {}, optional={"type": st.sampled_from(["word", "conversation", "utterance", "repair", "x"]),
                  "conversation": st.sampled_from(["c", "d", 3]),
                  "speaker": st.one_of(st.just("A"), _json),
                  "text": st.one_of(st.just("hi"), _json),
                  "start": _json, "end": _json, "label": st.one_of(st.just("filler"), _json),
                  "utterance": st.one_of(st.integers(-1, 2), _json),
                  "index": st.one_of(st.integers(-1, 2), _json),
                  "function": st.one_of(st.just("question"), _json),
                  "reparandum": st.one_of(st.just([0]), _json),
                  "interruption_points": st.one_of(st.just([0]), _json)})


@settings(max_examples=40)
@given(st.lists(_record, max_size=6))
def test_arbitrary_records_parse_or_raise_a_format_error(records: list[dict[str, object]]) -> None:
    text = HEADER + "".join(json.dumps(r) + "\n" for r in records)
    try:
        result = list(read_jsonl(io.StringIO(text)))
    except TranscriptFormatError:
        return
    for conversation in result:
        assert conversation.labels is None or len(conversation.labels) == len(conversation.words)


def test_a_hand_written_file_of_words_and_times(tmp_path: Path) -> None:
    # The smallest file docs/formats.md shows: words and times only.
    path = tmp_path / "calls.jsonl"
    path.write_text(HEADER
                    + '{"conversation": "call-1", "speaker": "A", "text": "so", "start": 0.0, '
                      '"end": 0.21}\n'
                    + '{"conversation": "call-1", "speaker": "A", "text": "um", "start": 0.21, '
                      '"end": 0.5}\n\n', encoding="utf-8")
    (conversation,) = read_jsonl(path)
    assert conversation.id == "call-1"
    assert [(w.text, w.start, w.end) for w in conversation.words] == [("so", 0.0, 0.21),
                                                                      ("um", 0.21, 0.5)]
    assert conversation.labels is None and conversation.utterances == ()
    assert conversation.corpus == "jsonl"
    # The corpus reader takes the path as a string as well as a Path.
    assert list(read_corpus(str(path))) == [conversation]
    assert list(read_corpus(str(tmp_path))) == [conversation]


def test_utterances_and_labels_by_hand() -> None:
    text = HEADER + "".join(json.dumps(r) + "\n" for r in [
        {"conversation": "c", "speaker": "A", "text": "is", "label": "fluent", "utterance": 0},
        {"conversation": "c", "speaker": "A", "text": "it", "label": "fluent", "utterance": 0},
        {"type": "utterance", "conversation": "c", "index": 0, "function": "question"},
    ])
    (conversation,) = read_jsonl(io.StringIO(text))
    (utterance,) = conversation.utterances
    assert utterance.words == (0, 1) and utterance.speaker == "A"
    assert utterance.function is UtteranceFunction.QUESTION
    assert conversation.labels == (DisfluencyLabel.FLUENT, DisfluencyLabel.FLUENT)


def _read(text: str) -> list[Conversation]:
    return list(read_jsonl(io.StringIO(text)))


@pytest.mark.parametrize(("body", "pattern"), [
    ('{"conversation": "c", "speaker": "A", "text": ""}\n', r":2: field 'text'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "start": "x"}\n',
     r":2: field 'start'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "start": 2, "end": 1}\n',
     r":2: field 'end': end is before start"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "confidence": 1.5}\n',
     r"field 'confidence'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "colour": 1}\n', r"field 'colour'"),
    ('{"type": "turn", "conversation": "c"}\n', r"field 'type'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "label": "noise"}\n',
     r"field 'label'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "label": "fluent"}\n'
     '{"conversation": "c", "speaker": "A", "text": "b"}\n', r"either every word has a label"),
    ('{"conversation": "c", "speaker": "A", "text": "a"}\n'
     '{"conversation": "d", "speaker": "A", "text": "a"}\n'
     '{"conversation": "c", "speaker": "A", "text": "a"}\n', r":4: field 'conversation'"),
    ('{"conversation": "c", "speaker": "A", "text": "a", "utterance": 0}\n',
     r"utterance 0, which has no utterance line"),
    ('{"type": "repair", "conversation": "c", "reparandum": [3]}\n',
     r"field 'reparandum': word index 3 out of range"),
    ('[1, 2]\n', r":2: expected a JSON object"),
    ('{"a": NaN}\n', r":2: not JSON"),
    pytest.param('[' * 100_000 + '\n', r":2: .*JSON", id="deeply-nested"),
])
def test_bad_lines_name_line_and_field(body: str, pattern: str) -> None:
    with pytest.raises(TranscriptFormatError, match=pattern):
        _read(HEADER + body)


def test_header_is_required_and_versioned() -> None:
    with pytest.raises(TranscriptFormatError, match="field 'format'"):
        _read('{"conversation": "c", "speaker": "A", "text": "a"}\n')
    with pytest.raises(TranscriptFormatError, match="version 2 is newer"):
        _read('{"format": "midstream-transcript", "version": 2}\n')
    with pytest.raises(TranscriptFormatError, match="empty file"):
        _read("")


def test_file_name_appears_in_errors(tmp_path: Path) -> None:
    path = tmp_path / "mine.jsonl"
    path.write_bytes(HEADER.encode() + b'{"conversation": "c", "speaker": "A", "text": 5}\n')
    with pytest.raises(TranscriptFormatError, match=r"mine\.jsonl:2: field 'text'"):
        list(read_jsonl(path))
    path.write_bytes(HEADER.encode() + b"\xff\xfe\n")
    with pytest.raises(TranscriptFormatError, match=r"mine\.jsonl:2: not UTF-8"):
        list(read_jsonl(path))


def test_line_length_limit(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(jsonl_module, "MAX_LINE_BYTES", 80)
    line = json.dumps({"conversation": "c", "speaker": "A", "text": "x" * 100}) + "\n"
    with pytest.raises(TranscriptFormatError, match=":2: line longer than the limit of 80"):
        _read(HEADER + line)


def test_overlong_line_of_multibyte_characters_is_a_length_error(
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(jsonl_module, "MAX_LINE_BYTES", 80)
    line = json.dumps({"conversation": "c", "speaker": "A", "text": "é" * 100},
                      ensure_ascii=False) + "\n"
    with pytest.raises(TranscriptFormatError, match="longer than the limit"):
        list(read_jsonl(io.BytesIO((HEADER + line).encode("utf-8"))))


def test_word_limit(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(jsonl_module, "MAX_WORDS", 2)
    line = '{"conversation": "c", "speaker": "A", "text": "x"}\n'
    with pytest.raises(TranscriptFormatError, match=r":4: .*limit of 2 words"):
        _read(HEADER + line * 3)


def test_writer_refuses_what_the_format_cannot_say() -> None:
    word = Word(text="a", speaker="A")
    utterance = Utterance(speaker="A", words=(0,), function=UtteranceFunction.OTHER,
                          fine_tag="", fine_class="")
    overlapping = Conversation(id="c", corpus="x", words=(word,),
                               utterances=(utterance, utterance))
    with pytest.raises(InputError, match="word 0 is in utterances 0 and 1"):
        write_jsonl([overlapping], io.StringIO())
    single = Conversation(id="c", corpus="x", words=(word,), utterances=())
    with pytest.raises(InputError, match="written twice"):
        write_jsonl([single, single], io.StringIO())


@pytest.mark.corpus
def test_a_real_meeting_round_trips(mrda_dir: Path) -> None:
    meeting = next(read_mrda(mrda_dir, ids=["Bed002"]))
    buffer = io.StringIO()
    write_jsonl([meeting], buffer)
    assert list(read_jsonl(io.StringIO(buffer.getvalue()))) == [meeting]


def test_the_examples_in_the_format_docs_parse() -> None:
    # docs/formats.md shows hand-written files; they must read as documented.
    docs = Path(__file__).resolve().parents[2] / "docs" / "formats.md"
    blocks = re.findall(r"```json\n(.*?)```", docs.read_text(encoding="utf-8"), flags=re.S)
    files = [b for b in blocks if b.startswith(HEADER.strip()) and b.count("\n") > 1]
    assert len(files) == 2
    (words_only,) = read_jsonl(io.StringIO(files[0]))
    assert words_only.speakers == ("A", "B") and words_only.labels is None
    (question,) = read_jsonl(io.StringIO(files[1]))
    clean = [w.text for w, label in zip(question.words, question.labels or (), strict=True)
             if label not in REMOVED_FROM_CLEAN_TEXT]
    assert clean == ["who", "wrote", "it"]
    assert question.repairs == (Repair(reparandum=(1,), interregnum=(2,), repair_onset=3),)
