"""Incremental decoding of one speaker channel: words in, revisable word states out.

Each new word adds its features and the pieces of its neighbours' features that it completes
(see :mod:`midstream.models.words._features`), then re-decodes a bounded window: the last finalised
word (its tag fixed) and at most :attr:`DecoderConfig.lag` open words. Cost per word therefore
does not grow with how long the speaker talks, and memory holds at most ``left + lag + 1`` words.

A word becomes *final* once its tag is settled (no later word can change the best path there),
when ``lag`` newer words have arrived, or when its utterance is closed; a final state never
changes again and the decoder forgets the word once it is no longer needed as left context
(the caller keeps history).

Abandoned utterances (restarts of the second kind, ``docs/labels.md``): an utterance is
abandoned only once its speaker starts afresh, so its words are first reported with another
label and revised to ``restart`` when the fresh start's first word arrives. With a model that
carries abandoned-unit cues (:mod:`~midstream.models.words._abandon`), the decoder judges each
predicted utterance end once, when the first word after it arrives: if the unit before it was
abandoned, its words that are still open (not fillers, editing terms or reparandum words) get
restart evidence and are re-decoded. Words of the unit already final keep their label: a final
state never changes. The revised words become final by the same rule as every word: once
settled, at the latest ``lag`` words late. A caller's explicit close finalises open words at
once, with no next word to judge by: after it they are never revised to ``restart``.

A :class:`ChannelDecoder` is not safe to share between threads or tasks: one per channel, used
from one place. The :class:`~midstream.models.words._model.WordModel` under it may be shared.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import repeat
from typing import NamedTuple

import numpy as np
import numpy.typing as npt
from midstream import DisfluencyLabel, EventError, Word
from midstream.models._lattice import accumulate_rows, decode_window
from midstream.models.boundaries._model import BoundaryModel
from midstream.models.words._abandon import ABANDON_EVIDENCE, WHOLE_UNIT, abandon_features
from midstream.models.words._features import Token, feature_piece, features_at, token_of
from midstream.models.words._model import WordModel
from midstream.models.words._tags import INTERREGNUM_TAGS, IP_TAGS

__all__ = ["DEFAULT_LAG", "ChannelDecoder", "DecoderConfig", "TokenState"]

FloatArray = npt.NDArray[np.float64]

_REPARANDUM_TAGS = frozenset({"rp", "rp.ip"})
_KEPT_IN_ABANDONED = INTERREGNUM_TAGS | _REPARANDUM_TAGS

#: Open words a settling decoder holds at most (see :class:`DecoderConfig`).
DEFAULT_LAG = 10


@dataclass(frozen=True, slots=True, kw_only=True)
class DecoderConfig:
    """How the channel decoder trades latency for stability.

    ``settle`` (default on): a word becomes final as soon as its tag is *settled*, that is when
    the Viterbi back-pointers of every tag of the newest word with complete features meet at
    or after it, so no later word can change the best path there (online Viterbi). The final
    labels are then those of decoding the whole channel at once, except where ``lag`` forces
    an earlier decision. Off: a word becomes final exactly when ``lag`` newer words arrived.

    ``lag``: open words at most; the oldest becomes final when a newer word would exceed it,
    settled or not (words). ``None``, the default, means :data:`DEFAULT_LAG` with ``settle``
    and one more than the words the model's features read to the right without it (a word is
    final only once its features are complete: 6 for a model that reads 5). It bounds the
    memory and the per-word cost of a channel.

    ``confidence_step``: a changed confidence is reported only when it moved by more than this
    (probability, default 0.05; common practice, no source).
    """

    lag: int | None = None
    settle: bool = True
    confidence_step: float = 0.05

    def __post_init__(self) -> None:
        if self.lag is not None and self.lag < 0:
            raise ValueError(f"lag must be >= 0, got {self.lag}")
        if not 0.0 <= self.confidence_step <= 1.0:
            raise ValueError(f"confidence_step must be in [0, 1], got {self.confidence_step}")


class TokenState(NamedTuple):
    """What the decoder currently says about one word.

    ``confidence`` is the CRF marginal probability of ``label`` (summed over the internal tags
    that publish as it); ``boundary_confidence`` the marginal probability of the
    ``ends_utterance`` decision. ``revision`` counts earlier reports of this word (0 first).
    ``reparandum_onset_key`` links a reparandum word to the repair onset that replaces it
    (``None`` for restarts, other labels, or while the onset has not arrived).
    ``interruption_point`` is true on the last word of a reparandum or restart.

    A named tuple rather than a frozen dataclass: the decoder makes a few per word, and a frozen
    dataclass's field-by-field ``__init__`` cost more than the rest of publishing them.
    Build it with keywords.
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
    """A held word: its key, current tag, finality and what was last published about it."""

    __slots__ = ("final", "judged", "key", "published", "tag")

    def __init__(self, key: int) -> None:
        self.key = key
        self.tag = -1
        self.final = False
        # An utterance end predicted after this word was judged for abandonment.
        self.judged = False
        self.published: TokenState | None = None


