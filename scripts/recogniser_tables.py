"""Print the model cards' tables of figures under recogniser conditions (0 %, 10 %, 20 % errors).

Runs ``midstream evaluate CORPUS --split val --as-recognised --word-error-rate R --json`` for
each rate (word fragments removed at every rate; seeded substitutions, deletions and insertions
as :mod:`midstream.models._recogniser` documents) and prints two Markdown tables: the word
model's figures (EDITED F1, reparandum F1, restart F1, utterance-end F1) and the function
model's (coarse accuracy on gold utterances, and per word on the predicted utterances). The
command line is printed above the tables so a model card can quote both.

Usage::

    python scripts/recogniser_tables.py [--corpus DIR] [--rates 0 0.1 0.2] [--seed 0]
                                        [--model words.tagger] [--functions-model f.tagger]
                                        [--limit N]
"""

from __future__ import annotations

import argparse
import json
import os
import shlex
import subprocess
import sys
from pathlib import Path

WORD_ROWS = (
    ("EDITED F1 (reparandum + restart, no fragments)", "disfluency.edited_no_fragments.f1"),
    ("reparandum F1, no fragments", "disfluency.reparandum_no_fragments.f1"),
    ("restart F1 (both kinds)", "disfluency.restart.f1"),
    ("utterance-end F1 (segmentation)", "segmentation.f1"),
)
FUNCTION_ROWS = (
    ("coarse function accuracy, gold utterances",
     "utterance_functions.gold_segmentation.coarse.accuracy"),
    ("coarse function accuracy per word, predicted utterances",
     "utterance_functions.predicted_segmentation.word_accuracy"),
)


def _corpora() -> Path:
    return Path(os.environ.get("MIDSTREAM_CORPORA", Path(__file__).resolve().parents[2]
                               / "shared" / "corpora"))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--corpus", type=Path, default=None,
                        help="corpus folder (default: $MIDSTREAM_CORPORA/swda)")
    parser.add_argument("--split", default="val")
    parser.add_argument("--rates", type=float, nargs="+", default=[0.0, 0.1, 0.2])
    parser.add_argument("--seed", type=int, default=0, help="seed of the word-error draws")
    parser.add_argument("--model", type=Path, default=None)
    parser.add_argument("--functions-model", type=Path, default=None)
    parser.add_argument("--limit", type=int, default=0,
                        help="only the first N conversations (a quick look; 0: all)")
    args = parser.parse_args()
    corpus = args.corpus or _corpora() / "swda"
    executable = Path(sys.executable).parent / "midstream"
    figures: dict[float, dict[str, float]] = {}
    for rate in args.rates:
        command = [str(executable), "evaluate", str(corpus), "--split", args.split,
                   "--as-recognised", "--word-error-rate", str(rate),
                   "--error-seed", str(args.seed), "--json"]
        if args.model is not None:
            command += ["--model", str(args.model)]
        if args.functions_model is not None:
            command += ["--functions-model", str(args.functions_model)]
        if args.limit:
            command += ["--limit", str(args.limit)]
        print(f"running: {shlex.join(command)}", file=sys.stderr, flush=True)
        done = subprocess.run(command, check=True, stdout=subprocess.PIPE, text=True)
        figures[rate] = json.loads(done.stdout)
    shown = " ".join(sys.argv[1:])
    print(f"`python scripts/recogniser_tables.py{' ' + shown if shown else ''}` "
          f"({corpus.name} {args.split}, seed {args.seed}; each column one run of "
          f"`midstream evaluate --as-recognised --word-error-rate R`)\n")
    header = "| figure | " + " | ".join(f"{100 * r:g} % word errors" for r in args.rates) + " |"
    rule = "|---|" + "---|" * len(args.rates)
    for rows in (WORD_ROWS, FUNCTION_ROWS):
        print(header)
        print(rule)
        for name, key in rows:
            values = [figures[r].get(key) for r in args.rates]
            cells = " | ".join("n/a" if v is None else f"{v:.4f}" for v in values)
            print(f"| {name} (`{key}`) | {cells} |")
        print()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
