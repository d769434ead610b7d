"""A real Redis for the shared-log tests: ``redis-server`` on a free loopback port.

Each test that asks for ``redis_server`` gets its own server in a temporary folder with
persistence off (``--save '' --appendonly no``), so a restart starts empty, as a Redis without
persistence does. When ``redis-server`` is not installed these tests fail under ``CI=true``
(``.ci/run`` installs it) and skip with the reason elsewhere.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
import socket
import subprocess
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from midstream.client.cli._demo_script import UTTERANCES
from midstream.server import MidstreamServer
from midstream.server._journal import SharedLog
from midstream.wire import midstream_pb2 as pb
from server_kit import TEST_LIMITS

#: Limits for callers that pause between steps (waiting for the log, for Redis to go and come
#: back) longer than the server kit's one-second idle timeout may allow on a loaded machine.
LIMITS = dataclasses.replace(TEST_LIMITS, idle_timeout_s=30.0)

#: Seconds a redis-server may take to answer its first PING.
_START_TIMEOUT_S = 10.0


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class RedisProcess:
    """One redis-server process; :meth:`restart` brings it back empty on the same port."""

    def __init__(self, binary: str, folder: Path, *, cluster: bool = False,
                 options: tuple[str, ...] = ()) -> None:
        self._binary = binary
        self._folder = folder
        self._cluster = cluster  # a node of a Redis Cluster (see RedisCluster)
        self._options = options
        self.port = _free_port()
        # The cluster bus port defaults to port + 10000, which a free port's may not be. It
        # stays the same across restarts: the other nodes reach a restarted node by it.
        self._bus_port = _free_port() if cluster else 0
        self._process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> None:
        self._process = subprocess.Popen(
            [self._binary, "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
             "--appendonly", "no", "--dir", str(self._folder), "--protected-mode", "yes",
             *(["--cluster-enabled", "yes", "--cluster-port", str(self._bus_port)]
               if self._cluster else []), *self._options],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + _START_TIMEOUT_S
        while time.monotonic() < deadline:
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.5) as conn:
                    conn.sendall(b"PING\r\n")
                    if conn.recv(16).startswith(b"+PONG"):
                        return
            except OSError:
                pass
            if self._process.poll() is not None:
                raise RuntimeError(f"redis-server exited with {self._process.returncode}")
            time.sleep(0.05)
        raise RuntimeError("redis-server did not answer within 10 s")

    def stop(self) -> None:
        if self._process is not None and self._process.poll() is None:
            self._process.kill()
            self._process.wait(timeout=10)
        self._process = None

    def restart(self) -> None:
        """Kill it and start it again empty (persistence is off)."""
        self.stop()
        self.start()


def _server_binary() -> str:
    binary = shutil.which("redis-server")
    if binary is None:
        message = "redis-server is not installed (Debian package redis-server; .ci/run installs it)"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    return binary


@pytest.fixture(name="redis_server")
def redis_server_fixture(tmp_path: Path) -> Iterator[RedisProcess]:
    server = RedisProcess(_server_binary(), tmp_path)
    server.start()
    try:
        yield server
    finally:
        server.stop()


#: Starts another redis-server (its extra command-line options given), each in its own folder.
RedisFactory = Callable[..., RedisProcess]


@pytest.fixture(name="redis_servers")
def redis_servers_fixture(tmp_path: Path) -> Iterator[RedisFactory]:
    """Any number of redis-servers, started with extra options (``--enable-debug-command
    yes``, say), all stopped after the test."""
    binary = _server_binary()
    started: list[RedisProcess] = []

    def start(*options: str) -> RedisProcess:
        folder = tmp_path / f"redis{len(started)}"
        folder.mkdir()
        server = RedisProcess(binary, folder, options=options)
        started.append(server)
        server.start()
        return server

    try:
        yield start
    finally:
        for server in started:
            server.stop()


def call_words() -> list[pb.SpokenWord]:
    """The demo's invented phone call as wire words, one id each, in order (invented data)."""
    words: list[pb.SpokenWord] = []
    start = 0.0
    for speaker, _, text in UTTERANCES:
        for token in text.split():
            word = pb.SpokenWord(word_id=f"w{len(words) + 1}", speaker=speaker, text=token,
                                 start_s=start, end_s=start + 0.25)
            words.append(word)
            start += 0.32
        start += 0.6
    return words


def comparable(update: pb.Update) -> bytes:
    """An update's bytes without its server time (each replica stamps its own clock) and epoch
    (drawn afresh for every conversation), to compare two conversations of the same words."""
    copy = pb.Update()
    copy.CopyFrom(update)
    copy.server_time = 0.0
    copy.epoch = 0
    return copy.SerializeToString(deterministic=True)


