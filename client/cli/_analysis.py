"""What ``midstream inspect`` computes from a revision log: per-word timelines and scores.

Everything here is pure: a :class:`~midstream.client.cli._records.RevisionLog` in, plain values out.
Scores against gold labels compare the stream's own words, so they are only as meaningful as the
corpus annotation the log carries (named in its ``source``).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

from midstream import (
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client._results import RevisionHistory, Snapshot, Welcome
from midstream.client.cli._records import RevisionLog, SentWord


class FinalReason:
    """Why a word's label became final (as far as the log shows)."""

    CONVERSATION_ENDED = "conversation ended"
    UTTERANCE_CLOSED = "utterance closed"
    LEFT_WINDOW = "left the window"
    NOT_FINAL = "not final"


@dataclass(frozen=True, slots=True, kw_only=True)
class LabelChange:
    """One published state of a word: the update it came in and what it said."""

    seq: int
    server_time: float | None
    sent: int | None
    label: DisfluencyLabel
    confidence: float
    final: bool


@dataclass(slots=True, kw_only=True)
class WordTimeline:
    """Every state one word had, in order, and why it became final."""

    word_id: str
    speaker: str
    text: str
    order: int
    changes: list[LabelChange] = field(default_factory=list)
    final_reason: str = FinalReason.NOT_FINAL
    gold: DisfluencyLabel | None = None

    @property
    def label(self) -> DisfluencyLabel | None:
        """The last label published."""
        return self.changes[-1].label if self.changes else None

    @property
    def label_changes(self) -> int:
        """How many times the label (not only its confidence) changed."""
        return sum(1 for a, b in zip(self.changes, self.changes[1:], strict=False)
                   if a.label != b.label)


@dataclass(slots=True, kw_only=True)
class Analysis:
    """Timelines and (when gold is present) scores of one conversation's stream."""

    conversation_id: str
    source: str
    words: list[WordTimeline]
    utterances: dict[str, list[tuple[int, UtteranceHypothesis]]]
    updates: int
    truncated: bool = False
    function_accuracy_by_seen: list[tuple[int, float, int]] = field(default_factory=list)
    """``(words seen, accuracy, utterances counted)`` for utterance functions."""

    @property
    def has_gold(self) -> bool:
        return any(w.gold is not None for w in self.words)

    def confusion(self) -> tuple[list[DisfluencyLabel], list[list[int]]]:
        """Labels in enum order and counts ``matrix[gold][final]`` over words with gold."""
        labels = list(DisfluencyLabel)
        index = {label: i for i, label in enumerate(labels)}
        matrix = [[0] * len(labels) for _ in labels]
        for word in self.words:
            if word.gold is not None and word.label is not None:
                matrix[index[word.gold]][index[word.label]] += 1
        return labels, matrix

    def word_accuracy(self) -> float | None:
        scored = [w for w in self.words if w.gold is not None and w.label is not None]
        if not scored:
            return None
        return sum(1 for w in scored if w.gold == w.label) / len(scored)

    def final_reasons(self) -> Counter[str]:
        return Counter(w.final_reason for w in self.words)


