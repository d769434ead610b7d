"""Time reading SwDA train into annotated conversations, against a baseline of the same run.

The baseline reads the same files and splits them into whitespace tokens (the least any reader
must do); the ratio says what the markup parsing, normalisation and labelling cost on top. CPU
time is reported beside wall time because the machine may be shared.

    midstream bench read [--split train] [--repeat 3]

The corpora are found at ``$MIDSTREAM_CORPORA`` or ``../shared/corpora`` beside the checkout.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from pathlib import Path

from midstream.client.bench._kit import Paired, corpora_root, write_json
from midstream.corpora.probes import conversation_files, read_swda, split_numbers


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


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'read', help='time reading SwDA against reading its files unparsed',
        description=__doc__.split("\n\n")[0])
    parser.add_argument("--split", default="train")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--corpus", type=Path, default=None, metavar="DIR",
                        help="SwDA folder (default $MIDSTREAM_CORPORA/swda)")
    parser.add_argument("--smoke", action="store_true", help="val, read once (seconds)")
    parser.add_argument("--json", type=Path, default=None, metavar="FILE",
                        help="also write the figures here")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    root = args.corpus or corpora_root() / "swda"
    if args.smoke:
        args.split, args.repeat = "val", 1
    base_wall, base_cpu, tokens = _best(lambda: _baseline(root, args.split), args.repeat)
    wall, cpu, words = _best(lambda: _read(root, args.split), args.repeat)
    print(f"SwDA {args.split}: {len(split_numbers(root, args.split))} conversations, "
          f"{words:,} words (best of {args.repeat})")
    print(f"  baseline (read + split files): {base_wall:6.2f} s wall {base_cpu:6.2f} s cpu "
          f"({tokens:,} raw tokens)")
    print(f"  read_swda:                     {wall:6.2f} s wall {cpu:6.2f} s cpu "
          f"= {words / cpu:,.0f} words/s cpu, {words / wall:,.0f} words/s wall")
    pair = Paired(measured=cpu, baseline=base_cpu)
    print("  " + pair.line("read_swda", "baseline", unit="s cpu", digits=2))
    write_json(args.json, {"split": args.split, "repeat": args.repeat, "words": words,
                           "raw_tokens": tokens, "wall_s": wall, "baseline_wall_s": base_wall,
                           "cpu": pair.as_json()})
    return 0

