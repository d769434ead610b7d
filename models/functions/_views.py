"""The utterance as the function tagger sees it, the one rule that builds it, and the check of
one a caller built.

:func:`build_view` is the only place that decides which words of an utterance the function tagger
sees: training and offline evaluation (gold labels, :func:`clean_view`) and the live engine (the
word tagger's labels) all call it, so a model is served the view it was trained on. The same
holds for the context: every utterance, also one with no word left after cleaning ("uh"), takes
its place on the chain, offline and live.

Kept apart from the tagger and its features because those modules may be compiled
(``core/_build.py``): a compiled dataclass checks its field types itself and a compiled function
its argument types, so a caller's malformed view would raise a bare ``TypeError`` before
:func:`check_view` could name the problem as an :class:`~midstream.InputError`. Here, as plain
Python, the view holds whatever it was given until it is checked.
"""

from __future__ import annotations

import bisect
import itertools
import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    DisfluencyLabel,
    InputError,
    Utterance,
)

__all__ = ["NO_PARTNER_YET", "UtteranceView", "build_view", "check_view", "clean_view",
           "conversation_views", "iter_views", "partner_gap"]

#: :attr:`UtteranceView.partner_gap` of a timed utterance before which no other speaker has
#: spoken: the conversation's opening, or a speaker alone so far.
NO_PARTNER_YET = math.inf

# Removed opening words whose identity the view keeps: a filled pause or an editing term says
# how the speaker starts ("sorry", "pardon", "uh"); a reparandum or restart is content that the
# repair replaces, already seen in the words that follow.
_OPENING_LABELS = frozenset({DisfluencyLabel.FILLER, DisfluencyLabel.EDIT_TERM})


@dataclass(frozen=True, slots=True, kw_only=True)
class UtteranceView:
    """One utterance as the function tagger sees it.

    Parameters
    ----------
    speaker
        Speaker id; only equality with the previous utterance's speaker is used.
    words
        The cleaned words, lower case, in order (disfluent words already removed).
    removed
        How many words were removed as filler, editing term, reparandum or restart.
    complete
        ``False`` while the utterance may still grow; ``True`` once it has ended (an abandoned
        utterance too: a live stream cannot tell abandoned from ended, so training does not
        either).
    opening
        The utterance's first word when it was removed as a filler or an editing
        term; ``""`` otherwise. Cleaning takes "sorry" out of "sorry which day" as an editing
        term, yet the word is the opening cue of a repetition request, so the view keeps which
        word it was.
    partner_gap
        Seconds from the end of the last word another speaker began before this utterance's
        first word to that first word's start (:func:`partner_gap`): negative when the other
        speaker was still talking, :data:`NO_PARTNER_YET` when no other speaker had spoken,
        ``None`` when the words carry no times (then nothing is read from timing).
    """

    speaker: str
    words: tuple[str, ...]
    removed: int = 0
    complete: bool = True
    opening: str = ""
    partner_gap: float | None = None

    def prefix(self, n: int) -> UtteranceView:
        """The view after only the first ``n`` cleaned words (incomplete when ``n`` is short)."""
        if n >= len(self.words):
            return self
        return UtteranceView(speaker=self.speaker, words=self.words[:n], removed=self.removed,
                             complete=False, opening=self.opening,
                             partner_gap=self.partner_gap)


def partner_gap(start: float, others: Iterable[Sequence[tuple[float, float]]]) -> float:
    """The :attr:`UtteranceView.partner_gap` of an utterance whose first word starts at
    ``start``, offline and live alike.

    Parameters
    ----------
    start
        The start time of the utterance's first received word.
    others
        For each other speaker, ``(start, end)`` of their words so far, in order of start.

    Returns
    -------
    float
        The smallest ``start - end`` over the other speakers' last word begun at or before
        ``start`` (negative while one of them is talking); :data:`NO_PARTNER_YET` when none
        had begun a word by then.

    Examples
    --------
    >>> partner_gap(5.0, [[(1.0, 1.5), (3.0, 4.2), (6.0, 6.5)]])
    0.8
    >>> partner_gap(5.0, [[(4.5, 5.4)], [(0.0, 0.3)]]) < 0, partner_gap(1.0, [[(2.0, 2.4)]])
    (True, inf)
    """
    gap = NO_PARTNER_YET
    for times in others:
        i = bisect.bisect_right(times, (start, math.inf))
        if i:
            gap = min(gap, round(start - times[i - 1][1], 6))
    return gap


