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
from collections import OrderedDict
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from midstream._errors import InputError, ModelError
from midstream._schemes import coarse_function
from midstream._types import (
    REMOVED_FROM_CLEAN_TEXT,
    Conversation,
    Utterance,
    UtteranceFunction,
)
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger

#: Feature-dictionary type the CRF adapter takes: attribute name to value.
Features = dict[str, float]

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
    """

    speaker: str
    words: tuple[str, ...]
    removed: int = 0
    complete: bool = True

    def prefix(self, n: int) -> UtteranceView:
        """The view after only the first ``n`` cleaned words (incomplete when ``n`` is short)."""
        if n >= len(self.words):
            return self
        return UtteranceView(speaker=self.speaker, words=self.words[:n], removed=self.removed,
                             complete=False)


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
    """

    trigrams: bool = True
    previous: bool = True
    complete_flag: bool = True

    def to_json(self) -> dict[str, bool]:
        return {"trigrams": self.trigrams, "previous": self.previous,
                "complete_flag": self.complete_flag}

    @classmethod
    def from_json(cls, data: Mapping[str, object]) -> FunctionFeatureConfig:
        known = {"trigrams", "previous", "complete_flag"}
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
                       config: FunctionFeatureConfig = FunctionFeatureConfig()) -> Features:
    """Features of one utterance given the one before it on the conversation's chain.

    Parameters
    ----------
    view
        The utterance to describe.
    previous
        The preceding utterance (either speaker), or ``None`` at the start of the chain.
    config
        Which feature groups to emit.

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
    feats: Features = {"bias": 1.0}
    words = view.words
    n = len(words)
    head = words[:MAX_FEATURE_WORDS]
    feats[f"len={_length_bucket(n)}"] = 1.0
    feats[f"rm={_removed_bucket(view.removed)}"] = 1.0
    if n == 0:
        # Nothing but disfluent words (or silence around a non-verbal sound).
        feats["empty"] = 1.0
        if view.removed:
            feats["only_disfluent"] = 1.0
    if config.complete_flag and not view.complete:
        feats["incomplete"] = 1.0
    for w in head:
        feats[f"w={w}"] = 1.0
    padded = (_BOS, *head, _EOS) if n <= MAX_FEATURE_WORDS else (_BOS, *head)
    for a, b in itertools.pairwise(padded):
        feats[f"b={a}|{b}"] = 1.0
    if config.trigrams:
        for a, b, c in zip(padded, padded[1:], padded[2:], strict=False):
            feats[f"t={a}|{b}|{c}"] = 1.0
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
    if previous is None:
        feats["prev=none"] = 1.0
        return feats
    changed = previous.speaker != view.speaker
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
        if changed and n:
            # "yeah" after a question is an answer, after an opinion an agreement, after a
            # statement a backchannel: the pair carries what neither word does alone.
            feats[f"x={pw[0] if pn else '-'}|{words[0]}"] = 1.0
            if n <= 2:
                feats[f"xs={pw[0] if pn else '-'}|{'_'.join(words)}"] = 1.0
    return feats


def sequence_features(views: Sequence[UtteranceView],
                      config: FunctionFeatureConfig = FunctionFeatureConfig()) -> list[Features]:
    """Features of each utterance of a chain, each given its predecessor in ``views``."""
    out: list[Features] = []
    previous: UtteranceView | None = None
    for view in views:
        out.append(utterance_features(view, previous, config))
        previous = view
    return out


def clean_view(conversation: Conversation, utterance: Utterance,
               upto: int | None = None) -> UtteranceView:
    """The view of one annotated utterance, cleaned with the gold disfluency labels.

    Words labelled filler, editing term, reparandum or restart are removed (and counted); a
    conversation without disfluency annotation keeps all its words. Word fragments ("s-") are
    dropped uncounted, because live recognisers do not emit them.

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
    kept: list[str] = []
    removed = 0
    for i in indices:
        if labels is not None and labels[i] in REMOVED_FROM_CLEAN_TEXT:
            removed += 1
            continue
        word = conversation.words[i]
        if word.fragment or not word.text:
            continue
        kept.append(word.text)
    # A whole utterance counts as complete even when the corpus marks it abandoned (see
    # UtteranceView.complete).
    whole = upto is None or upto >= len(utterance.words)
    return UtteranceView(speaker=utterance.speaker, words=tuple(kept), removed=removed,
                         complete=whole)


