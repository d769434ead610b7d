"""The one mapping from Midstream errors to gRPC status codes, and the server's own error kinds.

The server refines the root tree with kinds of its own (all stay catchable as the parent).
Each status code has one meaning, so a client maps codes back without knowing the method:
``FAILED_PRECONDITION`` is only a model that cannot be loaded (fix the files, then retry); an
event not allowed now (``open`` twice, no ``open`` first, an event after ``close``) is bad
input of the caller's own stream, ``INVALID_ARGUMENT`` like its parent::

    MidstreamError                          UNKNOWN
    ├── InputError                          INVALID_ARGUMENT
    │   ├── TranscriptFormatError           INVALID_ARGUMENT
    │   ├── CorpusNotFoundError             NOT_FOUND
    │   ├── EventError                      INVALID_ARGUMENT
    │   │   └── ProtocolStateError          INVALID_ARGUMENT     (event not allowed now)
    │   ├── PositionError                   OUT_OF_RANGE         (a sequence number ahead)
    │   └── ConflictError                   ALREADY_EXISTS       (a conversation id in use)
    ├── LimitExceededError                  RESOURCE_EXHAUSTED   (capacity: live, followers...)
    │   └── FieldLimitError                 INVALID_ARGUMENT     (a field too long/many)
    ├── ModelError                          FAILED_PRECONDITION
    ├── NotFoundError                       NOT_FOUND
    ├── UnavailableError                    UNAVAILABLE
    └── InternalError                       INTERNAL             (a server or engine fault)

Examples
--------
>>> from midstream import NotFoundError
>>> status_code(NotFoundError("no such conversation")).name
'NOT_FOUND'
"""

from __future__ import annotations

import grpc
from midstream import (
    CorpusNotFoundError,
    EventError,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    UnavailableError,
)


class ProtocolStateError(EventError):
    """An event that is well formed but not allowed now (``open`` twice, no ``open`` first)."""


class PositionError(InputError):
    """A sequence number beyond what the conversation has published."""


class ConflictError(InputError):
    """A caller-chosen conversation id that is already in use."""


class FieldLimitError(LimitExceededError):
    """One field of one message is over a limit (text length, batch size): bad input, not load."""


# Most specific first: the first class the error is an instance of wins.
_CODES: tuple[tuple[type[MidstreamError], grpc.StatusCode], ...] = (
    (PositionError, grpc.StatusCode.OUT_OF_RANGE),
    (ConflictError, grpc.StatusCode.ALREADY_EXISTS),
    (FieldLimitError, grpc.StatusCode.INVALID_ARGUMENT),
    (CorpusNotFoundError, grpc.StatusCode.NOT_FOUND),
    (InputError, grpc.StatusCode.INVALID_ARGUMENT),
    (LimitExceededError, grpc.StatusCode.RESOURCE_EXHAUSTED),
    (ModelError, grpc.StatusCode.FAILED_PRECONDITION),
    (NotFoundError, grpc.StatusCode.NOT_FOUND),
    (UnavailableError, grpc.StatusCode.UNAVAILABLE),
)


class InternalError(MidstreamError):
    """A fault of the server or the engine rather than of the caller's input."""


def status_code(error: MidstreamError) -> grpc.StatusCode:
    """The gRPC status code a Midstream error is reported with.

    ``UNKNOWN`` only for a bare :class:`~midstream.MidstreamError` (a kind nobody refined).
    """
    if isinstance(error, InternalError):
        return grpc.StatusCode.INTERNAL
    for kind, code in _CODES:
        if isinstance(error, kind):
            return code
    return grpc.StatusCode.UNKNOWN
