"""Cycle-collector pauses on the server's word path, for several collector thresholds.

No network: as ``bench_ingest.py``, a servicer in this process takes ``FeedMany`` request
frames for ``--conversations`` live conversations (SwDA val words, channels in turn) and every
reply frame is serialised. ``gc.callbacks`` time each collection. For each ``--gc-thresholds``
setting (``G0,G1,G2``, as ``midstream serve --gc-thresholds``) a fresh pass reports, per
generation: collections, the longest and total pause, and the objects they freed (anything
non-zero means the word path makes reference cycles, which only a collection can free). The
longest pause bounds how late a word is held up by the collector; the total is its share of the
CPU. The in-run baseline is Python's own thresholds (700,10,10).

Before the passes it counts the objects the collector tracks that stay alive per word taken in
(``gc.get_objects`` before and after a pass with every conversation still open): what kept
history costs every full collection.

    .venv/bin/python scripts/bench_gc.py [--conversations 700] [--words 120]
    .venv/bin/python scripts/bench_gc.py --smoke --json out.json      # seconds, for CI

Pauses are wall-clock times of a process that may share its core; a pause is dominated by
memory latency over the objects walked, so it also depends on the machine.
"""

from __future__ import annotations

import argparse
import asyncio
import collections
import gc
import json
import time
from typing import Any

from _benchkit import apply_frame, corpora_root, machine, models_folder, source_arguments
from bench_ingest import _frame_bytes, _plan, open_stream
from midstream import EndReason, InputError
from midstream.client.cli._cmd_bench import load_script
from midstream.client.cli._cmd_serve import parse_gc_thresholds
from midstream.models import ModelBundle
from midstream.server._many import ManyStream
from midstream.wire import midstream_pb2 as pb

_DEFAULT = (700, 10, 10)
_SETTINGS = "700,10,10 700,10,1000000 700,1000000,1000000"


def _feed(stream: ManyStream, frames: list[bytes]) -> None:
    for data in frames:
        apply_frame(stream, pb.ClientFrame.FromString(data))
        for reply in stream._frames():
            reply.SerializeToString()


async def retained(bundle: ModelBundle, frames: list[bytes], conversations: int,
                   words: int) -> dict[str, Any]:
    """Tracked objects alive per word after a pass, conversations still open, by type."""
    _, stream = open_stream(bundle, conversations)
    gc.collect()
    before = collections.Counter(type(o).__name__ for o in gc.get_objects())
    _feed(stream, frames)
    gc.collect()
    after = collections.Counter(type(o).__name__ for o in gc.get_objects())
    grown = after - before
    stream._end_all(EndReason.CLOSED)
    stream._frames()
    return {"per_word": sum(grown.values()) / words,
            "by_type": {name: n / words for name, n in grown.most_common(8)}}


async def timed_pass(bundle: ModelBundle, frames: list[bytes], conversations: int,
                     thresholds: tuple[int, int, int]) -> dict[str, Any]:
    """Collections during one pass at ``thresholds``, per generation."""
    _, stream = open_stream(bundle, conversations)
    gc.collect()
    pauses: list[tuple[int, float, int]] = []
    began = [0.0]

    def watch(phase: str, info: dict[str, int]) -> None:
        if phase == "start":
            began[0] = time.perf_counter()
        else:
            pauses.append((info["generation"], time.perf_counter() - began[0],
                           info["collected"]))

    gc.set_threshold(*thresholds)
    gc.callbacks.append(watch)
    try:
        cpu = time.process_time()
        _feed(stream, frames)
        cpu = time.process_time() - cpu
    finally:
        gc.callbacks.remove(watch)
        gc.set_threshold(*_DEFAULT)
    stream._end_all(EndReason.CLOSED)
    stream._frames()
    generations = {}
    for generation in range(3):
        mine = [p for p in pauses if p[0] == generation]
        generations[str(generation)] = {
            "collections": len(mine),
            "max_ms": max((p[1] for p in mine), default=0.0) * 1e3,
            "total_ms": sum(p[1] for p in mine) * 1e3,
            "freed": sum(p[2] for p in mine),
        }
    return {"thresholds": list(thresholds), "cpu_s": cpu, "generations": generations,
            "max_ms": max((p[1] for p in pauses), default=0.0) * 1e3,
            "total_ms": sum(p[1] for p in pauses) * 1e3}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    source_arguments(parser)
    parser.add_argument("--conversations", type=int, default=700)
    parser.add_argument("--words", type=int, default=120, help="words per conversation")
    parser.add_argument("--gc-thresholds", default=_SETTINGS,
                        help=f"space-separated G0,G1,G2 settings (default {_SETTINGS!r})")
    parser.add_argument("--smoke", action="store_true")
    args = parser.parse_args()
    if args.smoke:
        args.conversations, args.words = 20, 20
    try:
        settings = [parse_gc_thresholds(t) for t in args.gc_thresholds.split()]
    except InputError as exc:
        raise SystemExit(str(exc)) from None
    folder, how = models_folder(args.models, None)
    bundle = ModelBundle.load_directory(folder)
    bundle.warm_up()
    script, where = load_script(args.corpus or corpora_root() / "swda", "val",
                                limit=args.conversations * args.words * 2)
    plan = _plan([[script.word(c, k) for k in range(args.words)]
                  for c in range(args.conversations)], 30)
    frames = _frame_bytes(plan)
    words = sum(len(f) for f in plan)
    del plan
    # What lives from here on (models, frames) is not what is measured; as `serve` does.
    gc.collect()
    gc.freeze()
    print(f"models: {how}; words: {where}")
    print(f"{args.conversations} conversations x {args.words} words = {words} words")
    kept = asyncio.run(retained(bundle, frames, args.conversations, words))
    print(f"tracked objects alive per word taken in: {kept['per_word']:.2f} ("
          + ", ".join(f"{name} {n:.2f}" for name, n in kept["by_type"].items()) + ")")
    print("thresholds        gen  collections  max ms  total ms  freed")
    passes = []
    for thresholds in settings:
        result = asyncio.run(timed_pass(bundle, frames, args.conversations, thresholds))
        passes.append(result)
        for generation, g in result["generations"].items():
            if g["collections"]:
                print(f"{','.join(map(str, thresholds)):16s}  {generation:>3s}  "
                      f"{g['collections']:11d}  {g['max_ms']:6.1f}  {g['total_ms']:8.0f}  "
                      f"{g['freed']:5d}")
        print(f"{'':16s}  all  longest pause {result['max_ms']:.1f} ms, "
              f"{result['total_ms'] / words * 1e3:.1f} us per word")
    if args.json is not None:
        args.json.write_text(json.dumps({
            "machine": machine(), "models": how, "words_from": where, "words": words,
            "conversations": args.conversations, "retained": kept, "passes": passes,
        }, indent=2), encoding="utf-8")


if __name__ == "__main__":
    main()
