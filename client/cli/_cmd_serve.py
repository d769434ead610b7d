"""``midstream serve``: run the streaming gRPC service until SIGTERM or Ctrl-C.

::

    midstream serve                                   # shipped models, 127.0.0.1:50051
    midstream serve --port 0 --metrics-port 9464      # any free port; Prometheus metrics
    MIDSTREAM_TOKEN=... midstream serve --host 0.0.0.0 --tls-cert c.pem --tls-key k.pem \\
        --require-tls --token-env
    midstream serve --redis redis://10.0.0.7:6379/0 --workers 2     # one replica of several
    midstream serve --models DIR --setting maptask    # every conversation a task dialogue

The first line on standard output names the address (``serving on HOST:PORT``), so a script
started with ``--port 0`` can read the port. SIGTERM (and SIGINT) drain: health turns
NOT_SERVING, every live conversation is finished and its caller and followers get the final
update and ``ended`` within ``--grace`` seconds, then the process exits 0. This module is an
entry point: the only place the server's environment variables are read (``MIDSTREAM_HOST``,
``MIDSTREAM_PORT``, ``MIDSTREAM_MODELS`` under the options of the same meaning, the token's
variable and ``MIDSTREAM_REDIS`` for the shared log), in :func:`build_config`, which can be
handed another environment.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import gc
import logging
import os
import signal
import sys
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Final

from midstream import InputError
from midstream.client.cli._common import add_setting_option
from midstream.server import (
    IdleSpinners,
    MidstreamServer,
    ServerConfig,
    ServerLimits,
    SharedLogConfig,
    run_server_loop,
)

_TOKEN_ENV = "MIDSTREAM_TOKEN"
_HOST_ENV = "MIDSTREAM_HOST"
_PORT_ENV = "MIDSTREAM_PORT"
_MODELS_ENV = "MIDSTREAM_MODELS"
_DEFAULT_HOST = "127.0.0.1"
_DEFAULT_PORT = 50051
_REDIS_ENV = "MIDSTREAM_REDIS"
_log = logging.getLogger(__name__)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    defaults = ServerLimits()
    parser = subparsers.add_parser(
        "serve", help="run the streaming gRPC service",
        description="Serve the tagging models over gRPC (Feed, Follow, TagTranscript, ...) "
                    "until SIGTERM or Ctrl-C, which drain live conversations first. Limits are "
                    "listed in docs/limits.md.",
        epilog=f"environment: {_HOST_ENV}, {_PORT_ENV} and {_MODELS_ENV} set --host, --port "
               "and --models when the option is not given (the option wins); "
               f"--token-env reads {_TOKEN_ENV} by default.")
    parser.add_argument("--host", default=None,
                        help=f"address to listen on (default ${_HOST_ENV} or {_DEFAULT_HOST}; "
                             "0.0.0.0 for all)")
    parser.add_argument("--port", type=int, default=None,
                        help=f"gRPC port (default ${_PORT_ENV} or {_DEFAULT_PORT}; 0 picks a "
                             "free one)")
    parser.add_argument("--models", type=Path, default=None, metavar="DIR",
                        help=f"folder of .tagger model files (default ${_MODELS_ENV} or the "
                             "shipped models)")
    add_setting_option(parser)
    parser.add_argument("--metrics-port", type=int, default=None, metavar="N",
                        help="serve Prometheus metrics over HTTP on this port (default: off)")
    parser.add_argument("--metrics-host", default="127.0.0.1",
                        help="address of the metrics endpoint (default 127.0.0.1)")
    parser.add_argument("--tls-cert", type=Path, default=None, metavar="FILE",
                        help="PEM certificate chain; with --tls-key turns TLS on")
    parser.add_argument("--tls-key", type=Path, default=None, metavar="FILE",
                        help="PEM private key of --tls-cert")
    parser.add_argument("--require-tls", action="store_true",
                        help="refuse to start unless --tls-cert and --tls-key are given")
    token = parser.add_mutually_exclusive_group()
    token.add_argument("--token-env", nargs="?", const=_TOKEN_ENV, default=None, metavar="VAR",
                       help=f"require 'authorization: Bearer <token>' on every call, the token "
                            f"read from environment variable VAR (default {_TOKEN_ENV})")
    token.add_argument("--token", default=None,
                       help="the bearer token itself (visible to other local users in the "
                            "process list: prefer --token-env)")
    parser.add_argument("--grace", type=float, default=10.0, metavar="S",
                        help="seconds a shutdown waits for streams to drain (default 10)")
    parser.add_argument("--idle-timeout", type=float, default=defaults.idle_timeout_s,
                        metavar="S",
                        help="finish a conversation whose caller sent nothing for S seconds "
                             f"(default {defaults.idle_timeout_s:g})")
    parser.add_argument("--max-live-conversations", type=int,
                        default=defaults.max_live_conversations, metavar="N",
                        help="most conversations ingested at once "
                             f"(default {defaults.max_live_conversations})")
    parser.add_argument("--limit", action="append", default=[], metavar="NAME=VALUE",
                        help="set any server limit of docs/limits.md, e.g. --limit "
                             "max_channels_per_stream=2048 (repeatable; applied after "
                             "--idle-timeout and --max-live-conversations)")
    parser.add_argument("--lag", type=int, default=None, metavar="N",
                        help="open words at most: a word's label becomes final once settled "
                             "(no later word can change it) or N words late (default: the "
                             "decoder's, 10); smaller: final sooner, decided on fewer later "
                             "words")
    parser.add_argument("--no-settle", action="store_true",
                        help="make every label final exactly --lag words late instead "
                             "(without --lag: once its features are complete, one word more "
                             "than the model reads to the right)")
    parser.add_argument("--gc-thresholds", default=_GC_THRESHOLDS, metavar="G0,G1,G2",
                        help="the garbage collector's thresholds once serving (default "
                             f"{_GC_THRESHOLDS}: only young collections run by themselves; "
                             "Python's own are 700,10,10)")
    parser.add_argument("--full-collection-every", type=float, default=_FULL_COLLECTION_S,
                        metavar="S",
                        help="run a full garbage collection every S seconds, to free reference "
                             f"cycles older collections would miss (default {_FULL_COLLECTION_S:g}"
                             "; 0: never)")
    parser.add_argument("--spin-idle-cores", action="store_true",
                        help="keep the cores this server may run on from idling: one "
                             "idle-priority (SCHED_IDLE) spinning process per core, which takes "
                             "no time the server wants but costs the cores' power; on virtual "
                             "machines it lowers CPU per word and latency tails "
                             "(docs/benchmarks.md). Pin the server (taskset) first. Linux only")
    parser.add_argument("--redis", default=None, metavar="URL",
                        help="share every conversation's updates and input events in this "
                             "Redis (redis://HOST:PORT/DB; a Redis Cluster: "
                             "redis+cluster://ANY-NODE:PORT), so that any replica serves "
                             "Follow, GetRevisions and the listing and can continue a "
                             f"conversation whose replica died (default ${_REDIS_ENV}; "
                             "docs/deploy.md)")
    parser.add_argument("--redis-limit", action="append", default=[], metavar="NAME=VALUE",
                        help="set a limit of the shared log (max_entries, max_age_s, "
                             "max_events, buffer_entries, timeout_s, key_prefix, lease_s, "
                             "orphan_grace_s; "
                             "docs/limits.md), repeatable")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="run N server processes on one port (SO_REUSEPORT) sharing the "
                             "--redis log, to use N cores (default 1)")
    parser.add_argument("--reuse-port", action="store_true", help=argparse.SUPPRESS)
    parser.set_defaults(handler=run)


#: Collector thresholds while serving. Everything the word path keeps long (history, replay,
#: snapshots) is stored untracked (see midstream.server._kept), and the word path makes no
#: reference cycles (every collection of 'midstream bench gc' runs freed none), so collections
#: only cost time. Only the youngest generation is collected automatically (Python's 700): an
#: object that outlives one young collection is almost always a live conversation's state, which
#: waits for that conversation's next word, so walking it again in older collections found
#: nothing, and with a thousand live conversations Python's own thresholds paused for tenths of a
#: second (the pauses per setting, and the command that measures them: docs/limits.md). Cycles
#: that outlive a young collection (from errors, ended streams) are freed by the periodic full
#: collection.
_GC_THRESHOLDS: Final = "700,1000000,1000000"
#: Seconds between full collections (common practice, no source: rare enough that its pause,
#: tenths of a second with a thousand live conversations, touches few words).
_FULL_COLLECTION_S: Final = 600.0


async def _collect_periodically(every_s: float) -> None:
    """Run a full collection every ``every_s`` seconds until cancelled."""
    while True:
        await asyncio.sleep(every_s)
        began = time.perf_counter()
        freed = gc.collect()
        _log.debug("full collection freed %d objects in %.1f ms", freed,
                   (time.perf_counter() - began) * 1e3)


def parse_gc_thresholds(text: str) -> tuple[int, int, int]:
    """``G0,G1,G2`` as three positive integers.

    Raises
    ------
    InputError
        Not three comma-separated positive integers.
    """
    parts = text.split(",")
    try:
        values = tuple(int(p) for p in parts)
    except ValueError:
        values = ()
    if len(values) != 3 or min(values) < 1:
        raise InputError(f"--gc-thresholds: {text!r} is not three positive integers G0,G1,G2")
    return values[0], values[1], values[2]


def parse_limits(items: list[str]) -> dict[str, int | float]:
    """``NAME=VALUE`` items as ``ServerLimits`` keyword arguments (values checked there).

    Raises
    ------
    InputError
        An item without ``=``, a name that is no limit, or a value not of the limit's type.
    """
    defaults = ServerLimits()
    names = [f.name for f in dataclasses.fields(ServerLimits)]
    values: dict[str, int | float] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep:
            raise InputError(f"--limit {item!r}: expected NAME=VALUE")
        if name not in names:
            raise InputError(f"--limit {item!r}: {name!r} is no server limit; the limits are "
                             f"{', '.join(names)}")
        kind = type(getattr(defaults, name))
        try:
            values[name] = kind(text.strip())
        except ValueError:
            raise InputError(f"--limit {item!r}: {name} takes a "
                             f"{'whole number' if kind is int else 'number'}") from None
    return values


def _token(args: argparse.Namespace, environ: Mapping[str, str]) -> str | None:
    if args.token is not None:
        if not args.token:
            raise InputError("--token is empty")
        return str(args.token)
    if args.token_env is None:
        return None
    value = environ.get(args.token_env, "")
    if not value:
        raise InputError(f"--token-env: environment variable {args.token_env} is unset or empty")
    return value


def parse_log_limits(url: str, items: list[str]) -> SharedLogConfig:
    """The shared log's configuration: ``url`` and ``NAME=VALUE`` items.

    Raises
    ------
    InputError
        An item without ``=``, a name that is no shared-log limit, or a bad value.
    """
    defaults = SharedLogConfig(url=url)
    names = [f.name for f in dataclasses.fields(SharedLogConfig) if f.name != "url"]
    values: dict[str, int | float | str] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or name not in names:
            raise InputError(f"--redis-limit {item!r}: expected NAME=VALUE with NAME one of "
                             f"{', '.join(names)}")
        kind = type(getattr(defaults, name))
        try:
            values[name] = kind(text.strip())
        except ValueError:
            raise InputError(f"--redis-limit {item!r}: {name} takes a "
                             f"{'whole number' if kind is int else 'number'}") from None
    return SharedLogConfig(url=url, **values)  # type: ignore[arg-type]


def run(args: argparse.Namespace) -> int:
    config = build_config(args)
    if args.full_collection_every < 0:
        raise InputError("--full-collection-every must be >= 0 (0: never)")
    gc_thresholds = parse_gc_thresholds(args.gc_thresholds)
    if args.workers < 1:
        raise InputError(f"--workers must be at least 1, not {args.workers}")
    if args.workers > 1:
        if config.shared_log is None:
            raise InputError(
                f"--workers {args.workers} needs a shared log (--redis URL or "
                f"${_REDIS_ENV}): without one each worker would hold only its own "
                "conversations, and a follower would reach the wrong one")
        from midstream.client.cli._workers import run_workers  # noqa: PLC0415 - only with --workers

        return run_workers(config, args.workers, gc_thresholds=gc_thresholds,
                           full_collection_s=args.full_collection_every,
                           spin_idle_cores=args.spin_idle_cores)
    # Started before the server, while this process has one thread, and stopped after it.
    with IdleSpinners() if args.spin_idle_cores else contextlib.nullcontext():
        return run_server_loop(serve(config, gc_thresholds=gc_thresholds,
                                     full_collection_s=args.full_collection_every))


def _listen_address(args: argparse.Namespace, environ: Mapping[str, str]
                    ) -> tuple[str, int, Path | None]:
    """Host, port and models folder: the option if given, else its variable, else the default."""
    host = args.host if args.host is not None else (environ.get(_HOST_ENV) or _DEFAULT_HOST)
    port = args.port
    if port is None:
        text = environ.get(_PORT_ENV, "").strip()
        if not text:
            port = _DEFAULT_PORT
        elif text.isdigit() and int(text) <= 65535:
            port = int(text)
        else:
            raise InputError(f"environment variable {_PORT_ENV}: {text!r} is not a port number "
                             "(0 to 65535)")
    models = args.models
    if models is None and environ.get(_MODELS_ENV):
        models = Path(environ[_MODELS_ENV])
    return host, port, models


def build_config(args: argparse.Namespace, *, environ: Mapping[str, str] | None = None
                 ) -> ServerConfig:
    """The server configuration the parsed arguments and ``environ`` ask for.

    ``environ`` supplies ``MIDSTREAM_HOST``, ``MIDSTREAM_PORT``, ``MIDSTREAM_MODELS`` for options
    not given and the token's variable (``None``: the process's environment).

    Raises
    ------
    InputError
        A negative grace or lag, a non-positive idle timeout or live limit, a malformed or
        out-of-range ``--limit``, an empty or unset token, a ``MIDSTREAM_PORT`` that is no port.
    """
    environ = os.environ if environ is None else environ
    host, port, models = _listen_address(args, environ)
    if args.grace < 0 or args.idle_timeout <= 0 or args.max_live_conversations < 1:
        raise InputError("--grace must be >= 0, --idle-timeout > 0 and "
                         "--max-live-conversations >= 1")
    if args.lag is not None and args.lag < 0:
        raise InputError(f"--lag must be >= 0, got {args.lag}")
    url = args.redis if args.redis is not None else environ.get(_REDIS_ENV, "")
    if args.redis_limit and not url:
        raise InputError("--redis-limit needs --redis URL (or $MIDSTREAM_REDIS)")
    return ServerConfig(
        host=host, port=port, models_dir=models,
        metrics_host=args.metrics_host, metrics_port=args.metrics_port,
        tls_cert=args.tls_cert, tls_key=args.tls_key, require_tls=args.require_tls,
        token=_token(args, environ), grace_s=args.grace,
        limits=ServerLimits(**{"idle_timeout_s": args.idle_timeout,
                               "max_live_conversations": args.max_live_conversations,
                               **parse_limits(args.limit)}),
        max_open_words=args.lag, settle=not args.no_settle,
        shared_log=parse_log_limits(url, args.redis_limit) if url else None,
        reuse_port=args.reuse_port or args.workers > 1,
        setting=args.setting,
    )


async def serve(config: ServerConfig, *, gc_thresholds: tuple[int, int, int] | None = None,
                full_collection_s: float = 0.0,
                on_ready: Callable[[int], None] | None = None) -> int:
    """Serve until SIGTERM or SIGINT, then drain within ``config.grace_s``; returns 0.

    ``gc_thresholds``: the collector's thresholds once the models are loaded (``None``: leave
    them as they are). ``full_collection_s``: seconds between full collections (0: none).
    ``on_ready`` (a worker of ``--workers``) is given the port instead of it being printed.
    """
    server = MidstreamServer(config)
    await server.start()
    # The models' hundreds of thousands of feature-table objects never die: moving everything
    # alive now out of the collector's sight spares every full collection from walking them
    # again, which otherwise shows up as latency spikes under load.
    gc.freeze()
    if gc_thresholds is not None:
        gc.set_threshold(*gc_thresholds)
    if on_ready is not None:
        on_ready(server.port)
    else:
        print(f"serving on {config.host}:{server.port}", flush=True)
    if server.metrics_port is not None:
        print(f"metrics on http://{config.metrics_host}:{server.metrics_port}/metrics",
              flush=True)
    stop = asyncio.Event()
    collector = (asyncio.create_task(_collect_periodically(full_collection_s))
                 if full_collection_s > 0 else None)
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, stop.set)
    try:
        await stop.wait()
    finally:
        for signum in (signal.SIGTERM, signal.SIGINT):
            loop.remove_signal_handler(signum)
        if collector is not None:
            collector.cancel()
        print("draining: finishing live conversations", file=sys.stderr, flush=True)
        await server.stop(config.grace_s)
    print("stopped", file=sys.stderr, flush=True)
    return 0