class ChannelDecoder:
    """Streaming tagger of one speaker channel.

    Examples
    --------
    >>> decoder = ChannelDecoder(model)                                   # doctest: +SKIP
    >>> decoder.append(0, Word(text="i", speaker="A"))                    # doctest: +SKIP
    [TokenState(key=0, label=<DisfluencyLabel.FLUENT: 'fluent'>, ...)]
    """

    def __init__(self, model: WordModel, config: DecoderConfig = DecoderConfig(),
                 boundary: BoundaryModel | None = None) -> None:
        self._model = model
        self._config = config
        self._boundary = boundary
        self._end_columns = np.flatnonzero(model.end_mask)
        self._right = model.config.right
        self._settle = config.settle
        self._lag = config.lag if config.lag is not None else (
            DEFAULT_LAG if config.settle else model.config.right + 1)
        self._reparandum_tags = frozenset(
            k for k, b in enumerate(model.tag_base) if b in _REPARANDUM_TAGS)
        self._abandon = model.config.abandon
        # Where a judged unit's restart evidence goes: its inner words to ``rs``, its last word
        # to ``rs.ip`` ending the utterance (``rs.ip`` in a model without that tag), so the
        # path through the unit is the one the corpus gives an abandoned utterance.
        base, ends = model.tag_base, model.tag_ends
        self._restart_inner = [k for k, b in enumerate(base) if b == "rs" and not ends[k]]
        self._restart_last = ([k for k, b in enumerate(base) if b == "rs.ip" and ends[k]]
                              or [k for k, b in enumerate(base) if b == "rs.ip"])
        # Tags an abandoned unit's word keeps: the corpus leaves fillers, editing terms and the
        # reparanda of brackets inside the unit as they are.
        self._keeps_label = tuple(b in _KEPT_IN_ABANDONED for b in model.tag_base)
        self._classes = model.config.word_classes
        # Whether words were dropped from the front (the channel's first word is gone).
        self._trimmed = False
        # Finalised words kept as feature context; one more as the lattice's fixed left end.
        self._keep = max(model.config.left, 1)
        self._entries: list[_Entry] = []
        self._top_key = -1  # the largest key seen: larger ones skip the duplicate scan
        self._tokens: list[Token] = []
        # State scores of the held words, row k for self._entries[k], in one block that grows
        # by doubling to at most keep + lag + 1 rows and then allocates nothing more. It starts
        # small: an idle conversation's few words should not pay for a full window.
        self._scores: FloatArray = np.zeros((8, len(model.tags)))
        self._first_open = 0
        self._finished = False

    @property
    def open_keys(self) -> tuple[int, ...]:
        """Keys of the words whose state may still change, oldest first."""
        return tuple(e.key for e in self._entries[self._first_open :])

    @property
    def max_open(self) -> int:
        """Open words at most: the configured or default ``lag``."""
        return self._lag

    @property
    def held_words(self) -> int:
        """Words the decoder holds (open ones and finalised left context); bounded."""
        return len(self._entries)

    # -- events --------------------------------------------------------------------------

    def append(
        self, key: int, word: Word, *, after_other_speaker: bool = False, other_words: int = 0,
        overlap: bool = False
    ) -> list[TokenState]:
        """Add the next word of this channel; return the states that changed.

        ``after_other_speaker``: another speaker's word came between the previous word of this
        channel and this one (the engine knows; it is a strong utterance-end cue);
        ``other_words``: how many words the other speakers said there (a backchannel or a turn).
        ``overlap``: the word starts before another speaker's latest word ends. With a boundary
        model, the silence between the previous word and this one (when both have times) joins
        the previous word's utterance-end decision.

        Raises
        ------
        EventError
            ``key`` is already in the window, or the channel was finished.
        """
        if self._finished:
            raise EventError(f"word {key}: channel already finished")
        if key <= self._top_key and any(e.key == key for e in self._entries):
            raise EventError(f"word {key}: key already used in this channel")
        self._top_key = max(self._top_key, key)
        self._entries.append(_Entry(key))
        self._tokens.append(token_of(word, after_other_speaker=after_other_speaker,
                                     other_words=other_words, overlap=overlap))
        last = len(self._entries) - 1
        self._reserve(last + 1)
        self._scores[last] = 0.0
        if self._boundary is not None and last >= 1 and not self._entries[last - 1].final:
            self._join_evidence(last - 1)
        names: list[str] = []
        targets: list[int] = []
        model = self._model
        config = model.config
        entries = self._entries
        tokens = self._tokens
        for k in range(min(self._right, last) + 1):
            if not entries[last - k].final:
                piece = feature_piece(tokens, last - k, k, config)
                names += piece
                targets += [last - k] * len(piece)
        if names:
            # One lookup for all pieces; unknown features (row -1) weigh nothing.
            rows = list(map(model.attributes.get, names, repeat(-1)))
            accumulate_rows(self._scores, model.state, np.array(rows, dtype=np.int64),
                            np.array(targets, dtype=np.int64))
        return self._update(close=False)

    def replace(self, key: int, word: Word) -> list[TokenState]:
        """The recogniser changed an open word's text, times or confidence.

        Raises
        ------
        EventError
            ``key`` is final or unknown.
        """
        position = self._open_position(key)
        held = self._tokens[position]
        self._tokens[position] = token_of(word, after_other_speaker=held.after_other_speaker,
                                          other_words=held.other_words, overlap=held.overlap)
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
        held = len(self._entries)
        self._scores[position:held] = self._scores[position + 1 : held + 1]
        self._rescore_open()
        if self._first_open >= len(self._entries):
            return []
        return self._update(close=False)

    def tick(self, now: float, *, other_spoke: bool) -> list[TokenState]:
        """The stream's time moved on to ``now`` (seconds, the word times' clock) with no word.

        With a boundary model and a timed last word, the silence since that word is weighed
        as if the next word came now (``other_spoke``: another speaker spoke since it): when
        the joined evidence makes an utterance end after it more likely than not, the open
        utterance is closed as by :meth:`close_utterance`. Otherwise nothing changes (the
        evidence is not kept: the next word or tick weighs the silence again). A time at or
        before the last word's end changes nothing.
        """
        boundary = self._boundary
        held = len(self._entries)
        if boundary is None or self._first_open >= held:
            return []
        last = held - 1
        end = self._tokens[last].end
        if end is None or not now > end:
            return []
        evidence = boundary.evidence(self._tokens, last, silence=now - end,
                                     other_spoke=other_spoke)
        saved = self._scores[last].copy()
        self._scores[last, self._end_columns] += evidence
        start = self._first_open
        lo = start - 1 if start > 0 else start
        model = self._model
        result = decode_window(
            self._scores, lo, held, model.exp_transitions,
            first=self._entries[lo].tag if start > 0 else -1, last_mask=None,
            tag_group=model.tag_group, tag_end=model.tag_end, settle_from=-1)
        self._scores[last] = saved
        if result.end_probability[-1] < 0.5:
            return []
        return self._update(close=True)

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

    def _reserve(self, rows: int) -> None:
        if rows > len(self._scores):
            grown = np.zeros((2 * rows, self._scores.shape[1]))
            grown[: len(self._scores)] = self._scores
            self._scores = grown

    def _rescore_open(self) -> None:
        last = len(self._entries) - 1
        model = self._model
        for i in range(self._first_open, last + 1):
            self._scores[i] = model.score(features_at(self._tokens[: last + 1], i, model.config))
            self._entries[i].judged = False  # the restart evidence went with the old scores
            if self._boundary is not None and i < last:
                self._join_evidence(i)

    def _join_evidence(self, i: int) -> None:
        """Add the boundary model's evidence to word ``i``'s end tags (its successor is held)."""
        assert self._boundary is not None
        tokens = self._tokens
        end, start = tokens[i].end, tokens[i + 1].start
        if end is None or start is None:
            return  # untimed: the word model decides alone
        evidence = self._boundary.evidence(tokens, i, silence=max(start - end, 0.0),
                                           other_spoke=tokens[i + 1].after_other_speaker)
        self._scores[i, self._end_columns] += evidence

    def _update(self, *, close: bool) -> list[TokenState]:
        model = self._model
        start = self._first_open
        lo = start - 1 if start > 0 else start
        held = len(self._entries)
        # Rows up to held - 1 - right have all their feature pieces; only those can settle.
        complete = held - 1 - self._right - lo if self._settle else -1
        result = decode_window(
            self._scores, lo, held, model.exp_transitions,
            first=self._entries[lo].tag if start > 0 else -1,
            last_mask=model.end_mask if close else None,
            tag_group=model.tag_group, tag_end=model.tag_end, settle_from=complete,
        )
        if not close and self._abandon is not None and self._judge(
                lo, start, result.path, result.end_probability):
            result = decode_window(
                self._scores, lo, held, model.exp_transitions,
                first=self._entries[lo].tag if start > 0 else -1, last_mask=None,
                tag_group=model.tag_group, tag_end=model.tag_end, settle_from=complete,
            )
        path = result.path
        confidence = result.confidence
        end_probability = result.end_probability
        offset = start - lo
        n_open = held - start
        n_final = n_open if close else max(result.settled - offset + 1, n_open - self._lag, 0)
        window = self._entries[lo:]
        links = self._links(window, path)
        tag_label = model.tag_label
        tag_ends = model.tag_ends
        tag_ip = model.tag_ip
        step = self._config.confidence_step
        changed: list[TokenState] = []
        # One pass: take the new tag, and publish the words whose state moved (label, end,
        # finality, link, interruption point, or a confidence by more than the step).
        for j in range(offset, len(window)):
            entry = window[j]
            tag = path[j]
            entry.tag = tag
            label = tag_label[tag]
            ends = tag_ends[tag]
            p_end = end_probability[j]
            boundary = p_end if ends else 1.0 - p_end
            link = links[j]
            ip = tag_ip[tag]
            final = j - offset < n_final
            if final:
                entry.final = True
            old = entry.published
            if old is not None and (
                old.label == label and old.ends_utterance == ends and old.final == final
                and old.reparandum_onset_key == link and old.interruption_point == ip
                and abs(old.confidence - confidence[j]) <= step
                and abs(old.boundary_confidence - boundary) <= step
            ):
                continue
            state = TokenState(
                key=entry.key, label=label, confidence=confidence[j], ends_utterance=ends,
                boundary_confidence=boundary, final=final,
                revision=0 if old is None else old.revision + 1,
                reparandum_onset_key=link, interruption_point=ip,
            )
            entry.published = state
            changed.append(state)
        self._first_open = start + n_final
        drop = self._first_open - self._keep
        if drop > 0:
            self._trimmed = True
            del self._entries[:drop]
            del self._tokens[:drop]
            self._scores[: held - drop] = self._scores[drop:held]
            self._first_open -= drop
        return changed

    def _judge(self, lo: int, start: int, path: list[int],
               end_probability: list[float]) -> bool:
        """Judge the newest unjudged utterance end the path predicts among the open words.

        When the unit before it was abandoned, restart evidence joins its open words' scores
        and the caller re-decodes. Returns whether any score changed.
        """
        cues = self._abandon
        assert cues is not None
        unit = self.next_unit(lo, start, path)
        if unit is None:
            return False
        first, end, features = unit
        if cues.probability(features) < cues.threshold:
            return False
        keeps = self._keeps_label
        changed = False
        for i in range(max(first, start), end + 1):
            if not keeps[path[i - lo]]:
                columns = self._restart_last if i == end else self._restart_inner
                self._scores[i, columns] += ABANDON_EVIDENCE
                changed = True
        return changed

    def next_unit(self, lo: int, start: int,
                  path: list[int]) -> tuple[int, int, list[str]] | None:
        """The newest unjudged unit the path ends among the open words, marked judged.

        Only an end with a word after it counts (the speaker's fresh start); each is judged
        once. Returns the unit's first and last positions and its abandoned-unit features, or
        ``None`` when there is none to judge.
        """
        entries = self._entries
        tag_ends = self._model.tag_ends
        end = -1
        for i in range(len(entries) - 2, start - 1, -1):
            if tag_ends[path[i - lo]]:
                end = i
                break
        if end < 0 or entries[end].judged:
            return None
        entries[end].judged = True
        first = end
        while first > 0 and not tag_ends[path[first - 1 - lo] if first - 1 >= lo
                                          else entries[first - 1].tag]:
            first -= 1
        tokens = self._tokens
        following = tokens[end + 1]
        features = abandon_features(
            [t.text for t in tokens[max(first, end - WHOLE_UNIT + 1) : end + 1]],
            fragment=tokens[end].fragment, whole=first > 0 or not self._trimmed,
            length=end - first + 1, next_text=following.text,
            other_words=following.other_words if following.after_other_speaker else 0,
            classes=self._classes)
        return first, end, features

    def _links(self, window: list[_Entry], path: list[int]) -> list[int | None]:
        """For each window position, the key of the repair onset its reparandum word links to.

        ``None`` for restarts, other labels, and reparanda whose onset has not arrived yet.
        """
        links: list[int | None] = [None] * len(window)
        if self._reparandum_tags.isdisjoint(path):
            return links  # the usual case: no reparandum in the window
        base = self._model.tag_base
        target: int | None = None
        # Walk right to left, remembering the first word after the nearest interregnum.
        next_onset: int | None = None
        for j in range(len(window) - 1, -1, -1):
            tag = base[path[j]]
            if tag in IP_TAGS:
                target = next_onset if tag == "rp.ip" else None
            elif tag not in _REPARANDUM_TAGS:
                target = None
            if tag in _REPARANDUM_TAGS:
                links[j] = target
            if tag not in INTERREGNUM_TAGS:
                next_onset = window[j].key
        return links