def conversation_views(conversation: Conversation) -> list[UtteranceView]:
    """Views of all utterances of a conversation, in the conversation's order."""
    return [clean_view(conversation, u) for u in conversation.utterances]


def iter_views(conversations: Iterable[Conversation]) -> Iterator[list[UtteranceView]]:
    """Views per conversation, for batch use (training, evaluation)."""
    for conversation in conversations:
        yield conversation_views(conversation)


class _FeatureCache:
    """A small LRU of feature dictionaries keyed by (previous view, view, config).

    Context utterances are final, so their features are computed once and reused for every word
    of the next utterance. Bounded: a long session never grows it past ``size`` entries.
    """

    def __init__(self, size: int) -> None:
        self._size = size
        self._items: OrderedDict[tuple[UtteranceView | None, UtteranceView], Features] = (
            OrderedDict())

    def get(self, previous: UtteranceView | None, view: UtteranceView,
            config: FunctionFeatureConfig) -> Features:
        key = (previous, view)
        feats = self._items.get(key)
        if feats is not None:
            self._items.move_to_end(key)
            return feats
        feats = utterance_features(view, previous, config)
        self._items[key] = feats
        if len(self._items) > self._size:
            self._items.popitem(last=False)
        return feats


def check_view(view: object) -> UtteranceView:
    """Return ``view`` if it is a well-formed :class:`UtteranceView`, else raise InputError."""
    if not isinstance(view, UtteranceView):
        raise InputError(f"expected an UtteranceView, got {type(view).__name__}")
    if not isinstance(view.words, tuple) or not all(isinstance(w, str) for w in view.words):
        raise InputError("UtteranceView.words must be a tuple of strings")
    if view.removed < 0:
        raise InputError(f"UtteranceView.removed must be >= 0, got {view.removed}")
    return view



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

    Build it with :meth:`from_artifact` (or :meth:`load`). The tagger keeps a small bounded cache
    of feature dictionaries of recent (final) context utterances. It is not safe to share between
    threads that tag at the same time without the CRF adapter's lock serialising them; give each
    session its own tagger when decoding in parallel (creating one from an artifact is cheap).
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
        # Enough for the context window of a few concurrent utterance chains.
        self._cache = _FeatureCache(size=8 * (context + 2))

    @classmethod
    def from_artifact(cls, artifact: ModelArtifact, *, context: int = DEFAULT_CONTEXT,
                      coarse_from: str | None = None) -> FunctionTagger:
        """A tagger over a loaded ``.msm`` artifact of kind ``"utterance_functions"``.

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
        """Read a ``.msm`` file and build a tagger (raises NotFoundError or ModelError)."""
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

    def label_partial(self, context: Sequence[UtteranceView],
                      current: UtteranceView) -> FunctionGuess:
        """The function of ``current`` (possibly still growing) after ``context``.

        Only the last :attr:`context` utterances of ``context`` are decoded with ``current``, so
        the cost per call is bounded however long the conversation. Context utterances should be
        final: their feature dictionaries are cached.

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
        window = list(context[-self._context:]) if self._context else []
        for view in window:
            check_view(view)
        check_view(current)
        xseq: list[Features] = []
        previous: UtteranceView | None = None
        for view in window:
            xseq.append(self._cache.get(previous, view, self._config))
            previous = view
        # The current utterance changes with every word: not worth caching.
        xseq.append(utterance_features(current, previous, self._config))
        labels, marginals = self._crf.tag_with_marginals(xseq)
        return self._guess(labels[-1], marginals)

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
