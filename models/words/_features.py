"""Word features for the disfluency and utterance-end CRF: a window of words in, names out.

Only what a live recogniser gives is used: lower-case words, the fragment flag, optional times
and confidence, and whether the other speaker spoke in between. No punctuation, capitals or gold
boundaries.

The features of word ``i`` read at most :attr:`FeatureConfig.left` words to its left and
:attr:`FeatureConfig.right` words to its right. They are produced in *pieces*: piece ``k`` holds
the features whose right-most word read is ``i + k``. The streaming decoder adds piece ``k`` of
word ``i`` when word ``i + k`` arrives, so a new word costs one word's worth of feature work
however long the speaker talks; training joins all pieces of every word. Both go through
:func:`feature_piece`, so identical windows give identical features.

Every feature is an indicator (value 1.0); names are short strings with an ``=``-separated value.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Final

from midstream import Word
from midstream.models.words._abandon import AbandonCues

__all__ = ["FeatureConfig", "Token", "feature_piece", "features_at", "tokens_from_words"]

#: Pause buckets in seconds (common practice, no source: 0.1 s is inter-word jitter,
#: about 0.5 s a noticeable pause, 1.5 s a long one).
_PAUSE_EDGES: Final = (0.1, 0.3, 0.5, 1.0, 1.5)
#: Pause (seconds) that counts as a gap for the position feature (common practice, no source).
GAP_SECONDS: Final = 0.5
_CONFIDENCE_EDGES: Final = (0.3, 0.5, 0.7, 0.9)
#: How far back the same-class feature looks for the word a repair substitutes.
_CLASS_REACH: Final = 3


@dataclass(frozen=True, slots=True)
class Token:
    """What the features read of one word of a speaker channel."""

    text: str
    fragment: bool = False
    start: float | None = None
    end: float | None = None
    confidence: float | None = None
    after_other_speaker: bool = False
    #: Words the other speakers said since this speaker's previous word (0 when unknown).
    other_words: int = 0
    #: The word starts before another speaker's latest word ends (read by the boundary
    #: model only, :mod:`midstream.models.boundaries._model`).
    overlap: bool = False


def tokens_from_words(words: Sequence[Word], after_other: Sequence[bool],
                      other_words: Sequence[int] = (),
                      overlap: Sequence[bool] | None = None) -> list[Token]:
    """Tokens of one channel's words (``after_other[k]``: another speaker spoke before word k;
    ``other_words[k]``: how many words they said, all 0 when not given; ``overlap[k]``: word k
    overlaps another speaker's word, all false when not given)."""
    counts = other_words or [0] * len(words)
    overlaps = overlap if overlap is not None else [False] * len(words)
    return [token_of(w, after_other_speaker=a, other_words=n, overlap=o)
            for w, a, n, o in zip(words, after_other, counts, overlaps, strict=True)]


def token_of(word: Word, *, after_other_speaker: bool = False, other_words: int = 0,
             overlap: bool = False) -> Token:
    return Token(
        text=word.text,
        fragment=word.fragment,
        start=word.start,
        end=word.end,
        confidence=word.confidence,
        after_other_speaker=after_other_speaker,
        other_words=other_words,
        overlap=overlap,
    )


def _other_bucket(token: Token) -> str:
    # 1-2 words is a backchannel's size ("uh-huh", "oh really"), a longer one takes the floor
    # (common practice, no source).
    n = token.other_words
    return "1" if n <= 1 else "2" if n == 2 else "3-5" if n <= 5 else "6+"


