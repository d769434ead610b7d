"""``--ca FILE`` on every command that talks to a server, and certificate errors named as such.

A server with a self-signed certificate (made now with the openssl command) runs on its own
loop in a thread; commands connect to it as a user would.
"""

from __future__ import annotations

import asyncio
import shutil
import subprocess
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest
from client_kit import models_dir_fixture  # noqa: F401 - fixtures are found by name
from midstream import InputError, NotFoundError, UnavailableError
from midstream.client import Client
from midstream.client.cli._common import read_ca
from midstream.client.cli._main import build_parser, main
from midstream.server import MidstreamServer, ServerConfig

#: Every command that talks to a server (demo runs its own in-process).
_COMMANDS = {
    "tag": ["tag", "-"],
    "replay": ["replay", "x.ctm"],
    "subscribe": ["subscribe", "c1"],
    "inspect": ["inspect", "--conversation", "c1"],
    "bench": ["bench"],
}


def _certificate(folder: Path, name: str) -> tuple[Path, Path]:
    cert, key = folder / f"{name}.pem", folder / f"{name}-key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
         "-nodes", "-keyout", str(key), "-out", str(cert), "-days", "1", "-subj", "/CN=localhost",
         "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1"],
        check=True, capture_output=True,
    )
    return cert, key


@pytest.fixture(name="tls_server", scope="module")
def tls_server_fixture(models_dir: Path, tmp_path_factory: pytest.TempPathFactory,
                       ) -> Iterator[tuple[str, Path, Path]]:
    """``(target, the server's certificate, an unrelated certificate)``."""
    if shutil.which("openssl") is None:
        pytest.skip("the openssl command is not installed")
    folder = tmp_path_factory.mktemp("tls")
    cert, key = _certificate(folder, "server")
    other, _ = _certificate(folder, "other")
    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=loop.run_forever, name="tls-server", daemon=True)
    thread.start()
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=models_dir,
                                          tls_cert=cert, tls_key=key, grace_s=0.5))
    asyncio.run_coroutine_threadsafe(server.start(), loop).result(timeout=60)
    try:
        yield f"localhost:{server.port}", cert, other
    finally:
        asyncio.run_coroutine_threadsafe(server.stop(0.2), loop).result(timeout=30)
        loop.call_soon_threadsafe(loop.stop)
        thread.join(timeout=10)
        loop.close()


@pytest.mark.parametrize("command", sorted(_COMMANDS))
def test_every_server_command_takes_a_ca_file(command: str) -> None:
    args = build_parser().parse_args([*_COMMANDS[command], "--ca", "ca.pem"])
    assert (args.ca if command != "bench" else args.tls_ca) == Path("ca.pem")


def test_a_ca_file_that_is_missing_or_no_certificate_is_named(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"--ca .*missing.pem: cannot read the CA file"):
        read_ca(tmp_path / "missing.pem")
    junk = tmp_path / "junk.pem"
    junk.write_text("not a certificate\n", encoding="utf-8")
    with pytest.raises(InputError, match="not a PEM certificate file"):
        read_ca(junk)


def test_subscribe_with_the_right_ca_reaches_the_server(
        tls_server: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    target, cert, _ = tls_server
    code = main(["subscribe", "nobody", "--server", target, "--ca", str(cert)])
    err = capsys.readouterr().err
    assert code != 0
    assert "no live or kept conversation with id 'nobody'" in err  # TLS worked: the server said


def test_a_refused_certificate_is_named_not_called_unreachable(
        tls_server: tuple[str, Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    target, _, other = tls_server
    code = main(["subscribe", "nobody", "--server", target, "--ca", str(other)])
    err = capsys.readouterr().err
    assert code != 0
    assert "TLS handshake with the server failed: the server's certificate was not accepted" \
        in err
    assert "cannot reach the server" not in err


async def test_the_library_names_a_refused_certificate(
        tls_server: tuple[str, Path, Path]) -> None:
    target, cert, other = tls_server
    async with Client(target, tls=True, root_certificates=other.read_bytes()) as client:
        with pytest.raises(UnavailableError, match="certificate was not accepted"):
            await client.list_conversations()
        # A follower does not retry a refused certificate: retrying cannot fix it.
        with pytest.raises(UnavailableError, match="certificate was not accepted"):
            _ = [event async for event in client.follow("c1")]
    async with Client(target, tls=True, root_certificates=cert.read_bytes()) as client:
        with pytest.raises(NotFoundError):
            _ = [event async for event in client.follow("c1")]
