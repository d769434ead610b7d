"""The per-conversation buffers keep exactly the newest items and stay bounded."""

from __future__ import annotations

import gc
import weakref
from collections import deque

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream.server._session import _Recent


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
