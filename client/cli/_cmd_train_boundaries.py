"""Options and handler of ``midstream train boundaries`` (timing evidence for utterance ends).

::

    midstream train boundaries ../shared/corpora/mrda --split train --c1 0.1 0.5 \\
        --weight 1 1.5 2 --offset 1 2 3 --cv-folds 3 --seed 0 --out boundaries.tagger

Given several values of ``--c1``, ``--weight`` or ``--offset`` (or ``--cv-only``), every
combination is compared by cross-validation
grouped by conversation on the corpus given (which must be a training split): the classifier is
trained on the other folds, and each held-out channel is decoded whole by the word model
(``--words-model``, default the shipped one) with the evidence joined to its end tags; the
combination with the best pooled utterance-end F1 is then trained on the whole corpus. With one
value of each, that model is trained at once (settings chosen by an earlier run). Only words
with times teach the model anything (of the corpora here, MRDA's). Progress goes to stderr.
"""

from __future__ import annotations

import argparse
import hashlib
import shlex
import sys
import time
from dataclasses import replace
from pathlib import Path

from midstream import Conversation, InputError
from midstream.corpora import read_corpus
from midstream.models import WordModel, default_words_model_path
from midstream.models.training import (
    BoundaryConfig,
    BoundaryTrainingConfig,
    cross_validate_boundaries,
    save_artifact,
    train_boundary_artifact,
)


def add_training_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the boundary model's training options to ``parser``."""
    defaults = BoundaryTrainingConfig()
    parser.add_argument("corpus", type=Path, help="a corpus folder or a .jsonl file with word "
                                                  "times")
    parser.add_argument("--split", default=None, help="read only this split, e.g. train")
    parser.add_argument("--out", type=Path, default=None,
                        help="model file to write (.tagger); required unless --cv-only")
    parser.add_argument("--words-model", type=Path, default=None,
                        help="word model the evidence joins while choosing --weight and "
                             "--offset (default: the shipped one)")
    parser.add_argument("--c1", type=float, nargs="+", default=[defaults.c1],
                        help="L1 weight(s) of the classifier (several: compared by CV)")
    parser.add_argument("--c2", type=float, default=defaults.c2, help="L2 weight")
    parser.add_argument("--min-freq", type=int, default=defaults.min_freq,
                        help="drop features seen fewer times in training")
    parser.add_argument("--max-iterations", type=int, default=defaults.max_iterations)
    parser.add_argument("--weight", type=float, nargs="+", default=[1.0],
                        help="scale(s) of the classifier's log-odds where it joins the word "
                             "model (several: compared by CV)")
    parser.add_argument("--offset", type=float, nargs="+", default=[0.0],
                        help="constant(s) added to the joined evidence (several: compared "
                             "by CV)")
    parser.add_argument("--no-lexical", action="store_true",
                        help="leave out the word-identity features (timing and turns only)")
    parser.add_argument("--cv-folds", type=int, default=3, help="folds, grouped by conversation")
    parser.add_argument("--seed", type=int, default=0, help="seed of the fold draw")
    parser.add_argument("--cv-only", action="store_true",
                        help="print the cross-validation results and stop (no model written)")


def _command_line(args: argparse.Namespace) -> str:
    parts = ["midstream", "train", "boundaries", str(args.corpus)]
    if args.split is not None:
        parts += ["--split", args.split]
    if args.words_model is not None:
        parts += ["--words-model", str(args.words_model)]
    parts += ["--c1", *map(str, args.c1), "--c2", str(args.c2), "--min-freq",
              str(args.min_freq), "--max-iterations", str(args.max_iterations),
              "--weight", *map(str, args.weight), "--offset", *map(str, args.offset),
              "--cv-folds", str(args.cv_folds), "--seed", str(args.seed)]
    if args.no_lexical:
        parts.append("--no-lexical")
    if args.out is not None:
        parts += ["--out", str(args.out)]
    return " ".join(shlex.quote(p) for p in parts)


