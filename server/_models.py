"""What the server needs of the models, and how it loads them.

The server depends on the conversation engine only through the two protocols below, which
``midstream.models.ModelBundle`` and its engines satisfy; loading goes through
``ModelBundle.load_default`` / ``ModelBundle.load_directory``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Protocol

from midstream import HypothesisDiff, InputError, Word


class ModelInfoLike(Protocol):
    """One model's description (``midstream.models.ModelInfo``)."""

    @property
    def kind(self) -> str: ...
    @property
    def name(self) -> str: ...
    @property
    def format_version(self) -> int: ...
    @property
    def labels(self) -> Sequence[str]: ...
    @property
    def sha256(self) -> str: ...
    @property
    def training_summary(self) -> Mapping[str, object]: ...


class Engine(Protocol):
    """The conversation engine: one per conversation, not thread-safe.

    Every method raises :class:`~midstream.EventError` for an event that breaks the protocol
    (duplicate or unknown word id, correcting a final word, events after ``finish``, text with
    no speech content) and returns only what changed, naming each word and utterance at most
    once per diff (the session publishes a one-word batch's diff without merging it).
    """

    def add_word(self, word_id: str, word: Word) -> HypothesisDiff: ...
    def replace_word(self, word_id: str, word: Word) -> HypothesisDiff: ...
    def withdraw_word(self, word_id: str) -> HypothesisDiff: ...
    def hint(self, speaker: str, *, turn_end: bool) -> HypothesisDiff: ...
    def tick(self, now: float) -> HypothesisDiff: ...
    def finish(self) -> HypothesisDiff: ...
    @property
    def silence_marks(self) -> tuple[float, ...]:
        """Silences after a word (seconds, ascending) at which a tick can change a decision;
        empty when ticks change nothing."""


class Bundle(Protocol):
    """A loaded set of models that makes engines (``midstream.models.ModelBundle``)."""

    def describe(self) -> tuple[ModelInfoLike, ...]: ...
    def new_engine(self) -> Engine: ...


def load_bundle(directory: Path | None, *, max_open_words: int | None = None,
                settle: bool = True, setting: str | None = None) -> Bundle:
    """Load the models in ``directory``, or the shipped default models when it is ``None``.

    ``max_open_words`` and ``settle`` are the decoder's ``lag`` and ``settle``, ``setting`` the
    conversation setting utterance functions are labelled in (see :func:`tune_bundle`).
    Blocking file I/O: call it off the event loop.

    Raises
    ------
    ModelError
        When a model file is missing, corrupt, truncated, of the wrong kind or a newer format.
    InputError
        The coarse function model has learnt no conversation setting ``setting`` (the message
        names those it has).
    """
    from midstream.models import ModelBundle  # noqa: PLC0415 - the models load only on demand

    bundle = (ModelBundle.load_default() if directory is None
              else ModelBundle.load_directory(directory))
    # Here, off the event loop, rather than inside the first live word's latency.
    bundle.warm_up()
    return tune_bundle(bundle, max_open_words=max_open_words, settle=settle, setting=setting)


def tune_bundle(bundle: Bundle, *, max_open_words: int | None, settle: bool,
                setting: str | None = None) -> Bundle:
    """``bundle`` making engines whose decoders finalise words as asked and that label
    utterance functions as conversations of ``setting`` (server-wide: one deployment serves
    one kind of conversation).

    The defaults (``None``, ``True``, ``None``) leave any bundle as it is; other values need a
    ``midstream.models.ModelBundle``.

    Raises
    ------
    InputError
        Other values for a bundle that is not a ``ModelBundle``, or a setting its coarse
        function model has not learnt (the message names those it has).
    """
    if max_open_words is None and settle and setting is None:
        return bundle
    from midstream.models import DecoderConfig, ModelBundle  # noqa: PLC0415 - as above

    if not isinstance(bundle, ModelBundle):
        raise InputError("max_open_words, settle and setting need a "
                         f"midstream.models.ModelBundle, not {type(bundle).__name__}")
    if setting is not None:
        bundle = bundle.with_setting(setting)
    if max_open_words is None and settle:
        return bundle
    return bundle.with_decoder(DecoderConfig(lag=max_open_words, settle=settle))
