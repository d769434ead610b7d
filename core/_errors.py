"""The one exception tree of Midstream.

::

    MidstreamError
    ├── InputError                 bad caller input; names what was wrong
    │   ├── TranscriptFormatError  a transcript file or line does not parse (file, line, field)
    │   ├── CorpusNotFoundError    the corpus folder is missing or of no known kind
    │   └── EventError             a streamed event breaks the protocol (id, time, state)
    ├── LimitExceededError         an explicit, documented limit was hit (names the limit)
    ├── ModelError                 a model file is corrupt, of the wrong kind or of a newer format
    ├── NotFoundError              an unknown conversation, word or model
    └── UnavailableError           the service is stopping or a peer vanished

Each boundary translates: the server maps these to gRPC status codes in one function, the
client maps status codes back to these, and the command line prints ``str(exc)`` as one line.
"""

from __future__ import annotations


class MidstreamError(Exception):
    """Base of every error Midstream raises on purpose."""


class InputError(MidstreamError):
    """The caller's input is malformed."""


class TranscriptFormatError(InputError):
    """A transcript does not parse; the message names file, line and field."""

    def __init__(self, message: str, *, source: str = "", line: int | None = None,
                 field: str | None = None) -> None:
        where = source
        if line is not None:
            where = f"{where}:{line}" if where else f"line {line}"
        if field is not None:
            where = f"{where}: field {field!r}" if where else f"field {field!r}"
        super().__init__(f"{where}: {message}" if where else message)
        self.source = source
        self.line = line
        self.field = field


class CorpusNotFoundError(InputError):
    """The corpus folder does not exist or is of no kind Midstream reads."""


class EventError(InputError):
    """A streamed event breaks the protocol (bad id, time, text or state)."""


class LimitExceededError(MidstreamError):
    """A documented limit was exceeded; the message names the limit and its value."""

    def __init__(self, limit: str, value: object, message: str = "") -> None:
        super().__init__(message or f"limit {limit} ({value}) exceeded")
        self.limit = limit
        self.value = value


class ModelError(MidstreamError):
    """A model cannot be used: corrupt, truncated, of the wrong kind, or of an unknown format."""


class NotFoundError(MidstreamError):
    """A conversation, word or model that does not exist."""


class UnavailableError(MidstreamError):
    """The service is shutting down or the peer went away."""
