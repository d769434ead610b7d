"""Evaluating the word model by replaying annotated conversations word by word.

Every speaker channel is fed to a :class:`~midstream.models.words._decoder.ChannelDecoder` one word
at a time, and every state the decoder reports is recorded with the step (the channel position of
the newest word) at which it was said. Scores use only what the stream had said at each moment; no
gold boundary is ever given to the decoder.

Reported keys (all in ``[0, 1]`` unless a unit is named):

``disfluency.<label>.{precision,recall,f1}``
    word-level scores of each :class:`~midstream.DisfluencyLabel` on the final streaming output
    (the positive class is the label; gold from the corpus annotation).
``disfluency.reparandum_no_fragments.f1``
    reparandum F1 with word fragments left out (recognisers rarely emit fragments).
``disfluency.edited_no_fragments.f1``
    F1 of EDITED words, fragments left out, as published Switchboard disfluency figures are
    scored (Charniak & Johnson, NAACL 2001, and Johnson & Charniak, ACL 2004, score the words
    under the Treebank's EDITED nodes, fragments excluded: from memory). EDITED nodes come from
    the bracket markup (Meteer et al. 1995): reparanda and bracket restarts ``[ X + ]``. An
    abandoned utterance (``-/``) is an incomplete sentence in the Treebank, not an EDITED node
    (from memory), so on the gold side its restart words are not EDITED; on the predicted side
    every reparandum or restart word is, whatever its kind.
``disfluency.edited_with_abandoned_no_fragments.f1``
    the same with abandoned utterances' restart words counted as EDITED on the gold side too
    (our restart label covers both kinds; this is the stricter figure).
``disfluency.restart.{bracket,abandoned}.{precision,recall,f1}``
    restart words of each kind (``corpora/_restarts.py``). Gold kind: a restart word inside an
    abandoned utterance is ``abandoned``, any other ``bracket``. Predicted kind: a restart word
    whose run of restart words (fillers and editing terms inside it skipped) reaches a predicted
    utterance end is ``abandoned``, any other ``bracket``. ``disfluency.restart.*`` counts both.
``disfluency.offline.reparandum.f1``
    the same model decoding each whole channel at once (crfsuite's own Viterbi).
``incremental.edit_overhead``
    edit overhead (Baumann, Buß & Schlangen, "Evaluation and optimisation of incremental
    processors", Dialogue & Discourse 2(1), 2011): the share of all edits to the output that
    were unnecessary, where the necessary ones are those a processor that never revises would
    make. Here the output is each word's label: a word's first label is its one necessary edit
    and every later change of label an unnecessary one, whether the change was right or wrong
    (a change counts once, as a substitution, rather than as a revoke and an add; how the paper
    counts a substitution is from memory). :class:`EditCounts` does the counting.
``incremental.time_to_detection_words.median`` and ``incremental.detection_rate``
    time to detection (Zwarts, Johnson & Dale, "Detecting speech repairs incrementally using a
    noisy channel approach", COLING 2010; from memory): for gold repairs with an onset, words
    of the channel from the repair onset (the first word at which the repair can be seen)
    until the reparandum's first word was first labelled reparandum (negative: before the
    onset arrived), and the share of such reparanda ever so labelled. The paper averages over
    detected repairs (from memory); the median here is less swayed by a few late detections.
``incremental.final_decision_delay_words.mean``
    words that arrived after a word before it became final.
``incremental.reparandum_f1_at_delay.{0,1,2}``
    delayed accuracy (Zwarts, Johnson & Dale 2010, as above; from memory): reparandum F1 of
    the labels as they stood ``d`` words after each word arrived, so ``d = 0`` scores a word's
    label before any right context existed.
``segmentation.{precision,recall,f1}``
    utterance ends (the last word of each gold utterance in its speaker's channel), final output.
    Words are fed with the times, speaker changes and overlaps the corpus gives (MRDA has word
    times; SwDA and Map Task none), and no caller hint.

Disfluency metrics use disfluency-annotated conversations only (NaN when there is none);
segmentation uses all.
"""

from __future__ import annotations

