"""Incremental decoding of one speaker channel: words in, revisable word states out.

Each new word adds its features and the pieces of its neighbours' features that it completes
(see :mod:`midstream.models._features`), then re-decodes a bounded window: the last finalised
word (its tag fixed) and at most :attr:`DecoderConfig.lag` open words. Cost per word therefore
does not grow with how long the speaker talks, and memory holds at most ``left + lag + 1`` words.

A word becomes *final* when ``lag`` newer words have arrived or its utterance is closed; a final
state never changes again and the decoder forgets the word once it is no longer needed as left
context (the caller keeps history).

A :class:`ChannelDecoder` is not safe to share between threads or tasks: one per channel, used
from one place. The :class:`~midstream.models._wordmodel.WordModel` under it may be shared.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from midstream._errors import EventError
from midstream._types import DisfluencyLabel, Word
from midstream.models._features import Token, feature_piece, features_at, token_of
from midstream.models._lattice import decode_lattice
from midstream.models._wordmodel import WordModel
from midstream.models._wordtags import INTERREGNUM_TAGS, IP_TAGS

__all__ = ["ChannelDecoder", "DecoderConfig", "TokenState"]

FloatArray = npt.NDArray[np.float64]

_REPARANDUM_TAGS = frozenset({"rp", "rp.ip"})


@dataclass(frozen=True, slots=True, kw_only=True)
class DecoderConfig:
    """How the channel decoder trades latency for stability.

    ``lag``: open words at most; the oldest becomes final when a newer word would exceed it
    (words, default 6: the features read 5 words to the right, so a word is final only once
    its features are complete). ``confidence_step``: a changed confidence is reported only when
    it moved by more than this (probability, default 0.05; common practice, no source).
    """

    lag: int = 6
    confidence_step: float = 0.05

    def __post_init__(self) -> None:
        if self.lag < 0:
            raise ValueError(f"lag must be >= 0, got {self.lag}")
        if not 0.0 <= self.confidence_step <= 1.0:
            raise ValueError(f"confidence_step must be in [0, 1], got {self.confidence_step}")


@dataclass(frozen=True, slots=True, kw_only=True)
class TokenState:
    """What the decoder currently says about one word.

    ``confidence`` is the CRF marginal probability of ``label`` (summed over the internal tags
    that publish as it); ``boundary_confidence`` the marginal probability of the
    ``ends_utterance`` decision. ``revision`` counts earlier reports of this word (0 first).
    ``reparandum_onset_key`` links a reparandum word to the repair onset that replaces it
    (``None`` for restarts, other labels, or while the onset has not arrived).
    ``interruption_point`` is true on the last word of a reparandum or restart.
    """

    key: int
    label: DisfluencyLabel
    confidence: float
    ends_utterance: bool
    boundary_confidence: float
    final: bool
    revision: int
    reparandum_onset_key: int | None = None
    interruption_point: bool = False


class _Entry:
    __slots__ = (
        "boundary_confidence", "confidence", "ends", "final", "key", "label", "link",
        "published", "revision", "score", "tag",
    )

    def __init__(self, key: int, size: int) -> None:
        self.key = key
        self.score: FloatArray = np.zeros(size)
        self.tag = -1
        self.label = DisfluencyLabel.FLUENT
        self.ends = False
        self.confidence = 0.0
        self.boundary_confidence = 0.0
        self.link: int | None = None
        self.final = False
        self.published: TokenState | None = None
        self.revision = -1


class ChannelDecoder:
    """Streaming tagger of one speaker channel.

    Examples
    --------
    >>> decoder = ChannelDecoder(model)                                   # doctest: +SKIP
    >>> decoder.append(0, Word(text="i", speaker="A"))                    # doctest: +SKIP
    [TokenState(key=0, label=<DisfluencyLabel.FLUENT: 'fluent'>, ...)]
    """

    def __init__(self, model: WordModel, config: DecoderConfig = DecoderConfig()) -> None:
        self._model = model
        self._config = config
        self._right = model.config.right
        # Finalised words kept as feature context; one more as the lattice's fixed left end.
        self._keep = max(model.config.left, 1)
        self._entries: list[_Entry] = []
        self._tokens: list[Token] = []
        self._first_open = 0
        self._finished = False

    @property
    def open_keys(self) -> tuple[int, ...]:
        """Keys of the words whose state may still change, oldest first."""
        return tuple(e.key for e in self._entries[self._first_open :])

    @property
    def held_words(self) -> int:
        """Words the decoder holds (open ones and finalised left context); bounded."""
        return len(self._entries)

    # -- events --------------------------------------------------------------------------

    def append(
        self, key: int, word: Word, *, after_other_speaker: bool = False
    ) -> list[TokenState]:
        """Add the next word of this channel; return the states that changed.

        ``after_other_speaker``: another speaker's word came between the previous word of this
        channel and this one (the engine knows; it is a strong utterance-end cue).

        Raises
        ------
        EventError
            ``key`` is already in the window, or the channel was finished.
        """
        if self._finished:
            raise EventError(f"word {key}: channel already finished")
        if any(e.key == key for e in self._entries):
            raise EventError(f"word {key}: key already used in this channel")
        self._entries.append(_Entry(key, len(self._model.tags)))
        self._tokens.append(token_of(word, after_other_speaker))
        last = len(self._entries) - 1
        owners: list[_Entry] = []
        pieces: list[list[str]] = []
        for k in range(min(self._right, last) + 1):
            entry = self._entries[last - k]
            if not entry.final:
                owners.append(entry)
                pieces.append(feature_piece(self._tokens, last - k, k, self._model.config))
        for entry, row in zip(owners, self._model.score_pieces(pieces), strict=True):
            entry.score += row
        return self._update(close=False)

    def replace(self, key: int, word: Word) -> list[TokenState]:
        """The recogniser changed an open word's text, times or confidence.

        Raises
        ------
        EventError
            ``key`` is final or unknown.
        """
        position = self._open_position(key)
        self._tokens[position] = token_of(word, self._tokens[position].after_other_speaker)
        self._rescore_open()
        return self._update(close=False)

    def withdraw(self, key: int) -> list[TokenState]:
        """The recogniser took back an open word; return the other states that changed.

        Raises
        ------
        EventError
            ``key`` is final or unknown.
        """
        position = self._open_position(key)
        del self._entries[position]
        del self._tokens[position]
        self._rescore_open()
        if self._first_open >= len(self._entries):
            return []
        return self._update(close=False)

    def close_utterance(self) -> list[TokenState]:
        """The caller knows an utterance ends after the last word: finalise all open words."""
        if self._first_open >= len(self._entries):
            return []
        return self._update(close=True)

    def finish(self) -> list[TokenState]:
        """End of the channel: finalise everything; later appends raise EventError."""
        states = self.close_utterance()
        self._finished = True
        return states

    # -- internals -----------------------------------------------------------------------

    def _open_position(self, key: int) -> int:
        for position in range(len(self._entries) - 1, -1, -1):
            entry = self._entries[position]
            if entry.key == key:
                if entry.final:
                    raise EventError(f"word {key}: already final, cannot change it")
                return position
        raise EventError(f"word {key}: not an open word of this channel (final or unknown)")

    def _rescore_open(self) -> None:
        last = len(self._entries) - 1
        config = self._model.config
        for i in range(self._first_open, last + 1):
            features = features_at(self._tokens[: last + 1], i, config)
            self._entries[i].score = self._model.score(features)

    def _update(self, *, close: bool) -> list[TokenState]:
        model = self._model
        start = self._first_open
        anchor = start - 1 if start > 0 else None
        window = self._entries[anchor if anchor is not None else start :]
        emissions = np.stack([e.score for e in window])
        path, marginals = decode_lattice(
            emissions,
            model.exp_transitions,
            first=window[0].tag if anchor is not None else None,
            last_mask=model.end_mask if close else None,
        )
        label_probs = (marginals @ model.label_groups).tolist()
        end_probs = (marginals @ model.end_mask).tolist()
        offset = 1 if anchor is not None else 0
        n_open = len(self._entries) - start
        n_final = n_open if close else max(0, n_open - self._config.lag)
        for j in range(offset, len(window)):
            entry = window[j]
            tag = path[j]
            entry.tag = tag
            entry.label = model.tag_label[tag]
            entry.ends = model.tag_ends[tag]
            entry.confidence = label_probs[j][model.tag_label_index[tag]]
            p_end = end_probs[j]
            entry.boundary_confidence = p_end if entry.ends else 1.0 - p_end
        self._link(window, path)
        changed: list[TokenState] = []
        for j, entry in enumerate(self._entries[start:]):
            if j < n_final:
                entry.final = True
            if self._differs(entry):
                entry.revision += 1
                state = TokenState(
                    key=entry.key, label=entry.label, confidence=entry.confidence,
                    ends_utterance=entry.ends, boundary_confidence=entry.boundary_confidence,
                    final=entry.final, revision=entry.revision,
                    reparandum_onset_key=entry.link,
                    interruption_point=model.tag_ip[entry.tag],
                )
                entry.published = state
                changed.append(state)
        self._first_open = start + n_final
        drop = self._first_open - self._keep
        if drop > 0:
            del self._entries[:drop]
            del self._tokens[:drop]
            self._first_open -= drop
        return changed

    def _link(self, window: list[_Entry], path: list[int]) -> None:
        """Link reparandum words to the repair onset after their interruption point."""
        base = self._model.tag_base
        target: int | None = None
        # Walk right to left, remembering the first word after the nearest interregnum.
        next_onset: int | None = None
        for j in range(len(window) - 1, -1, -1):
            tag = base[path[j]]
            entry = window[j]
            if tag in IP_TAGS:
                target = next_onset if tag == "rp.ip" else None
            elif tag not in _REPARANDUM_TAGS:
                target = None
            if not entry.final:
                entry.link = target if tag in _REPARANDUM_TAGS else None
            if tag not in INTERREGNUM_TAGS:
                next_onset = entry.key

    def _differs(self, entry: _Entry) -> bool:
        old = entry.published
        if old is None:
            return True
        step = self._config.confidence_step
        return (
            old.label != entry.label
            or old.ends_utterance != entry.ends
            or old.final != entry.final
            or old.reparandum_onset_key != entry.link
            or old.interruption_point != self._model.tag_ip[entry.tag]
            or abs(old.confidence - entry.confidence) > step
            or abs(old.boundary_confidence - entry.boundary_confidence) > step
        )
