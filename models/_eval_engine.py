"""Whole-engine evaluation: replay conversations through :class:`ConversationEngine`.

This scores what a live caller would get with nothing but recogniser words: predicted
utterance segmentation and the functions of those predicted utterances. Each word is scored
against the function of the gold utterance it belongs to (``word_accuracy``), which compares
labellings of different segmentations fairly.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from midstream import Conversation, UtteranceFunction, UtteranceHypothesis
from midstream.models._bundle import ModelBundle
from midstream.models._recogniser import SilenceTick, silence_ticks


def replay_conversation(conversation: Conversation, bundle: ModelBundle, *,
                        ticks: Sequence[SilenceTick] = ()) -> dict[str, UtteranceHypothesis]:
    """Stream a conversation's words in time order; the final hypothesis of each word's utterance.

    ``ticks`` (in sending order, :func:`~midstream.models._recogniser.silence_ticks`) are sent
    between the words as a live caller would. Returns a mapping from word id (``"w<index>"``)
    to the final utterance containing it. Dissolved utterances (no words) are ignored.
    """
    engine = bundle.new_engine()
    latest: dict[str, UtteranceHypothesis] = {}
    diffs = []
    pending = iter(ticks)
    tick = next(pending, None)
    for i, word in enumerate(conversation.words):
        while tick is not None and tick.before <= i:
            diffs.append(engine.tick(tick.time))
            tick = next(pending, None)
        diffs.append(engine.add_word(f"w{i}", word))
    while tick is not None:
        diffs.append(engine.tick(tick.time))
        tick = next(pending, None)
    diffs.append(engine.finish())
    for diff in diffs:
        for utterance in diff.utterances:
            latest[utterance.utterance_id] = utterance
    by_word: dict[str, UtteranceHypothesis] = {}
    for utterance in latest.values():
        for word_id in utterance.word_ids:
            by_word[word_id] = utterance
    return by_word


def evaluate_engine(conversations: Iterable[Conversation], bundle: ModelBundle, *,
                    ticks: bool = False) -> dict[str, float]:
    """``utterance_functions.predicted_segmentation.word_accuracy`` and its word count.

    Words outside every gold utterance are not scored. ``ticks``: send the time ticks of
    :func:`~midstream.models._recogniser.silence_ticks` through every silence (with the
    bundle's boundary model; timed words only).
    """
    correct = total = 0
    boundary = bundle.boundary_model
    marks = boundary.silence_marks if ticks and boundary is not None else ()
    for conversation in conversations:
        gold: dict[str, UtteranceFunction] = {}
        for utterance in conversation.utterances:
            for index in utterance.words:
                gold[f"w{index}"] = utterance.function
        predicted = replay_conversation(conversation, bundle,
                                        ticks=silence_ticks(conversation, marks))
        for word_id, function in gold.items():
            guess = predicted.get(word_id)
            total += 1
            correct += guess is not None and guess.function == function
    prefix = "utterance_functions.predicted_segmentation"
    return {
        f"{prefix}.word_accuracy": correct / total if total else 0.0,
        f"{prefix}.words": float(total),
    }
