"""Status codes map back to Midstream's exception tree, each one, in one function."""

from __future__ import annotations

import grpc
import pytest
from midstream import (
    EventError,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    UnavailableError,
)
from midstream.client._status import error_from_status
from midstream.server import status_code


@pytest.mark.parametrize("code", list(grpc.StatusCode), ids=lambda c: c.name)
def test_every_status_code_is_mapped(code: grpc.StatusCode) -> None:
    error = error_from_status(code, "what went wrong", target="host:1")
    assert isinstance(error, MidstreamError)
    # One line naming the server, the server's words and the code.
    message = str(error)
    assert "host:1" in message and "what went wrong" in message and code.name in message
    assert "\n" not in message


@pytest.mark.parametrize(("code", "kind"), [
    (grpc.StatusCode.NOT_FOUND, NotFoundError),
    (grpc.StatusCode.UNAVAILABLE, UnavailableError),
    (grpc.StatusCode.CANCELLED, UnavailableError),
    (grpc.StatusCode.DEADLINE_EXCEEDED, UnavailableError),
    (grpc.StatusCode.INVALID_ARGUMENT, EventError),
    (grpc.StatusCode.RESOURCE_EXHAUSTED, LimitExceededError),
    (grpc.StatusCode.UNAUTHENTICATED, InputError),
    (grpc.StatusCode.FAILED_PRECONDITION, ModelError),
])
def test_codes_map_to_the_matching_kind(code: grpc.StatusCode, kind: type[Exception]) -> None:
    assert type(error_from_status(code, "x", target="t")) is kind


def test_failed_precondition_is_a_model_error_whatever_the_method() -> None:
    # One status per meaning: the client needs no method to tell a model failure apart.
    for method in ("ReloadModels", "Feed", ""):
        error = error_from_status(grpc.StatusCode.FAILED_PRECONDITION, "corrupt model",
                                  target="t", method=method)
        assert type(error) is ModelError


@pytest.mark.parametrize(("error", "method"), [
    (NotFoundError("no conversation"), ""),
    (UnavailableError("stopping"), ""),
    (EventError("duplicate word id"), ""),
    (LimitExceededError("max_live_conversations", 256), ""),
    (ModelError("truncated model"), "ReloadModels"),
])
def test_server_errors_come_back_as_the_same_kind(error: MidstreamError, method: str) -> None:
    # The server's one mapping (midstream.server.status_code) and the client's invert each other.
    back = error_from_status(status_code(error), str(error), target="t", method=method)
    assert type(back) is type(error)


def test_empty_details_still_say_something() -> None:
    assert "no details given" in str(error_from_status(grpc.StatusCode.INTERNAL, "", target="t"))
