"""Bearer-token check on every call, as a gRPC server interceptor.

A call must carry ``authorization: Bearer <token>`` metadata; a missing or wrong token ends it
with ``UNAUTHENTICATED`` before any handler runs, whatever the method (including streaming ones
such as ``Follow``). The standard health service stays open so that load balancers and
orchestrators can probe without the secret; it reveals only SERVING / NOT_SERVING.
"""

from __future__ import annotations

import asyncio
import hmac
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import TYPE_CHECKING, Any, TypeAlias

import grpc
from midstream.server._metrics import ServerMetrics

_OPEN_PREFIX = "/grpc.health.v1.Health/"

if TYPE_CHECKING:  # the stubs are generic, the runtime class is not
    _Handler: TypeAlias = grpc.RpcMethodHandler[Any, Any]
else:
    _Handler = grpc.RpcMethodHandler


async def drain_requests(requests: AsyncIterator[Any], *, seconds: float = 0.25,
                         limit: int = 64) -> None:
    """Read (and drop) what a caller already sent, briefly, before ending its call.

    A grpc.aio client still writing a request stream when the server ends the call sometimes
    sees ``INTERNAL: Internal error from Core`` instead of the status the server sent. Reading
    the messages already in flight (bounded in time and count) lets the real status arrive.
    """
    count = 0
    try:
        async with asyncio.timeout(seconds):
            async for _ in requests:
                count += 1
                if count >= limit:
                    return
    except (TimeoutError, grpc.aio.AioRpcError, grpc.RpcError):
        return


def _refusal(handler: _Handler, metrics: ServerMetrics,
             reason: str = "missing or wrong bearer token in 'authorization' metadata",
             ) -> _Handler:
    """A handler of the same shape as ``handler`` that only refuses the call."""

    async def refuse(request: Any, context: grpc.aio.ServicerContext[Any, Any]) -> None:
        metrics.errors.labels(code=grpc.StatusCode.UNAUTHENTICATED.name).inc()
        if handler.request_streaming:
            await drain_requests(request)
        await context.abort(grpc.StatusCode.UNAUTHENTICATED, reason)

    deserializer = handler.request_deserializer
    serializer = handler.response_serializer
    if handler.request_streaming and handler.response_streaming:
        return grpc.stream_stream_rpc_method_handler(refuse, deserializer, serializer)
    if handler.request_streaming:
        return grpc.stream_unary_rpc_method_handler(refuse, deserializer, serializer)
    if handler.response_streaming:
        return grpc.unary_stream_rpc_method_handler(refuse, deserializer, serializer)
    return grpc.unary_unary_rpc_method_handler(refuse, deserializer, serializer)


class BearerTokenInterceptor(grpc.aio.ServerInterceptor):
    """Refuse every call without the right bearer token (health checks excepted).

    The comparison takes constant time so the token cannot be guessed byte by byte.
    """

    def __init__(self, token: str, metrics: ServerMetrics) -> None:
        if not token:
            raise ValueError("the bearer token must not be empty")
        self._expected = f"Bearer {token}".encode()
        self._metrics = metrics

    async def intercept_service(
        self,
        continuation: Callable[[grpc.HandlerCallDetails], Awaitable[_Handler | None]],
        handler_call_details: grpc.HandlerCallDetails,
    ) -> _Handler | None:
        handler = await continuation(handler_call_details)
        method = handler_call_details.method
        if handler is None or method.startswith(_OPEN_PREFIX):
            return handler
        supplied = [value.encode() if isinstance(value, str) else value
                    for key, value in handler_call_details.invocation_metadata or ()
                    if key == "authorization"]
        if len(supplied) > 1:
            # Which one counts would depend on each proxy on the way: refuse them all.
            return _refusal(handler, self._metrics,
                            f"{len(supplied)} 'authorization' metadata entries; send exactly one")
        if supplied and hmac.compare_digest(supplied[0], self._expected):
            return handler
        return _refusal(handler, self._metrics)
