"""Utterance functions: features of cleaned (possibly partial) utterances and the tagger.

A linear-chain CRF runs over a conversation's utterances in time order, both speakers on one
chain, so its transition weights learn which function follows which ("an answer follows a
question"). Each utterance is seen through an :class:`UtteranceView`: its speaker, its *cleaned*
words (fillers, editing terms, reparanda and restarts removed), how many disfluent words were
removed and whether it is complete. The features are pure functions of a view and the view
before it; the tagger decodes a bounded window (a few preceding utterances plus the current,
growing one), so the cost of relabelling after each new word does not grow with the
conversation.

Feature values are recogniser-style text only: lower case, no punctuation, no timing.
"""

from __future__ import annotations

import itertools
import math
from collections import OrderedDict
from collections.abc import Callable, Hashable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Generic, NamedTuple, TypeVar

import numpy as np
import numpy.typing as npt
from midstream import (
    Conversation,
    InputError,
    ModelError,
    Utterance,
    UtteranceFunction,
    coarse_function,
)
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger
from midstream.models._lattice import chain_carry, chain_end_step, exp_into
from midstream.models.functions._views import UtteranceView, build_view, check_view

#: Feature-dictionary type the CRF adapter takes: attribute name to value.
Features = dict[str, float]

FloatArray = npt.NDArray[np.float64]

#: How many preceding utterances :meth:`FunctionTagger.label_partial` decodes with the current
#: one (common practice, no source: enough for question-answer-acknowledgement chains).
DEFAULT_CONTEXT = 4

#: n-grams are read from at most this many leading words of an utterance, so the features of a
#: growing utterance cost a bounded amount however long the speaker talks (documented limit;
#: fewer than 1% of SwDA utterances are longer, measured on the train split).
MAX_FEATURE_WORDS = 40

_BOS = "<s>"
_EOS = "</s>"


@dataclass(frozen=True, slots=True, kw_only=True)
class FunctionGuess:
    """The tagger's current label for one utterance.

    ``label`` is the model's own label (a SWBD-DAMSL 42-class name or a coarse function name);
    ``confidence`` the CRF marginal probability of ``label`` at this position; ``function`` the
    coarse function and ``function_confidence`` its probability (the marginals of the fine classes
    of that coarse group summed, for a fine model).
    """

    label: str
    confidence: float
    function: UtteranceFunction
    function_confidence: float


@dataclass(frozen=True, slots=True, kw_only=True)
class FunctionFeatureConfig:
    """Which feature groups are on (stored in the model so tagging matches training).

    Parameters
    ----------
    trigrams
        Word trigrams (with begin/end markers) besides unigrams and bigrams.
    previous
        Features of the previous utterance (first words, length) and their conjunction with the
        current first word when the speaker changed.
    complete_flag
        A feature telling whether the utterance is complete; with prefix augmentation it tells the
        CRF a growing utterance from a finished one.
    partner
        Across a change of speaker, how the utterance relates to the partner's utterance just
        before it: words and numbers it repeats, its length right after the partner's turn, its
        opening word, an alternative echoing the partner ("four fifteen or four fifty"). What a
        clarification request looks like in any corpus (ISO 24617-2 checkQuestion on the
        partner's utterance; see docs/labels.md). Off in models trained before it existed.
    opening
        The identity of a filler or editing term that opened the utterance and was cleaned away
        (``UtteranceView.opening``: the "sorry" of "sorry which day"). Off in models trained
        before it existed.
    lookback
        With ``partner``: when the previous utterance is the same speaker's, the partner
        features (under their own names, prefixed ``y``) against the last utterance of another
        speaker among the :data:`PARTNER_LOOKBACK` before it. A check often follows one's own
        "okay" or "so" after the partner's turn (Map Task's acknowledge then check moves, MRDA's
        floor holders), and in a meeting the previous segment is often the same speaker's. Off
        in models trained before it existed.
    """

    trigrams: bool = True
    previous: bool = True
    complete_flag: bool = True
    partner: bool = False
    opening: bool = False
    lookback: bool = False

    def to_json(self) -> dict[str, bool]:
        return {"trigrams": self.trigrams, "previous": self.previous,
                "complete_flag": self.complete_flag, "partner": self.partner,
                "opening": self.opening, "lookback": self.lookback}

    @classmethod
    def from_json(cls, data: Mapping[str, object]) -> FunctionFeatureConfig:
        known = {"trigrams", "previous", "complete_flag", "partner", "opening", "lookback"}
        unknown = set(data) - known
        if unknown:
            raise ModelError(f"unknown function feature settings {sorted(unknown)}")
        values: dict[str, bool] = {}
        for key, value in data.items():
            if not isinstance(value, bool):
                raise ModelError(f"function feature setting {key!r} must be true or false")
            values[key] = value
        return cls(**values)


def _length_bucket(n: int) -> str:
    if n <= 3:
        return str(n)
    if n <= 5:
        return "4-5"
    if n <= 9:
        return "6-9"
    if n <= 19:
        return "10-19"
    return "20+"


def _removed_bucket(n: int) -> str:
    return str(n) if n <= 2 else "3+"


def utterance_features(view: UtteranceView, previous: UtteranceView | None,
                       config: FunctionFeatureConfig = FunctionFeatureConfig(), *,
                       partner: UtteranceView | None = None) -> Features:
    """Features of one utterance given the one before it on the conversation's chain.

    Parameters
    ----------
    view
        The utterance to describe.
    previous
        The preceding utterance (either speaker), or ``None`` at the start of the chain.
    config
        Which feature groups to emit.
    partner
        When ``previous`` is the same speaker's: the last utterance of another speaker before
        it, as :func:`earlier_partner` finds it (used with ``config.lookback`` only).

    Returns
    -------
    dict
        A new dictionary of attribute names to 1.0; neither input is changed.

    Examples
    --------
    >>> v = UtteranceView(speaker="A", words=("do", "you", "know"))
    >>> f = utterance_features(v, None)
    >>> f["w0=do"], f["b=<s>|do"], f["len=3"], f["prev=none"]
    (1.0, 1.0, 1.0, 1.0)
    """
    feats = _shape_features(view, config)
    head = view.words[:MAX_FEATURE_WORDS]
    feats.update(dict.fromkeys(_ngram_names(head, closed=len(view.words) <= MAX_FEATURE_WORDS,
                                            trigrams=config.trigrams), 1.0))
    _add_word_features(feats, view.words)
    if previous is None:
        feats["prev=none"] = 1.0
        return feats
    changed = previous.speaker != view.speaker
    _add_previous_features(feats, previous, changed=changed, config=config)
    if changed and config.previous:
        _add_pair_features(feats, previous.words, view.words, partner=config.partner)
    elif partner is not None and config.lookback and config.partner:
        _add_partner_features(feats, partner.words, view.words, prefix="y")
    return feats


#: How many utterances back :func:`earlier_partner` looks for another speaker's: the streaming
#: tagger's context (:data:`DEFAULT_CONTEXT`), so that the utterance a stream labels sees the
#: partner training showed it.
PARTNER_LOOKBACK = 4


