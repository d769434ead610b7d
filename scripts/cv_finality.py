"""Cross-validated streaming reparandum F1 under each finality rule, on the training split only.

Reproduces the "Finality" table of ``models/weights/words.md``: the training conversations
are dealt into folds exactly as ``midstream train words --cv-folds 3 --cv-subset 0 --seed 0``
deals them, one model per fold is trained with the shipped word model's recorded
hyper-parameters on the other folds, and each held-out fold is replayed word by word under a
fixed 7-word delay and under settled finality with several bounds. Val is never read.

About 40 minutes on a 2-core machine (fold models train two at a time)::

    .venv/bin/python scripts/cv_finality.py [--work /tmp/cv-finality] [--bounds 10 14 20 30 60]
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import statistics
import subprocess
import sys
from pathlib import Path

from midstream.corpora import read_corpus
from midstream.models import DecoderConfig, WordModel, default_words_model_path
from midstream.models.evaluation import evaluate_words
from midstream.models.training import (
    WordTrainingConfig,
    load_artifact,
    save_artifact,
    train_word_artifact,
    word_folds,
)


def corpora_root() -> Path:
    """``$MIDSTREAM_CORPORA`` or ``../shared/corpora`` beside the checkout."""
    override = os.environ.get("MIDSTREAM_CORPORA")
    if override:
        return Path(override)
    return Path(__file__).resolve().parents[2] / "shared" / "corpora"


_FOLDS = 3
_KEYS = ("disfluency.reparandum_no_fragments.f1", "disfluency.offline.reparandum.f1",
         "incremental.final_decision_delay_words.mean")


def _shipped_config() -> WordTrainingConfig:
    """The training configuration recorded in the shipped word model."""
    artifact = load_artifact(default_words_model_path())
    hyper = artifact.hyper_parameters
    right = WordModel.from_artifact(artifact).config.right
    return WordTrainingConfig(
        c1=hyper["c1"], c2=hyper["c2"], min_freq=hyper["min_freq"],
        max_iterations=hyper["max_iterations"], restart_span=hyper["restart_span"],
        tag_bias=tuple(sorted(hyper["tag_bias"].items())), word_classes=hyper["word_classes"],
        right=right, left=max(WordTrainingConfig().left, right + 1))


def _train_fold(k: int, work: Path) -> None:
    folds = word_folds(list(read_corpus(corpora_root() / "swda", split="train")), _FOLDS)
    train = list(itertools.chain.from_iterable(f for j, f in enumerate(folds) if j != k))
    save_artifact(train_word_artifact(train, _shipped_config()), work / f"fold{k}.tagger")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--work", type=Path, default=Path("/tmp/cv-finality"))
    parser.add_argument("--bounds", type=int, nargs="+", default=[10, 14, 20, 30, 60])
    parser.add_argument("--train-fold", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    args.work.mkdir(parents=True, exist_ok=True)
    if args.train_fold is not None:
        _train_fold(args.train_fold, args.work)
        return 0
    missing = [k for k in range(_FOLDS) if not (args.work / f"fold{k}.tagger").exists()]
    for batch in (missing[i : i + 2] for i in range(0, len(missing), 2)):  # two cores
        running = [subprocess.Popen([sys.executable, __file__, "--work", str(args.work),
                                     "--train-fold", str(k)]) for k in batch]
        if any(p.wait() for p in running):
            raise SystemExit("a fold model failed to train")
    folds = word_folds(list(read_corpus(corpora_root() / "swda", split="train")), _FOLDS)
    rules = [("exactly 7 words late", DecoderConfig(lag=7, settle=False))]
    rules += [(f"settled, at most {b} open", DecoderConfig(lag=b)) for b in args.bounds]
    table: dict[str, list[dict[str, float]]] = {name: [] for name, _ in rules}
    for k in range(_FOLDS):
        model = WordModel.load(args.work / f"fold{k}.tagger")
        for name, config in rules:
            figures = evaluate_words(folds[k], model, config=config)
            table[name].append({key: figures[key] for key in _KEYS})
    for name, rows in table.items():
        f1 = [r[_KEYS[0]] for r in rows]
        delay = statistics.fmean(r[_KEYS[2]] for r in rows)
        print(f"{name:28} F1 {statistics.fmean(f1):.4f} (folds "
              f"{', '.join(f'{v:.4f}' for v in f1)}); final decision delay {delay:.2f}")
    print(json.dumps(table))
    return 0


if __name__ == "__main__":
    sys.exit(main())
