"""The conversation engine: recogniser events in, hypothesis diffs out.

One :class:`ConversationEngine` serves one conversation. Each speaker has a channel whose
:class:`~midstream.models.words._decoder.ChannelDecoder` labels words and utterance ends as they
arrive; the engine turns the decoder's token states into :class:`~midstream.WordHypothesis`
values, splits each channel's open words into utterances at the currently hypothesised ends,
labels every utterance whose cleaned words changed with the utterance-function tagger, and
returns only what changed.

Utterance ids are ``"<speaker>.<n>"``, numbered per speaker from 1 in order of creation and
never reused. When a revised utterance end merges two tentative utterances (or the only word of
an utterance is withdrawn), the later id is published once with no words and ``final=True``:
that utterance was dissolved, and its number is skipped from then on.

Memory is bounded however long the conversation runs: the decoders keep a bounded window,
the engine keeps only open (non-final) words and utterances, a bounded number of recent word
ids (to refuse duplicates) and a bounded context of final utterances. An engine is not safe to
share between threads or tasks; create one per conversation.
"""

from __future__ import annotations

import bisect
import contextlib
from collections import OrderedDict, deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    DisfluencyLabel,
    EventError,
    HypothesisDiff,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
    merge_diffs,
    normalise_token,
)
from midstream.models.functions._tagger import FunctionGuess, FunctionTagger, WordsMemo
from midstream.models.functions._views import UtteranceView, build_view, partner_gap
from midstream.models.words._decoder import ChannelDecoder, TokenState


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineConfig:
    """Tuning of the conversation engine.

    Parameters
    ----------
    confidence_step
        A word or utterance whose other published fields are unchanged is republished only when
        its confidence moved by at least this much since it was last published (common
        practice, no source: it keeps diffs small).
    max_utterance_words
        A channel's run of final words with no utterance end is closed as an (incomplete)
        utterance at this length, so an utterance never grows without bound.
    remembered_word_ids
        How many recent word ids are remembered to refuse duplicates (an id older than this and
        already final is forgotten).
    """

    confidence_step: float = 0.05
    max_utterance_words: int = 80
    remembered_word_ids: int = 4096


@dataclass(slots=True)
class _Slot:
    """One word the engine has not forgotten yet."""

    word_id: str
    speaker: str
    key: int
    #: The normalised text the decoder tagged; published states hold this same string object,
    #: so carrying the word in every update costs a reference, not a copy.
    text: str
    start: float | None = None
    end: float | None = None
    #: A broken-off word ("s-"): kept in the published clean text, left out of the view.
    fragment: bool = False
    label: DisfluencyLabel = DisfluencyLabel.FLUENT
    ends_utterance: bool = False
    final: bool = False
    published: WordHypothesis | None = None


@dataclass(slots=True)
class _OpenUtterance:
    index: int
    keys: tuple[int, ...] = ()
    word_ids: tuple[str, ...] = ()
    view: UtteranceView | None = None
    published: UtteranceHypothesis | None = None


@dataclass(slots=True)
class _Channel:
    speaker: str
    decoder: ChannelDecoder
    next_key: int = 0
    slots: dict[int, _Slot] = field(default_factory=dict)
    #: Keys of the words since the last final utterance end, in order.
    open_keys: list[int] = field(default_factory=list)
    #: The open keys whose word is hypothesised to end an utterance: grouping reads this small
    #: set on every word instead of every open word's slot (cold memory when many
    #: conversations interleave).
    ends: set[int] = field(default_factory=set)
    #: Number of the next utterance this speaker starts (1-based; never reused).
    next_index: int = 1
    #: The conversation's word count when this speaker's last word was added (0: none yet).
    last_added: int = 0
    utterances: list[_OpenUtterance] = field(default_factory=list)
    #: ``(start, end)`` of the speaker's last timed words, for the other speakers' views'
    #: partner gap (bounded: :data:`RECENT_TIMES`); kept only for a model that reads it.
    times: deque[tuple[float, float]] = field(
        default_factory=lambda: deque(maxlen=RECENT_TIMES))


