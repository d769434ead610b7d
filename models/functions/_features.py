"""Features of a cleaned (possibly partial) utterance, given the one before it on the chain.

Each utterance is seen through an :class:`~midstream.models.functions._views.UtteranceView`: its
speaker, its *cleaned* words (fillers, editing terms, reparanda and restarts removed), how many
disfluent words were removed and whether it is complete. The features are pure functions of a
view, the view before it and (with the look-back) an earlier partner's; the tagger
(:mod:`~midstream.models.functions._tagger`) maps their names to model rows and caches them.

Feature values are recogniser-style text only: lower case, no punctuation, no timing.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from midstream import ModelError
from midstream.models.functions._views import UtteranceView

#: Feature-dictionary type the CRF adapter takes: attribute name to value.
Features = dict[str, float]

#: n-grams are read from at most this many leading words of an utterance, so the features of a
#: growing utterance cost a bounded amount however long the speaker talks (documented limit;
#: fewer than 1% of SwDA utterances are longer, measured on the train split).
MAX_FEATURE_WORDS = 40

_BOS = "<s>"
_EOS = "</s>"


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
    settings
        The conversation settings (training corpora, by their ``Conversation.corpus`` name)
        the model holds a second, setting-only copy of every feature for (:func:`setting_copies`).
        A tagger told a conversation's setting adds that copy's weights to the shared ones
        (:meth:`FunctionTagger.for_setting`); one told none uses the shared weights alone,
        which training fits to work without a copy too. Empty in models trained without
        ``--setting-features``.
    timing
        When the words carry times: how the utterance starts against the other speakers'
        talk (:attr:`UtteranceView.partner_gap`, in :func:`gap_bucket`'s classes), alone and,
        for utterances of at most two words, with those words. A "yeah" said while the partner
        talks is a backchannel; one after the partner stops is more often an answer or an
        agreement, and a question is seldom started over the partner's words. Off in models
        trained before it existed.
    """

    trigrams: bool = True
    previous: bool = True
    complete_flag: bool = True
    partner: bool = False
    opening: bool = False
    lookback: bool = False
    settings: tuple[str, ...] = ()
    timing: bool = False

    def to_json(self) -> dict[str, object]:
        return {"trigrams": self.trigrams, "previous": self.previous,
                "complete_flag": self.complete_flag, "partner": self.partner,
                "opening": self.opening, "lookback": self.lookback,
                "settings": list(self.settings), "timing": self.timing}

    @classmethod
    def from_json(cls, data: Mapping[str, object]) -> FunctionFeatureConfig:
        known = {"trigrams", "previous", "complete_flag", "partner", "opening", "lookback",
                 "settings", "timing"}
        unknown = set(data) - known
        if unknown:
            raise ModelError(f"unknown function feature settings {sorted(unknown)}")
        values: dict[str, bool] = {}
        for key, value in data.items():
            if key == "settings":
                continue
            if not isinstance(value, bool):
                raise ModelError(f"function feature setting {key!r} must be true or false")
            values[key] = value
        settings = data.get("settings", [])
        if not isinstance(settings, list) or not all(
                isinstance(name, str) and name and SETTING_SEPARATOR not in name
                for name in settings):
            raise ModelError("function model 'settings' must be a list of non-empty names "
                             f"without {SETTING_SEPARATOR!r}")
        return cls(**values, settings=tuple(settings))


#: Opens the name of a setting-only feature copy: no shared feature name starts with it.
SETTING_MARK = "@"
#: Ends the setting's name in a feature copy's name (``@maptask|w0=which``).
SETTING_SEPARATOR = "|"


def setting_prefix(setting: str) -> str:
    """The prefix of the feature copies of ``setting``."""
    return f"{SETTING_MARK}{setting}{SETTING_SEPARATOR}"


def setting_copies(feats: Mapping[str, float], setting: str) -> Features:
    """``feats`` with a copy of each feature named for ``setting`` (a new dictionary).

    The copies let one pooled model learn where a setting's conventions differ from the others'
    (Daumé III 2007, "Frustratingly easy domain adaptation": shared plus per-domain copies)
    while the shared weights still serve a conversation of no known setting.

    Examples
    --------
    >>> setting_copies({"w0=so": 1.0}, "task")
    {'w0=so': 1.0, '@task|w0=so': 1.0}
    """
    prefix = setting_prefix(setting)
    out = dict(feats)
    out.update((prefix + name, value) for name, value in feats.items())
    return out


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


def gap_bucket(gap: float) -> str:
    """The class of a :attr:`UtteranceView.partner_gap` the timing features name.

    Overlap (``ov``, deep overlap ``ov2`` beyond half a second), a turn taken at once (``adj``,
    under 0.3 s: turn transitions cluster near 0.2 s, Stivers et al. 2009, from memory), after
    a short gap (under 1 s), a pause (under 3 s) or a long silence; ``none`` when no other
    speaker has spoken yet. The other bounds are common practice, no source.

    Examples
    --------
    >>> [gap_bucket(g) for g in (-1.0, -0.2, 0.1, 0.5, 2.0, 7.0, float("inf"))]
    ['ov2', 'ov', 'adj', 'short', 'pause', 'long', 'none']
    """
    if gap < -0.5:
        return "ov2"
    if gap < 0.0:
        return "ov"
    if gap < 0.3:
        return "adj"
    if gap < 1.0:
        return "short"
    if gap < 3.0:
        return "pause"
    return "none" if gap == float("inf") else "long"


#: Utterances of at most this many words have their timing class crossed with their words.
TIMED_WORDS = 2


def timing_names(view: UtteranceView) -> list[str]:
    """The timing feature names of ``view`` (none when its words carry no times)."""
    if view.partner_gap is None:
        return []
    bucket = gap_bucket(view.partner_gap)
    names = [f"tg={bucket}"]
    if 0 < len(view.words) <= TIMED_WORDS:
        names.append(f"tgw={bucket}|{'_'.join(view.words)}")
    return names


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
#: tagger's context (:data:`~midstream.models.functions._tagger.DEFAULT_CONTEXT`), so that the
#: utterance a stream labels sees the partner training showed it.
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
    if config.timing:
        feats.update(dict.fromkeys(timing_names(view), 1.0))
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
