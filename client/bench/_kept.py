"""``midstream bench kept``: memory of one conversation filled with maximal batches, against its
byte limits.

Feeds one conversation (in this process, no network) batches of ``max_words_per_message``
words whose ids and speaker names are ``max_id_chars`` long and whose words are
``max_word_chars`` non-ASCII characters, until every byte-limited buffer is full, then reports
with ``tracemalloc`` (Python allocations):

* ``estimate``: what the server counts the kept records as (``Session.kept_bytes``), which its
  byte limits bound;
* ``kept``: what those records really take (the memory freed by emptying them);
* ``rest``: the rest of the conversation (its engine, above all the ids of the last 4,096 words
  it remembers, and the session);
* ``bound``: the sum of the byte limits plus the two newest updates, which are kept whatever
  they cost.

It prints the figures as JSON and exits 1 when the estimate is below what the records take or
above the bound.

    midstream bench kept                                   # the default limits
    midstream bench kept --batches 3 --replay-bytes 262144 ...
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from midstream import Word
from midstream.client.bench._kit import WEIGHTS, write_json
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server.probes import measure_kept


def maximal_batch(batch: int, limits: ServerLimits) -> list[tuple[str, Word]]:
    words = []
    for i in range(limits.max_words_per_message):
        number = batch * limits.max_words_per_message + i
        word_id = f"{number:08d}".ljust(limits.max_id_chars, "x")
        speaker = "AB"[number % 2] * limits.max_id_chars
        text = ("é" + chr(0x4E00 + number % 500)) * (limits.max_word_chars // 2)
        words.append((word_id, Word(text=text, speaker=speaker, start=float(number))))
    return words


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "kept", help="memory of one conversation against its byte estimate",
        description=__doc__.split("\n\n")[0])
    defaults = ServerLimits()
    parser.add_argument("--models", type=Path, default=WEIGHTS, metavar="DIR",
                        help="model folder (default: the shipped models)")
    parser.add_argument("--batches", type=int, default=16)
    parser.add_argument("--replay-bytes", type=int, default=defaults.replay_bytes)
    parser.add_argument("--history-bytes", type=int, default=defaults.history_bytes)
    parser.add_argument("--snapshot-bytes", type=int, default=defaults.snapshot_bytes)
    parser.add_argument("--smoke", action="store_true", help="two batches (seconds)")
    parser.add_argument("--json", type=Path, default=None, metavar="FILE",
                        help="also write the figures here")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.smoke:
        args.batches = 2
    limits = ServerLimits(replay_bytes=args.replay_bytes, history_bytes=args.history_bytes,
                          snapshot_bytes=args.snapshot_bytes)
    bundle = ModelBundle.load_directory(args.models)
    measured = measure_kept(bundle, limits, args.batches,
                            lambda number: maximal_batch(number, limits),
                            warm_up=maximal_batch(999, limits)[:2])
    estimate = measured.estimate
    report = {
        "batches": args.batches, "words": args.batches * limits.max_words_per_message,
        "limits": {"replay_bytes": limits.replay_bytes, "history_bytes": limits.history_bytes,
                   "snapshot_bytes": limits.snapshot_bytes},
        "estimate": estimate, "kept": measured.kept, "rest": measured.rest,
        "total": measured.kept + measured.rest,
        "revisions_truncated": measured.revisions_truncated,
        "bound": limits.replay_bytes + limits.history_bytes + limits.snapshot_bytes
        + 2 * measured.largest_update,
    }
    json.dump(report, sys.stdout, indent=1)
    print()
    write_json(args.json, report)
    return 0 if report["kept"] <= estimate <= report["bound"] else 1
