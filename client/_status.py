"""gRPC status codes back to Midstream's exception tree: the client's one translation point.

The server maps domain errors to status codes in one function; this module inverts that
mapping, so a caller catches :class:`midstream.NotFoundError` or
:class:`midstream.UnavailableError` and never a ``grpc.RpcError``. Every ``grpc.StatusCode`` has an
entry (a test walks them all), and each message names the server it came from.
"""

from __future__ import annotations

from collections.abc import Callable

import grpc
from midstream import (
    EventError,
    InputError,
    LimitExceededError,
    MidstreamError,
    ModelError,
    NotFoundError,
    UnavailableError,
)

_Factory = Callable[[str], MidstreamError]


def _limit(message: str) -> MidstreamError:
    # The server's message already names the limit and its value; keep it whole.
    return LimitExceededError("server limit", "see message", message)


#: Status code -> how to build the Midstream error. ``OK`` appears only for completeness: a call
#: that ended OK but broke the protocol (e.g. a stream with no welcome) is still an error.
_BY_CODE: dict[grpc.StatusCode, _Factory] = {
    grpc.StatusCode.OK: MidstreamError,
    grpc.StatusCode.CANCELLED: UnavailableError,
    grpc.StatusCode.UNKNOWN: MidstreamError,
    grpc.StatusCode.INVALID_ARGUMENT: EventError,
    grpc.StatusCode.DEADLINE_EXCEEDED: UnavailableError,
    grpc.StatusCode.NOT_FOUND: NotFoundError,
    grpc.StatusCode.ALREADY_EXISTS: EventError,
    grpc.StatusCode.PERMISSION_DENIED: InputError,
    grpc.StatusCode.RESOURCE_EXHAUSTED: _limit,
    # The server's only FAILED_PRECONDITION: models that could not be loaded.
    grpc.StatusCode.FAILED_PRECONDITION: ModelError,
    grpc.StatusCode.ABORTED: UnavailableError,
    grpc.StatusCode.OUT_OF_RANGE: EventError,
    grpc.StatusCode.UNIMPLEMENTED: MidstreamError,
    grpc.StatusCode.INTERNAL: MidstreamError,
    grpc.StatusCode.UNAVAILABLE: UnavailableError,
    grpc.StatusCode.DATA_LOSS: MidstreamError,
    grpc.StatusCode.UNAUTHENTICATED: InputError,
}

#: What gRPC's status details say when the TLS handshake failed (BoringSSL's words).
_TLS_FAILURES = ("certificate_verify_failed", "ssl handshake failed", "handshake failed",
                 "certificate verify failed", "ssl_error_ssl")

#: Codes after which a follower may reconnect and resume (the server or network went away).
RETRYABLE: frozenset[grpc.StatusCode] = frozenset(
    {grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.ABORTED, grpc.StatusCode.DEADLINE_EXCEEDED}
)


def tls_failure(details: str | None) -> bool:
    """Whether an ``UNAVAILABLE`` status's details say the TLS handshake failed.

    Such a failure does not go away by retrying (a wrong CA, a certificate for another host).
    """
    lowered = (details or "").lower()
    return any(mark in lowered for mark in _TLS_FAILURES)


def error_from_status(
    code: grpc.StatusCode, details: str | None, *, target: str, method: str = ""
) -> MidstreamError:
    """The Midstream error for a failed call's status; the message names the server.

    ``method`` (the RPC's name) is kept for messages; each code has one meaning.

    Examples
    --------
    >>> import grpc
    >>> error = error_from_status(grpc.StatusCode.NOT_FOUND, "no conversation 'c1'",
    ...                           target="localhost:50551")
    >>> type(error).__name__, str(error)
    ('NotFoundError', "server localhost:50551: no conversation 'c1' (NOT_FOUND)")
    """
    text = (details or "").strip() or "no details given"
    lowered = text.lower()
    if code is grpc.StatusCode.UNAVAILABLE and tls_failure(text):
        # gRPC reports a refused certificate as a failure to connect: say what it was.
        text = (f"TLS handshake with the server failed: the server's certificate was not "
                f"accepted (is it signed by the CA given with --ca / root_certificates, and "
                f"issued for this host name?) ({text})")
    elif code is grpc.StatusCode.UNAVAILABLE and "connect" in lowered:
        text = f"cannot reach the server ({text})"
    factory = _BY_CODE.get(code, MidstreamError)
    return factory(f"server {target}: {text} ({code.name})")


def error_from_rpc(exc: grpc.RpcError, *, target: str, method: str = "") -> MidstreamError:
    """The Midstream error for a ``grpc.RpcError`` (sync or asyncio call); raise it ``from exc``."""
    code_of = getattr(exc, "code", None)
    details_of = getattr(exc, "details", None)
    code = code_of() if callable(code_of) else grpc.StatusCode.UNKNOWN
    details = details_of() if callable(details_of) else str(exc)
    if not isinstance(code, grpc.StatusCode):
        code = grpc.StatusCode.UNKNOWN
    return error_from_status(code, details if isinstance(details, str) else None,
                             target=target, method=method)
