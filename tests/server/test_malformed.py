"""Bytes that are no valid message: ``INVALID_ARGUMENT`` naming what was wrong, never a crash.

Each case checks the status code and message, that exactly one log line at INFO or above was
written for it (no traceback), that the error metric counted it, and, on an ingest call, that
followers are told ``REJECTED``.
"""

from __future__ import annotations

import asyncio
import logging
from typing import Any

import grpc
import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import EndReason
from midstream.server._decode import MalformedMessage, tolerant_deserializer
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    Caller,
    Running,
    bundle_fixture,
    follow_all,
    models_dir_fixture,
    open_event,
    running_fixture,
    spoken,
    start_server_fixture,
    until_followers,
    words_event,
)

_GARBAGE = b"\x0a\xff\xff\xff\xff\xff\xff"  # a length that runs past the end
_BAD_UTF8 = words_event(spoken("w1", "x")).SerializeToString().replace(b"x", b"\xc3\x28")


def _raw_stream(channel: grpc.aio.Channel, method: str) -> Any:
    return channel.stream_stream(f"/midstream.v1.Midstream/{method}",
                                 request_serializer=None,
                                 response_deserializer=pb.ServerMessage.FromString
                                 if method == "Feed" else pb.ServerFrame.FromString)


def _errors(running: Running) -> float:
    counter = running.server.metrics.errors.labels(code="INVALID_ARGUMENT")
    value: float = counter._value.get()  # prometheus_client has no getter
    return value


def _loud(caplog: pytest.LogCaptureFixture) -> list[logging.LogRecord]:
    return [r for r in caplog.records if r.levelno >= logging.INFO
            and "opened" not in r.getMessage() and "ended" not in r.getMessage()]


@pytest.mark.parametrize(("payload", "problem"), [
    (_GARBAGE, "midstream.v1.ClientEvent could not be decoded: 7 bytes that are not a valid "
               "protobuf message of this type (truncated or corrupt)"),
    (_BAD_UTF8, "midstream.v1.ClientEvent could not be decoded: field 'words.words.text' is "
                "not valid UTF-8"),
], ids=["undecodable bytes", "invalid UTF-8"])
async def test_malformed_event_is_invalid_argument_and_followers_are_told_rejected(
        running: Running, caplog: pytest.LogCaptureFixture, payload: bytes,
        problem: str) -> None:
    call = _raw_stream(running.channel, "Feed")()
    await call.write(open_event().SerializeToString())
    welcome = await call.read()
    conversation = welcome.welcome.conversation_id
    await call.write(words_event(spoken("w0", "so", start=0.0)).SerializeToString())
    assert (await call.read()).update.seq == 1
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    await until_followers(running, conversation, 1)
    before = _errors(running)
    caplog.clear()
    caplog.set_level(logging.DEBUG)
    await call.write(payload)
    with pytest.raises(grpc.aio.AioRpcError) as caught:
        while True:
            await call.read()
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert caught.value.details() == problem
    seen = await asyncio.wait_for(follower, 5)
    assert seen[-1].ended.reason == pb.END_REASON_REJECTED
    assert seen[-2].update.conversation_final
    assert _errors(running) == before + 1
    loud = _loud(caplog)
    assert [r.getMessage() for r in loud] == ["RPC refused with INVALID_ARGUMENT (EventError)"]
    assert not any(r.exc_info for r in caplog.records)


async def test_malformed_first_event_is_invalid_argument(running: Running) -> None:
    call = _raw_stream(running.channel, "Feed")()
    await call.write(_GARBAGE)
    with pytest.raises(grpc.aio.AioRpcError) as caught:
        await call.read()
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "ClientEvent could not be decoded" in (caught.value.details() or "")
    assert running.server.servicer.registry.live_count == 0