def earlier_partner(before: Sequence[UtteranceView], speaker: str) -> UtteranceView | None:
    """The last utterance of another speaker than ``speaker`` among the last
    :data:`PARTNER_LOOKBACK` of ``before`` (oldest first), when the very last is ``speaker``'s
    own; ``None`` otherwise (the last is the partner itself, or no other speaker is that near).

    Examples
    --------
    >>> a = UtteranceView(speaker="A", words=("four", "fifteen"))
    >>> b = UtteranceView(speaker="B", words=("okay",))
    >>> earlier_partner([a, b], "B") is a, earlier_partner([a], "B")
    (True, None)
    """
    if not before or before[-1].speaker != speaker:
        return None
    for view in reversed(before[-PARTNER_LOOKBACK:]):
        if view.speaker != speaker:
            return view
    return None


def chain_partners(views: Sequence[UtteranceView]) -> list[UtteranceView | None]:
    """:func:`earlier_partner` of each view of a chain among the views before it."""
    return [earlier_partner(views[max(0, i - PARTNER_LOOKBACK):i], view.speaker)
            for i, view in enumerate(views)]


# utterance_features in parts, so the tagger's per-word path can build only what a new word
# changes: the word-dependent rows come from a cache extended word by word, and the rows taken
# from the previous utterance are kept with the cached decoding of the context. Every n-gram
# name has "=" second ("w=", "b=", "t="), and no other feature name does but "x=...", so the
# n-grams never share a name with another part; the other parts' prefixes differ too.


def _shape_features(view: UtteranceView, config: FunctionFeatureConfig) -> Features:
    """Bias, length, removed count, emptiness and completeness features (first in the dict)."""
    feats: Features = {"bias": 1.0}
    n = len(view.words)
    feats[f"len={_length_bucket(n)}"] = 1.0
    feats[f"rm={_removed_bucket(view.removed)}"] = 1.0
    if n == 0:
        # Nothing but disfluent words (or silence around a non-verbal sound).
        feats["empty"] = 1.0
        if view.removed:
            feats["only_disfluent"] = 1.0
    if config.complete_flag and not view.complete:
        feats["incomplete"] = 1.0
    if config.opening and view.opening:
        feats[f"rw0={view.opening}"] = 1.0
    return feats


def _ngram_names(head: Sequence[str], *, closed: bool, trigrams: bool) -> list[str]:
    """Word unigram, bigram and trigram names of ``head``, with an end marker when ``closed``."""
    padded = (_BOS, *head, _EOS) if closed else (_BOS, *head)
    names = [f"w={w}" for w in head]
    names.extend(f"b={a}|{b}" for a, b in itertools.pairwise(padded))
    if trigrams:
        names.extend(f"t={a}|{b}|{c}"
                     for a, b, c in zip(padded, padded[1:], padded[2:], strict=False))
    return names


def _open_ngram_names(head: Sequence[str], *, trigrams: bool) -> list[str]:
    """The n-gram names :func:`_ngram_names` adds for the last word of ``head`` (non-empty)."""
    last = head[-1]
    before = head[-2] if len(head) > 1 else _BOS
    names = [f"w={last}", f"b={before}|{last}"]
    if trigrams and len(head) > 1:
        names.append(f"t={head[-3] if len(head) > 2 else _BOS}|{before}|{last}")
    return names


def _closing_ngram_names(head: Sequence[str], *, trigrams: bool) -> list[str]:
    """The n-gram names :func:`_ngram_names` adds for the end marker of a closed ``head``."""
    last = head[-1] if head else _BOS
    names = [f"b={last}|{_EOS}"]
    if trigrams and head:
        names.append(f"t={head[-2] if len(head) > 1 else _BOS}|{last}|{_EOS}")
    return names


def _add_word_features(feats: Features, words: tuple[str, ...]) -> None:
    """First and last words and word pairs of the utterance."""
    n = len(words)
    if n:
        first = words[0]
        feats[f"w0={first}"] = 1.0
        feats[f"wl={words[-1]}"] = 1.0
        if n > 1:
            feats[f"b0={first}|{words[1]}"] = 1.0
            feats[f"bl={words[-2]}|{words[-1]}"] = 1.0
        else:
            feats[f"only={first}"] = 1.0
        if n > 2:
            feats[f"t0={first}|{words[1]}|{words[2]}"] = 1.0


def _add_previous_features(feats: Features, previous: UtteranceView, *, changed: bool,
                           config: FunctionFeatureConfig) -> None:
    """The previous utterance's features: all of them depend on it and the speaker change only."""
    feats["spk=change" if changed else "spk=same"] = 1.0
    if config.previous:
        pw = previous.words
        pn = len(pw)
        tag = "o" if changed else "s"
        feats[f"p{tag}len={_length_bucket(pn)}"] = 1.0
        if pn:
            feats[f"p{tag}w0={pw[0]}"] = 1.0
            feats[f"p{tag}wl={pw[-1]}"] = 1.0
            if pn > 1:
                feats[f"p{tag}b0={pw[0]}|{pw[1]}"] = 1.0
        else:
            feats[f"p{tag}empty"] = 1.0
        if not previous.complete:
            feats[f"p{tag}incomplete"] = 1.0


def _add_pair_features(feats: Features, previous: tuple[str, ...],
                       words: tuple[str, ...], *, partner: bool = False) -> None:
    """Previous first word with this first word, across a change of speaker; with ``partner``
    also how this utterance echoes the partner's (see :class:`FunctionFeatureConfig`)."""
    if words:
        # "yeah" after a question is an answer, after an opinion an agreement, after a
        # statement a backchannel: the pair carries what neither word does alone.
        feats[f"x={previous[0] if previous else '-'}|{words[0]}"] = 1.0
        if len(words) <= 2:
            feats[f"xs={previous[0] if previous else '-'}|{'_'.join(words)}"] = 1.0
    if partner:
        _add_partner_features(feats, previous, words)


#: Number words a repeated number is recognised by (besides digits): checks of times, amounts and
#: distances repeat them ("four fifteen or four fifty"). Common practice, no source.
_NUMBER_WORDS = frozenset({
    "zero", "oh", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten",
    "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen", "seventeen", "eighteen",
    "nineteen", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety",
    "hundred", "thousand", "half", "quarter", "first", "second", "third",
})


