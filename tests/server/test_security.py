"""TLS, the bearer token on every RPC, and no transcript words in logs at INFO."""

from __future__ import annotations

import asyncio
import logging
import shutil
import subprocess
from pathlib import Path
from typing import Any

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc
from midstream import HypothesisDiff, InputError, Word
from midstream.models import ModelBundle
from midstream.server import MidstreamServer, ServerConfig
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Caller,
    Running,
    ServerFactory,
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


@pytest.fixture(scope="module")
def certificate(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """A self-signed certificate for localhost, made now with the openssl command."""
    if shutil.which("openssl") is None:
        pytest.skip("the openssl command is not installed")
    folder = tmp_path_factory.mktemp("tls")
    cert, key = folder / "cert.pem", folder / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
         "-nodes", "-keyout", str(key), "-out", str(cert), "-days", "1", "-subj", "/CN=localhost",
         "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1"],
        check=True, capture_output=True,
    )
    return cert, key


async def test_tls_serves_secure_callers_only(start_server: ServerFactory,
                                              certificate: tuple[Path, Path]) -> None:
    cert, key = certificate
    running = await start_server(tls_cert=cert, tls_key=key, require_tls=True)
    credentials = grpc.ssl_channel_credentials(root_certificates=cert.read_bytes())
    async with grpc.aio.secure_channel(f"localhost:{running.server.port}", credentials) as ch:
        stub = pb_grpc.MidstreamStub(ch)  # type: ignore[no-untyped-call]
        replies = [m async for m in stub.Feed(iter([
            open_event(), words_event(spoken("w1", "hello")), CLOSE]))]
        assert replies[-1].ended.reason == pb.END_REASON_CLOSED
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ListConversations(pb.ListConversationsRequest(), timeout=2)
    assert info.value.code() == grpc.StatusCode.UNAVAILABLE


async def test_required_tls_without_certificate_refuses_to_start(bundle: ModelBundle) -> None:
    server = MidstreamServer(ServerConfig(port=0, require_tls=True), bundle=bundle)
    with pytest.raises(InputError, match="require-tls"):
        await server.start()
    await server.stop(0)


def _every_rpc(stub: pb_grpc.MidstreamStub, metadata: tuple[tuple[str, str], ...],
               ) -> dict[str, object]:
    return {
        "Feed": stub.Feed(iter([open_event(), CLOSE]), metadata=metadata),
        "FeedMany": stub.FeedMany(iter([pb.ClientFrame()]), metadata=metadata),
        "Follow": stub.Follow(pb.FollowRequest(conversation_id="x"), metadata=metadata),
        "ListConversations": stub.ListConversations(pb.ListConversationsRequest(),
                                                    metadata=metadata),
        "TagTranscript": stub.TagTranscript(pb.TagTranscriptRequest(), metadata=metadata),
        "GetRevisions": stub.GetRevisions(pb.GetRevisionsRequest(conversation_id="x"),
                                          metadata=metadata),
        "DescribeModels": stub.DescribeModels(pb.DescribeModelsRequest(), metadata=metadata),
        "ReloadModels": stub.ReloadModels(pb.ReloadModelsRequest(directory="/nonexistent"),
                                          metadata=metadata),
    }


async def _outcome(call: object) -> grpc.StatusCode:
    try:
        if hasattr(call, "__aiter__"):
            _ = [m async for m in call]
        else:
            await call  # type: ignore[misc]
    except grpc.aio.AioRpcError as exc:
        return exc.code()
    return grpc.StatusCode.OK


@pytest.mark.parametrize("metadata", [(), (("authorization", "Bearer wrong"),),
                                      (("authorization", "s3cret"),),
                                      (("authorization", "Bearer wrong"),
                                       ("authorization", "Bearer s3cret")),
                                      (("authorization", "Bearer s3cret"),
                                       ("authorization", "Bearer s3cret"))],
                         ids=["missing", "wrong", "not-bearer", "duplicated", "right-twice"])
async def test_token_missing_or_wrong_is_unauthenticated_on_every_rpc(
    start_server: ServerFactory, metadata: tuple[tuple[str, str], ...],
) -> None:
    running = await start_server(token="s3cret")
    calls = _every_rpc(running.stub, metadata)
    codes = {name: await _outcome(call) for name, call in calls.items()}
    assert codes == dict.fromkeys(calls, grpc.StatusCode.UNAUTHENTICATED)
    reflect = reflection_pb2_grpc.ServerReflectionStub(running.channel)
    request = reflection_pb2.ServerReflectionRequest(list_services="")
    assert await _outcome(reflect.ServerReflectionInfo(iter([request]), metadata=metadata)) \
        == grpc.StatusCode.UNAUTHENTICATED
    # Health probes stay open (documented): they reveal only SERVING / NOT_SERVING.
    health = health_pb2_grpc.HealthStub(running.channel)
    reply = await health.Check(health_pb2.HealthCheckRequest(service=""), metadata=metadata)
    assert reply.status == health_pb2.HealthCheckResponse.SERVING


