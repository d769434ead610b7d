"""Abandoned utterances found live: one decision when the same speaker starts afresh.

An abandoned utterance (a restart of the second kind, ``docs/labels.md``) is known only once its
speaker starts a new one, so the word CRF, which labels words, finds few of them: the cue is
the whole unit's shape (where it stopped, how long it ran) together with what came next. This
module scores that shape with a small logistic model (its weights live in the word model's
feature configuration, trained beside the CRF by ``midstream train words --abandon-cues``).

The decoder asks it once per predicted utterance end, when the speaker's next word arrives
(:meth:`~midstream.models.words._decoder.ChannelDecoder.append`); when the probability reaches the
threshold, the utterance's open words are revised to ``restart``
(:data:`ABANDON_EVIDENCE` on the restart tags' state scores, so the CRF's path stays coherent).

Features of a unit (:func:`abandon_features`): the word it stopped at, the last two words and
their closed classes (a determiner, preposition, auxiliary or ``to`` at the end marks an
unfinished constituent), whether that word is a fragment, the unit's length (bucketed), the
first word after it and its class, how many words the other speaker said in between (none, a
backchannel, a turn), and, for units short enough to be held whole, the unit's first word and
whether the fresh start repeats it ("i was going to / i think").
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Final

__all__ = ["ABANDON_EVIDENCE", "AbandonCues", "abandon_features"]

#: Added to the restart tags' state scores of a unit judged abandoned. Large against the
#: CRF's own state scores (a few units), so the decision holds whatever the CRF preferred,
#: while the transition scores still pick ``rs`` against ``rs.ip`` and the end flag.
ABANDON_EVIDENCE: Final = 12.0
#: Units of at most this many words are judged with their first word (the decoder holds at
#: least this many words back from the newest, ``FeatureConfig.left``).
WHOLE_UNIT: Final = 8


def _bucket(n: int) -> str:
    return str(n) if n < 5 else "5-8" if n <= 8 else "9+"


def _other(n: int) -> str:
    # 1-2 words is a backchannel's size, more takes the floor (common practice, no source).
    return "0" if n <= 0 else "1" if n == 1 else "2" if n == 2 else "3-5" if n <= 5 else "6+"


def abandon_features(texts: Sequence[str], *, fragment: bool, whole: bool, length: int,
                     next_text: str, other_words: int,
                     classes: Mapping[str, str]) -> list[str]:
    """Features of one unit that ended before ``next_text``, the speaker's next word.

    ``texts``: the unit's last words (at least the last one), oldest first; ``whole``: ``texts``
    holds the whole unit; ``length``: the unit's length in words (a lower bound when not
    ``whole``); ``fragment``: the last word is a fragment; ``other_words``: words the other
    speakers said between the unit's last word and ``next_text`` (0: none).

    >>> abandon_features(["i", "was", "going", "to"], fragment=False, whole=True, length=4,
    ...                  next_text="we", other_words=0, classes={"to": "R", "we": "P"})[:4]
    ['b', 'w=to', 'ww=going|to', 'c=R']
    """
    w1 = texts[-1]
    w2 = texts[-2] if len(texts) > 1 else "<s>"
    c1 = classes.get(w1, "-")
    c2 = classes.get(w2, "-") if len(texts) > 1 else "<s>"
    cx = classes.get(next_text, "-")
    n = _bucket(length if whole or length >= 9 else 9)
    o = _other(other_words)
    out = ["b", "w=" + w1, "ww=" + w2 + "|" + w1, "c=" + c1, "cc=" + c2 + "|" + c1,
           "n=" + n, "nc=" + n + "|" + c1, "nx=" + next_text, "cx=" + cx,
           "cnx=" + c1 + "|" + cx, "o=" + o, "ow=" + o + "|" + w1, "on=" + o + "|" + n]
    if fragment:
        out.append("frag")
    if whole and length <= WHOLE_UNIT:
        out.append("first=" + texts[0])
        out.append("rep" if texts[0] == next_text else "norep")
    return out


@dataclass(frozen=True, slots=True, kw_only=True)
class AbandonCues:
    """The abandoned-unit model: a weight per feature (log-odds) and a probability threshold.

    ``threshold`` was chosen by cross-validation grouped by conversation on the training split
    (``models/weights/words.md``).
    """

    weights: Mapping[str, float] = field(repr=False)
    threshold: float

    def probability(self, features: Sequence[str]) -> float:
        """Probability that the unit with these features was abandoned."""
        get = self.weights.get
        score = sum(get(name, 0.0) for name in features)
        if score < -30.0:
            return 0.0
        return 1.0 / (1.0 + math.exp(-score))

    def to_json(self) -> dict[str, Any]:
        return {"threshold": self.threshold, "weights": dict(sorted(self.weights.items()))}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> AbandonCues:
        return cls(threshold=float(data["threshold"]),
                   weights={str(k): float(v) for k, v in dict(data["weights"]).items()})
