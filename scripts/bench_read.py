"""Time reading SwDA train into annotated conversations, against a baseline of the same run.

The baseline reads the same files and splits them into whitespace tokens (the least any reader
must do); the ratio says what the markup parsing, normalisation and labelling cost on top. CPU
time is reported beside wall time because the machine may be shared.

    .venv/bin/python scripts/bench_read.py [--split train] [--repeat 3]

The corpora are found at ``$MIDSTREAM_CORPORA`` or ``../shared/corpora`` beside the checkout.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable
from pathlib import Path

from midstream.corpora._swda import conversation_files, read_swda, split_numbers

_REPO = Path(__file__).resolve().parent.parent


def _baseline(root: Path, split: str) -> int:
    files = conversation_files(root)
    tokens = 0
    for number in split_numbers(root, split):
        tokens += len(files[number].read_text(encoding="latin-1").split())
    return tokens


def _read(root: Path, split: str) -> int:
    return sum(len(conversation.words) for conversation in read_swda(root, split=split))


def _best(run: Callable[[], int], repeat: int) -> tuple[float, float, int]:
    """Best (wall, cpu) seconds over ``repeat`` runs, and the run's count."""
    best_wall = best_cpu = float("inf")
    count = 0
    for _ in range(repeat):
        wall, cpu = time.perf_counter(), time.process_time()
        count = run()
        best_wall = min(best_wall, time.perf_counter() - wall)
        best_cpu = min(best_cpu, time.process_time() - cpu)
    return best_wall, best_cpu, count


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--split", default="train")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    corpora = Path(os.environ.get("MIDSTREAM_CORPORA") or _REPO.parent / "shared" / "corpora")
    root = corpora / "swda"
    base_wall, base_cpu, tokens = _best(lambda: _baseline(root, args.split), args.repeat)
    wall, cpu, words = _best(lambda: _read(root, args.split), args.repeat)
    print(f"SwDA {args.split}: {len(split_numbers(root, args.split))} conversations, "
          f"{words:,} words (best of {args.repeat})")
    print(f"  baseline (read + split files): {base_wall:6.2f} s wall {base_cpu:6.2f} s cpu "
          f"({tokens:,} raw tokens)")
    print(f"  read_swda:                     {wall:6.2f} s wall {cpu:6.2f} s cpu "
          f"= {words / cpu:,.0f} words/s cpu, {words / wall:,.0f} words/s wall")
    print(f"  ratio read_swda / baseline (cpu): {cpu / base_cpu:.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
