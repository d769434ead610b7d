"""The one error → status mapping, and the follower queue's lag handling (in-process)."""

from __future__ import annotations

import asyncio

import grpc
import pytest
from midstream import (
    CorpusNotFoundError,
    Ended,
    EndReason,
    EventError,
    Gap,
    GapReason,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    Snapshot,
    TranscriptFormatError,
    UnavailableError,
    Word,
)
from midstream.models import ModelBundle
from midstream.server import ServerLimits, status_code
from midstream.server._metrics import ServerMetrics
from midstream.server._published import PublishedUpdate
from midstream.server._session import Session
from midstream.server._status import (
    ConflictError,
    FieldLimitError,
    InternalError,
    PositionError,
    ProtocolStateError,
)
from server_kit import bundle_fixture, models_dir_fixture  # noqa: F401 - fixtures

EXPECTED = {
    MidstreamError: grpc.StatusCode.UNKNOWN,
    InputError: grpc.StatusCode.INVALID_ARGUMENT,
    TranscriptFormatError: grpc.StatusCode.INVALID_ARGUMENT,
    CorpusNotFoundError: grpc.StatusCode.NOT_FOUND,
    EventError: grpc.StatusCode.INVALID_ARGUMENT,
    ProtocolStateError: grpc.StatusCode.INVALID_ARGUMENT,
    PositionError: grpc.StatusCode.OUT_OF_RANGE,
    ConflictError: grpc.StatusCode.ALREADY_EXISTS,
    LimitExceededError: grpc.StatusCode.RESOURCE_EXHAUSTED,
    FieldLimitError: grpc.StatusCode.INVALID_ARGUMENT,
    ModelError: grpc.StatusCode.FAILED_PRECONDITION,
    NotFoundError: grpc.StatusCode.NOT_FOUND,
    UnavailableError: grpc.StatusCode.UNAVAILABLE,
    InternalError: grpc.StatusCode.INTERNAL,
}


def _every_error_class() -> list[type[MidstreamError]]:
    found: list[type[MidstreamError]] = []
    pending: list[type[MidstreamError]] = [MidstreamError]
    while pending:
        kind = pending.pop()
        found.append(kind)
        pending.extend(kind.__subclasses__())
    return found


def _instance(kind: type[MidstreamError]) -> MidstreamError:
    if issubclass(kind, LimitExceededError):
        return kind("some_limit", 1)
    return kind("what was wrong")


@pytest.mark.parametrize("kind", _every_error_class(), ids=lambda k: k.__name__)
def test_every_error_class_maps_to_its_specific_code(kind: type[MidstreamError]) -> None:
    # A new error class must be added to EXPECTED (and to the mapping) on purpose.
    assert kind in EXPECTED, f"{kind.__name__} has no expected status code"
    assert status_code(_instance(kind)) == EXPECTED[kind]
    if kind is not MidstreamError:
        assert status_code(_instance(kind)) != grpc.StatusCode.UNKNOWN


async def test_a_slow_follower_gets_gap_and_snapshot_and_never_slows_ingest(
    bundle: ModelBundle,
) -> None:
    limits = ServerLimits(follower_queue=4)
    session = Session("c1", bundle.new_engine(), limits, ServerMetrics())
    backlog, follower = session.follow(1)
    assert follower is not None and backlog == []
    for i in range(10):  # nobody reads: the queue fills after four updates
        session.add_words([(f"w{i}", Word(text="so", speaker="A", start=float(i)))], 0.0)
    assert session.seq == 10
    stream = follower.messages([])
    gap = await anext(stream)
    assert isinstance(gap, Gap) and gap.reason == GapReason.LAGGED
    assert gap.first_missing == 1
    snapshot = await anext(stream)
    assert isinstance(snapshot, Snapshot)
    assert snapshot.seq == 10 and len(snapshot.words) == 10
    session.add_words([("w10", Word(text="we", speaker="A", start=10.0))], 0.0)
    update = await anext(stream)
    assert isinstance(update, PublishedUpdate) and update.update.seq == 11
    session.finish(EndReason.CLOSED)
    final = await anext(stream)
    assert isinstance(final, PublishedUpdate) and final.update.conversation_final
    assert await anext(stream) == Ended(reason=EndReason.CLOSED, last_seq=12)
    with pytest.raises(StopAsyncIteration):
        await asyncio.wait_for(anext(stream), 1)


@pytest.mark.parametrize("field", ["max_word_chars", "follower_queue", "replay_updates",
                                   "idle_timeout_s", "ended_retention_s"])
def test_nonsense_limits_are_refused_naming_the_field(field: str) -> None:
    with pytest.raises(InputError, match=f"ServerLimits.{field} must be"):
        ServerLimits(**{field: -1})