def analyse(log: RevisionLog, *, max_seen: int = 20) -> Analysis:
    """Fold a revision log into per-word timelines and scores.

    Utterance-function accuracy after *k* words seen scores, for each gold utterance with at
    least *k* words, the function of the predicted utterance holding its *k*-th word right after
    the update that first published that word (what the stream said at that moment), against
    the gold function.
    """
    sent: dict[str, SentWord] = {w.word_id: w for w in log.words}
    order = {w.word_id: i for i, w in enumerate(log.words)}
    timelines: dict[str, WordTimeline] = {}
    utterances: dict[str, list[tuple[int, UtteranceHypothesis]]] = {}
    utterance_of_word: dict[str, str] = {}
    function_of: dict[str, UtteranceFunction] = {}

    # Gold utterances: their words in sent order, for the words-seen curve.
    gold_position: dict[str, tuple[int, int]] = {}
    gold_function: dict[int, UtteranceFunction] = {}
    seen_in: Counter[int] = Counter()
    for word in log.words:
        if word.gold is not None and word.gold.utterance is not None:
            number = word.gold.utterance
            seen_in[number] += 1
            gold_position[word.word_id] = (number, seen_in[number])
            if word.gold.function is not None:
                gold_function[number] = word.gold.function
    hits: Counter[int] = Counter()
    counts: Counter[int] = Counter()

    updates = 0
    for event, sent_count in log.events:
        if isinstance(event, HypothesisUpdate):
            updates += 1
            seq, time, final, diff = (event.seq, event.server_time, event.conversation_final,
                                      event.diff)
        elif isinstance(event, Snapshot):
            seq, time, final = event.seq, None, event.conversation_final
            diff = HypothesisDiff(words=event.words, utterances=event.utterances)
        else:
            continue
        closed: set[str] = set()
        for utterance in diff.utterances:
            utterances.setdefault(utterance.utterance_id, []).append((seq, utterance))
            function_of[utterance.utterance_id] = utterance.function
            for word_id in utterance.word_ids:
                utterance_of_word[word_id] = utterance.utterance_id
                if utterance.final:
                    closed.add(word_id)
        first_seen: list[str] = []
        for state in diff.words:
            timeline = timelines.get(state.word_id)
            if timeline is None:
                source = sent.get(state.word_id)
                timeline = timelines[state.word_id] = WordTimeline(
                    word_id=state.word_id, speaker=state.speaker,
                    text=source.text if source is not None else state.text or state.word_id,
                    order=order.get(state.word_id, len(order) + len(timelines)),
                    gold=source.gold.label if source is not None and source.gold else None)
                first_seen.append(state.word_id)
            _add_change(timeline, state, seq, time, sent_count)
            if state.final and timeline.final_reason == FinalReason.NOT_FINAL:
                timeline.final_reason = (
                    FinalReason.CONVERSATION_ENDED if final
                    else FinalReason.UTTERANCE_CLOSED if state.word_id in closed
                    else FinalReason.LEFT_WINDOW)
        for word_id in first_seen:
            if word_id not in gold_position:
                continue
            number, k = gold_position[word_id]
            if number not in gold_function or k > max_seen:
                continue
            predicted_utterance = utterance_of_word.get(word_id)
            predicted = function_of.get(predicted_utterance) if predicted_utterance else None
            counts[k] += 1
            hits[k] += int(predicted == gold_function[number])
        for word_id in diff.withdrawn_word_ids:
            timelines.pop(word_id, None)

    curve = [(k, hits[k] / counts[k], counts[k]) for k in sorted(counts)]
    words = sorted(timelines.values(), key=lambda t: t.order)
    conversation_id = log.conversation_id or next(
        (e.conversation_id for e, _ in log.events if isinstance(e, Welcome)), "")
    return Analysis(conversation_id=conversation_id, source=log.source, words=words,
                    utterances=utterances, updates=updates, function_accuracy_by_seen=curve)


def _add_change(timeline: WordTimeline, state: WordHypothesis, seq: int, time: float | None,
                sent: int | None) -> None:
    timeline.changes.append(LabelChange(seq=seq, server_time=time, sent=sent, label=state.label,
                                        confidence=state.confidence, final=state.final))


def log_from_history(history: RevisionHistory, *, ended: bool) -> RevisionLog:
    """A revision log rebuilt from a server's ``GetRevisions`` reply (no gold).

    Words sent are not in it; each word's text comes with its states.

    Revisions sharing a seq form one update. ``ended``: the conversation has ended, so its
    last update was the one that finalised everything.
    """
    grouped: dict[int, tuple[float, list[WordHypothesis], list[UtteranceHypothesis]]] = {}
    for revision in history.revisions:
        time, words, utterances = grouped.setdefault(revision.seq,
                                                     (revision.server_time, [], []))
        if isinstance(revision.state, WordHypothesis):
            words.append(revision.state)
        else:
            utterances.append(revision.state)
    last = max(grouped, default=0)
    log = RevisionLog(conversation_id=history.conversation_id,
                      source=f"GetRevisions {history.conversation_id}")
    for seq in sorted(grouped):
        time, words, utterances = grouped[seq]
        log.events.append((HypothesisUpdate(
            seq=seq, server_time=time,
            diff=HypothesisDiff(words=tuple(words), utterances=tuple(utterances)),
            conversation_final=ended and seq == last), None))
    return log
