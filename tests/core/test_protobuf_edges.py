"""Generated protobuf types never escape the edges (a house rule, ``STYLE.md``).

The server's sessions, followers' queues, replay buffers, revision histories and registry hold
domain values; only the modules where bytes cross a boundary touch protobuf:

* ``_app`` (registers the service, named by its descriptor), ``_decode`` (decodes requests),
  ``_ingest`` (reads a request's events), ``_servicer`` and ``_many`` (the RPC handlers, which
  write to gRPC streams) and ``_wire`` (turns what a session publishes into wire form);
* ``_journal``, ``_replica`` and ``_lease`` (the shared log: bytes stored in Redis and read
  back, and the ends written for a lost replica's conversations).

Any other server module importing ``midstream.wire`` (the generated code or its conversion),
``google.protobuf`` or ``midstream.server._wire`` fails here, and so does the core, the corpus
readers or the models importing the wire at all. The check reads the sources with :mod:`ast`
(nothing is imported), so it sees imports under ``TYPE_CHECKING`` and inside functions too.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]

#: The server modules where protobuf meets the domain (see the module docstring). ``probes``
#: hands the multiplexed stream request frames as the network would, for the benchmarks that
#: time that edge without a socket.
SERVER_EDGES = frozenset({
    "_app", "_decode", "_ingest", "_journal", "_lease", "_many", "_replica", "_servicer", "_wire",
    "probes",
})

#: What only an edge may import: the generated code and its conversion, protobuf itself, and
#: the server's conversion of what sessions publish.
_WIRE_PREFIXES = ("midstream.wire", "google.protobuf", "midstream.server._wire")

#: Folders whose modules never touch the wire, edges or not.
_WIRE_FREE = ("core", "corpora", "models")


def wire_imports(source: str, path: str) -> list[str]:
    """``line: module`` of every import in ``source`` of a module only an edge may use."""
    found: list[str] = []
    for node in ast.walk(ast.parse(source, filename=path)):
        if isinstance(node, ast.Import):
            modules = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            modules = [node.module, *(f"{node.module}.{alias.name}" for alias in node.names)]
        else:
            continue
        hits = {m for m in modules if any(m == p or m.startswith(p + ".") for p in _WIRE_PREFIXES)}
        found += [f"{node.lineno}: {module}" for module in sorted(hits)][:1]
    return found


def _modules(folder: str) -> list[Path]:
    return [p for p in sorted((REPO / folder).rglob("*.py")) if "_pb2" not in p.name]


def test_only_the_edge_modules_of_the_server_import_protobuf() -> None:
    offending = [f"server/{path.name}:{hit}" for path in _modules("server")
                 if path.stem not in SERVER_EDGES
                 for hit in wire_imports(path.read_text(encoding="utf-8"), str(path))]
    assert not offending, ("protobuf reached past the server's edges (convert in an edge "
                           "module, hand domain values inward):\n" + "\n".join(offending))


def test_every_named_edge_exists_and_still_talks_protobuf() -> None:
    # An edge that no longer needs protobuf leaves the list, so the list only shrinks.
    idle = [name for name in sorted(SERVER_EDGES)
            if not wire_imports((REPO / "server" / f"{name}.py").read_text(encoding="utf-8"),
                                name)]
    assert not idle, f"no longer edges, remove them from SERVER_EDGES: {idle}"


@pytest.mark.parametrize("folder", _WIRE_FREE)
def test_the_core_the_readers_and_the_models_never_touch_the_wire(folder: str) -> None:
    offending = [f"{path.relative_to(REPO)}:{hit}" for path in _modules(folder)
                 for hit in wire_imports(path.read_text(encoding="utf-8"), str(path))]
    assert not offending, "\n".join(offending)


@pytest.mark.parametrize("source", [
    "from midstream.wire import midstream_pb2 as pb",
    "from midstream.wire import convert as cv",
    "import midstream.wire.midstream_pb2",
    "from google.protobuf.message import Message",
    "from midstream.server._wire import update_message",
    "if TYPE_CHECKING:\n    from midstream.wire import midstream_pb2",
    "def later() -> None:\n    from midstream import wire",
])
def test_the_checker_sees_every_way_of_reaching_the_wire(source: str) -> None:
    assert wire_imports(source, "server/_session.py")


@pytest.mark.parametrize("source", [
    "from midstream import HypothesisUpdate",
    "from midstream.server._published import PublishedUpdate",
    "import grpc",  # status codes and interceptors are gRPC, not its generated types
])
def test_the_checker_lets_domain_imports_pass(source: str) -> None:
    assert wire_imports(source, "server/_session.py") == []
