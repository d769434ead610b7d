"""The utterance-function tagger: the CRF over a conversation's utterances, its streaming
labelling and the caches that keep it cheap per word.

A linear-chain CRF runs over a conversation's utterances in time order, both speakers on one
chain, so its transition weights learn which function follows which ("an answer follows a
question"). The tagger decodes a bounded window (a few preceding utterances plus the current,
growing one), so the cost of relabelling after each new word does not grow with the
conversation. Features come from :mod:`~midstream.models.functions._features`; the tagger maps
them to model rows (cached) and hands the rows to :mod:`~midstream.models.functions._inference`.
"""

from __future__ import annotations

import os
from collections import OrderedDict
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Generic, NamedTuple, TypeVar

from midstream import (
    InputError,
    ModelError,
    UtteranceFunction,
    coarse_function,
)
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger
from midstream.models.functions._features import (
    MAX_FEATURE_WORDS,
    Features,
    FunctionFeatureConfig,
    _add_pair_features,
    _add_partner_features,
    _add_previous_features,
    _add_word_features,
    _closing_ngram_names,
    _ngram_names,
    _open_ngram_names,
    _shape_features,
    chain_partners,
    earlier_partner,
    sequence_features,
    timing_names,
    utterance_features,
)
from midstream.models.functions._inference import ChainInference, EndStep, FloatArray
from midstream.models.functions._views import UtteranceView, check_view

#: How many preceding utterances :meth:`FunctionTagger.label_partial` decodes with the current
#: one (common practice, no source: enough for question-answer-acknowledgement chains).
DEFAULT_CONTEXT = 4


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