def gaps_told(messages: list[pb.ServerMessage], last_seq: int) -> int:
    """Check a follower's messages hold no silent gap and no duplicate; return the gap notices.

    Every update carries the next sequence number; a ``gap`` names exactly the next one as
    missing and is followed by a snapshot, after which updates go on from the snapshot's; the
    stream ends with ``ended`` at ``last_seq``.
    """
    expected: int | None = None
    gaps = 0
    pending_snapshot = False
    for message in messages:
        kind = message.WhichOneof("body")
        if kind == "snapshot":
            expected = message.snapshot.seq + 1
            pending_snapshot = False
        elif kind == "gap":
            assert expected is None or message.gap.first_missing == expected, message
            gaps += 1
            pending_snapshot = True
        elif kind == "update":
            assert not pending_snapshot, "an update between a gap notice and its snapshot"
            if expected is None:
                expected = message.update.seq
            assert message.update.seq == expected, (message.update.seq, expected)
            expected += 1
        elif kind == "ended":
            assert message.ended.last_seq == last_seq
            assert expected == last_seq + 1, (expected, last_seq)
    assert messages and messages[-1].WhichOneof("body") == "ended"
    return gaps


class RedisCluster:
    """Three ``redis-server`` processes joined into one Redis Cluster (no replicas), each on a
    free loopback port in its own folder with persistence off."""

    def __init__(self, binary: str, cli: str, folder: Path, *,
                 node_timeout_ms: int | None = None) -> None:
        self._cli = cli
        self.nodes: list[RedisProcess] = []
        # A node restarted in its folder finds its cluster configuration (nodes.conf) there
        # and joins again with its slots, empty (persistence is off).
        options = () if node_timeout_ms is None else (
            "--cluster-node-timeout", str(node_timeout_ms))
        for number in range(3):
            node_folder = folder / f"node{number}"
            node_folder.mkdir()
            self.nodes.append(RedisProcess(binary, node_folder, cluster=True, options=options))

    @property
    def url(self) -> str:
        """The URL ``--redis`` takes for it: any one node, with the cluster scheme."""
        return f"redis+cluster://127.0.0.1:{self.nodes[0].port}"

    def state(self, node: RedisProcess) -> str:
        """``ok`` or ``fail``: whether ``node`` finds every slot served."""
        info = subprocess.run([self._cli, "-p", str(node.port), "cluster", "info"],
                              capture_output=True, text=True, check=True, timeout=10).stdout
        return next(line.split(":", 1)[1].strip() for line in info.splitlines()
                    if line.startswith("cluster_state:"))

    def until(self, state: str, nodes: list[RedisProcess], timeout_s: float = 60.0) -> None:
        """Wait until every node of ``nodes`` reports the cluster ``state``."""
        deadline = time.monotonic() + timeout_s
        while not all(self.state(node) == state for node in nodes):
            if time.monotonic() > deadline:
                raise RuntimeError(f"the Redis Cluster did not become {state} in {timeout_s} s")
            time.sleep(0.1)

    def start(self) -> None:
        for node in self.nodes:
            node.start()
        subprocess.run([self._cli, "--cluster", "create",
                        *(f"127.0.0.1:{node.port}" for node in self.nodes),
                        "--cluster-replicas", "0", "--cluster-yes"],
                       check=True, capture_output=True, timeout=30)
        deadline = time.monotonic() + _START_TIMEOUT_S
        while time.monotonic() < deadline:  # every node must agree the cluster is up
            states = [subprocess.run([self._cli, "-p", str(node.port), "cluster", "info"],
                                     capture_output=True, text=True, check=True,
                                     timeout=10).stdout for node in self.nodes]
            if all("cluster_state:ok" in state for state in states):
                return
            time.sleep(0.1)
        raise RuntimeError("the Redis Cluster did not come up within 10 s")

    def stop(self) -> None:
        for node in self.nodes:
            node.stop()


def _cluster(folder: Path, node_timeout_ms: int | None) -> Iterator[RedisCluster]:
    binary, cli = shutil.which("redis-server"), shutil.which("redis-cli")
    if binary is None or cli is None:
        message = ("redis-server and redis-cli are not installed (Debian package redis-server; "
                   ".ci/run installs it)")
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    cluster = RedisCluster(binary, cli, folder, node_timeout_ms=node_timeout_ms)
    try:
        cluster.start()
        yield cluster
    finally:
        cluster.stop()


@pytest.fixture(name="redis_cluster")
def redis_cluster_fixture(tmp_path: Path) -> Iterator[RedisCluster]:
    yield from _cluster(tmp_path, None)


@pytest.fixture(name="failing_cluster")
def failing_cluster_fixture(tmp_path: Path) -> Iterator[RedisCluster]:
    """A cluster whose nodes take another for failed after 2 s without an answer (Redis's
    default is 15 s), for tests that stop nodes."""
    yield from _cluster(tmp_path, 2000)


def abandon(server: MidstreamServer) -> SharedLog:
    """Make an in-process replica vanish from the shared log as a killed process would: its
    writer and its lease renewals stop and it writes nothing more (no ends); its gRPC callers
    stay connected. Returns its shared log (its ``owner`` names it in Redis)."""
    log = server._shared  # the tasks a kill would stop
    assert log is not None and log._task is not None and log._keeper is not None
    log._task.cancel()
    keeper = log._keeper._task
    assert keeper is not None
    keeper.cancel()
    return log
