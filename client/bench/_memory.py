"""Memory per idle live conversation: the server's RSS growth, and the engine alone.

Service: a fresh ``midstream serve`` (pinned to one core) gets N conversations, each sent a few
SwDA val words (one event each, waiting for its update) and then left open and idle; the
server's resident set growth divided by N is the memory one idle live conversation costs,
transport included (stream state, buffers, the session, its replay buffer and history).

Transport baseline, in the same run: N gRPC streams on another fresh server that send nothing
(no ``open``: no session, no engine), so the difference is what the conversation itself costs.

Engine alone, in the same run: N conversation engines in this process, each fed the same
words, measured with ``tracemalloc`` (Python allocations only; the CRF library's C state is
shared by every engine, not per conversation). The difference between the two is what the
service adds around the models.

    midstream bench memory                 # N=1000, 5 words each
    midstream bench memory --smoke --json out.json

RSS is a coarse measure (allocator arenas, page granularity): use N of several hundred or more.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import json
import sys
import tracemalloc
from pathlib import Path
from typing import Any

from midstream import Word
from midstream.client.bench._kit import (
    corpora_root,
    machine,
    model_arguments,
    models_folder,
    pin_self,
)
from midstream.client.bench._load import LoadConfig, ProcessProbe, WordScript, hold_conversations
from midstream.client.cli._cmd_bench import load_script, spawn_server
from midstream.models import ModelBundle

#: Target from the project brief: an idle live conversation costs at most this much.
TARGET_BYTES = 50 * 1024


def engine_memory(models: Path, script: WordScript, *, conversations: int, words_each: int
                  ) -> dict[str, Any]:
    """Python-heap bytes per engine that holds ``words_each`` words (tracemalloc)."""
    bundle = ModelBundle.load_directory(models)
    # Build the words first so only the engines' own allocations are counted.
    feeds = [[(f"w{i}", Word(text=text, speaker=speaker))
              for i, (speaker, text) in enumerate(script.word(n, k) for k in range(words_each))]
             for n in range(conversations)]
    warm = bundle.new_engine()
    for word_id, word in feeds[0]:
        warm.add_word(word_id, word)  # first-use caches are shared, not per engine
    gc.collect()
    tracemalloc.start()
    before, _ = tracemalloc.get_traced_memory()
    engines = []
    for feed in feeds:
        engine = bundle.new_engine()
        for word_id, word in feed:
            engine.add_word(word_id, word)
        engines.append(engine)
    gc.collect()
    after, _ = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return {"conversations": len(engines), "words_each": words_each,
            "traced_bytes": after - before,
            "bytes_per_engine": round((after - before) / len(engines))}


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'memory', help='memory per idle live conversation',
        description=__doc__.split("\n\n")[0])
    model_arguments(parser)
    parser.add_argument("--corpus", type=Path, default=None)
    parser.add_argument("--split", default="val")
    parser.add_argument("--conversations", "-n", type=int, default=1000)
    parser.add_argument("--words", type=int, default=5, help="words sent per conversation")
    parser.add_argument("--channels", type=int, default=4)
    parser.add_argument("--server-core", type=int, default=0)
    parser.add_argument("--client-core", type=int, default=1)
    parser.add_argument("--smoke", action="store_true", help="20 conversations (seconds)")
    parser.add_argument("--json", type=Path, default=None, metavar="FILE")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.smoke:
        args.conversations = 20
    models, models_note = models_folder(args.models, args.train_tiny)
    script, source = load_script(args.corpus or corpora_root() / "swda", args.split,
                                 limit=2_000 if args.smoke else 20_000)
    info = machine()
    print(f"machine: {info['nproc']} CPUs ({info['cpu_model']}), Python {info['python']} "
          f"({info['build']} build), "
          f"load average {' '.join(f'{x:.2f}' for x in info['loadavg'])}")
    print(f"models: {models_note}")

    pin_self(args.client_core)

    def hold(*, bare: bool) -> dict[str, Any]:
        # A fresh server each time: RSS rarely shrinks, so one measure would hide the next.
        with spawn_server(models=models, cpu=args.server_core,
                          live=max(256, args.conversations + 16), token=None) as spawned:
            return asyncio.run(hold_conversations(
                LoadConfig(target=spawned.target, conversations=args.conversations,
                           ramp_s=min(10.0, args.conversations / 200), channels=args.channels),
                script, words_each=args.words, probe=ProcessProbe(spawned.pid),
                bare=bare)).summary()

    held = hold(bare=False)
    bare = hold(bare=True)
    engine = engine_memory(models, script, conversations=args.conversations,
                           words_each=args.words)
    service = held.get("bytes_per_conversation", 0)
    print()
    print("| measure | conversations | words each | bytes per conversation | KiB |")
    print("|---|---|---|---|---|")
    print(f"| server RSS growth / live idle conversations | {held['opened']} | {args.words} "
          f"| {service:,} | {service / 1024:.1f} |")
    print(f"| engine alone (tracemalloc) | {engine['conversations']} | {args.words} "
          f"| {engine['bytes_per_engine']:,} | {engine['bytes_per_engine'] / 1024:.1f} |")
    bare_bytes = bare.get("bytes_per_conversation", 0)
    print(f"| baseline: open gRPC stream, no conversation | {bare['opened']} | 0 "
          f"| {bare_bytes:,} | {bare_bytes / 1024:.1f} |")
    print()
    errors = held["error_count"] + bare["error_count"]
    print(f"errors: {held['errors'] or 'none'}; baseline {bare['errors'] or 'none'}")
    print(f"target <= {TARGET_BYTES // 1024} KiB per idle live conversation: "
          f"{'met' if service <= TARGET_BYTES and not errors else 'NOT met'} "
          f"({service / TARGET_BYTES:.2f} of the target); the engine is "
          f"{engine['bytes_per_engine'] / max(service, 1):.0%} and a bare stream "
          f"{bare_bytes / max(service, 1):.0%} of the service's figure")
    if args.json is not None:
        args.json.write_text(json.dumps({
            "machine": info, "models": models_note, "words": source, "service": held,
            "bare_stream": bare,
            "engine": engine, "target_bytes": TARGET_BYTES, "argv": sys.argv[1:],
        }, indent=2, sort_keys=True), encoding="utf-8")
    return 0