class FunctionTagger:
    """Labels utterances with their function from a trained CRF.

    Build it with :meth:`from_artifact` (or :meth:`load`).

    :meth:`label_partial` does not call crfsuite: the last position's Viterbi label and
    marginals come from the compiled recursions of
    :class:`~midstream.models.functions._inference.ChainInference`, held to crfsuite within its
    ``TOLERANCE`` (the tests), with crfsuite as the fallback where an ``exp`` would overflow.
    What does not change from word to word is cached, each cache a bounded LRU: the recursions
    over a window of final context utterances (keyed by the views' ids, each entry holding its
    views so the ids stay theirs, and behind that by the views' values;
    :data:`WINDOW_CACHE_SIZE` windows each), the context utterances' model rows
    (``WINDOW_CACHE_SIZE * (context + 1)`` entries), and the feature rows of a growing
    utterance's words (:data:`NGRAM_CACHE_SIZE`), so a call costs the new word's features and
    one compiled step; the first call after a new context window also runs the recursions over
    the window. A caller labelling word after word after the same context keeps the window
    (:meth:`context_window`) and calls :meth:`label_built`, so no shared cache is searched on
    each word.

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
                 context: int = DEFAULT_CONTEXT, coarse_from: str = "sum",
                 setting: str | None = None) -> None:
        if scheme not in SCHEMES:
            raise ModelError(f"unknown function scheme {scheme!r} (known: {', '.join(SCHEMES)})")
        if coarse_from not in COARSE_FROM:
            raise InputError(f"coarse_from must be one of {COARSE_FROM}, got {coarse_from!r}")
        if context < 0:
            raise InputError(f"context must be >= 0 utterances, got {context}")
        if setting is not None and setting not in config.settings:
            known = ", ".join(config.settings) or "none: trained without --setting-features"
            raise InputError(f"the function model has learnt no setting {setting!r} "
                             f"(its settings: {known})")
        self._setting = setting
        self._crf = crf
        self._scheme = scheme
        self._config = config
        self._context = context
        self._coarse_from = coarse_from
        self._coarse = {label: _coarse_of(scheme, label) for label in crf.labels}
        self._functions = tuple(UtteranceFunction)
        self._label_names: tuple[str, ...] = tuple(crf.labels)
        # Label index -> coarse function index (enum order), for summing marginals by group;
        # a function no label maps to can never be chosen.
        self._group_list: list[int] = [self._functions.index(self._coarse[label])
                                       for label in crf.labels]
        # A setting's copies are folded into the shared rows once, here, so labelling in a
        # setting costs nothing per word.
        self._chain = ChainInference(crf, self._group_list, setting=setting)
        self._opening = self._chain.rows({"prev=none": 1.0})
        self._shapes: dict[tuple[int, int, bool, str, str], tuple[int, ...]] = {}
        self._carries: _Lru[tuple[UtteranceView, ...], _Carry] = _Lru(WINDOW_CACHE_SIZE)
        # The same windows keyed by the views' ids: hashing a tuple of ints is far cheaper than
        # hashing the views' fields on every word. Each entry holds its views, so while it lives
        # no other object can carry those ids.
        self._recent: _Lru[tuple[int, ...], tuple[tuple[UtteranceView, ...], _Carry]] = _Lru(
            WINDOW_CACHE_SIZE)
        # Model rows of final context utterances, keyed by the ids of the previous view, the
        # earlier partner (lookback) and the view; each entry holds the views.
        self._context_rows: _Lru[tuple[int, int, int], tuple[UtteranceView | None,
                                                             UtteranceView | None,
                                                             UtteranceView, tuple[int, ...]]] = (
            _Lru(WINDOW_CACHE_SIZE * (context + 1)))
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
    def load(cls, path: str | os.PathLike[str], *,
             context: int = DEFAULT_CONTEXT) -> FunctionTagger:
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
    def settings(self) -> tuple[str, ...]:
        """The conversation settings the model has learnt apart (``FunctionFeatureConfig``)."""
        return self._config.settings

    @property
    def setting(self) -> str | None:
        """The setting this tagger labels in; ``None``: the shared weights alone."""
        return self._setting

    def for_setting(self, setting: str | None) -> FunctionTagger:
        """A tagger over the same model that labels conversations of ``setting`` (one of
        :attr:`settings`; ``None`` for none), with caches of its own.

        Raises
        ------
        InputError
            The model has learnt no such setting.
        """
        if setting == self._setting:
            return self
        return FunctionTagger(self._crf, scheme=self._scheme, config=self._config,
                              context=self._context, coarse_from=self._coarse_from,
                              setting=setting)

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

    # --- label_partial -----------------------------------------------------------------------

    def _rows_after(self, previous: UtteranceView | None, view: UtteranceView,
                    partner: UtteranceView | None) -> tuple[int, ...]:
        """Model rows of a final context utterance after ``previous`` (cached, read-only).

        Keyed by the views' ids (``partner`` the earlier partner, or ``None``), each entry
        holding the views so the ids stay theirs: a window's utterances are hashed by value
        only when the window itself is new.
        """
        key = (id(previous), id(partner), id(view))
        entry = self._context_rows.get(key)
        if entry is not None:
            return entry[3]
        rows = self._rows_of(view, previous, partner)
        self._context_rows.put(key, (previous, partner, view, rows))
        return rows

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
        rows: list[int] = []
        ends: list[int] = []
        for view, partner in zip(window, self._partners(window), strict=True):
            rows += self._rows_after(previous, view, partner)
            ends.append(len(rows))
            previous = view
        assert previous is not None
        forward, best = self._chain.carry(rows, ends)
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
        get = self._chain.attributes.get
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
            word_rows = self._chain.rows(feats)
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
        return (*head.unigrams, *head.bigrams, *head.trigrams, *self._chain.rows(feats))

    def _follow_rows(self, previous: UtteranceView, *, changed: bool) -> tuple[int, ...]:
        """Rows of the features an utterance takes from ``previous``, in order."""
        feats: Features = {}
        _add_previous_features(feats, previous, changed=changed, config=self._config)
        return self._chain.rows(feats)

    def _pair_rows(self, previous: UtteranceView, words: tuple[str, ...]) -> tuple[int, ...]:
        pairs: Features = {}
        _add_pair_features(pairs, previous.words, words, partner=self._config.partner)
        return self._chain.rows(pairs)

    def _lookback_rows(self, partner: UtteranceView, words: tuple[str, ...]) -> tuple[int, ...]:
        feats: Features = {}
        _add_partner_features(feats, partner.words, words, prefix="y")
        return self._chain.rows(feats)

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
        if opening and f"rw0={opening}" not in self._chain.attributes:
            # An opening word the model never kept has no row: one key for all of them keeps
            # the table as small as the model's vocabulary of openings.
            opening = ""
        timing = ""
        names = timing_names(view) if self._config.timing else []
        if names:
            # The class alone, or with the words of a short utterance when the model kept that
            # pair: the table stays as small as the model's own timing features.
            timing = names[-1] if names[-1] in self._chain.attributes else names[0]
        key = (min(len(view.words), 20), min(view.removed, 3), view.complete, opening, timing)
        rows = self._shapes.get(key)
        if rows is None:
            rows = self._chain.rows(_shape_features(view, self._config))
            self._shapes[key] = rows
        return rows

    def _decode_partial(self, context: Sequence[UtteranceView],
                        current: UtteranceView) -> EndStep:
        """:meth:`_last_step` after ``context`` (same errors), which the agreement tests hold
        to crfsuite."""
        return self._last_step(self.context_window(context), check_view(current))

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
        if window.views and len(window.rows) != len(window.views):
            # The window was not made here: it keeps no rows to slide.
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
        try:
            forward, best = self._chain.carry(flat, ends)
        except OverflowError:
            return ContextWindow(views, None, rows)
        last = views[-1]
        return ContextWindow(views, _Carry(
            forward=forward, best=best, same=self._follow_rows(last, changed=False),
            other=self._follow_rows(last, changed=True)), rows)

    def _last_step(self, window: ContextWindow, current: UtteranceView,
                   memo: WordsMemo | None = None) -> EndStep:
        """The last position of the chain ``window`` then ``current`` (a checked view).

        Raises
        ------
        OverflowError
            crfsuite's exp overflows on these views' scores.
        """
        # The rows of utterance_features(current, previous), in its order.
        rows = self._own_rows(current, memo)
        partner: UtteranceView | None = None
        previous: UtteranceView | None = None
        if window.views:
            previous = window.views[-1]
            carry = window.carry
            if carry is None:
                raise OverflowError("the context window's recursions overflowed")
            if self._lookback:
                partner = earlier_partner(window.views, current.speaker)
            rows += self._link_rows(previous, current, carry, partner)
            step = self._chain.end_step(rows, (carry.forward, carry.best))
        else:
            rows += self._opening
            step = self._chain.end_step(rows, None)
        if current.complete and memo is None:
            # A finished utterance is about to become context: its rows after this predecessor
            # are then at hand. (A caller with a memo of its own slides a window of its own,
            # extend_window, which does not read them.)
            self._context_rows.put((id(previous), id(partner), id(current)),
                                   (previous, partner, current, rows))
        return step

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
            step = self._last_step(window, current, memo)
        except OverflowError:
            return self._guess(*self._label_partial_crfsuite(window.views, current))
        label = self._label_names[step.label]
        confidence = step.confidence
        if self._scheme == "coarse":
            return FunctionGuess(label=label, confidence=confidence,
                                 function=self._coarse[label], function_confidence=confidence)
        if self._coarse_from == "label":
            group = self._group_list[step.label]
            return FunctionGuess(label=label, confidence=confidence,
                                 function=self._functions[group],
                                 function_confidence=float(step.group_sums[group]))
        return FunctionGuess(label=label, confidence=confidence,
                             function=self._functions[step.group],
                             function_confidence=step.group_confidence)

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
        return self._chain.reference(xseq)

    def label_conversation(self, utterances: Sequence[UtteranceView]) -> list[FunctionGuess]:
        """Labels of a whole chain of utterances, decoded jointly (batch use, evaluation).

        Unlike :meth:`label_partial`, later utterances inform earlier labels here (Viterbi over
        the whole chain), which suits transcripts but not a live stream.
        """
        for view in utterances:
            check_view(view)
        if not utterances:
            return []
        xseq = self._chain.with_copies(sequence_features(utterances, self._config))
        labels, _ = self._crf.tag_with_confidence(xseq)
        marginals = self._crf.marginals(xseq)
        return [self._guess(label, m) for label, m in zip(labels, marginals, strict=True)]