@dataclass(frozen=True, slots=True, kw_only=True)
class FeatureConfig:
    """Which features to compute; stored in the model file so decoding matches training.

    ``lexicon`` maps words to an interregnum class learned from training data (``"F"`` filled
    pause, ``"E"`` editing term, ``"D"`` discourse marker). ``right`` is how many words to the
    right a feature may read (the decoder cannot finalise a word before that many have followed);
    ``left`` bounds the left context (the position feature counts back at most that far);
    ``restart_span`` (0: off) how far back the phrase-restart features look for the word that
    follows an interruption point. Requires ``restart_span <= left``.

    ``word_classes`` maps closed-class words to a group letter (see
    :mod:`~midstream.models.words._classes`); empty turns the word-class features off (models
    trained before they existed).

    ``break_ahead`` turns on the features of a break ahead: the first place within the right
    context where the other speaker spoke before the speaker's next word, how many words they
    said there, and the word the speaker stopped at (an utterance broken off for no more than a
    backchannel, after which the speaker starts afresh, was abandoned: a restart).

    ``abandon``: the abandoned-unit cues the decoder judges predicted utterance ends with
    (:mod:`~midstream.models.words._abandon`; ``None``: the CRF's own restart tags alone).

    ``tag_bias`` maps internal CRF tags to a constant added to their state score at decoding
    (not a feature: it shifts the decision threshold between tags after training, chosen by
    cross-validation on the training split; empty means the trained weights alone decide).
    """

    right: int = 5
    left: int = 8
    lexicon: Mapping[str, str] = field(default_factory=dict, repr=False)
    restart_span: int = 0
    tag_bias: Mapping[str, float] = field(default_factory=dict)
    word_classes: Mapping[str, str] = field(default_factory=dict, repr=False)
    break_ahead: bool = False
    abandon: AbandonCues | None = None

    def __post_init__(self) -> None:
        if self.right < 0 or self.left < self.right + 1:
            raise ValueError(f"need 0 <= right < left, got right={self.right} left={self.left}")
        if not 0 <= self.restart_span <= self.left:
            raise ValueError(f"restart_span must be in [0, left], got {self.restart_span}")

    def to_json(self) -> dict[str, Any]:
        data: dict[str, Any] = {"right": self.right, "left": self.left,
                                 "lexicon": dict(self.lexicon),
                                 "restart_span": self.restart_span}
        if self.tag_bias:
            data["tag_bias"] = dict(self.tag_bias)
        if self.word_classes:
            data["word_classes"] = dict(self.word_classes)
        if self.break_ahead:
            data["break_ahead"] = True
        if self.abandon is not None:
            data["abandon"] = self.abandon.to_json()
        return data

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> FeatureConfig:
        return cls(
            right=int(data["right"]),
            left=int(data["left"]),
            lexicon={str(k): str(v) for k, v in dict(data["lexicon"]).items()},
            # Absent in models trained before the phrase-restart features existed.
            restart_span=int(data.get("restart_span", 0)),
            tag_bias={str(k): float(v) for k, v in dict(data.get("tag_bias", {})).items()},
            # Absent in models trained before the word-class features existed.
            word_classes={str(k): str(v)
                          for k, v in dict(data.get("word_classes", {})).items()},
            # Absent in models trained before the break-ahead features existed.
            break_ahead=bool(data.get("break_ahead", False)),
            # Absent in models trained before the abandoned-unit cues existed.
            abandon=(AbandonCues.from_json(data["abandon"]) if "abandon" in data else None),
        )


def _bucket(value: float, edges: Sequence[float]) -> int:
    for k, edge in enumerate(edges):
        if value < edge:
            return k
    return len(edges)


def _pause(before: Token, after: Token) -> float | None:
    if before.end is None or after.start is None:
        return None
    return after.start - before.end