def run(args: argparse.Namespace) -> int:
    if args.out is None and not args.cv_only:
        raise InputError("--out is required (the model file to write) unless --cv-only")
    if args.cv_folds < 2:
        raise InputError(f"--cv-folds must be at least 2, got {args.cv_folds}")
    conversations = list(read_corpus(args.corpus, split=args.split))
    if not conversations:
        raise InputError(f"{args.corpus}: no conversations (split {args.split!r})")
    words_path = args.words_model or default_words_model_path()
    words = WordModel.load(words_path)
    results: list[dict[str, float]] = []
    single = len(args.c1) == len(args.weight) == len(args.offset) == 1
    if single and not args.cv_only:
        # Nothing to choose between: the settings were chosen before (by a --cv-only run).
        return _train(args, conversations, words_path,
                      chosen=(args.c1[0], args.weight[0], args.offset[0]), results=results)
    for c1 in args.c1:
        config = BoundaryTrainingConfig(c1=c1, c2=args.c2, min_freq=args.min_freq,
                                        max_iterations=args.max_iterations,
                                        lexical=not args.no_lexical)
        print(f"cross-validating c1={c1} ({args.cv_folds} folds)", file=sys.stderr, flush=True)
        counts = cross_validate_boundaries(
            conversations, words, config, weights=args.weight, offsets=args.offset,
            folds=args.cv_folds, seed=args.seed)
        for (weight, offset), tally in sorted(counts.items()):
            results.append({"c1": c1, "weight": weight, "offset": offset,
                            "precision": round(tally.precision, 4),
                            "recall": round(tally.recall, 4), "f1": round(tally.f1, 4)})
            print(f"cv c1={c1} weight={weight:g} offset={offset:g}: utterance_end "
                  f"precision={tally.precision:.4f} recall={tally.recall:.4f} "
                  f"f1={tally.f1:.4f}", flush=True)
    best = max((r for r in results if r["weight"] > 0 or r["offset"] != 0), key=lambda r: r["f1"],
               default=None)
    if best is None:
        raise InputError("no candidate joins the evidence: give a --weight above 0")
    print(f"chosen c1={best['c1']:g} weight={best['weight']:g} offset={best['offset']:g}",
          flush=True)
    if args.cv_only:
        return 0
    return _train(args, conversations, words_path,
                  chosen=(best["c1"], best["weight"], best["offset"]), results=results)


def _train(args: argparse.Namespace, conversations: list[Conversation], words_path: Path, *,
           chosen: tuple[float, float, float], results: list[dict[str, float]]) -> int:
    c1, weight, offset = chosen
    config = BoundaryTrainingConfig(c1=c1, c2=args.c2, min_freq=args.min_freq,
                                    max_iterations=args.max_iterations,
                                    lexical=not args.no_lexical)
    metadata: dict[str, object] = {
        "created_by": _command_line(args),
        "corpus": args.corpus.name,
        "split": args.split,
        "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "words_model_sha256": hashlib.sha256(words_path.read_bytes()).hexdigest(),
    }
    if results:
        metadata["cross_validation"] = {
            "folds": args.cv_folds, "seed": args.seed,
            "objective": "held-out utterance-end F1 of the word model with the evidence "
                         "joined, whole channels decoded, counts pooled over folds",
            "results": results,
        }
    print(f"training on {len(conversations)} conversations (c1={c1:g})",
          file=sys.stderr, flush=True)
    started = time.perf_counter()
    artifact = train_boundary_artifact(
        conversations, config,
        join=BoundaryConfig(weight=weight, offset=offset, lexical=not args.no_lexical),
        metadata=metadata)
    seconds = round(time.perf_counter() - started, 1)
    artifact = replace(artifact, metadata={**artifact.metadata, "training_seconds": seconds})
    save_artifact(artifact, args.out)
    print(f"wrote {args.out} ({args.out.stat().st_size:,} bytes; "
          f"{artifact.metadata.get('examples', 0):,} timed words, {seconds} s)")
    return 0
