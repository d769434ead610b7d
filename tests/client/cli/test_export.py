"""``midstream export``: CSV, ISO 24617-2 DiAML and inline markup from a revision log (issue 28,
items 3-5), end to end from a WebVTT call with two voices.

DiAML is checked against the published examples of the standard's editors (DIT++ "Annotated
examples", https://dit.uvt.nl/is-examples.html, illustrating ISO 24617-2:2012 clause 11.2,
the concrete syntax). The page renders its XML with a space after each ``<`` and writes the
namespace as ``xmlns:"..."``; the example below is that XML restored to well-formedness.
"""

from __future__ import annotations

import csv
import json
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    Served,
    models_dir_fixture,
    served_fixture,
)
from midstream import DisfluencyLabel
from midstream.client.cli._diaml import DIAML, ISO_FUNCTIONS, LAYER, check_diaml
from midstream.client.cli._main import main
from midstream.client.cli._records import read_log
from midstream.corpora import read_corpus, write_jsonl

pytestmark = pytest.mark.corpus

#: Example 1 of the examples page: a set question and its answer, with a functional dependence.
PUBLISHED_EXAMPLE_1 = """<diaml xmlns="http://www.iso.org/diaml/">
<dialogueAct xml:id="da1" target="#fs1" speaker="#p1" addressee="#p2"
  communicativeFunction="setQuestion" dimension="task" conditionality="conditional"/>
<dialogueAct xml:id="da2" target="#fs2" speaker="#p2" addressee="#p1"
  communicativeFunction="answer" dimension="task"/>
<functionalDependence dact="#da2" functAntecedent="#da1"/>
</diaml>"""

#: An invented call with two voices, as a meeting tool would caption it: 42 words.
CALL_VTT = """WEBVTT

1
00:00:00.000 --> 00:00:03.000
<v Ann>Hi, I want to, uh, I need to book a repair for my washing machine.</v>

2
00:00:03.200 --> 00:00:05.000
<v Bo>Sure. What is, um, what is wrong with it?</v>

3
00:00:05.200 --> 00:00:07.500
<v Ann>It makes a loud noise when it spins.</v>

4
00:00:07.700 --> 00:00:08.500
<v Bo>Okay.</v>

5
00:00:08.600 --> 00:00:11.000
<v Bo>Is it still under warranty?</v>

6
00:00:11.200 --> 00:00:12.400
<v Ann>Yes, I think so.</v>
"""


def test_the_checker_accepts_the_published_example_and_refuses_what_breaks_it() -> None:
    assert check_diaml(ET.fromstring(PUBLISHED_EXAMPLE_1)) == []
    broken = PUBLISHED_EXAMPLE_1.replace('"setQuestion"', '"whQuestion"')
    assert check_diaml(ET.fromstring(broken)) == ["da1: 'whQuestion' is not an ISO 24617-2 "
                                                  "function"]
    wrong_dimension = PUBLISHED_EXAMPLE_1.replace(
        'communicativeFunction="answer" dimension="task"',
        'communicativeFunction="autoPositive" dimension="task"')
    assert check_diaml(ET.fromstring(wrong_dimension)) == [
        "da2: 'autoPositive' is not used in dimension 'task'"]
    dangling = PUBLISHED_EXAMPLE_1.replace('functAntecedent="#da1"', 'functAntecedent="#da9"')
    assert check_diaml(ET.fromstring(dangling)) == [
        "functionalDependence refers to '#da9', no dialogueAct"]


def test_the_function_list_has_the_standards_nine_dimensions() -> None:
    # Clause 9 of ISO 24617-2:2012 has nine dimensions (9.1 to 9.9); every one has functions.
    dimensions = {d for allowed in ISO_FUNCTIONS.values() for d in allowed}
    assert len(dimensions) == 9
    assert {"inform", "answer", "setQuestion", "autoPositive", "stalling"} <= set(ISO_FUNCTIONS)


