"""Retrain the shipped models from a clean checkout and compare their val figures.

Each shipped ``.tagger`` file records the command that trained it. This script re-runs those
commands on the corpora here (``--corpora`` or ``$MIDSTREAM_CORPORA`` or ``../shared/corpora``),
writing to a scratch folder, then evaluates shipped and retrained models on SwDA val (the
boundary model on MRDA val, the corpus with word times it is trained on) with
``midstream evaluate --json`` and checks that the headline figures agree within ``--tolerance``
(0.01 by default). It takes about an hour on a 2-core machine; it is not part of the CI run.

Usage::

    python scripts/reproduce_models.py [--corpora DIR] [--work DIR] [--tolerance 0.01]
                                       [--only words|utterance_functions|boundaries]
"""

from __future__ import annotations

import argparse
import json
import os
import shlex
import subprocess
import sys
import tempfile
from pathlib import Path

from midstream.models.training import load_artifact

REPO = Path(__file__).resolve().parent.parent
WEIGHTS = REPO / "models" / "weights"
#: The figures the model cards state and the issue thresholds refer to.
HEADLINES = {
    "words": ("disfluency.reparandum_no_fragments.f1", "disfluency.edited_no_fragments.f1",
              "disfluency.restart.f1", "disfluency.filler.f1",
              "disfluency.offline.reparandum.f1", "incremental.edit_overhead",
              "segmentation.f1"),
    "utterance_functions": ("utterance_functions.gold_segmentation.coarse.accuracy",
                            "utterance_functions.gold_segmentation.swbd42.accuracy",
                            "utterance_functions.accuracy_after_words.3"),
    "boundaries": ("segmentation.f1",),
}
#: The corpus each kind is trained and evaluated on.
CORPUS = {"words": "swda", "utterance_functions": "swda", "boundaries": "mrda"}


def training_command(model: Path, corpus: Path, out: Path) -> list[str]:
    """The recorded training command with the corpus and output paths of this run (a pooled
    command's corpora are each found by their folder name beside ``corpus``)."""
    metadata = load_artifact(model).metadata
    recorded = metadata.get("created_by") or metadata.get("command")
    if not isinstance(recorded, str):
        raise SystemExit(f"{model.name} records no training command")
    words = shlex.split(recorded)
    words = [w for w in words if w != "-v"]
    start = words.index("train")
    args = words[start:]
    # args: train TASK CORPUS [CORPUS...] [options...]; swap the corpora and the --out value.
    args[2] = str(corpus.parent / Path(args[2]).name)
    for i in range(3, len(args)):
        if args[i].startswith("-"):
            break
        args[i] = str(corpus.parent / Path(args[i]).name)
    args[args.index("--out") + 1] = str(out)
    return [sys.executable, "-m", "midstream", *args]


def evaluate(kind: str, model: Path, words_model: Path, corpus: Path) -> dict[str, float]:
    command = [sys.executable, "-m", "midstream", "evaluate", str(corpus),
               "--split", "val", "--json"]
    if kind == "words":
        command += ["--model", str(model)]
    elif kind == "boundaries":
        command += ["--model", str(words_model), "--boundary-model", str(model), "--words-only"]
    else:
        command += ["--model", str(words_model), "--functions-model", str(model)]
    result = subprocess.run(command, capture_output=True, text=True, check=True)
    figures: dict[str, float] = json.loads(result.stdout)
    return figures


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    default = os.environ.get("MIDSTREAM_CORPORA", str(REPO.parent / "shared" / "corpora"))
    parser.add_argument("--corpora", type=Path, default=Path(default))
    parser.add_argument("--work", type=Path, default=None)
    parser.add_argument("--tolerance", type=float, default=0.01)
    parser.add_argument("--only", choices=sorted(HEADLINES), default=None,
                        help="retrain only the model of this kind (the other is not touched)")
    args = parser.parse_args()
    work = args.work or Path(tempfile.mkdtemp(prefix="midstream-reproduce-"))
    work.mkdir(parents=True, exist_ok=True)
    shipped = sorted(WEIGHTS.glob("*.tagger"))
    words_shipped = next(m for m in shipped if load_artifact(m).kind == "words")
    failures = 0
    for model in shipped:
        if args.only is not None and load_artifact(model).kind != args.only:
            continue
        out = work / model.name
        corpus = args.corpora / CORPUS[load_artifact(model).kind]
        command = training_command(model, corpus, out)
        print("$", shlex.join(command[2:]), flush=True)
        subprocess.run(command, check=True)
        kind = load_artifact(model).kind
        words_new = work / words_shipped.name
        before = evaluate(kind, model, words_shipped, corpus)
        after = evaluate(kind, out, words_new if words_new.exists() else words_shipped, corpus)
        for key in HEADLINES[kind]:
            if key not in before:
                continue
            delta = after[key] - before[key]
            ok = abs(delta) <= args.tolerance
            failures += not ok
            print(f"{model.name:28} {key:58} shipped {before[key]:.4f} "
                  f"retrained {after[key]:.4f} {'ok' if ok else 'DIFFERS'}")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
