"""The per-conversation buffers keep exactly the newest items and stay bounded."""

from __future__ import annotations

import gc
import weakref
from collections import deque

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import EndReason, Word, merge_diffs
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._metrics import ServerMetrics
from midstream.server._registry import SessionRegistry
from midstream.server._session import Session, _Recent
from server_kit import bundle_fixture, models_dir_fixture  # noqa: F401 - fixtures by name


class _Item:
    """Something a weak reference can watch."""


@given(capacity=st.integers(min_value=1, max_value=8),
       count=st.integers(min_value=0, max_value=60))
def test_recent_keeps_what_a_bounded_deque_keeps(capacity: int, count: int) -> None:
    recent: _Recent[int] = _Recent(capacity)
    reference: deque[int] = deque(maxlen=capacity)
    for value in range(count):
        recent.append(value)
        reference.append(value)
        assert list(recent) == list(reference)
        assert list(reversed(recent)) == list(reversed(reference))
        assert len(recent) == len(reference)
        assert recent.oldest() == reference[0]
        # Bounded by about twice the capacity in slots, however many were appended.
        assert len(recent._items) <= 2 * capacity + 1


def test_recent_releases_an_evicted_item_at_once() -> None:
    recent: _Recent[_Item] = _Recent(3)
    first = _Item()
    watch = weakref.ref(first)
    recent.append(first)
    del first
    for _ in range(3):
        recent.append(_Item())
    gc.collect()
    assert watch() is None
    assert len(recent) == 3


def test_oldest_of_an_empty_buffer_is_an_index_error() -> None:
    recent: _Recent[int] = _Recent(2)
    with pytest.raises(IndexError):
        recent.oldest()


_SPOKEN = ("so", "i", "uh", "i", "went", "to", "the", "the", "store", "yesterday")


@pytest.mark.parametrize("capacity", range(1, 16))
def test_history_says_truncated_from_the_first_state_it_drops(bundle: ModelBundle,
                                                              capacity: int) -> None:
    session = Session("c1", bundle.new_engine(),
                      ServerLimits(history_revisions=capacity), ServerMetrics())
    published = 0
    for index, text in enumerate(_SPOKEN):
        update = session.add_words([(f"w{index}", Word(text=text, speaker="A"))], 0.0)
        assert update is not None
        published += len(update.diff.words) + len(update.diff.utterances)
        kept, truncated = session.revisions()
        assert len(kept) == min(published, capacity)
        assert truncated == (published > capacity)
    assert published > capacity  # the words above did reach the bound


def test_an_engine_diff_names_each_state_once_so_needs_no_merging(bundle: ModelBundle) -> None:
    # The session publishes a one-word batch's diff as the engine returned it.
    engine = bundle.new_engine()
    diffs = [engine.add_word(f"w{i}", Word(text=text, speaker="AB"[i % 3 == 2]))
             for i, text in enumerate(_SPOKEN * 3)]
    diffs.append(engine.finish())
    assert all(merge_diffs([diff]) == diff for diff in diffs)
    assert any(len(diff.words) > 1 for diff in diffs)  # revisions did happen


def _kept_records(session: Session) -> list[tuple[object, ...]]:
    return [*session._words.values(), *session._utterances.values(),
            *(record for _, _, record in session._revisions), *session._replay]


def test_kept_history_is_invisible_to_the_cycle_collector(bundle: ModelBundle) -> None:
    # What a session keeps grows with the conversation; if the collector tracked it, every
    # collection would walk it and the server's pauses would grow with its history.
    session = Session("c1", bundle.new_engine(), ServerLimits(), ServerMetrics())
    for index, text in enumerate(_SPOKEN * 4):
        session.add_words([(f"w{index}", Word(text=text, speaker="AB"[index % 7 == 6]))], 0.0)
    session.finish(EndReason.CLOSED)
    records = _kept_records(session)
    assert len(records) > 4 * len(_SPOKEN)
    # An update record holds state records: those are untracked in the first pass, it in the
    # second (as the young generations would do, one after the other).
    gc.collect()
    gc.collect()
    assert not any(gc.is_tracked(record) for record in records)


def test_reading_kept_records_gives_back_the_published_states(bundle: ModelBundle) -> None:
    session = Session("c1", bundle.new_engine(), ServerLimits(), ServerMetrics())
    published = []
    for index, text in enumerate(_SPOKEN * 2):
        update = session.add_words([(f"w{index}", Word(text=text, speaker="A"))], 0.0)
        assert update is not None
        published.append(update)
    # Replayed from the kept records: equal to what was published, field by field.
    assert session._after(0) == published
    assert [state for _, _, state in session.revisions()[0]] == [
        state for update in published for state in (*update.diff.words, *update.diff.utterances)]


def test_a_server_assigned_id_never_starts_with_a_dash(bundle: ModelBundle,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    # A shell command line reads "-x..." as an option: the registry draws again.
    draws = iter(["-starts-with-a-dash-12345", "fine-id-starting-with-f"])
    monkeypatch.setattr("midstream.server._session.secrets.token_urlsafe",
                        lambda _: next(draws))
    registry = SessionRegistry(ServerLimits(), ServerMetrics())
    assert registry.open("", bundle).id == "fine-id-starting-with-f"