@pytest.fixture(scope="module")
def call_log(served: Served, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A WebVTT call with two voices tagged by a real server; its revision log."""
    folder = tmp_path_factory.mktemp("vtt")
    vtt = folder / "call.vtt"
    vtt.write_text(CALL_VTT, encoding="utf-8")
    log = folder / "call.log"
    assert main(["tag", str(vtt), "--server", served.target, "--log", str(log)]) == 0
    return log


def test_a_webvtt_call_with_two_voices_tags_and_exports_as_diaml(
        call_log: Path, tmp_path: Path) -> None:
    out = tmp_path / "call.xml"
    assert main(["export", str(call_log), "--format", "diaml", "-o", str(out)]) == 0
    root = ET.parse(out).getroot()  # parses as XML
    ms = f"{{{LAYER}}}"
    names = [p.get("name") for p in root.iter(f"{ms}participant")]
    assert names == ["Ann", "Bo"]
    tokens = {w.get("{http://www.w3.org/XML/1998/namespace}id", ""): w
              for w in root.iter(f"{ms}w")}
    spoken = [w.text for w in tokens.values()]
    assert spoken[:4] == ["hi", "i", "want", "to"] and len(spoken) == 42
    diaml = root.find(f"{{{DIAML}}}diaml")
    assert diaml is not None and check_diaml(diaml) == []
    acts = list(diaml.iter(f"{{{DIAML}}}dialogueAct"))
    assert acts and all(a.get("communicativeFunction") in ISO_FUNCTIONS for a in acts)
    # Every functional segment points at word tokens, and every word is in one.
    segments = {s.get("{http://www.w3.org/XML/1998/namespace}id"): s
                for s in root.iter(f"{ms}functionalSegment")}
    covered = [ref.removeprefix("#") for s in segments.values() if s.get("kind") is None
               for ref in (s.get("target") or "").split()]
    assert sorted(covered) == sorted(tokens)
    assert all((a.get("target") or "").removeprefix("#") in segments for a in acts)
    # The disfluency layer names the filled pauses the voices said.
    roles = {tokens[r.get("target", "").removeprefix("#")].text: r.get("role")
             for r in root.iter(f"{ms}role")}
    assert roles.get("uh") == "filler" or roles.get("um") == "filler"
    # Each filled pause is also a stalling act (time management) on a segment of its own.
    fillers = sorted(r.get("target", "") for r in root.iter(f"{ms}role")
                     if r.get("role") == "filler")
    stalled = sorted(ref for a in acts if a.get("communicativeFunction") == "stalling"
                     for ref in (segments[a.get("target", "")[1:]].get("target") or "").split())
    assert stalled == fillers and all(
        a.get("dimension") == "timeManagement" for a in acts
        if a.get("communicativeFunction") == "stalling")


def test_the_csv_has_a_row_per_utterance_and_per_word(call_log: Path, tmp_path: Path) -> None:
    out = tmp_path / "call.csv"
    assert main(["export", str(call_log), "--format", "csv", "-o", str(out)]) == 0
    with out.open(encoding="utf-8", newline="") as stream:
        rows = list(csv.DictReader(stream))
    words = [r for r in rows if r["row"] == "word"]
    utterances = [r for r in rows if r["row"] == "utterance"]
    assert len(words) == 42 and utterances
    assert {r["speaker"] for r in words} == {"Ann", "Bo"}
    for utterance in utterances:
        mine = [w for w in words if w["utterance"] == utterance["id"]]
        assert utterance["text"] == " ".join(w["text"] for w in mine)
    assert all(float(w["start"]) <= float(w["end"]) for w in words)


def test_the_inline_export_is_a_transcript_read_corpus_reads(
        call_log: Path, tmp_path: Path) -> None:
    out = tmp_path / "call.inline"
    assert main(["export", str(call_log), "--format", "inline", "-o", str(out)]) == 0
    (conversation,) = list(read_corpus(out))
    records = [json.loads(line) for line in call_log.read_text(encoding="utf-8").splitlines()]
    sent = [r["text"].strip(",.?").lower() for r in records if r["type"] == "word"]
    assert [w.text for w in conversation.words] == sent
    assert conversation.labels is not None
    final = {}
    for record in records:
        for state in record.get("words", ()):
            final[state["id"]] = state["label"]
    fillers = [label for label in final.values() if label == "filler"]
    assert sum(1 for label in conversation.labels if label.value == "filler") == len(fillers)


def test_export_errors_name_the_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    empty = tmp_path / "empty.log"
    empty.write_text('{"type": "header", "format": 1}\n', encoding="utf-8")
    assert main(["export", str(empty), "--format", "csv", "-o", str(tmp_path / "x.csv")]) == 1
    assert f"{empty}: the log holds no word state" in capsys.readouterr().err


def test_docstring_examples_run() -> None:
    import doctest  # noqa: PLC0415

    import midstream.client.cli._diaml as module  # noqa: PLC0415

    result = doctest.testmod(module)
    assert result.attempted > 0 and result.failed == 0


def test_a_transcript_file_replays_with_its_gold_labels(
        served: Served, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    inline = tmp_path / "desk.inline"
    inline.write_text("@format midstream-inline 1\n@conversation desk-1\n"
                      "A question: {F uh} can you [ reset + {F um} reset ] my password /\n"
                      "B answer: {D well} yes i can /\n", encoding="utf-8")
    jsonl = tmp_path / "desk.jsonl"
    with jsonl.open("w", encoding="utf-8") as stream:
        write_jsonl(read_corpus(inline), stream)
    for transcript in (inline, jsonl):
        log = tmp_path / f"{transcript.suffix[1:]}.log"
        assert main(["replay", str(transcript), "--server", served.target, "--speed", "0",
                     "--no-progress", "--log", str(log)]) == 0
        words = read_log(log).words
        assert [w.text for w in words][:3] == ["uh", "can", "you"]
        assert words[0].gold is not None and words[0].gold.label is DisfluencyLabel.FILLER
        capsys.readouterr()
        assert main(["inspect", str(log)]) == 0
        assert "final word-label accuracy against gold" in capsys.readouterr().out
