"""Decoding is deterministic: the same input events give the same updates, bit for bit.

Continuing a conversation on another replica (``open.resume``) rebuilds its engine by
replaying the logged input events and relies on this: the rebuilt session must publish exactly
the updates the dead replica published, with the same sequence numbers, or followers would see
a conversation that changed under them. ``test_redis_failover.py`` checks the same across
processes.
"""

from __future__ import annotations

import time

from midstream import EndReason
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._ingest import apply_event
from midstream.server._metrics import ServerMetrics
from midstream.server._session import Session
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from redis_kit import call_words, comparable
from server_kit import bundle_fixture, models_dir_fixture, words_event

__all__ = ["bundle_fixture", "models_dir_fixture"]


def _events() -> list[pb.ClientEvent]:
    """The invented call, with the corrections a recogniser sends (invented)."""
    words = call_words()
    events: list[pb.ClientEvent] = []
    for index, word in enumerate(words):
        events.append(words_event(word))
        if index % 17 == 5:
            revised = pb.SpokenWord()
            revised.CopyFrom(word)
            revised.text = "uh"
            events.append(pb.ClientEvent(replace=pb.ReplaceWord(word=revised)))
        if index % 23 == 7:
            events.append(pb.ClientEvent(withdraw=pb.WithdrawWord(word_id=word.word_id)))
        if index % 11 == 10:
            events.append(pb.ClientEvent(hint=pb.SpeakerHint(
                speaker=word.speaker, kind=pb.HINT_KIND_UTTERANCE_END)))
    # Two batches of several words, as a caller buffering its recogniser sends them.
    tokens = ("so", "um", "so", "what", "i", "mean", "is", "it", "is", "fine")
    extra = [pb.SpokenWord(word_id=f"x{i}", speaker="caller", text=t, start_s=900.0 + i,
                           end_s=900.2 + i)
             for i, t in enumerate(tokens)]
    events.append(pb.ClientEvent(words=pb.WordBatch(words=extra[:4])))
    events.append(pb.ClientEvent(words=pb.WordBatch(words=extra[4:])))
    return events


def _run(bundle: ModelBundle, events: list[pb.ClientEvent]) -> list[bytes]:
    limits = ServerLimits(replay_updates=100_000)
    session = Session("replayed", bundle.new_engine(), limits, ServerMetrics())
    for event in events:
        apply_event(session, event, time.monotonic(), limits)
    session.finish(EndReason.CLOSED)
    return [comparable(cv.update_to_wire(m.update)) for m in session.since(0)]


def test_the_same_events_give_the_same_updates_bit_for_bit(bundle: ModelBundle) -> None:
    events = _events()
    first = _run(bundle, events)
    second = _run(bundle, events)
    assert len(first) > len(call_words())  # corrections and hints published updates too
    assert first == second


def test_a_replay_of_a_prefix_is_a_prefix_of_the_whole(bundle: ModelBundle) -> None:
    # A replica that replays the first k events must stand exactly where the original stood
    # after them, so the continued conversation goes on from the same state.
    events = _events()
    whole = _run(bundle, events)
    limits = ServerLimits(replay_updates=100_000)
    session = Session("prefix", bundle.new_engine(), limits, ServerMetrics())
    for event in events[:60]:
        apply_event(session, event, time.monotonic(), limits)
    prefix = [comparable(cv.update_to_wire(m.update)) for m in session.since(0)]
    assert prefix == whole[:len(prefix)]
