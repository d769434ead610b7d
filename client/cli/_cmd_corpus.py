"""``midstream corpus``: look at an annotated corpus before training on it.

::

    midstream corpus stats ../shared/corpora/swda --split train
    midstream corpus stats calls.jsonl --json

``stats`` reads the corpus through :func:`midstream.corpora.read_corpus` (any kind it detects)
and prints conversation, word and utterance counts, disfluency labels and repair types (from the
disfluency-annotated conversations only) and utterance functions and classes.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TextIO

from midstream.corpora import CorpusStats, corpus_stats, read_corpus


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "corpus", help="inspect an annotated corpus (counts of words, labels, repairs, acts)",
        description="Inspect an annotated corpus folder (SwDA, MRDA, Map Task, Disfl-QA) or "
                    "Midstream JSON Lines.")
    actions = parser.add_subparsers(dest="corpus_command", required=True, metavar="ACTION")
    stats = actions.add_parser(
        "stats", help="count conversations, words, disfluency labels, repairs and utterances",
        description="Count what a corpus holds. Disfluency labels and repair types cover only "
                    "the disfluency-annotated conversations.")
    stats.add_argument("path", type=Path, help="a corpus folder, or a .jsonl file")
    stats.add_argument("--split", default=None,
                       help="read only this split (splits/<split>.txt), e.g. train or val")
    stats.add_argument("--json", action="store_true", help="print the counts as one JSON object")
    stats.set_defaults(handler=run_stats)


def run_stats(args: argparse.Namespace) -> int:
    stats = corpus_stats(read_corpus(args.path, split=args.split))
    if args.json:
        json.dump(stats.to_json(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print_table(stats, sys.stdout)
    return 0


def _share(count: int, total: int) -> str:
    return f"{100 * count / total:6.2f}%" if total else "      -"


def _section(out: TextIO, title: str, counts: Mapping[str, int], total: int) -> None:
    out.write(f"\n{title}\n")
    width = max((len(key) for key in counts), default=0)
    for key, count in counts.items():
        out.write(f"  {key:<{width}}  {count:>10,}  {_share(count, total)}\n")


def print_table(stats: CorpusStats, out: TextIO) -> None:
    """Write the counts as aligned, human-readable sections."""
    rows = (
        ("conversations", stats.conversations),
        ("  disfluency-annotated", stats.disfluency_annotated),
        ("speakers (per conversation, summed)", stats.speakers),
        ("utterances", stats.utterances),
        ("  incomplete (cut off, trailed off, abandoned)", stats.incomplete_utterances),
        ("words", stats.words),
        ("  in annotated conversations", stats.annotated_words),
        ("  fragments", stats.fragments),
        ("unbalanced brackets", stats.unbalanced_brackets),
    )
    width = max(len(name) for name, _ in rows)
    for name, value in rows:
        out.write(f"{name:<{width}}  {value:>10,}\n")
    _section(out, "disfluency labels (share of annotated words)", stats.labels,
             stats.annotated_words)
    _section(out, "repairs (Shriberg 1994 types)", stats.repairs, sum(stats.repairs.values()))
    _section(out, "restarts (units of each kind)", stats.restarts, sum(stats.restarts.values()))
    _section(out, "restart words (share of restart words)", stats.restart_words,
             sum(stats.restart_words.values()))
    _section(out, "utterance functions", stats.functions, stats.utterances)
    _section(out, "utterance classes", stats.fine_classes, stats.utterances)