import statistics
import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from midstream import Conversation, DisfluencyLabel
from midstream.models._recogniser import SilenceTick, silence_ticks
from midstream.models.boundaries._model import BoundaryModel, overlap_flags
from midstream.models.words._decoder import ChannelDecoder, DecoderConfig, TokenState
from midstream.models.words._features import tokens_from_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import ChannelSequence, channel_sequences, decode_tag
from tqdm import tqdm

__all__ = ["BinaryCounts", "EditCounts", "evaluate_words", "offline_scores"]

_DELAYS = (0, 1, 2)
_RESTART_KINDS = ("bracket", "abandoned")
_EDITED = frozenset({DisfluencyLabel.REPARANDUM, DisfluencyLabel.RESTART})
#: Labels a run of restart words may hold without ending (they stay inside brackets too).
_INSIDE_RESTART = frozenset({DisfluencyLabel.FILLER, DisfluencyLabel.EDIT_TERM})


def restart_kinds(labels: Sequence[DisfluencyLabel | None], ends: Sequence[bool]) -> list[str]:
    """The kind of each restart word of one channel ("" for other words).

    A restart word is ``abandoned`` when its run of restart words (fillers and editing terms
    inside it skipped) reaches an utterance end, else ``bracket``.

    >>> R, F = DisfluencyLabel.RESTART, DisfluencyLabel.FLUENT
    >>> restart_kinds([R, F, R, R], [False, False, False, True])
    ['bracket', '', 'abandoned', 'abandoned']
    """
    kinds = [""] * len(labels)
    kind = "bracket"  # what a restart word gets at this point, walking right to left
    for position in range(len(labels) - 1, -1, -1):
        label = labels[position]
        if label is DisfluencyLabel.RESTART or label in _INSIDE_RESTART:
            if ends[position]:
                kind = "abandoned"
            if label is DisfluencyLabel.RESTART:
                kinds[position] = kind
        else:
            kind = "bracket"
    return kinds


@dataclass(slots=True)
class BinaryCounts:
    """True positives, false positives and false negatives of one binary decision."""

    tp: int = 0
    fp: int = 0
    fn: int = 0

    def add(self, predicted: bool, gold: bool) -> None:
        if predicted and gold:
            self.tp += 1
        elif predicted:
            self.fp += 1
        elif gold:
            self.fn += 1

    @property
    def precision(self) -> float:
        return self.tp / (self.tp + self.fp) if self.tp + self.fp else 0.0

    @property
    def recall(self) -> float:
        return self.tp / (self.tp + self.fn) if self.tp + self.fn else 0.0

    @property
    def f1(self) -> float:
        denominator = 2 * self.tp + self.fp + self.fn
        return 2 * self.tp / denominator if denominator else 0.0


@dataclass(slots=True)
class EditCounts:
    """Edits to a stream's word labels, for edit overhead (Baumann, Buß & Schlangen 2011).

    Feed each word's labels in the order the stream showed them (:meth:`add`); a word's first
    label is the one necessary edit and every change after it an unnecessary one. Showing a
    word again with the label it already had (a confidence moved) is no edit.

    Examples
    --------
    A word shown fluent, then reparandum, then fluent again made three edits, one necessary:

    >>> counts = EditCounts()
    >>> counts.add(["fluent", "reparandum", "fluent"])
    >>> counts.add(["filler", "filler"])
    >>> counts.edits, counts.words, round(counts.overhead, 3)
    (4, 2, 0.5)
    """

    edits: int = 0
    words: int = 0

    def add(self, labels: Sequence[object]) -> None:
        """Count one word from the labels it was shown with, oldest first."""
        shown = sum(1 for i, label in enumerate(labels) if i == 0 or label != labels[i - 1])
        if shown:  # a word never shown made no edit, necessary or not
            self.edits += shown
            self.words += 1

    @property
    def overhead(self) -> float:
        """Unnecessary edits over all edits (0 when nothing was shown)."""
        return (self.edits - self.words) / self.edits if self.edits else 0.0


