"""Conversion between wire messages and domain types, shared by the server and the client.

Hand-written (unlike the ``*_pb2`` modules beside it). Generated protobuf types never travel
further than the module that calls these functions: the servicer and the client library convert
at their edge and hand domain dataclasses inward.

The functions are pure and check only what the *shape* of a message can get wrong (an enum value
this version does not know, a oneof left empty). Semantic checks of caller input (empty text,
times going backwards, limits) belong to the server's edge validation, which names the limit.

Examples
--------
>>> from midstream import DisfluencyLabel, WordHypothesis
>>> state = WordHypothesis(word_id="w1", speaker="A", label=DisfluencyLabel.FILLER,
...                        confidence=0.9, revision=0, final=False)
>>> word_state_from_wire(word_state_to_wire(state)) == state
True
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from midstream import (
    DisfluencyLabel,
    EndReason,
    EventError,
    GapReason,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
)
from midstream.wire import midstream_pb2 as pb

__all__ = [
    "diff_from_wire",
    "end_reason_from_wire",
    "end_reason_to_wire",
    "function_from_wire",
    "function_to_wire",
    "gap_reason_from_wire",
    "gap_reason_to_wire",
    "hint_from_wire",
    "hint_to_wire",
    "label_from_wire",
    "label_to_wire",
    "snapshot_from_wire",
    "snapshot_to_wire",
    "spoken_word_from_wire",
    "spoken_word_to_wire",
    "tick_from_wire",
    "tick_to_wire",
    "update_from_wire",
    "update_into_wire",
    "update_to_wire",
    "utterance_state_from_wire",
    "utterance_state_to_wire",
    "word_state_from_wire",
    "word_state_to_wire",
]

_LABEL_TO_WIRE: dict[DisfluencyLabel, pb.WordRole] = {
    DisfluencyLabel.FLUENT: pb.WORD_ROLE_FLUENT,
    DisfluencyLabel.FILLER: pb.WORD_ROLE_FILLER,
    DisfluencyLabel.EDIT_TERM: pb.WORD_ROLE_EDIT_TERM,
    DisfluencyLabel.DISCOURSE_MARKER: pb.WORD_ROLE_DISCOURSE_MARKER,
    DisfluencyLabel.REPARANDUM: pb.WORD_ROLE_REPARANDUM,
    DisfluencyLabel.REPAIR: pb.WORD_ROLE_REPAIR,
    DisfluencyLabel.RESTART: pb.WORD_ROLE_RESTART,
}
_LABEL_FROM_WIRE: dict[int, DisfluencyLabel] = {int(v): k for k, v in _LABEL_TO_WIRE.items()}

_FUNCTION_TO_WIRE: dict[UtteranceFunction, pb.Function] = {
    UtteranceFunction.STATEMENT: pb.FUNCTION_STATEMENT,
    UtteranceFunction.QUESTION: pb.FUNCTION_QUESTION,
    UtteranceFunction.ANSWER: pb.FUNCTION_ANSWER,
    UtteranceFunction.AGREEMENT: pb.FUNCTION_AGREEMENT,
    UtteranceFunction.ACKNOWLEDGEMENT: pb.FUNCTION_ACKNOWLEDGEMENT,
    UtteranceFunction.CLARIFICATION_REQUEST: pb.FUNCTION_CLARIFICATION_REQUEST,
    UtteranceFunction.OTHER: pb.FUNCTION_OTHER,
}
_FUNCTION_FROM_WIRE: dict[int, UtteranceFunction] = {
    int(v): k for k, v in _FUNCTION_TO_WIRE.items()
}

# UNKNOWN is what the server gives a conversation ended by a fault (and what a reader makes of a
# value it does not know): the wire's UNSPECIFIED.
_END_REASON_TO_WIRE: dict[EndReason, pb.EndReason] = {
    EndReason.CLOSED: pb.END_REASON_CLOSED,
    EndReason.IDLE_TIMEOUT: pb.END_REASON_IDLE_TIMEOUT,
    EndReason.CALLER_VANISHED: pb.END_REASON_CALLER_VANISHED,
    EndReason.SERVER_SHUTDOWN: pb.END_REASON_SERVER_SHUTDOWN,
    EndReason.REJECTED: pb.END_REASON_REJECTED,
    EndReason.OWNER_LOST: pb.END_REASON_OWNER_LOST,
    EndReason.UNKNOWN: pb.END_REASON_UNSPECIFIED,
}
_END_REASON_FROM_WIRE: dict[int, EndReason] = {
    int(v): k for k, v in _END_REASON_TO_WIRE.items()
}
_GAP_REASON_TO_WIRE: dict[GapReason, pb.GapReason] = {
    GapReason.EVICTED: pb.GAP_REASON_EVICTED,
    GapReason.LAGGED: pb.GAP_REASON_LAGGED,
    GapReason.EPOCH_MISMATCH: pb.GAP_REASON_EPOCH_MISMATCH,
    GapReason.OWNER_CHANGED: pb.GAP_REASON_OWNER_CHANGED,
    GapReason.UNKNOWN: pb.GAP_REASON_UNSPECIFIED,
}
_GAP_REASON_FROM_WIRE: dict[int, GapReason] = {
    int(v): k for k, v in _GAP_REASON_TO_WIRE.items()
}


def label_to_wire(label: DisfluencyLabel) -> pb.WordRole:
    """The wire role of a disfluency label."""
    return _LABEL_TO_WIRE[label]


def label_from_wire(role: int) -> DisfluencyLabel:
    """The disfluency label of a wire role.

    Raises
    ------
    EventError
        For ``WORD_ROLE_UNSPECIFIED`` or a value this version does not know.
    """
    try:
        return _LABEL_FROM_WIRE[int(role)]
    except KeyError:
        raise EventError(f"field 'role': unknown word role {int(role)}") from None


def function_to_wire(function: UtteranceFunction) -> pb.Function:
    """The wire value of a coarse utterance function."""
    return _FUNCTION_TO_WIRE[function]


def function_from_wire(value: int) -> UtteranceFunction:
    """The coarse utterance function of a wire value.

    Raises
    ------
    EventError
        For ``FUNCTION_UNSPECIFIED`` or a value this version does not know.
    """
    try:
        return _FUNCTION_FROM_WIRE[int(value)]
    except KeyError:
        raise EventError(f"field 'function': unknown utterance function {int(value)}") from None


def end_reason_to_wire(reason: EndReason) -> pb.EndReason:
    """The wire value of why a conversation ended (``UNKNOWN`` is ``END_REASON_UNSPECIFIED``)."""
    return _END_REASON_TO_WIRE[reason]


def end_reason_from_wire(value: int) -> EndReason:
    """Why a conversation ended, from its wire value; ``UNKNOWN`` for one this version does not
    know (a reader carries on: the end itself is what matters)."""
    return _END_REASON_FROM_WIRE.get(int(value), EndReason.UNKNOWN)


def gap_reason_to_wire(reason: GapReason) -> pb.GapReason:
    """The wire value of why a follower misses updates (``UNKNOWN`` is unspecified)."""
    return _GAP_REASON_TO_WIRE[reason]


def gap_reason_from_wire(value: int) -> GapReason:
    """Why a follower misses updates, from its wire value; ``UNKNOWN`` for one this version
    does not know."""
    return _GAP_REASON_FROM_WIRE.get(int(value), GapReason.UNKNOWN)


# --- ingest ------------------------------------------------------------------------------------


def spoken_word_from_wire(message: pb.SpokenWord) -> tuple[str, Word]:
    """``(word_id, Word)`` of a spoken word, text as sent (the engine normalises it).

    Absent optional fields (times, confidence) become ``None``; nothing is validated here.
    """
    word = Word(
        text=message.text,
        speaker=message.speaker,
        start=message.start_s if message.HasField("start_s") else None,
        end=message.end_s if message.HasField("end_s") else None,
        confidence=message.confidence if message.HasField("confidence") else None,
    )
    return message.word_id, word


def spoken_word_to_wire(word_id: str, word: Word) -> pb.SpokenWord:
    """The wire form of one recogniser word.

    A fragment travels in the transcription convention, a trailing hyphen (``"s-"``), which the
    server's normalisation reads back as a fragment: streamed and locally decoded words then get
    the same features.
    """
    text = word.text + "-" if word.fragment and not word.text.endswith("-") else word.text
    message = pb.SpokenWord(word_id=word_id, speaker=word.speaker, text=text)
    if word.start is not None:
        message.start_s = word.start
    if word.end is not None:
        message.end_s = word.end
    if word.confidence is not None:
        message.confidence = word.confidence
    return message


def hint_from_wire(message: pb.SpeakerHint) -> tuple[str, bool]:
    """``(speaker, turn_end)`` of a speaker hint.

    Raises
    ------
    EventError
        When the kind is unspecified or unknown.
    """
    if message.kind == pb.HINT_KIND_TURN_END:
        return message.speaker, True
    if message.kind == pb.HINT_KIND_UTTERANCE_END:
        return message.speaker, False
    raise EventError(f"field 'hint.kind': unknown or unspecified hint kind {int(message.kind)}")


def hint_to_wire(speaker: str, *, turn_end: bool) -> pb.SpeakerHint:
    """The wire form of an utterance-end (``turn_end=False``) or turn-end hint."""
    kind = pb.HINT_KIND_TURN_END if turn_end else pb.HINT_KIND_UTTERANCE_END
    return pb.SpeakerHint(speaker=speaker, kind=kind)


def tick_from_wire(message: pb.TimeTick) -> float:
    """The stream time (seconds) a time tick says the recogniser's clock reads.

    Raises
    ------
    EventError
        When the time is not a finite number at least 0 (the rule of word times).
    """
    value = message.time_s
    if not math.isfinite(value) or value < 0:
        raise EventError(f"field 'tick.time_s' must be a finite number >= 0 seconds, got "
                         f"{value}")
    return value


def tick_to_wire(time_s: float) -> pb.TimeTick:
    """The wire form of a time tick (seconds on the clock of the words' times)."""
    return pb.TimeTick(time_s=time_s)


# --- hypotheses --------------------------------------------------------------------------------


def word_state_to_wire(state: WordHypothesis) -> pb.WordState:
    """The wire form of a word hypothesis (``reparandum_of=None`` becomes ``repaired_by=""``)."""
    return pb.WordState(
        word_id=state.word_id,
        speaker=state.speaker,
        role=label_to_wire(state.label),
        confidence=state.confidence,
        revision=state.revision,
        final=state.final,
        repaired_by=state.reparandum_of or "",
        interruption_point=state.interruption_point,
        text=state.text,
        start_s=state.start,
        end_s=state.end,
    )


def word_state_from_wire(message: pb.WordState) -> WordHypothesis:
    """The word hypothesis of a wire word state."""
    return WordHypothesis(
        word_id=message.word_id,
        speaker=message.speaker,
        label=label_from_wire(message.role),
        confidence=message.confidence,
        revision=message.revision,
        final=message.final,
        reparandum_of=message.repaired_by or None,
        interruption_point=message.interruption_point,
        text=message.text,
        start=message.start_s if message.HasField("start_s") else None,
        end=message.end_s if message.HasField("end_s") else None,
    )


def utterance_state_to_wire(state: UtteranceHypothesis) -> pb.UtteranceState:
    """The wire form of an utterance hypothesis."""
    return pb.UtteranceState(
        utterance_id=state.utterance_id,
        speaker=state.speaker,
        word_ids=state.word_ids,
        clean_text=state.clean_text,
        function=function_to_wire(state.function),
        fine_class=state.fine_class,
        confidence=state.confidence,
        revision=state.revision,
        final=state.final,
    )


def utterance_state_from_wire(message: pb.UtteranceState) -> UtteranceHypothesis:
    """The utterance hypothesis of a wire utterance state."""
    return UtteranceHypothesis(
        utterance_id=message.utterance_id,
        speaker=message.speaker,
        word_ids=tuple(message.word_ids),
        clean_text=message.clean_text,
        function=function_from_wire(message.function),
        fine_class=message.fine_class,
        confidence=message.confidence,
        revision=message.revision,
        final=message.final,
    )


def update_to_wire(update: HypothesisUpdate) -> pb.Update:
    """The wire form of one published update."""
    message = pb.Update()
    update_into_wire(update, message)
    return message


def update_into_wire(update: HypothesisUpdate, message: pb.Update) -> None:
    """Write one published update into an empty ``message``, e.g. one inside a reply frame.

    The same content as :func:`update_to_wire`, but built in place: each state is made inside
    its parent instead of being built alone and copied in, and the caller's message need not be
    copied into its frame either (a copy per nesting level was a third of the conversion's CPU,
    ``midstream bench ingest``). The field mapping repeats :func:`word_state_to_wire` and
    :func:`utterance_state_to_wire` on purpose: a shared dict of field values per state measured
    slower on this per-word path; ``tests/wire/test_convert.py`` holds the two forms equal.
    """
    diff = update.diff
    message.seq = update.seq
    message.server_time = update.server_time
    add_word, roles = message.words.add, _LABEL_TO_WIRE
    for w in diff.words:
        # None leaves an optional field unset, as the caller gave no time.
        add_word(word_id=w.word_id, speaker=w.speaker, role=roles[w.label],
                 confidence=w.confidence, revision=w.revision, final=w.final,
                 repaired_by=w.reparandum_of or "", interruption_point=w.interruption_point,
                 text=w.text, start_s=w.start, end_s=w.end)
    add_utterance, functions = message.utterances.add, _FUNCTION_TO_WIRE
    for u in diff.utterances:
        add_utterance(utterance_id=u.utterance_id, speaker=u.speaker, word_ids=u.word_ids,
                      clean_text=u.clean_text, function=functions[u.function],
                      fine_class=u.fine_class, confidence=u.confidence, revision=u.revision,
                      final=u.final)
    if diff.withdrawn_word_ids:
        message.withdrawn_word_ids.extend(diff.withdrawn_word_ids)
    message.conversation_final = update.conversation_final
    message.epoch = update.epoch


def diff_from_wire(message: pb.Update | pb.TagTranscriptReply) -> HypothesisDiff:
    """The diff carried by an update (or the final states of a batch reply)."""
    withdrawn: Iterable[str] = (
        message.withdrawn_word_ids if isinstance(message, pb.Update) else ()
    )
    return HypothesisDiff(
        words=tuple(word_state_from_wire(w) for w in message.words),
        utterances=tuple(utterance_state_from_wire(u) for u in message.utterances),
        withdrawn_word_ids=tuple(withdrawn),
    )


def update_from_wire(message: pb.Update) -> HypothesisUpdate:
    """The published update of a wire update."""
    return HypothesisUpdate(
        seq=message.seq,
        server_time=message.server_time,
        diff=diff_from_wire(message),
        conversation_final=message.conversation_final,
        epoch=message.epoch,
    )


def snapshot_to_wire(
    seq: int,
    words: Iterable[WordHypothesis],
    utterances: Iterable[UtteranceHypothesis],
    *,
    conversation_final: bool,
    epoch: int = 0,
) -> pb.Snapshot:
    """The wire form of a whole current state as of ``seq``; ``epoch`` is the conversation's
    incarnation the state belongs to (0 where no shared log numbers them)."""
    return pb.Snapshot(
        seq=seq,
        words=[word_state_to_wire(w) for w in words],
        utterances=[utterance_state_to_wire(u) for u in utterances],
        conversation_final=conversation_final,
        epoch=epoch,
    )


def snapshot_from_wire(
    message: pb.Snapshot,
) -> tuple[int, tuple[WordHypothesis, ...], tuple[UtteranceHypothesis, ...], bool]:
    """``(seq, words, utterances, conversation_final)`` of a wire snapshot."""
    return (
        message.seq,
        tuple(word_state_from_wire(w) for w in message.words),
        tuple(utterance_state_from_wire(u) for u in message.utterances),
        message.conversation_final,
    )