def build_view(speaker: str, words: Iterable[tuple[str, bool, DisfluencyLabel | None]], *,
               complete: bool, gap: float | None = None) -> UtteranceView:
    """The view of an utterance from its received words, offline and live alike.

    Parameters
    ----------
    speaker
        The utterance's speaker.
    words
        ``(text, fragment, label)`` of each received word in order; ``label`` is ``None`` where
        no disfluency labels exist (a conversation without that annotation keeps every word).
    complete
        Whether the utterance has ended.
    gap
        The utterance's :func:`partner_gap`, or ``None`` for untimed words.

    Returns
    -------
    UtteranceView
        Words labelled filler, editing term, reparandum or restart are removed and counted;
        word fragments ("s-") and empty texts are dropped uncounted, because recognisers
        rarely emit fragments and a model should not learn from what it will not be given.
        When the first kept-or-removed word is a filler or an editing term, its text is the
        view's ``opening``.

    Examples
    --------
    >>> F, R = DisfluencyLabel.FLUENT, DisfluencyLabel.FILLER
    >>> build_view("A", [("uh", False, R), ("s", True, F), ("so", False, F)], complete=True)
    UtteranceView(speaker='A', words=('so',), removed=1, complete=True, opening='uh')
    """
    kept: list[str] = []
    removed = 0
    opening = ""
    first = True
    for text, fragment, label in words:
        if first and text and not fragment:
            # Fragments and empty texts are not words a recogniser gives, so the first word is
            # the first whole one.
            first = False
            if label in _OPENING_LABELS:
                opening = text
        if label is not None and label in REMOVED_FROM_CLEAN_TEXT:
            removed += 1
        elif text and not fragment:
            kept.append(text)
    return UtteranceView(speaker=speaker, words=tuple(kept), removed=removed, complete=complete,
                         opening=opening, partner_gap=gap)


def check_view(view: object) -> UtteranceView:
    """Return ``view`` if it is a well-formed :class:`UtteranceView`, else raise InputError."""
    if not isinstance(view, UtteranceView):
        raise InputError(f"expected an UtteranceView, got {type(view).__name__}")
    words = view.words
    if not isinstance(words, tuple) or not all(map(isinstance, words, itertools.repeat(str))):
        raise InputError("UtteranceView.words must be a tuple of strings")
    if view.removed < 0:
        raise InputError(f"UtteranceView.removed must be >= 0, got {view.removed}")
    if not isinstance(view.opening, str):
        raise InputError("UtteranceView.opening must be a string")
    gap = view.partner_gap
    if gap is not None and (not isinstance(gap, (int, float)) or isinstance(gap, bool)
                            or math.isnan(gap) or gap == -math.inf):
        raise InputError(f"UtteranceView.partner_gap must be a number of seconds, "
                         f"inf or None, got {gap!r}")
    return view


def clean_view(conversation: Conversation, utterance: Utterance,
               upto: int | None = None) -> UtteranceView:
    """The view of one annotated utterance, cleaned with the gold disfluency labels.

    Words labelled filler, editing term, reparandum or restart are removed (and counted); a
    conversation without disfluency annotation keeps all its words. Word fragments ("s-") are
    dropped uncounted. The rule is :func:`build_view`'s, which the live engine calls too.

    Parameters
    ----------
    conversation, utterance
        The utterance and the conversation whose words and labels it indexes.
    upto
        Only the utterance's first ``upto`` words (as a stream would have them so far); the view
        is then incomplete unless ``upto`` covers the whole utterance.
    """
    labels = conversation.labels
    indices = utterance.words if upto is None else utterance.words[:upto]
    words = conversation.words
    first = words[utterance.words[0]] if utterance.words else None
    gap = (None if first is None or first.start is None
           else partner_gap(first.start, _timing(conversation).others(utterance.speaker)))
    # A whole utterance counts as complete even when the corpus marks it abandoned (see
    # UtteranceView.complete).
    whole = upto is None or upto >= len(utterance.words)
    return build_view(utterance.speaker,
                      [(words[i].text, words[i].fragment, labels[i] if labels is not None
                        else None) for i in indices],
                      complete=whole, gap=gap)


class _Timing:
    """Each speaker's timed words of one conversation, ``(start, end)`` in order of start."""

    __slots__ = ("by_speaker", "conversation")

    def __init__(self, conversation: Conversation) -> None:
        self.conversation = conversation
        self.by_speaker: dict[str, list[tuple[float, float]]] = {}
        for word in conversation.words:
            if word.start is not None:
                end = word.end if word.end is not None else word.start
                self.by_speaker.setdefault(word.speaker, []).append((word.start, end))
        for times in self.by_speaker.values():
            times.sort()

    def others(self, speaker: str) -> list[list[tuple[float, float]]]:
        return [times for name, times in self.by_speaker.items() if name != speaker]


# Views are built utterance by utterance, conversation after conversation: one conversation's
# index is kept, found by identity, so a batch builds each index once.
_last_timing: list[_Timing] = []


def _timing(conversation: Conversation) -> _Timing:
    for kept in _last_timing[:1]:  # a copy: another thread may replace the entry meanwhile
        if kept.conversation is conversation:
            return kept
    timing = _Timing(conversation)
    _last_timing[:] = [timing]
    return timing


def conversation_views(conversation: Conversation) -> list[UtteranceView]:
    """Views of all utterances of a conversation, in the conversation's order."""
    return [clean_view(conversation, u) for u in conversation.utterances]


def iter_views(conversations: Iterable[Conversation]) -> Iterator[list[UtteranceView]]:
    """Views per conversation, for batch use (training, evaluation)."""
    for conversation in conversations:
        yield conversation_views(conversation)
