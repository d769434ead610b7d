"""Memory of one conversation filled with maximal batches, against its byte limits.

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

    .venv/bin/python scripts/measure_kept.py                      # the default limits
    .venv/bin/python scripts/measure_kept.py --batches 3 --replay-bytes 262144 ...
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
import tracemalloc
from collections import OrderedDict
from pathlib import Path

from midstream import Word
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._metrics import ServerMetrics
from midstream.server._registry import SessionRegistry
from midstream.server._session import _Recent

WEIGHTS = Path(__file__).resolve().parent.parent / "models" / "weights"


def maximal_batch(batch: int, limits: ServerLimits) -> list[tuple[str, Word]]:
    words = []
    for i in range(limits.max_words_per_message):
        number = batch * limits.max_words_per_message + i
        word_id = f"{number:08d}".ljust(limits.max_id_chars, "x")
        speaker = "AB"[number % 2] * limits.max_id_chars
        text = ("é" + chr(0x4E00 + number % 500)) * (limits.max_word_chars // 2)
        words.append((word_id, Word(text=text, speaker=speaker, start=float(number))))
    return words


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    defaults = ServerLimits()
    parser.add_argument("--batches", type=int, default=16)
    parser.add_argument("--replay-bytes", type=int, default=defaults.replay_bytes)
    parser.add_argument("--history-bytes", type=int, default=defaults.history_bytes)
    parser.add_argument("--snapshot-bytes", type=int, default=defaults.snapshot_bytes)
    args = parser.parse_args()
    limits = ServerLimits(replay_bytes=args.replay_bytes, history_bytes=args.history_bytes,
                          snapshot_bytes=args.snapshot_bytes)
    bundle = ModelBundle.load_directory(WEIGHTS)
    registry = SessionRegistry(limits, ServerMetrics())
    registry.open("warm-up", bundle).add_words(maximal_batch(999, limits)[:2], received=0.0)
    gc.collect()
    tracemalloc.start()
    before, _ = tracemalloc.get_traced_memory()
    session = registry.open("filled", bundle)
    largest_update = 0
    for batch in range(args.batches):
        was = session.kept_bytes
        session.add_words(maximal_batch(batch, limits), received=0.0)
        largest_update = max(largest_update, session.kept_bytes - was)
    gc.collect()
    filled, _ = tracemalloc.get_traced_memory()
    estimate = session.kept_bytes
    session._replay = _Recent(1)  # emptied in place: what they held
    session._revisions = _Recent(1)
    session._words = OrderedDict()
    session._utterances = OrderedDict()
    gc.collect()
    emptied, _ = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    report = {
        "batches": args.batches, "words": args.batches * limits.max_words_per_message,
        "limits": {"replay_bytes": limits.replay_bytes, "history_bytes": limits.history_bytes,
                   "snapshot_bytes": limits.snapshot_bytes},
        "estimate": estimate, "kept": filled - emptied, "rest": emptied - before,
        "total": filled - before, "revisions_truncated": session.revisions_truncated,
        "bound": limits.replay_bytes + limits.history_bytes + limits.snapshot_bytes
        + 2 * largest_update,
    }
    json.dump(report, sys.stdout, indent=1)
    print()
    return 0 if report["kept"] <= estimate <= report["bound"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