@dataclass(slots=True)
class _Tally:
    labels: dict[DisfluencyLabel, BinaryCounts] = field(
        default_factory=lambda: {label: BinaryCounts() for label in DisfluencyLabel}
    )
    no_fragments: BinaryCounts = field(default_factory=BinaryCounts)
    edited: BinaryCounts = field(default_factory=BinaryCounts)
    edited_with_abandoned: BinaryCounts = field(default_factory=BinaryCounts)
    restart_kinds: dict[str, BinaryCounts] = field(
        default_factory=lambda: {kind: BinaryCounts() for kind in _RESTART_KINDS}
    )
    offline: BinaryCounts = field(default_factory=BinaryCounts)
    at_delay: dict[int, BinaryCounts] = field(
        default_factory=lambda: {d: BinaryCounts() for d in _DELAYS}
    )
    segmentation: BinaryCounts = field(default_factory=BinaryCounts)
    edit_counts: EditCounts = field(default_factory=EditCounts)
    detection_delays: list[int] = field(default_factory=list)
    gold_repairs: int = 0
    final_delays: list[int] = field(default_factory=list)


def _gold_labels(channel: ChannelSequence) -> list[DisfluencyLabel] | None:
    if channel.tags is None:
        return None
    return [decode_tag(t)[1] for t in channel.tags]


@dataclass(slots=True)
class _Stream:
    """What streaming one channel said: label changes per word and the final states."""

    history: list[list[tuple[int, DisfluencyLabel]]]
    final_label: list[DisfluencyLabel | None]
    final_end: list[bool]
    final_step: list[int]


def _stream_channel(channel: ChannelSequence, model: WordModel, config: DecoderConfig,
                    boundary: BoundaryModel | None = None,
                    overlap: Sequence[bool] | None = None, *,
                    ticks: Sequence[SilenceTick] = (),
                    speakers: Sequence[str] = ()) -> _Stream:
    """Stream one channel; ``ticks`` (conversation-wide, in sending order) reach it between its
    words as they would live, ``speakers`` (each conversation word's) telling whether another
    speaker's word was the last to arrive before a tick."""
    decoder = ChannelDecoder(model, config, boundary)
    n = len(channel.words)
    stream = _Stream(history=[[] for _ in range(n)], final_label=[None] * n,
                     final_end=[False] * n, final_step=[n - 1] * n)

    def record(states: Iterable[TokenState], step: int) -> None:
        for state in states:
            key = state.key
            steps = stream.history[key]
            if not steps or steps[-1][1] != state.label:
                steps.append((step, state.label))
            if state.final:
                stream.final_label[key] = state.label
                stream.final_end[key] = state.ends_utterance
                stream.final_step[key] = step

    other_words = channel.other_words or (0,) * n  # a channel built without the counts
    pending = iter(ticks)
    tick = next(pending, None)

    def send_ticks(current: SilenceTick | None, until: int, step: int) -> SilenceTick | None:
        # From `current` on, the ticks sent before conversation word `until` (all left: -1);
        # returns the first tick not sent.
        while current is not None and (until < 0 or current.before <= until):
            record(decoder.tick(current.time,
                                other_spoke=speakers[current.before - 1] != channel.speaker),
                   step)
            current = next(pending, None)
        return current

    for position, word in enumerate(channel.words):
        if tick is not None:
            if position:
                tick = send_ticks(tick, channel.indices[position], position - 1)
            else:  # before the channel's first word there is nothing to close
                while tick is not None and tick.before <= channel.indices[0]:
                    tick = next(pending, None)
        record(
            decoder.append(position, word,
                           after_other_speaker=channel.after_other_speaker[position],
                           other_words=other_words[position],
                           overlap=overlap is not None and overlap[channel.indices[position]]),
            position,
        )
    if tick is not None and n:
        send_ticks(tick, -1, n - 1)
    record(decoder.finish(), n - 1)
    return stream