def _add_partner_features(feats: Features, previous: tuple[str, ...],
                          words: tuple[str, ...], prefix: str = "") -> None:
    """How an utterance after the partner's relates to it (both at most MAX_FEATURE_WORDS
    words are compared, so the cost per call is bounded); ``prefix`` names the features of an
    earlier partner utterance (``"y"``) apart from those of one right before."""
    n = len(words)
    size = _length_bucket(n)
    feats[f"{prefix}xlen={size}"] = 1.0
    if not n:
        return
    # An opening right after the partner's turn: "sorry", "pardon", "what" start repetition
    # requests there, and something else in the middle of one's own turn.
    feats[f"{prefix}xw0={words[0]}|{'short' if n <= 4 else 'long'}"] = 1.0
    said = frozenset(previous[:MAX_FEATURE_WORDS])
    head = words[:MAX_FEATURE_WORDS]
    repeated = [w for w in head if w in said]
    share = len(repeated) / len(head)
    echo = "0" if not repeated else "all" if share == 1.0 else "most" if share >= 0.5 else "some"
    feats[f"{prefix}ov={echo}"] = 1.0
    feats[f"{prefix}ov={echo}|{size}"] = 1.0
    if not repeated:
        return
    if words[0] in said:
        feats[f"{prefix}ov0"] = 1.0
    if head[-1] in said:
        feats[f"{prefix}ovl"] = 1.0
    if any(w in _NUMBER_WORDS or w.isdigit() for w in repeated):
        feats[f"{prefix}ovnum"] = 1.0
    if "or" in head:
        # An alternative built from the partner's words offers two hearings of them.
        feats[f"{prefix}ovor"] = 1.0


def sequence_features(views: Sequence[UtteranceView],
                      config: FunctionFeatureConfig = FunctionFeatureConfig()) -> list[Features]:
    """Features of each utterance of a chain, each given its predecessor in ``views``."""
    out: list[Features] = []
    previous: UtteranceView | None = None
    partners: Iterable[UtteranceView | None] = (
        chain_partners(views) if config.lookback else itertools.repeat(None))
    for view, partner in zip(views, partners, strict=False):
        out.append(utterance_features(view, previous, config, partner=partner))
        previous = view
    return out


def clean_view(conversation: Conversation, utterance: Utterance,
               upto: int | None = None) -> UtteranceView:
    """The view of one annotated utterance, cleaned with the gold disfluency labels.

    Words labelled filler, editing term, reparandum or restart are removed (and counted); a
    conversation without disfluency annotation keeps all its words. Word fragments ("s-") are
    dropped uncounted. The rule is
    :func:`~midstream.models.functions._views.build_view`'s, which the live engine calls too.

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
    # A whole utterance counts as complete even when the corpus marks it abandoned (see
    # UtteranceView.complete).
    whole = upto is None or upto >= len(utterance.words)
    return build_view(utterance.speaker,
                      [(words[i].text, words[i].fragment, labels[i] if labels is not None
                        else None) for i in indices],
                      complete=whole)


def conversation_views(conversation: Conversation) -> list[UtteranceView]:
    """Views of all utterances of a conversation, in the conversation's order."""
    return [clean_view(conversation, u) for u in conversation.utterances]


def iter_views(conversations: Iterable[Conversation]) -> Iterator[list[UtteranceView]]:
    """Views per conversation, for batch use (training, evaluation)."""
    for conversation in conversations:
        yield conversation_views(conversation)


_K = TypeVar("_K", bound=Hashable)
_V = TypeVar("_V")


class _Lru(Generic[_K, _V]):
    """A bounded least-recently-used map.

    Every step is one operation on the underlying ``OrderedDict`` (atomic under the GIL), and a
    key evicted between a lookup and its refresh is tolerated, so threads sharing one map at
    worst recompute an entry; they never see a torn one (values are never changed in place).
    """

    __slots__ = ("_items", "_size")

    def __init__(self, size: int) -> None:
        self._size = size
        self._items: OrderedDict[_K, _V] = OrderedDict()

    def __len__(self) -> int:
        return len(self._items)

    def get(self, key: _K) -> _V | None:
        value = self._items.get(key)
        if value is not None:
            try:  # noqa: SIM105 (contextlib.suppress costs more, and this runs per word)
                self._items.move_to_end(key)
            except KeyError:
                pass  # evicted by another thread since the lookup: the value is still good
        return value

    def peek(self, key: _K) -> _V | None:
        """The value of ``key`` without refreshing it (for an entry about to be superseded)."""
        return self._items.get(key)

    def put(self, key: _K, value: _V) -> None:
        self._items[key] = value
        while len(self._items) > self._size:
            try:
                self._items.popitem(last=False)
            except KeyError:
                break  # emptied by another thread meanwhile


@dataclass(frozen=True, slots=True, kw_only=True)
class _Carry:
    """crfsuite's recursions over a window of final context utterances, one step short.

    ``forward[j]`` is ``sum_i alpha[i] * exp(T[i, j])`` with ``alpha`` the scaled forward
    vector of the window's last position, ``best[j]`` is ``max_i viterbi[i] + T[i, j]``: what
    the next position's recursions combine with its state scores (both read-only). ``same``
    and ``other`` are the model rows of the features a following utterance takes from the
    window's last one, when its speaker is the same or another.
    """

    forward: FloatArray
    best: FloatArray
    same: tuple[int, ...]
    other: tuple[int, ...]


@dataclass(frozen=True, slots=True)
class ContextWindow:
    """Final utterances to label the next ones after, with their recursions worked out.

    Made by :meth:`FunctionTagger.context_window`; a caller that labels many utterances after the
    same context (the engine, on every word) keeps one instead of having the tagger find the
    window in its shared cache on every call. ``carry`` is ``None`` when the window is empty, or
    when crfsuite's arithmetic overflows on it (labels are then crfsuite's own).
    """

    views: tuple[UtteranceView, ...]
    carry: _Carry | None
    #: For each view, the model rows of its own features (shape and words) and of those it
    #: takes from its predecessor in the window (``()`` for the first): what
    #: :meth:`FunctionTagger.extend_window` sums a slid window from. Empty for a window made by
    #: :meth:`FunctionTagger.context_window`.
    rows: tuple[tuple[tuple[int, ...], tuple[int, ...]], ...] = ()


class _Words(NamedTuple):
    """Model rows of the features of an utterance that depend on its words alone.

    ``unigrams``, ``bigrams`` and ``trigrams`` are the rows of the word n-grams without the end
    marker, each in the order :func:`utterance_features` adds their names, repeats left out (a
    repeated name is one attribute): what the entry of ``words + (word,)`` extends. ``lead``
    are the rows of the first word, pair and triple features (``w0``, ``b0``, ``t0``; ``None``
    if unknown or absent), which stop changing after three words; ``rows`` the rows of an
    utterance of exactly these words, in feature order: n-grams with the end marker's, then
    first and last words. (A named tuple: built once per word, and cheaper to build than a
    dataclass.)
    """

    unigrams: tuple[int, ...]
    bigrams: tuple[int, ...]
    trigrams: tuple[int, ...]
    lead: tuple[int | None, int | None, int | None]
    rows: tuple[int, ...]


class WordsMemo:
    """Feature rows of one caller's latest utterances (:meth:`FunctionTagger.label_built`).

    Holds the entries of the last :data:`WORDS_MEMO_SIZE` word sequences labelled through it:
    enough for an open utterance per speaker and the prefix it grows from. One per engine.
    """

    __slots__ = ("_entries",)

    def __init__(self) -> None:
        self._entries: dict[tuple[str, ...], _Words] = {}

    def find(self, words: tuple[str, ...]) -> _Words | None:
        return self._entries.get(words)

    def keep(self, words: tuple[str, ...], entry: _Words) -> None:
        entries = self._entries
        entries[words] = entry
        if len(entries) > WORDS_MEMO_SIZE:
            del entries[next(iter(entries))]  # the oldest kept


