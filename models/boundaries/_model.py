"""Timing evidence for utterance ends: silences, speaker changes and overlap.

The word CRF decides utterance ends from the words (it was trained on untimed telephone
transcripts, so its pause features carry no weight). This module adds what a recogniser's word
times show: the *boundary model* is a maximum-entropy classifier (a CRF over one-word sequences,
trained through :mod:`midstream.models._crf`) that says, for one word of a speaker channel,
whether an utterance ends after it, from

- the silence after the word, as cumulative indicators (``sa>=0.5`` fires for every silence of
  at least 0.5 s), so that a silence still running gives a lower bound of its evidence and
  the same features serve a word that has a successor and a word the stream has only fallen
  silent after;
- whether another speaker spoke in that silence (a speaker change);
- the silence before the word (bucketed) and whether the word overlaps another speaker's word;
- the word itself, the word before it and the next word of the channel when there is one
  (lexical cues such as "okay", "right", "yeah", or a next word that starts afresh).

The evidence for a word is complete once the channel's next word arrives (the silence and the
speaker change are then known). While the stream is silent after a word, a time tick weighs the
silence so far with the features that need no next word (the silence indicators fire one by
one as it grows). The decoder adds ``weight * log_odds + offset`` to the state score of every
utterance-end tag of the word CRF (a product of the two models; ``weight`` and ``offset`` are
chosen by cross-validation with the word model), and only for words whose times are known: on
an untimed conversation the word CRF decides alone, exactly as before. The word model is used
only through its end tags, so a retrained word model with the same tag set keeps working (its
``weight`` and ``offset`` are then worth choosing again).

A :class:`BoundaryModel` is immutable after loading and safe to share between threads.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Final

from midstream import Conversation, ModelError
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger
from midstream.models.words._features import Token

__all__ = [
    "BOUNDARY_LABELS",
    "BoundaryConfig",
    "BoundaryModel",
    "boundary_features",
    "default_boundary_model_path",
    "overlap_flags",
]

#: The classifier's two labels: an utterance ends after the word, or it goes on.
END: Final = "end"
GOES_ON: Final = "on"
BOUNDARY_LABELS: Final = (END, GOES_ON)

#: Silence thresholds of the cumulative silence-after indicators, seconds (common practice, no
#: source: 0.1 s is inter-word jitter, 0.2-0.5 s a short pause, a second and more a long one).
SILENCE_EDGES: Final = (0.1, 0.2, 0.3, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0)
#: Buckets of the silence before a word, seconds (same source).
_BEFORE_EDGES: Final = (0.1, 0.3, 0.5, 1.0, 2.0)
#: Every silence at which a silence feature starts to fire (the speaker-change feature buckets
#: the silence by the same edges as the silence before a word).
_MARKS: Final = tuple(sorted({*SILENCE_EDGES, *_BEFORE_EDGES}))


def default_boundary_model_path() -> Path:
    """Where the shipped boundary model lives (inside the installed package)."""
    return Path(str(resources.files("midstream.models") / "weights" / "boundaries.tagger"))


@dataclass(frozen=True, slots=True, kw_only=True)
class BoundaryConfig:
    """How the boundary model's evidence joins the word CRF; stored in the model file.

    ``weight`` scales the classifier's log-odds of an end and ``offset`` is added to it before
    the sum reaches the word CRF's utterance-end tags (natural-log units, like the CRF's state
    scores). ``lexical`` turns the word-identity features on.
    """

    weight: float = 1.0
    offset: float = 0.0
    lexical: bool = True

    def to_json(self) -> dict[str, Any]:
        return {"weight": self.weight, "offset": self.offset, "lexical": self.lexical}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> BoundaryConfig:
        return cls(weight=float(data["weight"]), offset=float(data["offset"]),
                   lexical=bool(data.get("lexical", True)))


def _bucket(value: float, edges: Sequence[float]) -> int:
    for k, edge in enumerate(edges):
        if value < edge:
            return k
    return len(edges)


def boundary_features(tokens: Sequence[Token], i: int, *, silence: float, other_spoke: bool,
                      lexical: bool = True) -> list[str]:
    """Features of an utterance end after ``tokens[i]``.

    ``silence`` is the silence after the word so far (seconds; the whole gap to the next word
    of the channel once that word is there), ``other_spoke`` whether another speaker spoke
    since the word. Reads ``tokens[i - 1]``, ``tokens[i]`` and, when the channel's next word
    is there, ``tokens[i + 1]`` (its text only: a stream that has fallen silent after a word
    has none, and the lexical features of the next word are then simply absent).
    """
    t0 = tokens[i]
    out = ["b"]
    for edge in SILENCE_EDGES:
        if silence < edge:
            break
        out.append(f"sa>={edge}")
    if other_spoke:
        out.append("oth")
        out.append(f"oth&sa={_bucket(silence, _BEFORE_EDGES)}")
    if t0.overlap:
        out.append("ov")
    if i >= 1:
        before = tokens[i - 1]
        if before.end is not None and t0.start is not None:
            out.append(f"sb={_bucket(t0.start - before.end, _BEFORE_EDGES)}")
        if t0.after_other_speaker:
            out.append("oth-1")
    else:
        out.append("first")
    if lexical:
        w0 = "<frag>" if t0.fragment else t0.text
        wm1 = tokens[i - 1].text if i >= 1 else "<s>"
        out += ["w=" + w0, "w-1w=" + wm1 + "|" + w0]
        if i + 1 < len(tokens):
            t1 = tokens[i + 1]
            w1 = "<frag>" if t1.fragment else t1.text
            out += ["w+1=" + w1, "ww+1=" + w0 + "|" + w1]
    return out


def overlap_flags(conversation: Conversation) -> list[bool]:
    """For each word of ``conversation``: it starts before another speaker's latest word ends.

    Words are taken in conversation order, as a live stream would deliver them; a word without
    a start time never overlaps.
    """
    last_end: dict[str, float] = {}
    flags: list[bool] = []
    for word in conversation.words:
        start = word.start
        flags.append(start is not None and any(
            end > start for speaker, end in last_end.items() if speaker != word.speaker))
        if word.end is not None:
            last_end[word.speaker] = word.end
    return flags


class BoundaryModel:
    """The trained boundary classifier with its joining weights.

    Use :meth:`from_artifact` or :meth:`load`. :meth:`evidence` is what the decoder adds to the
    word CRF's utterance-end tags.
    """

    def __init__(self, artifact: ModelArtifact, tagger: CrfTagger) -> None:
        self.artifact = artifact
        try:
            self.config = BoundaryConfig.from_json(artifact.features)
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelError(f"boundary model's configuration is malformed: {exc}") from exc
        weights = tagger.weights()
        if set(weights.labels) != set(BOUNDARY_LABELS):
            raise ModelError(f"boundary model has labels {list(weights.labels)}, expected "
                             f"{list(BOUNDARY_LABELS)}")
        end, on = weights.labels.index(END), weights.labels.index(GOES_ON)
        state = weights.state
        # One number per feature: its weight for an end minus its weight for going on. A
        # one-word sequence has no transitions, so their sum is the classifier's log-odds.
        self._delta: dict[str, float] = {
            name: float(state[row, end] - state[row, on])
            for name, row in weights.attributes.items()}

    @classmethod
    def from_artifact(cls, artifact: ModelArtifact) -> BoundaryModel:
        if artifact.kind != "boundaries":
            raise ModelError(f"model kind is {artifact.kind!r}, expected 'boundaries'")
        return cls(artifact, CrfTagger.from_bytes(artifact.crf))

    @classmethod
    def load(cls, path: str | os.PathLike[str] | None = None) -> BoundaryModel:
        """Load a ``.tagger`` boundary model (the shipped one when ``path`` is None)."""
        path = default_boundary_model_path() if path is None else path
        return cls.from_artifact(load_artifact(path, expected_kind="boundaries"))

    @property
    def silence_marks(self) -> tuple[float, ...]:
        """The silences after a word (seconds, ascending) at which its evidence can change.

        Between two marks every silence fires the same features, so a stream that has fallen
        silent needs weighing again only as its silence passes each mark; past the last one
        the evidence stays as it is.
        """
        return _MARKS

    def log_odds(self, features: Sequence[str]) -> float:
        """The classifier's log-odds of an utterance end (unknown features weigh nothing)."""
        get = self._delta.get
        return sum([get(name, 0.0) for name in features])

    def evidence(self, tokens: Sequence[Token], i: int, *, silence: float,
                 other_spoke: bool) -> float:
        """What joins the word CRF's end-tag scores of ``tokens[i]`` (log units)."""
        config = self.config
        features = boundary_features(tokens, i, silence=silence, other_spoke=other_spoke,
                                     lexical=config.lexical)
        return config.weight * self.log_odds(features) + config.offset
