"""Decoding requests at the edge: bytes that are no valid message get an answer, not a crash.

grpc decodes each request with the handler's deserializer before any of our code runs. Left to
protobuf's own ``FromString``, undecodable bytes (or a string field holding invalid UTF-8, which
proto3 forbids) raise inside grpc: the call ends ``UNKNOWN`` with the exception's class name, a
traceback is logged per message, nothing is counted, and an ingest call's followers are told the
caller vanished. Here every method is registered with a deserializer that never raises: bytes
that do not decode become a :class:`MalformedMessage` naming what was wrong, which the handlers
refuse like any other bad input (``INVALID_ARGUMENT``, one log line, the error metric, followers
told ``REJECTED``).

A unary request with a unary reply is refused before the servicer's method runs (so its
``request`` is always a message); ``Follow`` and the streamed requests (read with
``context.read()``) reach their handler, which checks for it.

Examples
--------
>>> from midstream.wire import midstream_pb2 as pb
>>> decode = tolerant_deserializer(pb.ClientEvent)
>>> decode(pb.ClientEvent(close=pb.CloseConversation()).SerializeToString()).HasField("close")
True
>>> bad = pb.ClientEvent(words=pb.WordBatch(words=[pb.SpokenWord(word_id="w1", text="x")]))
>>> raw = bad.SerializeToString().replace(b"x", b"\\xff")
>>> print(decode(raw).problem)
midstream.v1.ClientEvent could not be decoded: field 'words.words.text' is not valid UTF-8
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from typing import TYPE_CHECKING, Any, TypeAlias, TypeVar

import grpc
from google.protobuf.descriptor import FieldDescriptor
from google.protobuf.message import DecodeError, Message
from midstream import EventError
from midstream.wire import midstream_pb2 as pb

if TYPE_CHECKING:  # the servicer imports this module
    from midstream.server._servicer import MidstreamServicer

_M = TypeVar("_M", bound=Message)
_Context: TypeAlias = "grpc.aio.ServicerContext[Any, Any]"
# protobuf's stubs name two descriptor classes (pure Python and upb) for one thing.
_Descriptor: TypeAlias = Any

#: The service whose methods :func:`add_servicer` registers.
SERVICE = pb.DESCRIPTOR.services_by_name["Midstream"]


class MalformedMessage:
    """A request whose bytes did not decode; ``problem`` says what was wrong (never the bytes)."""

    __slots__ = ("problem",)

    def __init__(self, problem: str) -> None:
        self.problem = problem

    def error(self) -> EventError:
        """The error a handler refuses the request with (``INVALID_ARGUMENT``)."""
        return EventError(self.problem)


def tolerant_deserializer(message_type: type[_M]) -> Callable[[bytes], _M | MalformedMessage]:
    """A deserializer for ``message_type`` that returns a :class:`MalformedMessage` on failure."""
    parse = message_type.FromString

    def deserialize(data: bytes) -> _M | MalformedMessage:
        try:
            return parse(data)
        except DecodeError:
            return MalformedMessage(describe(message_type.DESCRIPTOR, data))

    return deserialize


class _TruncatedError(Exception):
    """The bytes do not follow the protobuf wire format."""


def _varint(data: bytes, pos: int) -> tuple[int, int]:
    value = shift = 0
    while True:
        if pos >= len(data) or shift > 63:
            raise _TruncatedError
        byte = data[pos]
        pos += 1
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return value, pos
        shift += 7


def _first_problem(descriptor: _Descriptor, data: bytes, path: str) -> str | None:
    """The first string field with invalid UTF-8 (by its dotted path), or ``None``.

    Raises ``_TruncatedError`` when the bytes do not follow the wire format at all.
    """
    pos, end = 0, len(data)
    while pos < end:
        key, pos = _varint(data, pos)
        number, wire_type = key >> 3, key & 7
        if number == 0:
            raise _TruncatedError
        if wire_type == 0:
            _, pos = _varint(data, pos)
        elif wire_type == 1:
            pos += 8
        elif wire_type == 5:
            pos += 4
        elif wire_type == 2:
            length, pos = _varint(data, pos)
            chunk = data[pos:pos + length]
            pos += length
            if len(chunk) < length:
                raise _TruncatedError
            field = descriptor.fields_by_number.get(number)
            if field is None:
                continue
            if field.type == FieldDescriptor.TYPE_STRING:
                try:
                    chunk.decode("utf-8")
                except UnicodeDecodeError:
                    return f"field '{path}{field.name}' is not valid UTF-8"
            elif field.type == FieldDescriptor.TYPE_MESSAGE and field.message_type is not None:
                inner = _first_problem(field.message_type, chunk, f"{path}{field.name}.")
                if inner is not None:
                    return inner
        else:  # groups (3, 4) are not used by this protocol; 6 and 7 do not exist
            raise _TruncatedError
        if pos > end:
            raise _TruncatedError
    return None


def describe(descriptor: _Descriptor, data: bytes) -> str:
    """What is wrong with bytes that did not decode as ``descriptor``'s message.

    Names the first string field holding invalid UTF-8 when that is the fault, else says the
    bytes are not protobuf of that type. Never quotes the bytes (they may hold words).
    """
    name = descriptor.full_name
    try:
        problem = _first_problem(descriptor, data, "")
    except _TruncatedError:
        problem = None
    if problem is None:
        return (f"{name} could not be decoded: {len(data)} bytes that are not a valid protobuf "
                f"message of this type (truncated or corrupt)")
    return f"{name} could not be decoded: {problem}"


def _serializer(reply_type: type[Message]) -> Callable[[Message | bytes], bytes]:
    """``reply_type``'s serializer that passes bytes through: a handler may yield a message
    serialised once for many streams (an update shared by its caller and every follower,
    :mod:`midstream.server._wire`) without grpc serialising it again for each."""
    serialize = reply_type.SerializeToString

    def serializer(reply: Message | bytes) -> bytes:
        return reply if isinstance(reply, bytes) else serialize(reply)

    return serializer


def _refusing_unary(servicer: MidstreamServicer, behaviour: Callable[..., Any]) -> Any:
    async def handle(request: Message | MalformedMessage, context: _Context) -> Any:
        if isinstance(request, MalformedMessage):
            await servicer.refuse(context, request.error())
        return await behaviour(request, context)
    return handle


def add_servicer(servicer: MidstreamServicer, server: grpc.aio.Server) -> None:
    """Register every method of the service on ``server`` with tolerant deserializers.

    What the generated ``add_MidstreamServicer_to_server`` does, but a request that does not
    decode is refused by the servicer with ``INVALID_ARGUMENT`` instead of failing inside grpc.
    """
    handlers: dict[str, grpc.RpcMethodHandler[Any, Any]] = {}
    for method in SERVICE.methods:
        request_type = getattr(pb, method.input_type.name)
        reply_type = getattr(pb, method.output_type.name)
        behaviour = getattr(servicer, method.name)
        deserialize = tolerant_deserializer(request_type)
        serialize = _serializer(reply_type)
        if method.client_streaming:
            make = (grpc.stream_stream_rpc_method_handler if method.server_streaming
                    else grpc.stream_unary_rpc_method_handler)
            handlers[method.name] = make(behaviour, deserialize, serialize)
        elif method.server_streaming:
            # grpc runs a handler that is no async generator function in a thread, so a
            # wrapper would have to re-yield every message: these check for themselves.
            assert inspect.isasyncgenfunction(behaviour)
            handlers[method.name] = grpc.unary_stream_rpc_method_handler(
                behaviour, deserialize, serialize)
        else:
            handlers[method.name] = grpc.unary_unary_rpc_method_handler(
                _refusing_unary(servicer, behaviour), deserialize, serialize)
    server.add_generic_rpc_handlers(
        (grpc.method_handlers_generic_handler(SERVICE.full_name, handlers),))
    server.add_registered_method_handlers(SERVICE.full_name, handlers)

