"""Random, partly malformed event sequences against the conversation engine.

``tests/models/test_engine.py`` already streams random well-formed events. Here the events are
hostile as well: any Unicode text (empty, punctuation, control characters), ids reused or never
sent, replacements that move a word to another speaker, odd times and confidences, and events
after ``finish``. The engine may refuse an event only with ``EventError`` and must keep its
promises to subscribers whatever it was sent:

- a final word or utterance never changes again;
- revision counts start at 0 and never go down;
- a withdrawn word is never final and never published again;
- after ``finish`` every word still standing is final, and so is every utterance;
- the same events give the same diffs (no hidden state between engines).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from midstream import EventError, HypothesisDiff, Word
from midstream.models import ModelBundle
from reliability_kit import bundle_fixture, models_dir_fixture  # noqa: F401 - fixtures by name

pytestmark = pytest.mark.corpus  # the models are trained from SwDA when none are shipped

_VOCABULARY = ["i", "uh", "um", "we", "the", "went", "to", "yeah", "so", "well", "no", "like",
               "i-", "you know", "Okay.", "--", "[laughter]"]
_TEXT = st.one_of(st.sampled_from(_VOCABULARY), st.sampled_from(_VOCABULARY),
                  st.text(max_size=6))
_ID = st.integers(0, 25).map(lambda n: f"w{n}")
_SPEAKER = st.sampled_from(["A", "B", "C"])
_TIME = st.none() | st.floats(allow_nan=True, allow_infinity=True, width=32)
_CONFIDENCE = st.none() | st.floats(-1.0, 2.0) | st.just(float("nan"))

_WORD = st.builds(lambda text, speaker, start, confidence: Word(
    text=text, speaker=speaker, start=start, end=None, confidence=confidence),
    _TEXT, _SPEAKER, _TIME, _CONFIDENCE)

_EVENT = st.one_of(
    st.tuples(st.just("add"), _ID, _WORD),
    st.tuples(st.just("add"), _ID, _WORD),
    st.tuples(st.just("replace"), _ID, _WORD),
    st.tuples(st.just("withdraw"), _ID, st.none()),
    st.tuples(st.just("hint"), _SPEAKER, st.booleans()),
    st.tuples(st.just("finish"), st.none(), st.none()),
)


@dataclass
class _Outcome:
    diffs: list[HypothesisDiff] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)
    finished_early: bool = False


def _run(bundle: ModelBundle, events: list[tuple[str, Any, Any]]) -> _Outcome:
    engine = bundle.new_engine()
    outcome = _Outcome()
    for kind, a, b in events:
        try:
            if kind == "add":
                outcome.diffs.append(engine.add_word(a, b))
            elif kind == "replace":
                outcome.diffs.append(engine.replace_word(a, b))
            elif kind == "withdraw":
                outcome.diffs.append(engine.withdraw_word(a))
            elif kind == "hint":
                outcome.diffs.append(engine.hint(a, turn_end=b))
            else:
                outcome.diffs.append(engine.finish())
                outcome.finished_early = True
        except EventError as error:
            outcome.refused.append(str(error))
    if not engine.finished:
        outcome.diffs.append(engine.finish())
    # Once finished, every event is refused with EventError (and says why).
    late: list[Callable[[], HypothesisDiff]] = [
        lambda: engine.add_word("late", Word(text="so", speaker="A")),
        lambda: engine.hint("A", turn_end=True), engine.finish]
    for event in late:
        with pytest.raises(EventError, match=r"finish|ended|no more"):
            event()
    return outcome


@settings(max_examples=80, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(events=st.lists(_EVENT, max_size=50))
def test_hostile_event_streams_keep_the_engine_promises(
        bundle: ModelBundle, events: list[tuple[str, Any, Any]]) -> None:
    outcome = _run(bundle, events)
    words: dict[str, Any] = {}
    utterances: dict[str, Any] = {}
    withdrawn: set[str] = set()
    for diff in outcome.diffs:
        for word in diff.words:
            before = words.get(word.word_id)
            assert word.word_id not in withdrawn, "a withdrawn word was published again"
            if before is None:
                assert word.revision == 0
            else:
                assert not before.final, "a final word changed"
                assert word.revision >= before.revision
                assert word.speaker == before.speaker
            words[word.word_id] = word
        for utterance in diff.utterances:
            before = utterances.get(utterance.utterance_id)
            # Dissolved utterances (final, no words) included: their ids are never reused.
            assert before is None or not before.final, "a final utterance changed"
            utterances[utterance.utterance_id] = utterance
        for word_id in diff.withdrawn_word_ids:
            assert word_id in words and not words[word_id].final, "withdrew a final word"
            del words[word_id]
            withdrawn.add(word_id)
    assert all(w.final for w in words.values()), "a word was left open after finish"
    assert all(u.final for u in utterances.values()), "an utterance was left open"
    # Every word still standing belongs to exactly one (non-dissolved) utterance.
    owners = [i for u in utterances.values() for i in u.word_ids]
    assert sorted(owners) == sorted(words)
    # Determinism: a second engine given the same events says exactly the same.
    assert _run(bundle, events).diffs == outcome.diffs


# Utterance ids are never reused: a dissolved utterance's number is skipped from then on.
def test_a_dissolved_utterance_id_is_never_reused(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    diffs = [engine.add_word("w0", Word(text="i", speaker="A")), engine.withdraw_word("w0")]
    (dissolved,) = diffs[-1].utterances
    assert dissolved.final and not dissolved.word_ids
    diffs += [engine.add_word("w1", Word(text="we", speaker="A")), engine.finish()]
    later = [u for d in diffs[2:] for u in d.utterances]
    assert later and dissolved.utterance_id not in {u.utterance_id for u in later}