#: Word sequences a :class:`WordsMemo` keeps. Documented limit.
WORDS_MEMO_SIZE = 4

#: The longest word sequences a caller with a :class:`WordsMemo` shares with other callers
#: through the tagger's cache (common practice, no source: short utterances recur across
#: conversations, longer ones hardly ever).
SHARED_WORDS = 3


#: Distinct context windows whose decoding :class:`FunctionTagger` keeps (a live conversation
#: uses one at a time; twice the server's default ``max_live_conversations``, so conversations
#: interleaving on one tagger do not evict each other). Documented limit.
WINDOW_CACHE_SIZE = 512

#: Word sequences of current utterances whose feature rows :class:`FunctionTagger` keeps
#: (about two open utterances per live conversation). An entry holds at most
#: ``6 * MAX_FEATURE_WORDS + 10`` row numbers. Documented limit.
NGRAM_CACHE_SIZE = 1024


#: Label schemes a function model is trained on.
SCHEMES: tuple[str, ...] = ("coarse", "swbd42")

#: How a fine (42-class) model gives its coarse function: ``"sum"`` adds the marginals of the
#: fine classes of each coarse group and takes the largest sum; ``"label"`` maps the decoded fine
#: label. Chosen by cross-validation (see functions.md).
COARSE_FROM: tuple[str, ...] = ("sum", "label")


def _coarse_of(scheme: str, label: str) -> UtteranceFunction:
    if scheme == "coarse":
        try:
            return UtteranceFunction(label)
        except ValueError:
            raise ModelError(f"coarse function model has unknown label {label!r}") from None
    return coarse_function("swbd42", label)


def _exp_like_c() -> tuple[Callable[[FloatArray], FloatArray], bool]:
    """An elementwise exp with the C library's results, as crfsuite's arithmetic needs.

    numpy's float64 exp is the C library's except on CPUs where numpy brings a vectorised one
    of its own; the compiled kernels call the C library's unless numba was given a vector
    library of its own. A probe tells: the second value says whether the compiled kernels'
    exp passed it (they are used only then), and the first is numpy's exp if that passed, else
    the compiled one, else :func:`math.exp` value by value (a few microseconds more per call).
    """
    probe = np.linspace(-60.0, 60.0, 4099)
    expected = [math.exp(x) for x in probe.tolist()]
    compiled = np.empty_like(probe)
    exp_into(probe, compiled)
    compiled_like_c = compiled.tolist() == expected
    if np.exp(probe).tolist() == expected:
        return np.exp, compiled_like_c
    if compiled_like_c:
        def exp_compiled(values: FloatArray) -> FloatArray:
            out = np.empty_like(values)
            exp_into(values, out)
            return out
        return exp_compiled, True

    def exp_each(values: FloatArray) -> FloatArray:
        return np.array([math.exp(x) for x in values.tolist()])
    return exp_each, False


