"""Who can get in and what leaks: ids, TLS with the token together, the CLI's TLS switch, logs.

``tests/server/test_security.py`` checks TLS alone, the token on every RPC over plaintext and
the server's own INFO logs. These tests add what it lacks: server-assigned conversation ids are
unguessable, the token is still demanded on every call (Follow included) when TLS is on,
``midstream serve --require-tls`` refuses to start without a certificate, and neither the server
nor the client library logs words or clean text at INFO while a conversation is streamed,
followed and inspected through the client library.
"""

from __future__ import annotations

import asyncio
import collections
import itertools
import logging
import math
import shutil
import string
import subprocess
import sys
from pathlib import Path

import grpc
import pytest
from midstream import Word
from midstream.client import AddWord, Client
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from reliability_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    WAIT_S,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    start_server_fixture,
)

pytestmark = pytest.mark.corpus  # the models are trained from SwDA when none are shipped

_URLSAFE = set(string.ascii_letters + string.digits + "-_")


async def test_server_assigned_ids_are_unguessable(start_server: ServerFactory) -> None:
    running = await start_server()
    ids = []
    for _ in range(200):
        replies = [m async for m in running.stub.Feed(iter([open_event(), CLOSE]),
                                                         timeout=WAIT_S)]
        ids.append(replies[0].welcome.conversation_id)
    assert len(set(ids)) == len(ids)
    # At least 128 bits: 22 or more characters of a 64-symbol alphabet (6 bits each).
    assert all(len(i) >= 22 and set(i) <= _URLSAFE for i in ids)
    # Usable as a command-line argument: none looks like an option (1 in 64 would by chance).
    assert not any(i.startswith("-") for i in ids)
    # Characters spread over the whole alphabet: pooled entropy near log2(64) = 6 bits.
    counts = collections.Counter("".join(ids))
    total = sum(counts.values())
    entropy = -sum(n / total * math.log2(n / total) for n in counts.values())
    assert entropy > 5.8
    # No sequential pattern: consecutive ids differ in almost every position (63/64 expected)
    # and share no prefix, so neither a counter nor a clock shows through.
    distances = [sum(a != b for a, b in zip(x, y, strict=True)) / len(x)
                 for x, y in itertools.pairwise(ids)]
    assert sum(distances) / len(distances) > 0.9
    assert max(len(_common_prefix(x, y)) for x, y in itertools.pairwise(ids)) < 4


def _common_prefix(a: str, b: str) -> str:
    n = 0
    while n < min(len(a), len(b)) and a[n] == b[n]:
        n += 1
    return a[:n]


@pytest.fixture(name="certificate")
def certificate_fixture(tmp_path: Path) -> tuple[Path, Path]:
    """A self-signed certificate for localhost, made now with the openssl command."""
    if shutil.which("openssl") is None:
        pytest.skip("the openssl command is not installed")
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key),
         "-out", str(cert), "-days", "1", "-subj", "/CN=localhost",
         "-addext", "subjectAltName=DNS:localhost"],
        check=True, capture_output=True, timeout=60,
    )
    return cert, key


_SECRET_WORDS = ["periwinkle", "gazebo", "ocelot", "rhubarb", "tangerine"]


async def test_tls_with_token_guards_follow_and_leaks_no_words(
    start_server: ServerFactory, certificate: tuple[Path, Path],
    caplog: pytest.LogCaptureFixture,
) -> None:
    cert, key = certificate
    running = await start_server(tls_cert=cert, tls_key=key, require_tls=True, token="t0k3n")
    target = f"localhost:{running.server.port}"
    credentials = grpc.ssl_channel_credentials(root_certificates=cert.read_bytes())
    caplog.set_level(logging.INFO)  # every logger, server and client library alike
    async with Client(target, tls=True, root_certificates=cert.read_bytes(),
                      token="t0k3n") as client, client.feed() as stream:
        conversation = stream.conversation_id
        follower = asyncio.create_task(_follow_all(client, conversation))
        await asyncio.sleep(0.1)
        for i, text in enumerate(_SECRET_WORDS):
            await stream.send_words([AddWord(word_id=f"w{i}", word=Word(
                text=text, speaker="AB"[i % 2], start=float(i), end=float(i) + 0.3))])
        await stream.replace_word("w4", Word(text="rhubarb", speaker="A", start=4.0, end=4.3))
        await stream.close()
        seen = await asyncio.wait_for(follower, WAIT_S)
        assert seen, "the follower over TLS with the token got nothing"
        history = await client.revisions(conversation)
        assert history is not None

        async with grpc.aio.secure_channel(target, credentials) as channel:
            stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]
            for metadata in ((), (("authorization", "Bearer wrong"),)):
                with pytest.raises(grpc.aio.AioRpcError) as info:
                    _ = [m async for m in stub.Follow(
                        pb.FollowRequest(conversation_id=conversation, from_seq=1),
                        metadata=metadata, timeout=WAIT_S)]
                assert info.value.code() == grpc.StatusCode.UNAUTHENTICATED
            # The right token over TLS reads the kept conversation.
            late = [m async for m in stub.Follow(
                pb.FollowRequest(conversation_id=conversation, from_seq=1),
                metadata=(("authorization", "Bearer t0k3n"),), timeout=WAIT_S)]
            assert late[-1].ended.reason == pb.END_REASON_CLOSED
            # The clean text carried the words, so the check below has something to miss.
            clean = " ".join(u.clean_text for m in late for u in m.update.utterances)
            assert any(word in clean for word in _SECRET_WORDS)

    info_records = [r for r in caplog.records if r.levelno >= logging.INFO]
    assert any(conversation in r.getMessage() for r in info_records)  # the capture works
    for record in info_records:
        text = record.getMessage().lower()
        assert not [w for w in _SECRET_WORDS if w in text], record.getMessage()


async def _follow_all(client: Client, conversation: str) -> list[object]:
    return [event async for event in client.follow(conversation, from_seq=1)]


def test_serve_require_tls_without_certificate_refuses_to_start(models_dir: Path) -> None:
    # The documented switch: `midstream serve --require-tls` never falls back to plaintext.
    # Run as its own process, as a user runs it (it owns its event loop and logging setup).
    done = subprocess.run(
        [sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", "0", "--models",
         str(models_dir), "--require-tls"],
        capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode != 0
    assert "TLS is required (--require-tls)" in done.stderr
    assert "serving on" not in done.stdout