async def test_duplicate_authorization_headers_are_refused_by_name(
    start_server: ServerFactory,
) -> None:
    # With two headers, which one a server (or a proxy on the way) reads is anyone's guess.
    running = await start_server(token="s3cret")
    metadata = (("authorization", "Bearer wrong"), ("authorization", "Bearer s3cret"))
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ListConversations(pb.ListConversationsRequest(), metadata=metadata)
    assert info.value.code() == grpc.StatusCode.UNAUTHENTICATED
    assert info.value.details() == "2 'authorization' metadata entries; send exactly one"


async def test_right_token_is_let_through(start_server: ServerFactory) -> None:
    running = await start_server(token="s3cret")
    metadata = (("authorization", "Bearer s3cret"),)
    codes = {name: await _outcome(call)
             for name, call in _every_rpc(running.stub, metadata).items()}
    assert codes == {
        "Feed": grpc.StatusCode.OK, "FeedMany": grpc.StatusCode.OK,
        "Follow": grpc.StatusCode.NOT_FOUND,
        "ListConversations": grpc.StatusCode.OK, "TagTranscript": grpc.StatusCode.OK,
        "GetRevisions": grpc.StatusCode.NOT_FOUND, "DescribeModels": grpc.StatusCode.OK,
        "ReloadModels": grpc.StatusCode.FAILED_PRECONDITION,
    }


async def test_no_transcript_words_in_logs_at_info(running: Running,
                                                   caplog: pytest.LogCaptureFixture) -> None:
    secret_words = ["zanzibar", "quetzal", "marmalade", "xylophone"]
    caplog.set_level(logging.INFO)
    caller = Caller(running.stub)
    conversation = await caller.open()
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    for i, text in enumerate(secret_words[:3]):
        await caller.send(words_event(spoken(f"w{i}", text, start=float(i))))
    await caller.send(pb.ClientEvent(replace=pb.ReplaceWord(word=spoken("w2", "zanzibar"))))
    # A refused event whose text is a secret word: the refusal is logged, the word is not.
    await caller.call.write(words_event(spoken("w0", secret_words[3])))
    with pytest.raises(grpc.aio.AioRpcError):
        while True:
            await caller.call.read()
    await follower
    await running.stub.TagTranscript(pb.TagTranscriptRequest(
        items=[pb.TranscriptItem(word=spoken("t1", secret_words[0]))]))
    info = [r for r in caplog.records if r.levelno >= logging.INFO]
    assert any("refused" in r.getMessage() for r in info)  # the capture works
    assert any(conversation in r.getMessage() for r in info)
    for record in info:
        for word in secret_words:
            assert word not in record.getMessage().lower()


class _BrokenEngine:
    """The real engine, except that the word "boom" makes it fail like a bug would."""

    def __init__(self, inner: Any) -> None:
        self._inner = inner

    def add_word(self, word_id: str, word: Word) -> HypothesisDiff:
        if word.text == "boom":
            raise RuntimeError("engine bug while tagging 'zanzibar'")
        result: HypothesisDiff = self._inner.add_word(word_id, word)
        return result

    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)


class _BrokenBundle:
    def __init__(self, inner: ModelBundle) -> None:
        self._inner = inner

    def describe(self) -> Any:
        return self._inner.describe()

    def new_engine(self) -> _BrokenEngine:
        return _BrokenEngine(self._inner.new_engine())


async def test_engine_fault_is_internal_finishes_the_conversation_and_logs_no_words(
    start_server: ServerFactory, bundle: ModelBundle, caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.INFO)
    running = await start_server(given=_BrokenBundle(bundle))
    caller = Caller(running.stub)
    conversation = await caller.open()
    await caller.send(words_event(spoken("w1", "zanzibar", start=0.0)))
    follower = asyncio.create_task(follow_all(running.stub, conversation, from_seq=1))
    await until_followers(running, conversation, 1)
    await caller.call.write(words_event(spoken("w2", "boom", start=1.0)))
    final = await caller.call.read()
    assert final.update.conversation_final
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await caller.call.read()
    assert info.value.code() == grpc.StatusCode.INTERNAL
    seen = await asyncio.wait_for(follower, 5)
    assert seen[-1].ended.reason == pb.END_REASON_UNSPECIFIED
    assert all(w.final for w in seen[-2].update.words)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.TagTranscript(pb.TagTranscriptRequest(
            items=[pb.TranscriptItem(word=spoken("t1", "boom"))]))
    assert info.value.code() == grpc.StatusCode.INTERNAL
    errors = [r for r in caplog.records if r.levelno >= logging.INFO]
    assert any("RuntimeError" in r.getMessage() for r in errors)
    assert not any("zanzibar" in r.getMessage() for r in errors)