class FunctionTagger:
    """Labels utterances with their function from a trained CRF.

    Build it with :meth:`from_artifact` (or :meth:`load`).

    :meth:`label_partial` does not call crfsuite: it needs only the last position's Viterbi
    label and marginals, and both come from the forward recursions alone (crfsuite's backward
    vector at the last position is its scale factor, which the marginal divides out again). The
    tagger reads the CRF's weights once and repeats crfsuite's own arithmetic step for step (the
    same operations in the same order, the C library's ``exp``), so labels and marginals are
    crfsuite's to the last bit. The per-word step (state scores, the last position's recursions,
    marginals and coarse sums) runs as one compiled kernel where its ``exp`` passes a probe
    against the C library's (else in numpy, the same arithmetic). What does not change from
    word to word is cached, each cache a
    bounded LRU: the recursions over a window of final context utterances (keyed by the views'
    ids, each entry holding its views so the ids stay theirs, and behind that by the views'
    values; :data:`WINDOW_CACHE_SIZE` windows each), the context utterances' state scores
    (``WINDOW_CACHE_SIZE * (context + 1)`` entries of two vectors), and the feature rows of a
    growing utterance's words (:data:`NGRAM_CACHE_SIZE`), so a call costs the new word's
    features, one gather of weight rows and one step of the recursions; the first call after a
    new context window also runs the recursions over the window. A caller labelling word after
    word after the same context keeps the window (:meth:`context_window`) and calls
    :meth:`label_built`, so no shared cache is searched on each word. In the rare case ``exp``
    would overflow (state scores past 709, which no regularised model reaches), the call is
    handed to crfsuite so that even then the result is its own.

    Sharing: the weights are never written after construction and cache entries never change
    after insertion, so one tagger may serve any number of engines and sessions, interleaved on
    one event loop (a call never awaits, so no other call runs in the middle of one) or on
    several threads (shared arrays are only read, every intermediate is the calling thread's
    own, and a race on a cache can at worst make a thread recompute an entry another evicted;
    threads gain no speed, the GIL being held for most of a call). The cache sizes bound the
    memory however many conversations use the tagger, a few megabytes at most.
    :meth:`label_conversation` calls crfsuite, whose adapter serialises calls with a lock.
    """

    def __init__(self, crf: CrfTagger, *, scheme: str, config: FunctionFeatureConfig,
                 context: int = DEFAULT_CONTEXT, coarse_from: str = "sum") -> None:
        if scheme not in SCHEMES:
            raise ModelError(f"unknown function scheme {scheme!r} (known: {', '.join(SCHEMES)})")
        if coarse_from not in COARSE_FROM:
            raise InputError(f"coarse_from must be one of {COARSE_FROM}, got {coarse_from!r}")
        if context < 0:
            raise InputError(f"context must be >= 0 utterances, got {context}")
        self._crf = crf
        self._scheme = scheme
        self._config = config
        self._context = context
        self._coarse_from = coarse_from
        self._coarse = {label: _coarse_of(scheme, label) for label in crf.labels}
        weights = crf.weights()
        self._attributes = weights.attributes
        # One all-zero last row, gathered when an utterance has no known attribute at all.
        self._state: FloatArray = np.vstack([weights.state, np.zeros((1, len(crf.labels)))])
        self._pad = len(self._state) - 1
        self._transitions: FloatArray = weights.transitions
        # Exponentiated one by one with the C library's exp, as crfsuite does.
        self._exp_transitions: FloatArray = np.array(
            [[math.exp(w) for w in row] for row in weights.transitions.tolist()]).reshape(
            weights.transitions.shape)
        self._functions = tuple(UtteranceFunction)
        self._label_names: tuple[str, ...] = tuple(crf.labels)
        # Label index -> coarse function index (enum order), for summing marginals by group;
        # a function no label maps to can never be chosen.
        self._group_of = np.array([self._functions.index(self._coarse[label])
                                   for label in crf.labels], dtype=np.intp)
        self._groups = sorted(set(self._group_of.tolist()))
        self._exp, self._compiled = _exp_like_c()
        # The compiled last step's fixed inputs, and the width of its work rows (the group
        # sums share them, and there may be more functions than labels).
        self._group_of_rows = self._group_of.astype(np.int64)
        self._group_list: list[int] = self._group_of.tolist()
        self._group_rows = np.array(self._groups, dtype=np.int64)
        self._work_width = max(len(crf.labels), self._groups[-1] + 1)
        self._no_carry: FloatArray = np.empty(0)
        self._opening = self._rows({"prev=none": 1.0})
        self._shapes: dict[tuple[int, int, bool, str], tuple[int, ...]] = {}
        self._carries: _Lru[tuple[UtteranceView, ...], _Carry] = _Lru(WINDOW_CACHE_SIZE)
        # The same windows keyed by the views' ids: hashing a tuple of ints is far cheaper than
        # hashing the views' fields on every word. Each entry holds its views, so while it lives
        # no other object can carry those ids.
        self._recent: _Lru[tuple[int, ...], tuple[tuple[UtteranceView, ...], _Carry]] = _Lru(
            WINDOW_CACHE_SIZE)
        # Keyed by the ids of the previous view, the earlier partner (lookback) and the view.
        self._states: _Lru[tuple[int, int, int], tuple[UtteranceView | None,
                                                       UtteranceView | None, UtteranceView,
                                                       FloatArray, FloatArray]] = _Lru(
            WINDOW_CACHE_SIZE * (context + 1))
        self._lookback = config.lookback and config.partner
        self._words: _Lru[tuple[str, ...], _Words] = _Lru(NGRAM_CACHE_SIZE)
        # Only the crfsuite path (overflow fallback, tests, benchmark baseline) uses this one.
        # Features of final context utterances, keyed by (previous view, earlier partner,
        # view): computed once and reused for every word of the next utterance.
        self._context_features: _Lru[tuple[UtteranceView | None, UtteranceView | None,
                                           UtteranceView], Features] = _Lru(8 * (context + 2))

    @classmethod
    def from_artifact(cls, artifact: ModelArtifact, *, context: int = DEFAULT_CONTEXT,
                      coarse_from: str | None = None) -> FunctionTagger:
        """A tagger over a loaded ``.tagger`` artifact of kind ``"utterance_functions"``.

        Raises
        ------
        ModelError
            The artifact is of another kind, names an unknown scheme or feature setting, or its
            labels differ from those inside the CRF.
        """
        if artifact.kind != "utterance_functions":
            raise ModelError(f"model kind is {artifact.kind!r}, expected 'utterance_functions'")
        scheme = artifact.features.get("scheme")
        if not isinstance(scheme, str):
            raise ModelError("function model metadata lacks its label scheme")
        settings = artifact.features.get("config", {})
        if not isinstance(settings, dict):
            raise ModelError("function model feature settings must be an object")
        config = FunctionFeatureConfig.from_json(settings)
        crf = CrfTagger.from_bytes(artifact.crf)
        if set(crf.labels) != set(artifact.labels):
            raise ModelError("function model labels differ from those inside its CRF")
        stored = artifact.features.get("coarse_from", "sum")
        chosen = coarse_from if coarse_from is not None else stored
        if not isinstance(chosen, str) or chosen not in COARSE_FROM:
            raise ModelError(f"unknown coarse_from setting {chosen!r}")
        try:
            return cls(crf, scheme=scheme, config=config, context=context, coarse_from=chosen)
        except InputError as exc:
            raise ModelError(f"function model labels do not fit scheme {scheme!r}: {exc}") from exc

    @classmethod
    def load(cls, path: Path, *, context: int = DEFAULT_CONTEXT) -> FunctionTagger:
        """Read a ``.tagger`` file and build a tagger (raises NotFoundError or ModelError)."""
        return cls.from_artifact(load_artifact(path, expected_kind="utterance_functions"),
                                 context=context)

    @property
    def scheme(self) -> str:
        """``"coarse"`` or ``"swbd42"``: what :attr:`FunctionGuess.label` holds."""
        return self._scheme

    @property
    def labels(self) -> tuple[str, ...]:
        return self._crf.labels

    @property
    def context(self) -> int:
        """How many preceding utterances :meth:`label_partial` decodes with the current one."""
        return self._context

    @property
    def config(self) -> FunctionFeatureConfig:
        return self._config

    def _guess(self, label: str, marginals: Mapping[str, float]) -> FunctionGuess:
        confidence = marginals.get(label, 0.0)
        if self._scheme == "coarse":
            function = self._coarse[label]
            return FunctionGuess(label=label, confidence=confidence, function=function,
                                 function_confidence=confidence)
        sums: dict[UtteranceFunction, float] = {}
        for name, p in marginals.items():
            group = self._coarse[name]
            sums[group] = sums.get(group, 0.0) + p
        if self._coarse_from == "label":
            function = self._coarse[label]
        else:
            # Ties broken by the enum order so the result is deterministic.
            order = list(UtteranceFunction)
            function = max(sums, key=lambda g: (sums[g], -order.index(g)))
        return FunctionGuess(label=label, confidence=confidence, function=function,
                             function_confidence=sums.get(function, 0.0))

    def _group_at(self, k: int, probs: FloatArray) -> tuple[int, float]:
        """The coarse function (enum index) and its confidence, for label ``k`` and marginals
        ``probs`` of a fine model, as :meth:`_guess` chooses them."""
        # bincount adds in label order from 0.0, as _guess does.
        sums: list[float] = np.bincount(self._group_of, weights=probs).tolist()
        if self._coarse_from == "label":
            group = self._group_list[k]
        else:
            # max keeps the first of equal sums: ties go to the earlier function in enum order.
            group = max(self._groups, key=sums.__getitem__)
        return group, sums[group]

    # --- crfsuite's arithmetic, step for step ---------------------------------------------
    #
    # crfsuite sums an item's state scores attribute by attribute in the order the item lists
    # them (here the feature dictionary's order), each from 0.0; a gather of those rows summed
    # along the first axis adds them in that order too. Its vector sums run left to right, its
    # exp is the C library's (math.exp), and it scales by multiplying with 1 / sum.

    def _rows(self, features: Iterable[str]) -> tuple[int, ...]:
        """Model rows of the known attributes among ``features``, in their order."""
        get = self._attributes.get
        return tuple(r for r in map(get, features) if r is not None)

    def _state_scores(self, rows: Sequence[int]) -> FloatArray:
        """crfsuite's state scores of an item with the attributes of ``rows`` (in that order)."""
        gathered = self._state.take(rows if rows else [self._pad], axis=0)
        scores: FloatArray = np.add.reduce(gathered, axis=0)
        return scores

    def _push(self, alpha: FloatArray, viterbi: FloatArray) -> tuple[FloatArray, FloatArray]:
        """``sum_i alpha[i] * exp(T[i, j])`` (over ``i`` in order) and ``max_i viterbi[i] +
        T[i, j]`` for every ``j``: the recursions up to the next position's state scores."""
        forward: FloatArray = np.add.reduce(alpha[:, None] * self._exp_transitions, axis=0)
        best: FloatArray = np.maximum.reduce(viterbi[:, None] + self._transitions, axis=0)
        return forward, best

    @staticmethod
    def _scale(forward: FloatArray) -> float:
        """crfsuite's scale factor of a forward vector: 1 / its sum added left to right.

        Raises
        ------
        OverflowError
            The sum is not finite: an exp overflowed (numpy's warns, math.exp raises at once).
        """
        # accumulate adds strictly left to right (a plain sum may pair terms up).
        total = float(np.add.accumulate(forward)[-1])
        if not total < math.inf:
            raise OverflowError("forward vector overflowed")
        return 1.0 / total if total != 0.0 else 1.0

    # --- label_partial -----------------------------------------------------------------------

    def _context_scores(self, previous: UtteranceView | None, view: UtteranceView,
                        partner: UtteranceView | None) -> tuple[FloatArray, FloatArray]:
        """State scores of a final context utterance and their exps (cached, read-only).

        Keyed by the views' ids (``partner`` the earlier partner, or ``None``), each entry
        holding the views so the ids stay theirs: a window's utterances are hashed by value
        only when the window itself is new.

        Raises
        ------
        OverflowError
            crfsuite's exp overflows on these scores.
        """
        key = (id(previous), id(partner), id(view))
        entry = self._states.get(key)
        if entry is not None:
            return entry[3], entry[4]
        scores = self._state_scores(self._rows_of(view, previous, partner))
        exps = self._exp(scores)
        scores.flags.writeable = False
        exps.flags.writeable = False
        self._states.put(key, (previous, partner, view, scores, exps))
        return scores, exps

    def _window_carry(self, window: tuple[UtteranceView, ...]) -> _Carry:
        """The recursions over ``window`` (non-empty, final views), from the cache if there.

        Raises
        ------
        InputError
            A view of the window is malformed.
        OverflowError
            crfsuite's exp overflows on these views' scores.
        """
        try:
            carry = self._carries.get(window)
        except TypeError:
            # Unhashable fields: say which view is malformed, else name the problem.
            for view in window:
                check_view(view)
            raise InputError("UtteranceView fields must be hashable (speaker a string, "
                             "words a tuple of strings)") from None
        if carry is not None:
            # Equal to views checked when the entry was made, so well-formed too.
            return carry
        for view in window:
            check_view(view)
        previous: UtteranceView | None = None
        alpha = viterbi = self._state[self._pad]
        partners = self._partners(window)
        for view, partner in zip(window, partners, strict=True):
            scores, exps = self._context_scores(previous, view, partner)
            if previous is None:
                forward, viterbi = exps, scores
            else:
                forward, viterbi = self._push(alpha, viterbi)
                forward *= exps
                viterbi += scores
            alpha = forward * self._scale(forward)
            previous = view
        assert previous is not None
        forward, best = self._push(alpha, viterbi)
        forward.flags.writeable = False
        best.flags.writeable = False
        carry = _Carry(forward=forward, best=best,
                       same=self._follow_rows(previous, changed=False),
                       other=self._follow_rows(previous, changed=True))
        self._carries.put(window, carry)
        return carry

    def _carry(self, window: tuple[UtteranceView, ...]) -> _Carry:
        ids = tuple(map(id, window))
        recent = self._recent.get(ids)
        if recent is not None:
            return recent[1]
        carry = self._window_carry(window)
        self._recent.put(ids, (window, carry))
        return carry

    def _words_of(self, words: tuple[str, ...], memo: WordsMemo | None = None) -> _Words:
        """The word-dependent rows of ``words`` (at most MAX_FEATURE_WORDS), cached: in the
        shared cache, or with a ``memo`` in it first and in the shared cache only up to
        :data:`SHARED_WORDS` words.

        A growing utterance finds its previous words' entry and adds the n-grams ending at the
        new word instead of rebuilding every name.
        """
        if memo is None:
            entry = self._words.get(words)
            if entry is None:
                entry = self._build_words(words, self._words.peek(words[:-1]) if words else None)
                self._words.put(words, entry)
            return entry
        entry = memo.find(words)
        if entry is not None:
            return entry
        # Longer sequences are one conversation's own: sharing them would only push out the
        # short ones many conversations say ("uh-huh", "i know").
        shared = len(words) <= SHARED_WORDS
        entry = self._words.get(words) if shared else None
        if entry is None:
            parent = memo.find(words[:-1]) if words else None
            if parent is None and words:
                parent = self._words.peek(words[:-1])
            entry = self._build_words(words, parent)
            if shared:
                self._words.put(words, entry)
        memo.keep(words, entry)
        return entry

    def _build_words(self, words: tuple[str, ...], parent: _Words | None) -> _Words:
        """The entry of ``words``, from its parent's (``words[:-1]``) when there is one."""
        get = self._attributes.get
        trigrams = self._config.trigrams
        if parent is not None:
            unigrams, bigrams, tri = parent.unigrams, parent.bigrams, parent.trigrams
            new = [get(name) for name in _open_ngram_names(words, trigrams=trigrams)]
            if new[0] is not None and new[0] not in unigrams:
                unigrams = (*unigrams, new[0])
            if new[1] is not None and new[1] not in bigrams:
                bigrams = (*bigrams, new[1])
            if len(new) > 2 and new[2] is not None and new[2] not in tri:
                tri = (*tri, new[2])
        else:
            names = _ngram_names(words, closed=False, trigrams=trigrams)
            n = len(words)
            # Unigrams, bigrams, then trigrams, as _ngram_names lists them; dict.fromkeys keeps
            # first occurrences in order, as the feature dictionary does.
            unigrams, bigrams, tri = (
                tuple(dict.fromkeys(r for r in map(get, part) if r is not None))
                for part in (names[:n], names[n:2 * n], names[2 * n:]))
        # The end marker's n-grams come last among the bigrams and the trigrams.
        closing = [get(name) for name in _closing_ngram_names(words, trigrams=trigrams)]
        end_bigram = (closing[0],) if closing[0] is not None and closing[0] not in bigrams else ()
        end_trigram = (
            (closing[1],) if len(closing) > 1 and closing[1] is not None
            and closing[1] not in tri else ())
        if parent is not None and len(words) > 3:
            # What _add_word_features adds, in its order: w0, wl, b0, bl, t0.
            lead = parent.lead
            w0, b0, t0 = lead
            tail = (w0, get(f"wl={words[-1]}"), b0, get(f"bl={words[-2]}|{words[-1]}"), t0)
            word_rows = tuple(r for r in tail if r is not None)
        else:
            feats: Features = {}
            _add_word_features(feats, words)
            word_rows = self._rows(feats)
            lead = (get(f"w0={words[0]}") if words else None,
                    get(f"b0={words[0]}|{words[1]}") if len(words) > 1 else None,
                    get(f"t0={words[0]}|{words[1]}|{words[2]}") if len(words) > 2 else None)
        rows = (*unigrams, *bigrams, *end_bigram, *tri, *end_trigram, *word_rows)
        return _Words(unigrams=unigrams, bigrams=bigrams, trigrams=tri, lead=lead, rows=rows)

    def _word_rows(self, words: tuple[str, ...],
                   memo: WordsMemo | None = None) -> tuple[int, ...]:
        """Rows of the features of an utterance that depend on its words alone, in order."""
        if len(words) <= MAX_FEATURE_WORDS:
            return self._words_of(words, memo).rows
        # Past the limit the n-grams stop growing and lose their end marker.
        head = self._words_of(words[:MAX_FEATURE_WORDS], memo)
        feats: Features = {}
        _add_word_features(feats, words)
        return (*head.unigrams, *head.bigrams, *head.trigrams, *self._rows(feats))

    def _follow_rows(self, previous: UtteranceView, *, changed: bool) -> tuple[int, ...]:
        """Rows of the features an utterance takes from ``previous``, in order."""
        feats: Features = {}
        _add_previous_features(feats, previous, changed=changed, config=self._config)
        return self._rows(feats)

    def _pair_rows(self, previous: UtteranceView, words: tuple[str, ...]) -> tuple[int, ...]:
        pairs: Features = {}
        _add_pair_features(pairs, previous.words, words, partner=self._config.partner)
        return self._rows(pairs)

    def _lookback_rows(self, partner: UtteranceView, words: tuple[str, ...]) -> tuple[int, ...]:
        feats: Features = {}
        _add_partner_features(feats, partner.words, words, prefix="y")
        return self._rows(feats)

    def _partners(self, views: Sequence[UtteranceView]) -> Sequence[UtteranceView | None]:
        """The earlier partner of each view of a window among the window's views before it."""
        if self._lookback:
            return chain_partners(views)
        return [None] * len(views)

    def _partner_in(self, window: Sequence[UtteranceView],
                    speaker: str) -> UtteranceView | None:
        return earlier_partner(window, speaker) if self._lookback else None

    def _rows_of(self, view: UtteranceView, previous: UtteranceView | None,
                 partner: UtteranceView | None = None) -> tuple[int, ...]:
        """Rows of ``utterance_features(view, previous, partner=partner)`` in its order, from
        the caches."""
        own = self._own_rows(view)
        if previous is None:
            return own + self._opening
        return own + self._link_rows(previous, view, None, partner)

    def _own_rows(self, view: UtteranceView, memo: WordsMemo | None = None) -> tuple[int, ...]:
        """Rows of the features of ``view`` that do not depend on its predecessor, in order."""
        return self._shape_rows(view) + self._word_rows(view.words, memo)

    def _link_rows(self, previous: UtteranceView, view: UtteranceView,
                   carry: _Carry | None, partner: UtteranceView | None = None) -> tuple[int, ...]:
        """Rows of the features ``view`` takes from ``previous`` (and from its earlier
        ``partner``), in order; ``carry`` is the window ending with ``previous`` when there is
        one (it holds the follow rows)."""
        changed = previous.speaker != view.speaker
        if carry is not None:
            rows = carry.other if changed else carry.same
        else:
            rows = self._follow_rows(previous, changed=changed)
        if changed and self._config.previous:
            rows += self._pair_rows(previous, view.words)
        elif partner is not None and self._lookback:
            rows += self._lookback_rows(partner, view.words)
        return rows

    def _shape_rows(self, view: UtteranceView) -> tuple[int, ...]:
        # The shape features depend on these alone (length and removed buckets end at 20 and
        # 3, openings are the model's own), so the table stays small.
        opening = view.opening if self._config.opening else ""
        if opening and f"rw0={opening}" not in self._attributes:
            # An opening word the model never kept has no row: one key for all of them keeps
            # the table as small as the model's vocabulary of openings.
            opening = ""
        key = (min(len(view.words), 20), min(view.removed, 3), view.complete, opening)
        rows = self._shapes.get(key)
        if rows is None:
            rows = self._rows(_shape_features(view, self._config))
            self._shapes[key] = rows
        return rows

    def _decode_partial(self, context: Sequence[UtteranceView],
                        current: UtteranceView) -> tuple[int, FloatArray]:
        """Index of the last position's Viterbi label and every label's marginal there: the
        part of :meth:`_last_step` (same errors) that the exactness tests compare."""
        k, _, _, _, probs = self._last_step(self.context_window(context), check_view(current))
        return k, probs

    def context_window(self, context: Sequence[UtteranceView]) -> ContextWindow:
        """The last :attr:`context` views of ``context`` with their recursions, for
        :meth:`label_built`.

        Raises
        ------
        InputError
            A view of a window not seen before is malformed.
        """
        views = tuple(context[-self._context:]) if self._context else ()
        if not views:
            return ContextWindow(views, None)
        try:
            return ContextWindow(views, self._carry(views))
        except OverflowError:
            return ContextWindow(views, None)

    def extend_window(self, window: ContextWindow, view: UtteranceView,
                      memo: WordsMemo | None = None) -> ContextWindow:
        """The window after ``view``, an utterance that just became final, joins ``window``.

        For a caller that keeps its window and built ``view`` itself (the engine, once per final
        utterance): the result equals :meth:`context_window` of the views, but it is summed from
        rows the window keeps rather than from the shared caches, which a busy server's other
        conversations have usually moved on from by the time a view is a window's oldest.
        ``memo`` is the one ``view`` was labelled with.
        """
        if not self._context:
            return window
        if not self._compiled or (window.views and len(window.rows) != len(window.views)):
            # numba's exp is not the C library's here, or the window was not made here.
            return self.context_window((*window.views, view))
        own = self._own_rows(view, memo)
        link = self._link_rows(window.views[-1], view, window.carry) if window.views else ()
        views = (*window.views, view)[-self._context:]
        rows = (*window.rows, (own, link))[-self._context:]
        if self._lookback:
            # A view's earlier partner is looked for among the window's views only (as
            # context_window does), and sliding may have taken it out: the links, a few small
            # dictionaries once per final utterance, are summed again.
            partners = chain_partners(views)
            rows = tuple((own_rows, self._link_rows(views[i - 1], views[i], None, partners[i])
                          if i else link_rows)
                         for i, (own_rows, link_rows) in enumerate(rows))
        # The oldest view opens the chain: it takes no features from the one before it.
        flat = [*rows[0][0], *self._opening]
        ends = [len(flat)]
        for own_rows, link_rows in rows[1:]:
            flat += own_rows
            flat += link_rows
            ends.append(len(flat))
        size = len(self._label_names)
        forward, best = np.empty(size), np.empty(size)
        if not chain_carry(self._state, np.array(flat, dtype=np.int64),
                           np.array(ends, dtype=np.int64), exp_transitions=self._exp_transitions,
                           transitions=self._transitions, forward_out=forward, best_out=best):
            return ContextWindow(views, None, rows)
        forward.flags.writeable = False
        best.flags.writeable = False
        last = views[-1]
        return ContextWindow(views, _Carry(
            forward=forward, best=best, same=self._follow_rows(last, changed=False),
            other=self._follow_rows(last, changed=True)), rows)

    def _last_step(self, window: ContextWindow, current: UtteranceView,
                   memo: WordsMemo | None = None) -> tuple[int, float, int, float, FloatArray]:
        """The last position's Viterbi label, its marginal, the coarse function :meth:`_guess`
        would choose (enum index; fine models only, else meaningless) with its confidence, and
        every label's marginal, after ``window`` (``current`` a checked view).

        Raises
        ------
        OverflowError
            crfsuite's exp overflows on these views' scores.
        """
        # The rows of utterance_features(current, previous), in its order.
        rows = self._own_rows(current, memo)
        partner: UtteranceView | None = None
        if window.views:
            previous = window.views[-1]
            carry = window.carry
            if carry is None:
                raise OverflowError("the context window's recursions overflowed")
            if self._lookback:
                partner = earlier_partner(window.views, current.speaker)
            rows += self._link_rows(previous, current, carry, partner)
            carry_forward, carry_best = carry.forward, carry.best
        else:
            previous = None
            rows += self._opening
            carry_forward = carry_best = self._no_carry
        if not self._compiled:
            return self._last_step_numpy(rows, carry_forward, carry_best, previous, current,
                                         partner=partner)
        size = len(self._label_names)
        out = np.empty((4, self._work_width))
        k, confidence, group, group_confidence = chain_end_step(
            self._state, np.array(rows, dtype=np.int64), carry_forward=carry_forward,
            carry_best=carry_best, group_of=self._group_of_rows, groups=self._group_rows,
            sums=out[3], out=out)
        if k < 0:
            raise OverflowError("forward vector overflowed")
        if current.complete and memo is None:
            # A finished utterance is about to become context: its state scores after this
            # predecessor are then at hand. (A caller with a memo of its own slides a window of
            # its own, extend_window, which does not read them.) Copies, so the cache holds two
            # vectors rather than the whole work block.
            scores = out[0, :size].copy()
            exps = out[1, :size].copy()
            scores.flags.writeable = False
            exps.flags.writeable = False
            self._states.put((id(previous), id(partner), id(current)),
                             (previous, partner, current, scores, exps))
        if self._coarse_from == "label":
            group = self._group_list[k]
            group_confidence = float(out[3, group])
        return k, confidence, group, group_confidence, out[2, :size]

    def _last_step_numpy(self, rows: tuple[int, ...], carry_forward: FloatArray,
                         carry_best: FloatArray, previous: UtteranceView | None,
                         current: UtteranceView, *, partner: UtteranceView | None,
                         ) -> tuple[int, float, int, float, FloatArray]:
        """:meth:`_last_step`'s arithmetic in numpy, where the compiled exp is not the C
        library's."""
        scores = self._state_scores(rows)
        exps = self._exp(scores)
        if len(carry_forward):
            forward = carry_forward * exps
            viterbi = carry_best + scores
        else:
            forward = exps
            viterbi = scores
        scale = self._scale(forward)
        if current.complete:
            scores.flags.writeable = False
            exps.flags.writeable = False
            self._states.put((id(previous), id(partner), id(current)),
                             (previous, partner, current, scores, exps))
        # At the last position crfsuite's backward vector is the scale factor and its marginal
        # alpha * beta / scale, alpha the scaled forward vector; its Viterbi takes the first of
        # equal final scores, as argmax does.
        probs: FloatArray = forward * scale
        probs *= scale
        probs /= scale
        k = int(viterbi.argmax())
        group, group_confidence = self._group_at(k, probs)
        return k, float(probs[k]), group, group_confidence, probs

    def label_partial(self, context: Sequence[UtteranceView],
                      current: UtteranceView) -> FunctionGuess:
        """The function of ``current`` (possibly still growing) after ``context``.

        Only the last :attr:`context` utterances of ``context`` are decoded with ``current``, so
        the cost per call is bounded however long the conversation. Context utterances should be
        final: the decoding of a window of them is cached (keyed by their values, so a changed
        view is simply another window).

        Parameters
        ----------
        context
            Preceding utterances of the conversation (either speaker), oldest first.
        current
            The utterance to label; ``complete=False`` while it may still grow.

        Raises
        ------
        InputError
            An argument is not a well-formed :class:`UtteranceView`.
        """
        return self.label_built(self.context_window(context), check_view(current))

    def label_built(self, window: ContextWindow, current: UtteranceView,
                    memo: WordsMemo | None = None) -> FunctionGuess:
        """:meth:`label_partial` after a :meth:`context_window` the caller keeps, for callers
        that built ``current`` themselves (the engine, on every word): it is not checked again.
        ``memo``, the caller's own, keeps the feature rows of its latest utterances, so a
        growing utterance extends its previous words' rows even when other callers have pushed
        them out of the shared cache.
        """
        try:
            k, confidence, group, group_confidence, _ = self._last_step(window, current, memo)
        except OverflowError:
            return self._guess(*self._label_partial_crfsuite(window.views, current))
        label = self._label_names[k]
        if self._scheme == "coarse":
            return FunctionGuess(label=label, confidence=confidence,
                                 function=self._coarse[label], function_confidence=confidence)
        return FunctionGuess(label=label, confidence=confidence, function=self._functions[group],
                             function_confidence=group_confidence)

    def _label_partial_crfsuite(self, context: Sequence[UtteranceView],
                                current: UtteranceView) -> tuple[str, dict[str, float]]:
        """The Viterbi label and marginals of ``current`` decoded by crfsuite over the window.

        What :meth:`label_partial` must equal (the overflow fallback, tests, benchmark
        baseline).
        """
        window = list(context[-self._context:]) if self._context else []
        for view in window:
            check_view(view)
        check_view(current)
        xseq: list[Features] = []
        previous: UtteranceView | None = None
        for view, partner in zip(window, self._partners(window), strict=True):
            key = (previous, partner, view)
            feats = self._context_features.get(key)
            if feats is None:
                feats = utterance_features(view, previous, self._config, partner=partner)
                self._context_features.put(key, feats)
            xseq.append(feats)
            previous = view
        xseq.append(utterance_features(current, previous, self._config,
                                       partner=self._partner_in(window, current.speaker)))
        labels, marginals = self._crf.tag_with_marginals(xseq)
        return labels[-1], marginals

    def label_conversation(self, utterances: Sequence[UtteranceView]) -> list[FunctionGuess]:
        """Labels of a whole chain of utterances, decoded jointly (batch use, evaluation).

        Unlike :meth:`label_partial`, later utterances inform earlier labels here (Viterbi over
        the whole chain), which suits transcripts but not a live stream.
        """
        for view in utterances:
            check_view(view)
        if not utterances:
            return []
        xseq = sequence_features(utterances, self._config)
        labels, _ = self._crf.tag_with_confidence(xseq)
        marginals = self._crf.marginals(xseq)
        return [self._guess(label, m) for label, m in zip(labels, marginals, strict=True)]