def streaming_final_labels(conversation: Conversation, model: WordModel,
                           config: DecoderConfig | None = None) -> list[DisfluencyLabel]:
    """The final label of every word of ``conversation`` (conversation order), as scored.

    This is exactly what :func:`evaluate_words` scores: each speaker channel streamed word by
    word through a :class:`ChannelDecoder`.
    """
    labels: list[DisfluencyLabel | None] = [None] * len(conversation.words)
    for channel in channel_sequences(conversation):
        stream = _stream_channel(channel, model, config or DecoderConfig())
        for position, index in enumerate(channel.indices):
            labels[index] = stream.final_label[position]
    if any(label is None for label in labels):
        raise AssertionError("a word was left without a final label")
    return [label for label in labels if label is not None]


def _replay(
    channel: ChannelSequence, model: WordModel, config: DecoderConfig, tally: _Tally,
    conversation: Conversation, *, boundary: BoundaryModel | None = None,
    overlap: Sequence[bool] | None = None, ticks: Sequence[SilenceTick] = (),
    speakers: Sequence[str] = (),
) -> None:
    n = len(channel.words)
    stream = _stream_channel(channel, model, config, boundary, overlap, ticks=ticks,
                             speakers=speakers)
    history, final_label = stream.history, stream.final_label
    final_end, final_step = stream.final_end, stream.final_step

    for position in range(n):
        tally.segmentation.add(final_end[position], channel.ends[position])
    gold = _gold_labels(channel)
    if gold is None:
        return
    predicted = final_label
    for position in range(n):
        label = predicted[position]
        assert label is not None, "decoder left a word without a final state"
        for name, counts in tally.labels.items():
            counts.add(label == name, gold[position] == name)
        is_rep = gold[position] == DisfluencyLabel.REPARANDUM
        if not channel.words[position].fragment:
            tally.no_fragments.add(label == DisfluencyLabel.REPARANDUM, is_rep)
        for d in _DELAYS:
            step = position + d
            at = [lab for s, lab in history[position] if s <= step]
            tally.at_delay[d].add(bool(at) and at[-1] == DisfluencyLabel.REPARANDUM, is_rep)
        tally.edit_counts.add([label for _, label in history[position]])
        tally.final_delays.append(final_step[position] - position)
    abandoned = {i for u in conversation.utterances if u.abandoned for i in u.words}
    for position, index in enumerate(channel.indices):
        if not channel.words[position].fragment:
            edited = predicted[position] in _EDITED
            # The Treebank's EDITED nodes come from the bracket markup alone: an abandoned
            # utterance's words sit in an incomplete sentence, not under EDITED (from memory).
            tally.edited.add(edited, gold[position] in _EDITED and index not in abandoned)
            tally.edited_with_abandoned.add(edited, gold[position] in _EDITED)
    predicted_kind = restart_kinds(predicted, final_end)
    for position, index in enumerate(channel.indices):
        gold_kind = ""
        if gold[position] is DisfluencyLabel.RESTART:
            gold_kind = "abandoned" if index in abandoned else "bracket"
        for kind, counts in tally.restart_kinds.items():
            counts.add(predicted_kind[position] == kind, gold_kind == kind)
    offline = model.tag_tokens(tokens_from_words(
        channel.words, channel.after_other_speaker, channel.other_words))
    for position, tag in enumerate(offline):
        tally.offline.add(
            decode_tag(tag)[1] == DisfluencyLabel.REPARANDUM,
            gold[position] == DisfluencyLabel.REPARANDUM,
        )
    # Time to detection, over the gold repairs of this channel that have an onset.
    where = {index: position for position, index in enumerate(channel.indices)}
    for repair in conversation.repairs:
        if repair.repair_onset is None or repair.reparandum[0] not in where:
            continue
        onset = where.get(repair.repair_onset)
        if onset is None:
            continue
        tally.gold_repairs += 1
        first = where[repair.reparandum[0]]
        detected = [s for s, lab in history[first] if lab == DisfluencyLabel.REPARANDUM]
        if detected:
            tally.detection_delays.append(detected[0] - onset)