async def test_malformed_frame_ends_the_stream_and_rejects_its_channels(
        running: Running, caplog: pytest.LogCaptureFixture) -> None:
    call = _raw_stream(running.channel, "FeedMany")()
    await call.write(pb.ClientFrame(events=[pb.ChannelEvent(
        channel=1, event=open_event("m1"))]).SerializeToString())
    assert (await call.read()).replies[0].message.HasField("welcome")
    before = _errors(running)
    caplog.set_level(logging.DEBUG)
    caplog.clear()
    await call.write(_GARBAGE)
    replies = []
    with pytest.raises(grpc.aio.AioRpcError) as caught:
        while True:
            replies.extend((await call.read()).replies)
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "ClientFrame could not be decoded" in (caught.value.details() or "")
    assert replies[-1].message.ended.reason == pb.END_REASON_REJECTED
    assert _errors(running) == before + 1
    assert not any(r.exc_info for r in caplog.records)
    kept = running.server.servicer.registry.get("m1")
    assert kept.end_reason == EndReason.REJECTED


@pytest.mark.parametrize("method", ["Follow", "GetRevisions"])
async def test_malformed_unary_request_names_the_field(
        running: Running, method: str, caplog: pytest.LogCaptureFixture) -> None:
    raw = pb.FollowRequest(conversation_id="x").SerializeToString().replace(b"x", b"\xff")
    caplog.set_level(logging.DEBUG)
    before = _errors(running)
    if method == "Follow":
        follow: Any = running.channel.unary_stream(f"/midstream.v1.Midstream/{method}",
                                                   request_serializer=None)
        call = follow(raw)
        with pytest.raises(grpc.aio.AioRpcError) as caught:
            await call.read()
    else:
        unary: Any = running.channel.unary_unary(f"/midstream.v1.Midstream/{method}",
                                                 request_serializer=None)
        with pytest.raises(grpc.aio.AioRpcError) as caught:
            await unary(raw)
    request = "FollowRequest" if method == "Follow" else "GetRevisionsRequest"
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert caught.value.details() == (f"midstream.v1.{request} could not be decoded: field "
                                      "'conversation_id' is not valid UTF-8")
    assert _errors(running) == before + 1
    assert not any(r.exc_info for r in caplog.records)


async def test_well_formed_calls_still_work_through_the_tolerant_decoding(
        running: Running) -> None:
    caller = Caller(running.stub)
    conversation = await caller.open()
    await caller.send(words_event(spoken("w0", "so", start=0.0)))
    await caller.close()
    seen = await follow_all(running.stub, conversation, from_seq=1)
    assert seen[-1].ended.reason == pb.END_REASON_CLOSED
    history = await running.stub.GetRevisions(pb.GetRevisionsRequest(
        conversation_id=conversation))
    assert history.revisions


@given(st.binary(max_size=200))
def test_any_bytes_decode_to_a_message_or_a_named_problem(data: bytes) -> None:
    for message_type in (pb.ClientEvent, pb.ClientFrame, pb.FollowRequest):
        decoded = tolerant_deserializer(message_type)(data)
        if isinstance(decoded, MalformedMessage):
            assert decoded.problem.startswith(
                f"{message_type.DESCRIPTOR.full_name} could not be decoded: ")
        else:
            assert isinstance(decoded, message_type)


@given(st.text(max_size=20))
def test_invalid_utf8_is_named_by_its_field_path(text: str) -> None:
    frame = pb.ClientFrame(events=[pb.ChannelEvent(channel=1, event=pb.ClientEvent(
        words=pb.WordBatch(words=[pb.SpokenWord(word_id="w1", speaker="A", text=text + "q")]))),
    ])
    raw = frame.SerializeToString()
    # Replace the text's last character (an ASCII "q") with a byte that never starts UTF-8.
    at = raw.rindex(b"q")
    decoded = tolerant_deserializer(pb.ClientFrame)(raw[:at] + b"\xff" + raw[at + 1:])
    assert isinstance(decoded, MalformedMessage)
    assert decoded.problem == ("midstream.v1.ClientFrame could not be decoded: field "
                               "'events.event.words.words.text' is not valid UTF-8")
