"""Validation of caller input at the edge, before anything reaches an engine.

Every check raises a Midstream error whose message names the field (and the limit with its
value) so a caller can fix the request; the status code follows from the error kind
(``midstream.server._status``). Messages never quote word text: it may be sensitive and error
messages end up in logs and metrics.

:class:`SpeakerTimeline` is per conversation and bounded by the number of speakers.
"""

from __future__ import annotations

import math
import re
import unicodedata

from midstream import EventError, LimitExceededError, Word
from midstream.server._config import ServerLimits
from midstream.server._status import FieldLimitError


def check_id(value: str, field: str, limits: ServerLimits) -> None:
    """Check a word id or speaker name: non-empty, bounded, printable.

    Raises
    ------
    EventError
        When empty or holding a control character.
    FieldLimitError
        When longer than ``max_id_chars``.
    """
    if not value.strip():
        raise EventError(f"field {field!r} is empty")
    if len(value) > limits.max_id_chars:
        raise FieldLimitError(
            "max_id_chars", limits.max_id_chars,
            f"field {field!r} is {len(value)} characters long; "
            f"limit max_id_chars is {limits.max_id_chars}",
        )
    if _CONTROL.search(value):
        raise EventError(f"field {field!r} contains a control character")


# Unicode category Cc is exactly these 65 code points (C0, DEL, C1), fixed by the standard's
# stability policy; one regex search is a fraction of a category lookup per character, which
# runs on every word id and speaker.
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")
# The ASCII characters outside categories C* and Z*: everything but controls and the space.
_ASCII_SPEECH = re.compile("[\x21-\x7e]")


def _id_fine(value: str, limits: ServerLimits) -> bool:
    """Whether :func:`check_id` would pass ``value`` (without building its field name)."""
    return len(value) <= limits.max_id_chars and not _CONTROL.search(value) \
        and not value.isspace() and value != ""


def _has_speech_characters(text: str) -> bool:
    # Letters, digits, marks or symbols: anything but separators, controls and punctuation-free
    # emptiness. Category "C*" is control/format/unassigned, "Z*" separators.
    if text.isascii():
        return _ASCII_SPEECH.search(text) is not None
    return any(unicodedata.category(c)[0] not in "CZ" for c in text)


def check_word(word_id: str, word: Word, limits: ServerLimits) -> None:
    """Check one recogniser word on its own (no conversation state).

    Raises
    ------
    EventError
        Empty or whitespace/control-only text, a non-finite or negative time, ``end`` before
        ``start``, a confidence outside ``[0, 1]``.
    FieldLimitError
        Text longer than ``max_word_chars``, an id longer than ``max_id_chars``.
    """
    if not (_id_fine(word_id, limits) and _id_fine(word.speaker, limits)):
        check_id(word_id, "word_id", limits)
        check_id(word.speaker, f"speaker of word {word_id!r}", limits)
    if not word.text:
        raise EventError(f"field 'text' of word {word_id!r} is empty")
    if len(word.text) > limits.max_word_chars:
        raise FieldLimitError(
            "max_word_chars", limits.max_word_chars,
            f"field 'text' of word {word_id!r} is {len(word.text)} characters long; "
            f"limit max_word_chars is {limits.max_word_chars}",
        )
    if not _has_speech_characters(word.text):
        raise EventError(f"field 'text' of word {word_id!r} holds only whitespace or control "
                         f"characters")
    # An untimed word skips building the pairs.
    if word.start is not None or word.end is not None:
        for name, value in (("start_s", word.start), ("end_s", word.end)):
            if value is not None and (not math.isfinite(value) or value < 0):
                raise EventError(f"field {name!r} of word {word_id!r} must be a finite number "
                                 f">= 0, not {value}")
    if word.start is not None and word.end is not None and word.end < word.start:
        raise EventError(
            f"field 'end_s' of word {word_id!r} ({word.end}) is before its 'start_s' ({word.start})"
        )
    if word.confidence is not None and not 0.0 <= word.confidence <= 1.0:
        # NaN fails both comparisons and lands here too.
        raise EventError(
            f"field 'confidence' of word {word_id!r} must be in [0, 1], not {word.confidence}"
        )


def check_batch_size(count: int, limits: ServerLimits) -> None:
    """Check the number of words in one ``WordBatch``.

    Raises
    ------
    EventError
        For an empty batch.
    FieldLimitError
        For more than ``max_words_per_message`` words.
    """
    if count == 0:
        raise EventError("field 'words' of the word batch is empty")
    if count > limits.max_words_per_message:
        raise FieldLimitError(
            "max_words_per_message", limits.max_words_per_message,
            f"the word batch holds {count} words; "
            f"limit max_words_per_message is {limits.max_words_per_message}",
        )


class SpeakerTimeline:
    """Per-conversation checks that need memory: speaker count and time order per speaker.

    Memory is bounded by ``max_speakers_per_conversation`` entries. Not thread-safe.
    """

    # One per live conversation: no per-instance __dict__.
    __slots__ = ("_last_start", "_limits")

    def __init__(self, limits: ServerLimits) -> None:
        self._limits = limits
        # Speaker -> start of their latest timed word (None until one has a time), in order of
        # first appearance (assigning to a present key keeps its place).
        self._last_start: dict[str, float | None] = {}

    @property
    def speakers(self) -> tuple[str, ...]:
        """Speakers in order of first appearance."""
        return tuple(self._last_start)

    def check_speaker(self, speaker: str) -> None:
        """Check that ``speaker`` is known or may still join.

        Raises
        ------
        LimitExceededError
            When a new speaker would exceed ``max_speakers_per_conversation``.
        """
        limit = self._limits.max_speakers_per_conversation
        if speaker not in self._last_start and len(self._last_start) >= limit:
            raise LimitExceededError(
                "max_speakers_per_conversation", limit,
                f"a new speaker would be number {len(self._last_start) + 1}; "
                f"limit max_speakers_per_conversation is {limit}",
            )

    def check_new_word(self, word_id: str, word: Word) -> None:
        """Check a new word against its speaker's earlier words (start times never go back).

        Raises
        ------
        EventError
            When the word starts before the speaker's previous word started.
        LimitExceededError
            When its speaker would be one too many.
        """
        self.check_speaker(word.speaker)
        last = self._last_start.get(word.speaker)
        if word.start is not None and last is not None and word.start < last:
            raise EventError(
                f"field 'start_s' of word {word_id!r} ({word.start}) goes back before the "
                f"previous start of speaker {word.speaker!r} ({last})"
            )

    def record(self, word: Word) -> None:
        """Remember an accepted word (after the engine took it)."""
        if word.start is not None:
            self._last_start[word.speaker] = word.start
        else:
            self._last_start.setdefault(word.speaker, None)