#: Timed words of each speaker kept for the partner gap of the other speakers' utterances
#: (:func:`~midstream.models.functions._views.partner_gap`). An utterance's gap reads the last
#: word each other speaker began before it; only an utterance still open while another speaker
#: says more than this many words could miss it (it would read as no partner yet).
RECENT_TIMES = 256


class ConversationEngine:
    """Incremental tagging of one conversation.

    Parameters
    ----------
    new_decoder
        Makes a fresh channel decoder for each new speaker.
    function_tagger
        Labels the function of (partial) utterances: the fine class, and the coarse function
        unless ``coarse_tagger`` is given.
    coarse_tagger
        A model of the coarse functions that decides them instead (the fine tagger still gives
        the fine class); decoded over a context window of its own.
    config
        Engine tuning; see :class:`EngineConfig`.
    silence_marks
        The silences after a word (seconds, ascending) at which :meth:`tick` can change a
        decision (the boundary model's, see ``BoundaryModel.silence_marks``); empty when ticks
        change nothing (no boundary model).
    """

    def __init__(self, *, new_decoder: Callable[[], ChannelDecoder],
                 function_tagger: FunctionTagger, coarse_tagger: FunctionTagger | None = None,
                 config: EngineConfig | None = None,
                 silence_marks: tuple[float, ...] = ()) -> None:
        self._new_decoder = new_decoder
        self.silence_marks = silence_marks
        self._functions = function_tagger
        self._coarse = coarse_tagger
        # The speakers' recent times are kept and the partner gap read only for a model that
        # uses it: the gap costs a search of those times whenever a view is rebuilt.
        self._timed = function_tagger.config.timing or (
            coarse_tagger is not None and coarse_tagger.config.timing)
        self._config = config or EngineConfig()
        self._channels: dict[str, _Channel] = {}
        self._by_id: dict[str, _Slot] = {}
        self._recent_ids: OrderedDict[str, None] = OrderedDict()
        #: The final utterances the function tagger decodes the current ones after (its
        #: context size, oldest first), with their recursions: made when one is added, read on
        #: every word (the tagger's shared cache of windows holds fewer than a busy server's
        #: conversations).
        self._window = function_tagger.context_window(())
        self._memo = WordsMemo()
        # The coarse tagger's rows index its own weights: a window and memo of its own.
        self._coarse_window = (coarse_tagger or function_tagger).context_window(())
        self._coarse_memo = WordsMemo()
        self._last_speaker: str | None = None
        self._words_added = 0
        #: End time of each speaker's latest timed word: a new word that starts before another
        #: speaker's latest end overlaps it (one entry per speaker, bounded by the speakers).
        self._last_end: dict[str, float] = {}
        self._finished = False
        # An utterance of nothing but disfluent words ("uh") has no words to label: it is
        # published as the scheme's abandoned/uninterpretable class, coarse "other".
        fine = "%" if function_tagger.scheme == "swbd42" else UtteranceFunction.OTHER.value
        self._empty_guess = FunctionGuess(label=fine, confidence=1.0,
                                          function=UtteranceFunction.OTHER,
                                          function_confidence=1.0)

    @property
    def finished(self) -> bool:
        """True once :meth:`finish` ran; every later event raises :class:`EventError`."""
        return self._finished

    @property
    def context(self) -> tuple[UtteranceView, ...]:
        """The final utterances the current ones are labelled after, oldest first (at most the
        function tagger's context size)."""
        return self._window.views

    @property
    def open_word_count(self) -> int:
        """Words the engine still holds: not yet in a final utterance (bounded by the config)."""
        return len(self._by_id)

    # -- events ---------------------------------------------------------------------------

    def add_word(self, word_id: str, word: Word) -> HypothesisDiff:
        """Add a newly recognised word; returns what changed.

        Raises
        ------
        EventError
            The id was used before, the text has no speech content, or the engine finished.
        """
        self._check_open()
        if word_id in self._by_id or word_id in self._recent_ids:
            raise EventError(f"word id {word_id!r} was already used in this conversation")
        token = normalise_token(word.text) if word.text.strip() else None
        if token is None:
            raise EventError(f"word {word_id!r}: text has no speech content")
        channel = self._channel(word.speaker)
        key = channel.next_key
        channel.next_key += 1
        fragment = token.fragment or word.fragment
        slot = _Slot(word_id=word_id, speaker=word.speaker, key=key, text=token.text,
                     start=word.start, end=word.end, fragment=fragment)
        channel.slots[key] = slot
        channel.open_keys.append(key)
        self._by_id[word_id] = slot
        self._remember(word_id)
        after_other = self._last_speaker is not None and self._last_speaker != word.speaker
        self._last_speaker = word.speaker
        overlap = False
        start = word.start
        if start is not None:
            for speaker, end in self._last_end.items():
                if end > start and speaker != word.speaker:
                    overlap = True
                    break
        if word.end is not None:
            self._last_end[word.speaker] = word.end
        if start is not None and self._timed:
            channel.times.append(_times(slot))
        # The other speakers' words since this speaker's previous word, as training counts them
        # (0 before a channel's first word).
        self._words_added += 1
        other_words = (self._words_added - channel.last_added - 1) if channel.last_added else 0
        channel.last_added = self._words_added
        clean = _clean_word(word, token.text, fragment)
        states = channel.decoder.append(key, clean, after_other_speaker=after_other,
                                        other_words=other_words, overlap=overlap)
        return self._apply(channel, states)

    def replace_word(self, word_id: str, word: Word) -> HypothesisDiff:
        """The recogniser revised a recent word (same id, new text or times).

        Raises
        ------
        EventError
            Unknown or final word, a different speaker, no speech content, or engine finished.
        """
        self._check_open()
        slot = self._open_slot(word_id, "replace")
        if word.speaker != slot.speaker:
            raise EventError(
                f"word {word_id!r}: a replacement cannot move the word from speaker "
                f"{slot.speaker!r} to {word.speaker!r}")
        token = normalise_token(word.text) if word.text.strip() else None
        if token is None:
            raise EventError(f"word {word_id!r}: replacement text has no speech content")
        channel = self._channels[slot.speaker]
        slot.text = token.text
        if self._timed and slot.start is not None:
            _forget_times(channel.times, slot)
        slot.start, slot.end = word.start, word.end
        if self._timed and slot.start is not None:
            # A revised word's times stand where its old times stood, in order of start.
            _insert_times(channel.times, _times(slot))
        slot.fragment = token.fragment or word.fragment
        clean = _clean_word(word, token.text, slot.fragment)
        states = channel.decoder.replace(slot.key, clean)
        # The new text changes the word's utterance even when no tag moved.
        return self._apply(channel, states, revised=slot.key)

    def withdraw_word(self, word_id: str) -> HypothesisDiff:
        """The recogniser withdrew a recent word.

        Raises
        ------
        EventError
            Unknown or final word, or the engine finished.
        """
        self._check_open()
        slot = self._open_slot(word_id, "withdraw")
        channel = self._channels[slot.speaker]
        states = channel.decoder.withdraw(slot.key)
        if self._timed and slot.start is not None:
            _forget_times(channel.times, slot)
        del channel.slots[slot.key]
        channel.open_keys.remove(slot.key)
        channel.ends.discard(slot.key)
        del self._by_id[word_id]
        return self._apply(channel, states, withdrawn=(word_id,))

    def hint(self, speaker: str, *, turn_end: bool) -> HypothesisDiff:
        """The caller says the speaker's utterance (or turn) ended after the last word sent.

        Both hints close the open utterance and finalise its words; a turn end also means the
        next word of this speaker follows another speaker. A hint for a speaker with no words
        changes nothing.
        """
        self._check_open()
        channel = self._channels.get(speaker)
        if channel is None or not channel.open_keys:
            return HypothesisDiff()
        states = channel.decoder.close_utterance()
        if turn_end and self._last_speaker == speaker:
            self._last_speaker = None
        return self._apply(channel, states, close_all=True)

    def tick(self, now: float) -> HypothesisDiff:
        """The stream's time moved on to ``now`` with no word (seconds, the word times' clock).

        Each speaker whose last word has an end time before ``now`` has been silent since; an
        open utterance closes (its words become final) once the silence, with whether another
        speaker spoke since, makes its end more likely than not under the boundary model
        joined with the word model. Without a boundary model, or for untimed words, nothing
        changes. Caller hints still close utterances at once.
        """
        self._check_open()
        diffs = []
        for channel in self._channels.values():
            if not channel.open_keys:
                continue
            states = channel.decoder.tick(
                now, other_spoke=self._last_speaker is not None
                and self._last_speaker != channel.speaker)
            if states:
                diffs.append(self._apply(channel, states, close_all=True))
        return merge_diffs(diffs)

    def finish(self) -> HypothesisDiff:
        """End of conversation: every word and utterance becomes final."""
        self._check_open()
        diffs = [self._apply(channel, channel.decoder.finish(), close_all=True)
                 for channel in self._channels.values()]
        self._finished = True
        return merge_diffs(diffs)

    # -- internals ------------------------------------------------------------------------

    def _check_open(self) -> None:
        if self._finished:
            raise EventError("the conversation has ended: no more events are accepted")

    def _channel(self, speaker: str) -> _Channel:
        channel = self._channels.get(speaker)
        if channel is None:
            channel = _Channel(speaker=speaker, decoder=self._new_decoder())
            self._channels[speaker] = channel
        return channel

    def _open_slot(self, word_id: str, action: str) -> _Slot:
        slot = self._by_id.get(word_id)
        if slot is None:
            if word_id in self._recent_ids:
                raise EventError(f"cannot {action} word {word_id!r}: it is already final")
            raise EventError(f"cannot {action} word {word_id!r}: no such word was sent")
        if slot.final:
            raise EventError(f"cannot {action} word {word_id!r}: it is already final")
        return slot

    def _remember(self, word_id: str) -> None:
        self._recent_ids[word_id] = None
        while len(self._recent_ids) > self._config.remembered_word_ids:
            self._recent_ids.popitem(last=False)

    def _apply(self, channel: _Channel, states: Iterable[TokenState], *,
               withdrawn: tuple[str, ...] = (), close_all: bool = False,
               revised: int | None = None) -> HypothesisDiff:
        words: list[WordHypothesis] = []
        # Keys whose label, end or finality moved (or whose text did: ``revised``): only their
        # utterances can have changed.
        changed: set[int] = set() if revised is None else {revised}
        slots = channel.slots
        step = self._config.confidence_step
        for state in states:
            key = state.key
            slot = slots.get(key)
            if slot is None:
                continue
            final = slot.final or state.final
            ends = state.ends_utterance
            if slot.ends_utterance != ends:
                slot.ends_utterance = ends
                if ends:
                    channel.ends.add(key)
                else:
                    channel.ends.discard(key)
                changed.add(key)
            if slot.label is not state.label or final != slot.final:
                slot.label = state.label
                slot.final = final
                changed.add(key)
            onset = slots.get(state.reparandum_onset_key) \
                if state.reparandum_onset_key is not None else None
            link = onset.word_id if onset is not None else None
            previous = slot.published
            # The decoder also reports a word when only its utterance-end decision moved; the
            # word's own hypothesis is republished only when something it carries changed.
            if previous is not None and (
                    previous.label is state.label and previous.final == final
                    and previous.reparandum_of == link
                    and previous.interruption_point == state.interruption_point
                    and abs(previous.confidence - state.confidence) < step
                    and previous.text is slot.text):
                continue
            slot.published = hypothesis = WordHypothesis(
                word_id=slot.word_id, speaker=slot.speaker, label=state.label,
                confidence=state.confidence,
                revision=0 if previous is None else previous.revision + 1,
                final=final, reparandum_of=link, interruption_point=state.interruption_point,
                text=slot.text, start=slot.start, end=slot.end,
            )
            words.append(hypothesis)
        if revised is not None:
            self._republish_revised(slots.get(revised), words)
        utterances = self._resegment(channel, close_all=close_all, changed=changed)
        return HypothesisDiff(words=tuple(words), utterances=tuple(utterances),
                              withdrawn_word_ids=withdrawn)

    @staticmethod
    def _republish_revised(slot: _Slot | None, words: list[WordHypothesis]) -> None:
        """Republish a replaced word whose text or times moved when its tag did not.

        The decoder reports a word only when its tag state moved; a subscriber must still
        learn the word's new text and times.
        """
        if slot is None or slot.published is None:
            return
        previous = slot.published
        if previous.text is slot.text and previous.start == slot.start \
                and previous.end == slot.end:
            return
        slot.published = hypothesis = WordHypothesis(
            word_id=previous.word_id, speaker=previous.speaker, label=previous.label,
            confidence=previous.confidence, revision=previous.revision + 1, final=previous.final,
            reparandum_of=previous.reparandum_of, interruption_point=previous.interruption_point,
            text=slot.text, start=slot.start, end=slot.end)
        words.append(hypothesis)

    def _groups(self, channel: _Channel, close_all: bool) -> list[tuple[int, ...]]:
        """Split the channel's open words at the currently hypothesised utterance ends."""
        keys = channel.open_keys
        if not keys:
            return []
        # Runs on every word: the few ends are found in the key list (an identity scan), then
        # tuples are sliced there.
        cuts = sorted([keys.index(key) + 1 for key in channel.ends])
        if not cuts or cuts[-1] != len(keys):
            cuts.append(len(keys))
        whole = tuple(keys)  # a full slice of a tuple is the tuple itself, not a copy
        groups = [whole[a:b] for a, b in zip([0, *cuts[:-1]], cuts, strict=True)]
        if close_all:
            return groups
        # A run of final words with no end in sight is closed at the documented length.
        limit = self._config.max_utterance_words
        if groups and len(groups[0]) >= limit and all(
                channel.slots[k].final for k in groups[0][:limit]):
            head = groups[0]
            groups[0:1] = [head[:limit], head[limit:]] if len(head) > limit else [head]
        return groups

    def _resegment(self, channel: _Channel, *, close_all: bool,
                   changed: set[int]) -> list[UtteranceHypothesis]:
        """Regroup the channel's open words and relabel the utterances that changed.

        ``changed`` holds the keys whose word state the decoder just revised. An utterance with
        the same words as before, none of them revised, cannot have changed (its words, labels,
        end and finality all come from those states), so it is skipped without rebuilding.
        """
        groups = self._groups(channel, close_all)
        limit = self._config.max_utterance_words
        published: list[UtteranceHypothesis] = []
        old = channel.utterances
        new: list[_OpenUtterance] = []
        n_old = len(old)
        held = channel.slots
        for position, keys in enumerate(groups):
            if (not close_all and position < n_old and old[position].keys == keys
                    and old[position].published is not None and changed.isdisjoint(keys)):
                new.append(old[position])
                continue
            # List comprehensions rather than generators: this runs on every word.
            slots = [held[k] for k in keys]
            ended = slots[-1].ends_utterance or close_all or len(keys) >= limit
            final = (ended and all([s.final for s in slots])) or close_all
            if position < n_old:
                entry = old[position]
            else:
                entry = _OpenUtterance(index=channel.next_index)
                channel.next_index += 1
            word_ids = tuple([s.word_id for s in slots])
            clean = tuple([s.text for s in slots if s.label not in REMOVED_FROM_CLEAN_TEXT])
            # The view training saw (fragments out): one builder for both.
            first = slots[0].start
            view = build_view(channel.speaker, [(s.text, s.fragment, s.label) for s in slots],
                              complete=ended, gap=None if first is None or not self._timed
                              else partner_gap(first, [c.times for c in self._channels.values()
                                                       if c is not channel]))
            if entry.view != view or entry.word_ids != word_ids or (
                    final and not (entry.published and entry.published.final)):
                guess = self._guess(view) if view.words else self._empty_guess
                hypothesis = self._utterance(entry, speaker=channel.speaker, word_ids=word_ids,
                                             clean=clean, guess=guess, final=final)
                if entry.published is None or _utterance_changed(
                        entry.published, hypothesis, self._config.confidence_step):
                    entry.published = hypothesis
                    published.append(hypothesis)
                entry.view, entry.word_ids = view, word_ids
            entry.keys = keys
            new.append(entry)
        for gone in old[len(new):]:
            if gone.published is not None:
                published.append(self._dissolved(gone, channel.speaker))
        # Final leading utterances leave the open region and become context.
        while new and new[0].published is not None and new[0].published.final:
            done = new.pop(0)
            for word_id in done.word_ids:
                slot = self._by_id.pop(word_id, None)
                if slot is not None:
                    channel.slots.pop(slot.key, None)
            channel.ends.difference_update(done.keys)
            del channel.open_keys[:len(done.keys)]
            if done.view is not None:
                # Every utterance joins the context, also one with no word left after
                # cleaning: the chain training saw holds them too.
                self._window = self._functions.extend_window(self._window, done.view,
                                                             self._memo)
                if self._coarse is not None:
                    self._coarse_window = self._coarse.extend_window(
                        self._coarse_window, done.view, self._coarse_memo)
        channel.utterances = new
        return published

    def _guess(self, view: UtteranceView) -> FunctionGuess:
        """The fine tagger's label, with the coarse tagger's function when there is one."""
        guess = self._functions.label_built(self._window, view, self._memo)
        if self._coarse is None:
            return guess
        coarse = self._coarse.label_built(self._coarse_window, view, self._coarse_memo)
        return FunctionGuess(label=guess.label, confidence=guess.confidence,
                             function=coarse.function,
                             function_confidence=coarse.function_confidence)

    def _utterance(self, entry: _OpenUtterance, *, speaker: str, word_ids: tuple[str, ...],
                   clean: tuple[str, ...], guess: FunctionGuess,
                   final: bool) -> UtteranceHypothesis:
        previous = entry.published
        return UtteranceHypothesis(
            utterance_id=f"{speaker}.{entry.index}", speaker=speaker, word_ids=word_ids,
            clean_text=" ".join(clean), function=guess.function, fine_class=guess.label,
            confidence=guess.function_confidence,
            revision=0 if previous is None else previous.revision + 1, final=final,
        )

    @staticmethod
    def _dissolved(entry: _OpenUtterance, speaker: str) -> UtteranceHypothesis:
        previous = entry.published
        assert previous is not None
        return UtteranceHypothesis(
            utterance_id=previous.utterance_id, speaker=speaker, word_ids=(), clean_text="",
            function=previous.function, fine_class=previous.fine_class, confidence=0.0,
            revision=previous.revision + 1, final=True,
        )




