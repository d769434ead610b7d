"""What the shared Redis log costs: server CPU per word with and without it, and Redis memory.

No network between caller and server: each pass opens ``--conversations`` sessions in this
process and applies one-word events to them in turn, as the ``Feed`` handler does
(``apply_event``: checks, engine, publishing); with the shared log every session also has its
journal, and the pass ends only when the writer task has sent everything to Redis, so its work
(conversion, pipelining, the client) is inside the timed part. Passes alternate between the two
ways, and the figure is the median ratio of this process's CPU time per word
(``time.process_time``), measured in the same run because the machine may be shared. Redis's
own CPU is not counted (it is another process, usually on another machine).

After the last pass it reads ``MEMORY USAGE`` of each key of the conversations the shared
passes wrote: bytes per word in the update stream, the event stream and in all.

    midstream bench redis                      # starts its own redis-server
    midstream bench redis --redis redis://127.0.0.1:6379/9
    midstream bench redis --smoke              # seconds
"""

from __future__ import annotations

import argparse
import asyncio
import json
import shutil
import socket
import statistics
import subprocess
import tempfile
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from midstream import EndReason
from midstream.client.bench._kit import corpora_root, machine, models_folder, source_arguments
from midstream.client.cli._cmd_bench import load_script
from midstream.models import ModelBundle
from midstream.server import ServerLimits, SharedLogConfig
from midstream.server.probes import (
    ServerMetrics,
    SessionRegistry,
    apply_event,
    open_shared_log,
    stored_bytes,
)
from midstream.wire import midstream_pb2 as pb

if TYPE_CHECKING:
    from midstream.server.probes import SharedLog


def _redis_server(folder: Path) -> tuple[subprocess.Popen[bytes], str]:
    binary = shutil.which("redis-server")
    if binary is None:
        raise SystemExit("redis-server is not installed: give --redis URL")
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    process = subprocess.Popen([binary, "--port", str(port), "--bind", "127.0.0.1", "--save",
                                "", "--appendonly", "no", "--dir", str(folder)],
                               stdout=subprocess.DEVNULL)
    time.sleep(0.5)
    return process, f"redis://127.0.0.1:{port}/0"


def _events(script: list[list[tuple[str, str]]]) -> list[tuple[int, pb.ClientEvent]]:
    """One-word events, conversations taking turns (as many callers at once would)."""
    order: list[tuple[int, pb.ClientEvent]] = []
    for index in range(max(len(w) for w in script)):
        for conversation, words in enumerate(script):
            if index < len(words):
                speaker, text = words[index]
                order.append((conversation, pb.ClientEvent(words=pb.WordBatch(words=[
                    pb.SpokenWord(word_id=f"w{index}", speaker=speaker, text=text,
                                  start_s=float(index), end_s=index + 0.3)]))))
    return order


async def _pass(bundle: ModelBundle, script: list[list[tuple[str, str]]],
                log: SharedLog | None, tag: str) -> tuple[float, int, list[str]]:
    limits = ServerLimits(max_live_conversations=len(script) + 1)
    registry = SessionRegistry(limits, ServerMetrics(),
                               journal=log.journal if log is not None else None)
    sessions = [registry.open(f"{tag}-{n}", bundle) for n in range(len(script))]
    events = _events(script)
    began = time.process_time()
    for count, (conversation, event) in enumerate(events):
        apply_event(sessions[conversation], event, time.monotonic(), limits)
        if count % 64 == 63:
            await asyncio.sleep(0)  # let the writer run, as a serving loop would
    while log is not None and log.pending:
        await asyncio.sleep(0.001)
    spent = time.process_time() - began
    for session in sessions:
        registry.close(session, EndReason.CLOSED)
    while log is not None and log.pending:
        await asyncio.sleep(0.001)
    return spent, len(events), [s.id for s in sessions]


async def _memory(url: str, prefix: str, ids: list[str], words: int) -> dict[str, float]:
    stored = await stored_bytes(url, prefix, ids)
    updates, events, other = stored["updates"], stored["events"], stored["other"]
    return {"update_stream_bytes_per_word": round(updates / words, 1),
            "event_stream_bytes_per_word": round(events / words, 1),
            "all_bytes_per_word": round((updates + events + other) / words, 1)}


async def _main(args: argparse.Namespace, url: str) -> dict[str, Any]:
    folder, _ = models_folder(args.models, None)
    bundle = ModelBundle.load_directory(folder)
    script, source = load_script(args.corpus or corpora_root() / "swda", "val",
                                 limit=args.words)
    per = max(args.words // args.conversations, 1)
    transcripts = [[script.word(c, i) for i in range(per)] for c in range(args.conversations)]
    config = SharedLogConfig(url=url, key_prefix=f"bench{int(time.time())}")
    log = open_shared_log(config, models=lambda: "bench")
    await log.start()
    if not log.healthy:
        raise SystemExit(f"cannot reach {url}")
    await _pass(bundle, transcripts[:2], None, "warm")  # kernels compiled, caches warm
    ratios: list[float] = []
    per_word: dict[str, list[float]] = {"plain": [], "shared": []}
    ids: list[str] = []
    words = 0
    for repeat in range(args.repeats):
        plain, n, _ = await _pass(bundle, transcripts, None, f"p{repeat}")
        shared, n, ids = await _pass(bundle, transcripts, log, f"s{repeat}")
        words = n
        per_word["plain"].append(1000 * plain / n)
        per_word["shared"].append(1000 * shared / n)
        ratios.append(shared / plain)
    memory = await _memory(url, config.key_prefix, ids, words)
    await log.stop(5)
    return {
        "machine": machine(), "words_from": source, "conversations": len(transcripts),
        "words_per_pass": words, "repeats": args.repeats,
        "ms_per_word_plain": round(statistics.median(per_word["plain"]), 4),
        "ms_per_word_shared": round(statistics.median(per_word["shared"]), 4),
        "cpu_ratio_median": round(statistics.median(ratios), 3),
        "cpu_ratios": [round(r, 3) for r in ratios],
        **memory,
    }


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'redis', help='CPU and Redis memory per word of the shared log, in-process',
        description=__doc__.split("\n\n")[0])
    source_arguments(parser)
    parser.add_argument("--redis", default=None, metavar="URL",
                        help="the Redis to write to (default: start a redis-server here)")
    parser.add_argument("--conversations", type=int, default=50)
    parser.add_argument("--words", type=int, default=20_000,
                        help="words read from the corpus (default 20,000)")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--smoke", action="store_true", help="a few seconds")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.smoke:
        args.conversations, args.words, args.repeats = 4, 400, 1
    with tempfile.TemporaryDirectory() as folder:
        process = None
        url = args.redis
        if url is None:
            process, url = _redis_server(Path(folder))
        try:
            result = asyncio.run(_main(args, url))
        finally:
            if process is not None:
                process.kill()
                process.wait()
    text = json.dumps(result, indent=2, sort_keys=True)
    if args.json:
        Path(args.json).write_text(text + "\n", encoding="utf-8")
    print(text)
    return 0