def evaluate_words(
    conversations: Iterable[Conversation],
    model: WordModel,
    *,
    config: DecoderConfig | None = None,
    progress: bool = False,
    boundary: BoundaryModel | None = None,
    ticks: bool = False,
) -> dict[str, float]:
    """Replay every conversation's channels and score them (keys in the module docstring).

    ``boundary``: the boundary model whose timing evidence joins the word model's utterance
    ends, as in the server (``None``: the word model alone). ``ticks``: with a boundary model,
    send the time ticks of :func:`~midstream.models._recogniser.silence_ticks` through every
    silence, so an utterance closes during the silence after it as on a live stream (and
    stays closed whatever the speaker's next word is); untimed words get none.
    """
    config = DecoderConfig() if config is None else config
    tally = _Tally()
    conversations = list(conversations)
    for conversation in tqdm(conversations, desc="evaluate words", file=sys.stderr,
                             disable=not progress):
        overlap = overlap_flags(conversation) if boundary is not None else None
        sent: tuple[SilenceTick, ...] = ()
        if ticks and boundary is not None:
            sent = silence_ticks(conversation, boundary.silence_marks)
        speakers = [word.speaker for word in conversation.words] if sent else []
        for channel in channel_sequences(conversation):
            _replay(channel, model, config, tally, conversation, boundary=boundary,
                    overlap=overlap, ticks=sent, speakers=speakers)
    result: dict[str, float] = {}
    for label, counts in tally.labels.items():
        result[f"disfluency.{label.value}.precision"] = counts.precision
        result[f"disfluency.{label.value}.recall"] = counts.recall
        result[f"disfluency.{label.value}.f1"] = counts.f1
    result["disfluency.reparandum_no_fragments.f1"] = tally.no_fragments.f1
    result["disfluency.edited_no_fragments.f1"] = tally.edited.f1
    result["disfluency.edited_with_abandoned_no_fragments.f1"] = tally.edited_with_abandoned.f1
    for kind, counts in tally.restart_kinds.items():
        result[f"disfluency.restart.{kind}.precision"] = counts.precision
        result[f"disfluency.restart.{kind}.recall"] = counts.recall
        result[f"disfluency.restart.{kind}.f1"] = counts.f1
    result["disfluency.offline.reparandum.f1"] = tally.offline.f1
    result["incremental.edit_overhead"] = tally.edit_counts.overhead
    result["incremental.time_to_detection_words.median"] = (
        float(statistics.median(tally.detection_delays)) if tally.detection_delays
        else float("nan")
    )
    result["incremental.detection_rate"] = (
        len(tally.detection_delays) / tally.gold_repairs if tally.gold_repairs else 0.0
    )
    result["incremental.final_decision_delay_words.mean"] = (
        statistics.fmean(tally.final_delays) if tally.final_delays else float("nan")
    )
    for d, counts in tally.at_delay.items():
        result[f"incremental.reparandum_f1_at_delay.{d}"] = counts.f1
    if not tally.edit_counts.words:
        # No disfluency-annotated conversation: these figures are unknown, not zero.
        result = {k: float("nan") for k in result}
    result["segmentation.precision"] = tally.segmentation.precision
    result["segmentation.recall"] = tally.segmentation.recall
    result["segmentation.f1"] = tally.segmentation.f1
    return result


def offline_scores(conversations: Sequence[Conversation], model: WordModel) -> dict[str, float]:
    """Quick offline scores (whole channels at once) used by cross-validation."""
    reparandum = BinaryCounts()
    filler = BinaryCounts()
    segmentation = BinaryCounts()
    for conversation in conversations:
        for channel in channel_sequences(conversation):
            tokens = tokens_from_words(channel.words, channel.after_other_speaker,
                                       channel.other_words)
            tags = [decode_tag(t) for t in model.tag_tokens(tokens)]
            gold = _gold_labels(channel)
            for position, (_, label, ends) in enumerate(tags):
                segmentation.add(ends, channel.ends[position])
                if gold is not None:
                    reparandum.add(label == DisfluencyLabel.REPARANDUM,
                                   gold[position] == DisfluencyLabel.REPARANDUM)
                    filler.add(label == DisfluencyLabel.FILLER,
                               gold[position] == DisfluencyLabel.FILLER)
    return {
        "reparandum_f1": reparandum.f1,
        "filler_f1": filler.f1,
        "segmentation_f1": segmentation.f1,
    }