def _times(slot: _Slot) -> tuple[float, float]:
    assert slot.start is not None
    return slot.start, slot.end if slot.end is not None else slot.start


def _forget_times(channel_times: deque[tuple[float, float]], slot: _Slot) -> None:
    with contextlib.suppress(ValueError):  # already pushed out of the bounded record
        channel_times.remove(_times(slot))


def _insert_times(channel_times: deque[tuple[float, float]], times: tuple[float, float]) -> None:
    index = bisect.bisect_right(channel_times, times)
    if len(channel_times) == channel_times.maxlen and index == 0:
        return  # older than everything kept
    if len(channel_times) == channel_times.maxlen:
        channel_times.popleft()
        index -= 1
    channel_times.insert(index, times)


def _clean_word(word: Word, text: str, fragment: bool) -> Word:
    if text == word.text and fragment == word.fragment:
        return word  # the usual case: the recogniser's word is already clean (and immutable)
    return Word(text=text, speaker=word.speaker, start=word.start, end=word.end,
                confidence=word.confidence, fragment=fragment)


def _utterance_changed(old: UtteranceHypothesis, new: UtteranceHypothesis, step: float) -> bool:
    return (old.function != new.function or old.fine_class != new.fine_class
            or old.word_ids != new.word_ids or old.clean_text != new.clean_text
            or old.final != new.final or abs(old.confidence - new.confidence) >= step)