def feature_piece(tokens: Sequence[Token], i: int, k: int, config: FeatureConfig) -> list[str]:
    """Features of token ``i`` whose right-most token read is ``i + k``.

    Reads only ``tokens[i - config.left : i + k + 1]``; ``i - 1 < 0`` means the channel (or
    the window the caller kept) starts at ``i``. Requires ``0 <= k <= config.right`` and
    ``i + k < len(tokens)``.
    """
    lex = config.lexicon
    t0 = tokens[i]
    w0 = "<frag>" if t0.fragment else t0.text
    out: list[str] = []
    if k == 0:
        wm1 = tokens[i - 1].text if i >= 1 else "<s>"
        wm2 = tokens[i - 2].text if i >= 2 else "<s>"
        out += [
            "b",
            "w=" + w0,
            "w-1=" + wm1,
            "w-2=" + wm2,
            "w-1w=" + wm1 + "|" + w0,
            "w-2w-1w=" + wm2 + "|" + wm1 + "|" + w0,
            "lx=" + lex.get(t0.text, "-"),
            "lx-1=" + (lex.get(wm1, "-") if i >= 1 else "<s>"),
        ]
        if t0.fragment:
            out.append("frag")
            out.append("fp=" + t0.text[:2])
        if t0.after_other_speaker:
            out.append("oth")
            if config.break_ahead:
                out.append("othn=" + _other_bucket(t0))
        if i >= 1:
            pause = _pause(tokens[i - 1], t0)
            if pause is not None:
                out.append(f"pb={_bucket(pause, _PAUSE_EDGES)}")
        if t0.confidence is not None:
            out.append(f"cf={_bucket(t0.confidence, _CONFIDENCE_EDGES)}")
        # Words since the last gap, counted back at most config.left words.
        # A gap is another speaker or a pause of at least GAP_SECONDS before the word.
        since = 0
        j = i
        left = config.left
        while j > 0 and since < left:
            tj = tokens[j]
            if tj.after_other_speaker:
                break
            before = tokens[j - 1]
            if (before.end is not None and tj.start is not None
                    and tj.start - before.end >= GAP_SECONDS):
                break
            since += 1
            j -= 1
        out.append(f"pos={min(since, 6) if since < config.left else 'far'}")
        # Repetition of earlier words: the second copy of a repeat (repair onset or later).
        for b in range(1, config.right + 1):
            if i - b < 0:
                break
            if tokens[i - b].text == t0.text:
                out.append(f"lm{b}")
                if i - b - 1 >= 0 and i >= 1 and tokens[i - b - 1].text == tokens[i - 1].text:
                    out.append(f"lbm{b}")
        classes = config.word_classes
        if classes:
            c0 = classes.get(t0.text, "-")
            cm1 = classes.get(wm1, "-") if i >= 1 else "<s>"
            cm2 = classes.get(wm2, "-") if i >= 2 else "<s>"
            out += ["c=" + c0, "c-1c=" + cm1 + "|" + c0, "c-2c-1c=" + cm2 + "|" + cm1 + "|" + c0]
            # A different word of the same closed class shortly before: a substitution's repair.
            if c0 != "-" and not t0.fragment:
                for b in range(1, _CLASS_REACH + 1):
                    if i - b < 0:
                        break
                    tb = tokens[i - b].text
                    if tb != t0.text and classes.get(tb) == c0:
                        out.append(f"cb{b}=" + c0)
                        break
        return out

    tk = tokens[i + k]
    text0 = t0.text
    textk = tk.text
    wk = "<frag>" if tk.fragment else textk
    lexk = lex.get(textk, "-")
    span = config.restart_span
    # How far back the copy features look (restart_span <= left, so this covers the span too).
    reach = min(max(span, 2), config.left)
    # Most pieces of k >= 2 fire nothing: every copy feature below needs textk to recur among
    # the words up to i, or text0 among the words between, so those two memberships (C-speed
    # scans of short lists) decide whether the loops run at all. Guarding a block by a
    # condition it needs leaves the features and their order as they were.
    between = [t.text for t in tokens[i + 1 : i + k]]
    behind = [t.text for t in tokens[max(i - reach, 0) : i + 1]]
    recurs = textk in behind
    # Whether every word strictly between i and i + k is a filled pause or editing term:
    # several features below ask, so it is worked out once.
    only_fe = True
    for w in between:
        if lex.get(w, "-") not in "FE":
            only_fe = False
            break
    if k == 1:
        out += [
            "w+1=" + wk,
            "ww+1=" + w0 + "|" + wk,
            "lx+1=" + lexk,
        ]
        if tk.after_other_speaker:
            out.append("oth+1")
            if config.break_ahead:
                out.append("othw=" + w0)
                out.append("othn+1=" + _other_bucket(tk))
                out.append("othnw=" + _other_bucket(tk) + "|" + w0)
        pause = _pause(t0, tk)
        if pause is not None:
            out.append(f"pa={_bucket(pause, _PAUSE_EDGES)}")
        if tk.fragment:
            out.append("frag+1")
    elif k == 2:
        out += ["w+2=" + wk, "w+1w+2=" + between[0] + "|" + wk, "lx+2=" + lexk]
    elif textk in lex:
        # A filled pause or editing term further ahead: an interruption point may lie between.
        out.append(f"lx+{k}=" + lex[textk])
    if k >= 2 and config.break_ahead and tk.after_other_speaker and not any(
            t.after_other_speaker for t in tokens[i + 1 : i + k]):
        # The first break ahead, and the word the speaker stopped at: the words of an utterance
        # broken off there may be abandoned (a restart) when the speaker then starts afresh.
        out.append(f"oth+{k}")
        out.append("othw=" + between[-1])
        out.append(f"othn+{k}=" + _other_bucket(tk))
    # Exact and rough copies ending at or starting from i that reach i + k.
    if not t0.fragment and textk == text0:
        out.append(f"m0_{k}")
        if text0 not in between:
            out.append(f"m0first={k}")
            out.append("m0w=" + w0)
            if only_fe and k > 1:
                out.append("mskip")
    if recurs:
        for a in (1, 2):
            if i - a >= 0 and tokens[i - a].text == textk:
                out.append(f"m{a}_{k}")
    # A word right after i recurs at i + k: i may precede a repeated stretch too.
    if k > 2 and textk in between:
        for a in (1, 2):
            if k > a + 1 and between[a - 1] == textk:
                out.append(f"n{a}m{k}")
    if span and recurs:
        for a in range(3, span + 1):
            if i - a >= 0 and tokens[i - a].text == textk:
                out.append(f"m{a}_{k}")
        # The first word after i that is no filled pause or editing term restarts a phrase
        # that began a words back: i is then likely the last word of a reparandum.
        if lexk not in "FE" and only_fe:
            for a in range(span + 1):
                if i - a >= 0 and tokens[i - a].text == textk:
                    out.append(f"nx{a}")
                    break
    # The word that resumes after a filled pause or editing term, paired with the word before
    # them: a substitution ("and uh but", "a i mean the") shows in the pair.
    if k >= 2 and lexk not in "FE" and only_fe:
        out.append("wi=" + w0 + "|" + wk)
        out.append("lxi=" + lex.get(text0, "-") + "|" + lexk)
    # Left copy: tokens[i-a .. i] equals tokens[i+k-a .. i+k] for a = 0, 1 (and 2).
    if textk == text0 and i >= 1 and k > 1 and tokens[i - 1].text == between[-1]:
        if i >= 2 and k > 2 and tokens[i - 2].text == between[-2]:
            out.append(f"lc{k}_3")
        else:
            out.append(f"lc{k}_2")
    # Forward copy: tokens[i .. i+n-1] equals tokens[i+d .. i+d+n-1] with d + n - 1 = k, n >= 2.
    if text0 in between:
        for n in (2, 3):
            d = k - n + 1
            if d >= n:
                for b in range(n):
                    if tokens[i + b].text != tokens[i + d + b].text:
                        break
                else:
                    out.append(f"fc{d}_{n}")
    if k >= 2:
        if tk.fragment:
            out.append(f"frag+{k}")
        if recurs:
            # Rough copy of a phrase that began before i: the bigram at i-a (a >= 2) recurs
            # ending at i + k, exactly or with its middle word of a trigram substituted.
            back = between[-1]
            for a in range(2, reach + 1):
                if i - a < 0:
                    break
                if tokens[i - a].text == back and tokens[i - a + 1].text == textk:
                    out.append(f"bg{a}_{k}")
            if k >= 3:
                first = between[-2]
                for a in range(2, reach + 1):
                    if i - a < 0:
                        break
                    if (tokens[i - a].text == first and tokens[i - a + 2].text == textk
                            and tokens[i - a + 1].text != back):
                        out.append(f"sb{a}_{k}")
    classes = config.word_classes
    if classes:
        # A different word of the same closed class follows: "a- the", "he uh she", "is- was".
        c0 = classes.get(text0, "-")
        ck = classes.get(textk, "-")
        if c0 != "-" and ck == c0 and textk != text0 and not t0.fragment:
            out.append(f"cs{k}=" + c0)
            if k >= 2 and only_fe:
                out.append("csi=" + c0)
        if k == 1:
            out.append("cc+1=" + c0 + "|" + ck)
        elif k >= 3:
            # The class pattern of words i, i+1 comes again at i+k-1, i+k but the words differ.
            d = k - 1
            c1 = classes.get(between[0], "-")
            cd = classes.get(between[-1], "-")
            if ((c0 != "-" or c1 != "-") and cd == c0 and ck == c1
                    and (between[-1] != text0 or textk != between[0])):
                out.append(f"cp{d}")
    # A broken-off word that the speaker then says in full.
    if t0.fragment and len(text0) > 1 and textk.startswith(text0.rstrip("-")):
        out.append(f"fpre{k}")
    return out


def features_at(tokens: Sequence[Token], i: int, config: FeatureConfig) -> list[str]:
    """All features of token ``i`` given the tokens known so far (all pieces joined)."""
    last = min(config.right, len(tokens) - 1 - i)
    out: list[str] = []
    for k in range(last + 1):
        out += feature_piece(tokens, i, k, config)
    return out
