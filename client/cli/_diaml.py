"""Export a tagged conversation as ISO 24617-2 dialogue acts (DiAML) with a disfluency layer.

ISO 24617-2 (*Language resource management — Semantic annotation framework — Part 2: Dialogue
acts*, 2012; second edition 2020) defines dialogue acts by a communicative function and a
dimension, annotated on *functional segments*, and their XML form, the Dialogue Act Markup
Language (DiAML, clause 11; concrete syntax 11.2). What this module takes from where:

- **Function and dimension names** (:data:`ISO_FUNCTIONS`, :data:`DIMENSIONS`): the core
  communicative functions of clause 10 (10.1 general-purpose, 10.2 dimension-specific) and the
  nine dimensions of clause 9 (9.1 Task ... 9.9 Partner Communication Management), written as
  DiAML attribute values. The clause numbers and dimension titles were checked against the
  2012 edition's table of contents; the function names themselves are **from memory** of the
  standard (its text was not at hand), cross-checked with ``docs/labels.md``.
- **Element and attribute names** (``diaml``, ``dialogueAct`` with ``xml:id``, ``target``,
  ``sender``, ``addressee``, ``communicativeFunction``, ``dimension``; ``functionalDependence``
  with ``dact`` and ``functAntecedent``; ``feedbackDependence`` with ``dact`` and ``fbSegment``;
  the namespace ``http://www.iso.org/diaml/``): as in the published DiAML examples of the
  standard's editors (DIT++ "Annotated examples", https://dit.uvt.nl/is-examples.html), which
  ``tests/client/cli/test_export.py`` checks :func:`check_diaml` against.

The standard leaves the primary data and the functional segments to "another level of
analysis" (the examples page says so). Midstream writes that level itself, in its own namespace
(:data:`LAYER`): participants, the word tokens with their times, functional segments that list
their word tokens, and the disfluency roles (Shriberg's reparandum, interregnum and repair
onset, per word with the tagger's confidence). One document holds all four::

    <ms:dialogue xmlns:ms="urn:x-midstream:layer:1" xmlns="http://www.iso.org/diaml/" ...>
      <ms:participants>  <ms:participant xml:id="p1" name="A"/> ...
      <ms:tokens>        <ms:w xml:id="w1" who="#p1" start="0.1" end="0.3">well</ms:w> ...
      <ms:segments>      <ms:functionalSegment xml:id="fs1" target="#w1 #w2" .../> ...
      <diaml>            <dialogueAct xml:id="da1" target="#fs1" .../> ...
      <ms:disfluencies>  <ms:role target="#w2" role="filler" .../> <ms:repair .../> ...

Each utterance is one functional segment with one dialogue act: its coarse function (and, where
it decides, its fine class) mapped to one ISO function by :func:`iso_function`. An utterance
whose function is ``other`` with no fine class that names an ISO function gets a segment but no
dialogue act: Midstream does not know which act it is. Disfluencies the standard has functions
for get segments and acts of their own as well (a filled pause is ``stalling``, a repair a
``selfCorrection``, a restart a ``retraction``), after the utterances' acts; the disfluency
layer keeps every role, with or without such a function.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Mapping
from typing import IO, Final

from midstream import DisfluencyLabel, UtteranceFunction
from midstream.client.cli._outcome import Outcome, repairs_of

DIAML: Final = "http://www.iso.org/diaml/"
LAYER: Final = "urn:x-midstream:layer:1"
_XML_ID: Final = "{http://www.w3.org/XML/1998/namespace}id"

#: The nine dimensions of ISO 24617-2 clause 9, as DiAML values.
DIMENSIONS: Final = (
    "task", "autoFeedback", "alloFeedback", "turnManagement", "timeManagement",
    "discourseStructuring", "socialObligationsManagement", "ownCommunicationManagement",
    "partnerCommunicationManagement",
)

_FEEDBACK = ("autoFeedback", "alloFeedback")
#: Every core communicative function of ISO 24617-2 clause 10 (names from memory, see the
#: module docstring) with the dimensions it may be used in: general-purpose functions (10.1)
#: in any dimension, dimension-specific ones (10.2) only in their own.
ISO_FUNCTIONS: Final[Mapping[str, tuple[str, ...]]] = {
    # 10.1 general-purpose: information-seeking
    **dict.fromkeys(("question", "propositionalQuestion", "setQuestion", "checkQuestion",
                     "choiceQuestion"), DIMENSIONS),
    # 10.1 general-purpose: information-providing
    **dict.fromkeys(("inform", "agreement", "disagreement", "correction", "answer", "confirm",
                     "disconfirm"), DIMENSIONS),
    # 10.1 general-purpose: commissives and directives
    **dict.fromkeys(("promise", "offer", "addressRequest", "acceptRequest", "declineRequest",
                     "addressSuggest", "acceptSuggest", "declineSuggest", "request", "instruct",
                     "suggest", "addressOffer", "acceptOffer", "declineOffer"), DIMENSIONS),
    # 10.2 dimension-specific
    **dict.fromkeys(("autoPositive", "autoNegative"), ("autoFeedback",)),
    **dict.fromkeys(("alloPositive", "alloNegative", "feedbackElicitation"), ("alloFeedback",)),
    **dict.fromkeys(("turnAccept", "turnAssign", "turnGrab", "turnKeep", "turnRelease",
                     "turnTake"), ("turnManagement",)),
    **dict.fromkeys(("stalling", "pausing"), ("timeManagement",)),
    **dict.fromkeys(("interactionStructuring", "opening"), ("discourseStructuring",)),
    **dict.fromkeys(("initialGreeting", "returnGreeting", "initialSelfIntroduction",
                     "returnSelfIntroduction", "apology", "acceptApology", "thanking",
                     "acceptThanking", "initialGoodbye", "returnGoodbye"),
                    ("socialObligationsManagement",)),
    **dict.fromkeys(("retraction", "selfCorrection", "selfError"),
                    ("ownCommunicationManagement",)),
    **dict.fromkeys(("completion", "correctMisspeaking"), ("partnerCommunicationManagement",)),
}

#: The function (and dimension) a coarse class stands for when its fine class says no more;
#: the alignment of ``docs/labels.md``. ``other`` stands for no single function.
_COARSE: Final[Mapping[UtteranceFunction, tuple[str, str]]] = {
    UtteranceFunction.STATEMENT: ("inform", "task"),
    UtteranceFunction.QUESTION: ("question", "task"),
    UtteranceFunction.ANSWER: ("answer", "task"),
    UtteranceFunction.AGREEMENT: ("agreement", "task"),
    UtteranceFunction.ACKNOWLEDGEMENT: ("autoPositive", "autoFeedback"),
    UtteranceFunction.CLARIFICATION_REQUEST: ("autoNegative", "autoFeedback"),
}

#: Fine classes (SWBD-DAMSL 42 classes, MRDA tags, Map Task moves) that name a more specific
#: ISO function than their coarse class, with the coarse class they must come with. The
#: correspondences follow the tag definitions of the corpora's coding manuals and the
#: standard's function definitions as remembered (from memory; see docs/labels.md for the
#: coarse alignment they refine).
_FINE: Final[Mapping[tuple[UtteranceFunction, str], tuple[str, str]]] = {
    **{(UtteranceFunction.QUESTION, tag): ("propositionalQuestion", "task")
       for tag in ("qy", "query_yn")},
    **{(UtteranceFunction.QUESTION, tag): ("checkQuestion", "task") for tag in ("qy^d", "^g")},
    **{(UtteranceFunction.QUESTION, tag): ("setQuestion", "task")
       for tag in ("qw", "qw^d", "qo", "query_w")},
    **{(UtteranceFunction.QUESTION, tag): ("choiceQuestion", "task") for tag in ("qrr", "qr")},
    **{(UtteranceFunction.QUESTION, tag): ("feedbackElicitation", "alloFeedback")
       for tag in ("f", "align")},
    **{(UtteranceFunction.ANSWER, tag): ("confirm", "task") for tag in ("ny", "na", "reply_y")},
    **{(UtteranceFunction.ANSWER, tag): ("disconfirm", "task")
       for tag in ("nn", "ng", "reply_n")},
    **{(UtteranceFunction.AGREEMENT, tag): ("disagreement", "task") for tag in ("ar", "arp")},
    (UtteranceFunction.CLARIFICATION_REQUEST, "check"): ("checkQuestion", "task"),
    (UtteranceFunction.OTHER, "ft"): ("thanking", "socialObligationsManagement"),
    (UtteranceFunction.OTHER, "fa"): ("apology", "socialObligationsManagement"),
    (UtteranceFunction.OTHER, "fp"): ("initialGreeting", "socialObligationsManagement"),
    (UtteranceFunction.OTHER, "fc"): ("initialGoodbye", "socialObligationsManagement"),
    (UtteranceFunction.OTHER, "fw"): ("acceptThanking", "socialObligationsManagement"),
    (UtteranceFunction.OTHER, "ad"): ("instruct", "task"),
    (UtteranceFunction.OTHER, "co"): ("instruct", "task"),
    (UtteranceFunction.OTHER, "instruct"): ("instruct", "task"),
    (UtteranceFunction.OTHER, "cs"): ("suggest", "task"),
    (UtteranceFunction.OTHER, "cc"): ("promise", "task"),
    (UtteranceFunction.OTHER, "oo_co_cc"): ("offer", "task"),
    (UtteranceFunction.OTHER, "^h"): ("stalling", "timeManagement"),
    (UtteranceFunction.OTHER, "h"): ("stalling", "timeManagement"),
    (UtteranceFunction.OTHER, "fh"): ("turnKeep", "turnManagement"),
}

_QUESTIONS = frozenset({"question", "propositionalQuestion", "setQuestion", "checkQuestion",
                        "choiceQuestion"})
_ANSWERS = frozenset({"answer", "confirm", "disconfirm"})
_AGREEMENTS = frozenset({"agreement", "disagreement"})
_FEEDBACK_FUNCTIONS = frozenset({"autoPositive", "autoNegative"})


def iso_function(function: UtteranceFunction, fine_class: str) -> tuple[str, str] | None:
    """``(communicative function, dimension)`` of an utterance, or ``None`` for ``other``
    without a fine class that names one.

    Examples
    --------
    >>> iso_function(UtteranceFunction.QUESTION, "qw")
    ('setQuestion', 'task')
    >>> iso_function(UtteranceFunction.ACKNOWLEDGEMENT, "b")
    ('autoPositive', 'autoFeedback')
    >>> iso_function(UtteranceFunction.OTHER, "%") is None
    True
    """
    return _FINE.get((function, fine_class)) or _COARSE.get(function)


def _seconds(value: float | None) -> str | None:
    return None if value is None else f"{value:.3f}"


def _set(element: ET.Element, name: str, value: str | None) -> None:
    if value is not None:
        element.set(name, value)


def diaml_document(outcome: Outcome) -> ET.Element:
    """The whole export of one conversation as an XML element tree (see the module docstring)."""
    ms = f"{{{LAYER}}}"
    root = ET.Element(f"{ms}dialogue", {"conversation": outcome.conversation_id,
                                         "complete": "true" if outcome.complete else "false"})
    speakers = outcome.speakers
    participant = {speaker: f"p{n}" for n, speaker in enumerate(speakers, start=1)}
    people = ET.SubElement(root, f"{ms}participants")
    for speaker in speakers:
        ET.SubElement(people, f"{ms}participant", {_XML_ID: participant[speaker],
                                                   "name": speaker})
    tokens = ET.SubElement(root, f"{ms}tokens")
    for n, word in enumerate(outcome.words, start=1):
        token = ET.SubElement(tokens, f"{ms}w", {_XML_ID: f"w{n}", "wordId": word.word_id,
                                                 "who": f"#{participant[word.speaker]}"})
        _set(token, "start", _seconds(word.start))
        _set(token, "end", _seconds(word.end))
        token.text = word.text
    segments = ET.SubElement(root, f"{ms}segments")
    acts = ET.SubElement(root, f"{{{DIAML}}}diaml")
    # The latest act of each kind by each sender, for the dependences of answers, agreements
    # and feedback (what they respond to is the other party's latest question, inform or
    # segment: a heuristic, common practice, no source).
    latest_question: dict[str, str] = {}
    latest_inform: dict[str, str] = {}
    latest_segment: dict[str, str] = {}
    for n, utterance in enumerate(outcome.utterances, start=1):
        state = utterance.state
        segment_id = f"fs{n}"
        sender = participant[state.speaker]
        ET.SubElement(segments, f"{ms}functionalSegment", {
            _XML_ID: segment_id, "target": " ".join(f"#w{i + 1}" for i in utterance.words),
            "sender": f"#{sender}", "utteranceId": state.utterance_id,
            "function": state.function.value, "fineClass": state.fine_class,
            "confidence": f"{state.confidence:.4f}"})
        mapped = iso_function(state.function, state.fine_class)
        others = [p for p in participant.values() if p != sender]
        if mapped is not None:
            name, dimension = mapped
            act_id = f"da{n}"
            act = ET.SubElement(acts, f"{{{DIAML}}}dialogueAct", {
                _XML_ID: act_id, "target": f"#{segment_id}", "sender": f"#{sender}"})
            if len(others) == 1:
                act.set("addressee", f"#{others[0]}")
            act.set("communicativeFunction", name)
            act.set("dimension", dimension)
            antecedent = None
            if name in _ANSWERS:
                antecedent = _latest_other(latest_question, sender)
            elif name in _AGREEMENTS:
                antecedent = _latest_other(latest_inform, sender)
            if antecedent is not None:
                ET.SubElement(acts, f"{{{DIAML}}}functionalDependence",
                              {"dact": f"#{act_id}", "functAntecedent": f"#{antecedent}"})
            if name in _FEEDBACK_FUNCTIONS:
                heard = _latest_other(latest_segment, sender)
                if heard is not None:
                    ET.SubElement(acts, f"{{{DIAML}}}feedbackDependence",
                                  {"dact": f"#{act_id}", "fbSegment": f"#{heard}"})
            if name in _QUESTIONS:
                latest_question[sender] = act_id
            if name == "inform":
                latest_inform[sender] = act_id
        latest_segment[sender] = segment_id
    _disfluency_acts(segments, acts, outcome, participant, first=len(outcome.utterances) + 1)
    _disfluency_layer(root, outcome)
    return root


def _disfluency_acts(segments: ET.Element, acts: ET.Element, outcome: Outcome,
                     participant: dict[str, str], *, first: int) -> None:
    """The disfluencies the standard has functions for, as dialogue acts of their own.

    A filled pause is stalling (time management: the speaker needs a moment); a repair is a
    selfCorrection and a restart a retraction (own communication management: the speaker
    corrects or withdraws what they just said). The segment of a filler run is its words; that
    of a repair its reparandum, interregnum and onset. (The functions' use for these is the
    standard's definitions as remembered, from memory.)
    """
    ms = f"{{{LAYER}}}"
    number = first
    for utterance in outcome.utterances:
        spans: list[tuple[tuple[int, ...], str, str]] = []
        run: list[int] = []
        for index in (*utterance.words, -1):
            if index >= 0 and outcome.words[index].state.label is DisfluencyLabel.FILLER \
                    and (not run or run[-1] + 1 == index):
                run.append(index)
                continue
            if run:
                spans.append((tuple(run), "stalling", "timeManagement"))
            run = [index] if index >= 0 and \
                outcome.words[index].state.label is DisfluencyLabel.FILLER else []
        for repair in repairs_of(outcome, utterance):
            words = (*repair.reparandum, *repair.interregnum,
                     *(() if repair.repair_onset is None else (repair.repair_onset,)))
            spans.append((words, "retraction" if repair.is_restart else "selfCorrection",
                          "ownCommunicationManagement"))
        sender = participant[utterance.state.speaker]
        for words, function, dimension in sorted(spans):
            segment_id, act_id = f"fs{number}", f"da{number}"
            number += 1
            ET.SubElement(segments, f"{ms}functionalSegment", {
                _XML_ID: segment_id, "target": " ".join(f"#w{i + 1}" for i in words),
                "sender": f"#{sender}", "kind": "disfluency"})
            ET.SubElement(acts, f"{{{DIAML}}}dialogueAct", {
                _XML_ID: act_id, "target": f"#{segment_id}", "sender": f"#{sender}",
                "communicativeFunction": function, "dimension": dimension})


def _latest_other(latest: dict[str, str], sender: str) -> str | None:
    others = [act for who, act in latest.items() if who != sender]
    # Ids count up in spoken order; the latest is the one with the highest number.
    return max(others, key=lambda act: int(act[2:]), default=None)


def _disfluency_layer(root: ET.Element, outcome: Outcome) -> None:
    ms = f"{{{LAYER}}}"
    layer = ET.SubElement(root, f"{ms}disfluencies")
    for n, word in enumerate(outcome.words, start=1):
        state = word.state
        if state.label is DisfluencyLabel.FLUENT:
            continue
        role = ET.SubElement(layer, f"{ms}role", {
            "target": f"#w{n}", "role": state.label.value,
            "confidence": f"{state.confidence:.4f}"})
        if state.interruption_point:
            role.set("interruptionPoint", "true")
    for utterance in outcome.utterances:
        for repair in repairs_of(outcome, utterance):
            element = ET.SubElement(layer, f"{ms}repair", {
                "reparandum": " ".join(f"#w{i + 1}" for i in repair.reparandum)})
            if repair.interregnum:
                element.set("interregnum", " ".join(f"#w{i + 1}" for i in repair.interregnum))
            if repair.repair_onset is not None:
                element.set("onset", f"#w{repair.repair_onset + 1}")


def write_diaml(outcome: Outcome, stream: IO[bytes]) -> None:
    """Write the export of one conversation as UTF-8 XML."""
    ET.register_namespace("ms", LAYER)
    ET.register_namespace("", DIAML)
    tree = ET.ElementTree(diaml_document(outcome))
    ET.indent(tree)
    tree.write(stream, encoding="utf-8", xml_declaration=True)


def check_diaml(diaml: ET.Element) -> list[str]:
    """The problems of a ``diaml`` element against the standard's vocabulary (empty: none).

    Checks what the module docstring takes from the standard: the element and attribute names
    of dialogue acts and their dependences, every ``communicativeFunction`` an ISO 24617-2
    function used in a dimension it may be used in, ids unique and references resolved.
    ``sender`` is written ``speaker`` in some published examples; either is accepted.
    """
    problems: list[str] = []
    if diaml.tag != f"{{{DIAML}}}diaml":
        return [f"the root is {diaml.tag}, not {{{DIAML}}}diaml"]
    acts: set[str] = set()
    for child in diaml:
        if child.tag != f"{{{DIAML}}}dialogueAct":
            continue
        act_id = child.get(_XML_ID)
        if not act_id or act_id in acts:
            problems.append(f"a dialogueAct without an xml:id or with a repeated one: {act_id}")
            continue
        acts.add(act_id)
        if not (child.get("target") or "").startswith("#"):
            problems.append(f"{act_id}: target must reference a functional segment ('#...')")
        if child.get("sender") is None and child.get("speaker") is None:
            problems.append(f"{act_id}: no sender")
        function = child.get("communicativeFunction", "")
        dimension = child.get("dimension", "")
        if function not in ISO_FUNCTIONS:
            problems.append(f"{act_id}: {function!r} is not an ISO 24617-2 function")
        elif dimension not in ISO_FUNCTIONS[function]:
            problems.append(f"{act_id}: {function!r} is not used in dimension {dimension!r}")
    known = {"dialogueAct", "functionalDependence", "feedbackDependence", "rhetoricalLink"}
    for child in diaml:
        name = child.tag.removeprefix(f"{{{DIAML}}}")
        if name not in known:
            problems.append(f"unknown DiAML element {child.tag}")
        elif name in ("functionalDependence", "feedbackDependence"):
            references = [child.get("dact", "")]
            if name == "functionalDependence":
                references.append(child.get("functAntecedent", ""))
            for reference in references:
                if reference.removeprefix("#") not in acts:
                    problems.append(f"{name} refers to {reference!r}, no dialogueAct")
    return problems
