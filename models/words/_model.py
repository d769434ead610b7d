"""The trained word model: CRF weights, feature configuration and tag bookkeeping in one object.

A :class:`WordModel` is immutable after loading and safe to share between threads and sessions;
each speaker channel gets its own :class:`~midstream.models.words._decoder.ChannelDecoder` over it.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from importlib import resources
from pathlib import Path

import numpy as np
import numpy.typing as npt
from midstream import DisfluencyLabel, ModelError
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger
from midstream.models._lattice import decode_lattice
from midstream.models.words._features import FeatureConfig, Token, features_at
from midstream.models.words._tags import END_SUFFIX, IP_TAGS, TAG_LABEL, decode_tag

__all__ = ["WordModel", "default_words_model_path"]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


def default_words_model_path() -> Path:
    """Where the shipped word model lives (inside the installed package)."""
    return Path(str(resources.files("midstream.models") / "weights" / "words.tagger"))


class WordModel:
    """Disfluency and utterance-end CRF ready for decoding.

    Use :meth:`from_artifact` or :meth:`load`. ``tags`` are the CRF's internal tags; the
    arrays map them to published labels and utterance-end flags.
    """

    def __init__(self, artifact: ModelArtifact, tagger: CrfTagger) -> None:
        self.artifact = artifact
        self.tagger = tagger
        try:
            self.config = FeatureConfig.from_json(artifact.features)
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelError(f"word model's feature configuration is malformed: {exc}") from exc
        weights = tagger.weights()
        self.tags: tuple[str, ...] = weights.labels
        unknown = [t for t in self.tags if t.removesuffix(END_SUFFIX) not in TAG_LABEL]
        if unknown:
            raise ModelError(f"word model has unknown tags {unknown}")
        self.attributes = weights.attributes
        self.state: FloatArray = np.ascontiguousarray(weights.state, dtype=np.float64)
        if self.config.tag_bias:
            self._apply_bias(self.config.tag_bias)
        self.transitions = weights.transitions
        # Scaled so the largest entry is 1: Viterbi products stay well inside float range.
        self.exp_transitions: FloatArray = np.ascontiguousarray(
            np.exp(weights.transitions - weights.transitions.max()))
        decoded = [decode_tag(t) for t in self.tags]
        self.tag_base: tuple[str, ...] = tuple(d[0] for d in decoded)
        self.tag_label: tuple[DisfluencyLabel, ...] = tuple(d[1] for d in decoded)
        self.tag_ends: tuple[bool, ...] = tuple(d[2] for d in decoded)
        self.end_mask: FloatArray = np.array([1.0 if e else 0.0 for e in self.tag_ends])
        if not self.end_mask.any():
            raise ModelError("word model has no utterance-end tag")
        self.labels: tuple[DisfluencyLabel, ...] = tuple(DisfluencyLabel)
        self.tag_label_index: tuple[int, ...] = tuple(
            self.labels.index(lab) for lab in self.tag_label
        )
        self.tag_ip: tuple[bool, ...] = tuple(b in IP_TAGS for b in self.tag_base)
        # The same facts as arrays, for the compiled window decoder.
        self.tag_group: IntArray = np.array(self.tag_label_index, dtype=np.int64)
        self.tag_end: npt.NDArray[np.bool_] = np.array(self.tag_ends, dtype=np.bool_)
        self.zero: FloatArray = np.zeros(len(self.tags))

    def _apply_bias(self, bias: Mapping[str, float]) -> None:
        unknown = sorted(set(bias) - set(self.tags))
        if unknown:
            raise ModelError(f"word model's tag_bias names unknown tags {unknown}")
        # Every word carries the always-on feature "b", so its row is the per-tag bias: adding
        # there shifts every state score at once and costs nothing per word.
        row = self.attributes.get("b")
        if row is None:
            raise ModelError("word model has no always-on feature 'b' to carry tag_bias")
        for tag, value in bias.items():
            self.state[row, self.tags.index(tag)] += value

    @classmethod
    def from_artifact(cls, artifact: ModelArtifact) -> WordModel:
        if artifact.kind != "words":
            raise ModelError(f"model kind is {artifact.kind!r}, expected 'words'")
        return cls(artifact, CrfTagger.from_bytes(artifact.crf))

    @classmethod
    def load(cls, path: str | os.PathLike[str] | None = None) -> WordModel:
        """Load a ``.tagger`` word model (the shipped one when ``path`` is None)."""
        path = default_words_model_path() if path is None else path
        return cls.from_artifact(load_artifact(path, expected_kind="words"))

    def rows(self, features: Sequence[str]) -> list[int]:
        """Rows of :attr:`state` of the features the model knows (unknown ones weigh nothing)."""
        get = self.attributes.get
        return [r for r in map(get, features) if r is not None]

    def score(self, features: Sequence[str]) -> FloatArray:
        """State scores of one word's features (unknown features weigh nothing)."""
        rows = self.rows(features)
        if not rows:
            return self.zero.copy()
        result: FloatArray = self.state[rows].sum(axis=0)
        return result

    def tag_tokens(self, tokens: Sequence[Token]) -> list[str]:
        """Decode a whole channel at once (offline), with crfsuite's own Viterbi.

        With a ``tag_bias`` the numpy lattice decodes instead, since crfsuite knows nothing of it.
        """
        if self.config.tag_bias:
            path, _ = self.decode_tokens(tokens)
            return [self.tags[k] for k in path]
        xseq = [dict.fromkeys(features_at(tokens, i, self.config), 1.0)
                for i in range(len(tokens))]
        return self.tagger.tag(xseq)

    def decode_tokens(self, tokens: Sequence[Token]) -> tuple[list[int], FloatArray]:
        """Decode a whole channel at once with the numpy lattice (tag indices, marginals)."""
        if not tokens:
            return [], np.zeros((0, len(self.tags)))
        emissions = np.stack(
            [self.score(features_at(tokens, i, self.config)) for i in range(len(tokens))]
        )
        return decode_lattice(emissions, self.exp_transitions)
