"""The domain: words, speakers, labels, annotated conversations and hypotheses.

Everything here is pure data: frozen dataclasses and string enums, no I/O. The same types serve
the corpus readers (gold annotation), the models (what they predict) and the server (what it
publishes); generated protobuf types are converted to and from these at the network edges only.

Units: times are seconds from the start of the conversation; confidences are probabilities in
``[0, 1]``. Word indices count words of one conversation in time order, from 0.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum


class DisfluencyLabel(StrEnum):
    """What a word does in the disfluency structure of its utterance.

    Terms follow Shriberg (1994): a *reparandum* is the stretch of speech the speaker goes back
    on, the *interruption point* follows its last word, an optional *interregnum* of editing terms
    and filled pauses comes next, and the *repair* replaces the reparandum. ``REPAIR`` marks only
    the first word of the repair (its onset): later repair words are fluent speech.
    """

    FLUENT = "fluent"
    FILLER = "filler"
    """Filled pause: "uh", "um"."""
    EDIT_TERM = "edit_term"
    """Explicit editing term: "I mean", "sorry", "no wait"."""
    DISCOURSE_MARKER = "discourse_marker"
    """"well", "you know", "like" used as a discourse marker."""
    REPARANDUM = "reparandum"
    """Word of a reparandum that a repair replaces."""
    REPAIR = "repair"
    """First word of a repair (the repair onset)."""
    RESTART = "restart"
    """Word of an abandoned stretch with no repair (a restart)."""


#: Labels whose words a reader drops to get the speaker's intended, clean text.
REMOVED_FROM_CLEAN_TEXT: frozenset[DisfluencyLabel] = frozenset(
    {
        DisfluencyLabel.FILLER,
        DisfluencyLabel.EDIT_TERM,
        DisfluencyLabel.REPARANDUM,
        DisfluencyLabel.RESTART,
    }
)


class UtteranceFunction(StrEnum):
    """Coarse communicative function of an utterance, aligned to ISO 24617-2.

    The alignment to ISO 24617-2 general-purpose and feedback functions is tabulated in
    ``docs/labels.md``; the fine corpus tags map onto these through the tables in
    ``midstream/data``.
    """

    STATEMENT = "statement"
    QUESTION = "question"
    ANSWER = "answer"
    AGREEMENT = "agreement"
    ACKNOWLEDGEMENT = "acknowledgement"
    CLARIFICATION_REQUEST = "clarification_request"
    OTHER = "other"


@dataclass(frozen=True, slots=True, kw_only=True)
class Word:
    """One word as a live speech recogniser gives it.

    ``text`` is lower case with no punctuation (recogniser output). ``fragment`` marks a word
    the speaker broke off ("s-"); recognisers rarely emit those, so evaluation can leave them out.
    """

    text: str
    speaker: str
    start: float | None = None
    end: float | None = None
    confidence: float | None = None
    fragment: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class Repair:
    """A repair structure over word indices of one conversation (Shriberg 1994).

    ``reparandum`` lists the words gone back on; the interruption point follows its last word.
    ``interregnum`` lists editing terms and filled pauses between the interruption point and the
    repair. ``repair_onset`` is the first word of the repair, or ``None`` for a restart, where the
    speaker abandons the reparandum and starts afresh.
    """

    reparandum: tuple[int, ...]
    interregnum: tuple[int, ...] = ()
    repair_onset: int | None = None

    @property
    def is_restart(self) -> bool:
        return self.repair_onset is None

    @property
    def interruption_point(self) -> int:
        """Index of the word the interruption point follows (the reparandum's last word)."""
        return self.reparandum[-1]


@dataclass(frozen=True, slots=True, kw_only=True)
class Utterance:
    """One utterance (a SwDA slash unit, an MRDA segment, a Map Task move).

    ``words`` are indices into the conversation's words, ascending. They need not be contiguous:
    a speaker's utterance may be interrupted by the other speaker and continued afterwards.
    ``fine_tag`` is the corpus's own tag as written; ``fine_class`` its clustered class (the
    SWBD-DAMSL 42 classes for SwDA, the corpus's label set elsewhere); ``function`` the coarse one.
    """

    speaker: str
    words: tuple[int, ...]
    function: UtteranceFunction
    fine_tag: str
    fine_class: str
    complete: bool = True


@dataclass(frozen=True, slots=True, kw_only=True)
class Conversation:
    """An annotated conversation: all speakers' words in time order, with gold layers.

    ``labels`` is ``None`` when the conversation carries no disfluency annotation at all: it
    must then never be scored as if every word were fluent.

    ``interruption_points`` lists the words after which a speaker broke off, for corpora that
    mark interruption points without the full repair structure (MRDA's `` - ``); it is empty
    where a corpus marks none, and ``repairs`` carries the interruption points of full
    annotations.
    """

    id: str
    corpus: str
    words: tuple[Word, ...]
    utterances: tuple[Utterance, ...]
    labels: tuple[DisfluencyLabel, ...] | None = None
    repairs: tuple[Repair, ...] = ()
    unbalanced_brackets: int = 0
    interruption_points: tuple[int, ...] = ()

    @property
    def speakers(self) -> tuple[str, ...]:
        """Speakers in order of first appearance."""
        return tuple(dict.fromkeys(w.speaker for w in self.words))

    @property
    def disfluency_annotated(self) -> bool:
        return self.labels is not None


@dataclass(frozen=True, slots=True, kw_only=True)
class WordHypothesis:
    """The current hypothesis about one streamed word.

    ``revision`` counts how many times the published label or confidence changed (0 for the
    first publication). Once ``final`` is true the label never changes again.
    ``reparandum_of`` links a reparandum or restart word to the repair onset that replaces it
    (``None`` for a restart or any other label); ``interruption_point`` is true on the last word
    of a reparandum.
    """

    word_id: str
    speaker: str
    label: DisfluencyLabel
    confidence: float
    revision: int
    final: bool
    reparandum_of: str | None = None
    interruption_point: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class UtteranceHypothesis:
    """The current hypothesis about one utterance as it grows."""

    utterance_id: str
    speaker: str
    word_ids: tuple[str, ...]
    clean_text: str
    function: UtteranceFunction
    fine_class: str
    confidence: float
    revision: int
    final: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class HypothesisDiff:
    """What changed after one input event: only the words and utterances whose state moved."""

    words: tuple[WordHypothesis, ...] = ()
    utterances: tuple[UtteranceHypothesis, ...] = ()
    withdrawn_word_ids: tuple[str, ...] = field(default=())

    def __bool__(self) -> bool:
        return bool(self.words or self.utterances or self.withdrawn_word_ids)


@dataclass(frozen=True, slots=True, kw_only=True)
class HypothesisUpdate:
    """One published update of a conversation: a diff with its place in the sequence.

    ``seq`` counts a conversation's updates from 1 without gaps; ``server_time`` is Unix time in
    seconds when the server published it. ``conversation_final`` is set on the update that
    finalised everything when the conversation ended. ``epoch`` tells this conversation apart
    from any other that uses or used the same id (a random number chosen when it was opened;
    0 when unknown): sequence numbers continue only within one epoch.
    """

    seq: int
    server_time: float
    diff: HypothesisDiff
    conversation_final: bool = False
    epoch: int = 0
