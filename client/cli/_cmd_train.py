"""``midstream train``: train a model on annotated conversations and write a ``.tagger`` file.

::

    midstream train words ../shared/corpora/swda --split train --out words.tagger
    midstream train words ../shared/corpora/swda --split train --out words.tagger \\
        --c1 0.05 0.2 --c2 0.01 0.1 --cv-folds 3 --cv-subset 120
    midstream train functions ../shared/corpora/swda --split train --out functions.tagger

One sub-command per model: ``words`` (disfluency roles and utterance ends, this module),
``functions`` (utterance functions, options from
:mod:`midstream.client.cli._cmd_train_functions`) and ``boundaries`` (timing evidence for
utterance ends, :mod:`midstream.client.cli._cmd_train_boundaries`). Given several
``--c1``/``--c2``/``--min-freq`` values, ``words`` compares every combination by
cross-validation grouped by conversation on a seeded random subset (``--cv-subset``) of the
corpus given, which must be the training split; the best is then trained on all of it. Progress
goes to stderr.
"""

from __future__ import annotations

import argparse
import itertools
import math
import shlex
import sys
import time
from dataclasses import replace
from pathlib import Path

from midstream import Conversation, InputError
from midstream.client.cli import _cmd_train_boundaries as boundaries
from midstream.client.cli import _cmd_train_functions as functions
from midstream.corpora import read_corpus
from midstream.models.training import (
    BIAS_CANDIDATES,
    RESTART_BIAS_CANDIDATES,
    TAG_LABEL,
    BiasResult,
    WordTrainingConfig,
    cross_validate_words,
    save_artifact,
    train_word_artifact,
    tune_tag_bias,
)

#: How much held-out reparandum or utterance-end F1 a restart bias may cost (common practice,
#: no source: about the spread between neighbouring reparandum biases in the model card).
RESTART_GUARD = 0.002


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "train", help="train a model (words, functions or boundaries) on annotated conversations",
        description="Train a model on annotated conversations and write a .tagger model file.")
    tasks = parser.add_subparsers(dest="train_task", required=True, metavar="MODEL")
    words = tasks.add_parser(
        "words", help="the disfluency and utterance-end CRF",
        description="Train the word CRF (disfluency roles crossed with utterance ends) on the "
                    "disfluency-annotated conversations of a corpus.")
    words.add_argument("corpus", type=Path, help="a corpus folder or a .jsonl file")
    words.add_argument("--split", default=None, help="read only this split, e.g. train")
    words.add_argument("--out", type=Path, default=None,
                       help="model file to write (.tagger); required unless --cv-only")
    defaults = WordTrainingConfig()
    words.add_argument("--c1", type=float, nargs="+", default=[defaults.c1],
                       help="L1 weight(s); several values are compared by cross-validation")
    words.add_argument("--c2", type=float, nargs="+", default=[defaults.c2],
                       help="L2 weight(s); several values are compared by cross-validation")
    words.add_argument("--min-freq", type=int, nargs="+", default=[defaults.min_freq],
                       help="drop features seen fewer times (several: compared by CV)")
    words.add_argument("--restart-span", type=int, nargs="+", default=[defaults.restart_span],
                       help="words back the phrase-restart features look (0: off; several: "
                            "compared by CV)")
    words.add_argument("--tag-bias", default=None, metavar="TAG=VALUE[,TAG=VALUE...]",
                       help="constant added to a disfluency tag's score at decoding, stored in "
                            "the model (e.g. rp.ip=0.3; tags: " + ", ".join(sorted(TAG_LABEL))
                            + ")")
    words.add_argument("--right", type=int, default=defaults.right,
                       help="words to the right a feature may read; the server's decoder keeps "
                            "a word open until that many more have arrived")
    words.add_argument("--no-word-classes", action="store_true",
                       help="leave out the closed-class substitution features")
    words.add_argument("--break-ahead", action="store_true",
                       help="add the break-ahead features (where the other speaker next spoke "
                            "within the right context, and the word the speaker stopped at)")
    words.add_argument("--abandon-cues", action="store_true",
                       help="train the abandoned-unit model beside the CRF: the decoder judges "
                            "each predicted utterance end when the speaker's next word arrives "
                            "and revises an abandoned unit's open words to restart (threshold "
                            "chosen by 3-fold cross-validation inside the training data)")
    words.add_argument("--tune-bias", action="store_true",
                       help="choose the reparandum/repair tag bias by cross-validation "
                            "(--cv-folds, --cv-subset, --seed) before training")
    words.add_argument("--tune-restart-bias", action="store_true",
                       help="choose the restart tag bias (rs, rs.ip) by cross-validation on top "
                            "of the --tag-bias given: the best held-out restart F1 among the "
                            "candidates that keep reparandum, EDITED and utterance-end F1 "
                            f"within {RESTART_GUARD} of no restart bias")
    words.add_argument("--cv-only", action="store_true",
                       help="print the cross-validation results and stop (no model written)")
    words.add_argument("--max-iterations", type=int, default=defaults.max_iterations,
                       help="L-BFGS iterations")
    words.add_argument("--cv-folds", type=int, default=3,
                       help="folds for comparing several hyper-parameter values")
    words.add_argument("--cv-subset", type=int, default=120,
                       help="conversations drawn for cross-validation (0: all)")
    words.add_argument("--seed", type=int, default=0, help="seed of the cross-validation draw")
    words.set_defaults(handler=run_words)
    _register_functions(tasks)
    timing = tasks.add_parser(
        "boundaries", help="timing evidence for utterance ends (silences, speaker changes)",
        description="Train the boundary classifier on conversations with word times and choose "
                    "how its evidence joins the word model, by grouped cross-validation.")
    boundaries.add_training_arguments(timing)
    timing.set_defaults(handler=boundaries.run)


def _register_functions(tasks: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = tasks.add_parser(
        "functions", help="the utterance-function CRF",
        description="Train the utterance-function CRF and write a .tagger model file.")
    parser.add_argument("corpus", type=Path, nargs="+",
                        help="corpus folders or .jsonl files; several are pooled")
    parser.add_argument("--split", default=None, help="read only this split of each, e.g. train")
    parser.add_argument("--out", type=Path, required=True, help="model file to write (.tagger)")
    functions.add_training_arguments(parser)
    parser.set_defaults(handler=functions.run)


def _command_line(args: argparse.Namespace) -> str:
    """The effective command, defaults spelled out, to reproduce a model exactly."""
    parts = ["midstream", "train", "words", str(args.corpus)]
    if args.split is not None:
        parts += ["--split", args.split]
    for flag, values in (("--c1", args.c1), ("--c2", args.c2), ("--min-freq", args.min_freq),
                         ("--restart-span", args.restart_span)):
        parts += [flag, *(str(v) for v in values)]
    parts += ["--max-iterations", str(args.max_iterations)]
    if args.right != WordTrainingConfig().right:
        parts += ["--right", str(args.right)]
    if args.no_word_classes:
        parts += ["--no-word-classes"]
    if args.break_ahead:
        parts += ["--break-ahead"]
    if args.abandon_cues:
        parts += ["--abandon-cues"]
    if args.tag_bias is not None:
        parts += ["--tag-bias", args.tag_bias]
    if args.tune_bias:
        parts += ["--tune-bias"]
    if args.tune_restart_bias:
        parts += ["--tune-restart-bias"]
    grid_size = len(args.c1) * len(args.c2) * len(args.min_freq) * len(args.restart_span)
    if args.tune_bias or args.tune_restart_bias or grid_size > 1:
        parts += ["--cv-folds", str(args.cv_folds), "--cv-subset", str(args.cv_subset),
                  "--seed", str(args.seed)]
    parts += ["--out", str(args.out)]
    return " ".join(shlex.quote(p) for p in parts)


def parse_tag_bias(text: str) -> tuple[tuple[str, float], ...]:
    """``rp.ip=0.3,rp=0.1`` as sorted (tag, value) pairs.

    Raises
    ------
    InputError
        An item is not ``TAG=NUMBER``, names an unknown tag, or repeats one.
    """
    pairs: dict[str, float] = {}
    for item in text.split(","):
        tag, sep, value = item.strip().partition("=")
        tag = tag.strip()
        if not sep or not tag:
            raise InputError(f"--tag-bias: {item!r} is not TAG=VALUE")
        if tag not in TAG_LABEL:
            raise InputError(f"--tag-bias: unknown tag {tag!r}; known: "
                             + ", ".join(sorted(TAG_LABEL)))
        if tag in pairs:
            raise InputError(f"--tag-bias: tag {tag!r} given twice")
        try:
            number = float(value)
        except ValueError:
            raise InputError(f"--tag-bias: {value!r} (tag {tag}) is not a number") from None
        if not math.isfinite(number):
            raise InputError(f"--tag-bias: {value!r} (tag {tag}) is not a finite number")
        pairs[tag] = number
    return tuple(sorted(pairs.items()))


def _tune_bias(args: argparse.Namespace, conversations: list[Conversation],
               chosen: WordTrainingConfig, metadata: dict[str, object]) -> WordTrainingConfig:
    results = tune_tag_bias(conversations, chosen, BIAS_CANDIDATES, folds=args.cv_folds,
                            subset=args.cv_subset or None, seed=args.seed, progress=True)
    for result in results:
        shown = ",".join(f"{t}={v:g}" for t, v in result.bias) or "none"
        print(f"bias {shown}: reparandum_no_fragments precision={result.precision:.4f} "
              f"recall={result.recall:.4f} f1={result.f1:.4f}", flush=True)
    best = max(results, key=lambda r: r.f1)
    bias = tuple((t, v) for t, v in best.bias if v != 0.0)
    print("chosen bias " + (",".join(f"{t}={v:g}" for t, v in bias) or "none"), flush=True)
    metadata["bias_cross_validation"] = {
        "folds": args.cv_folds,
        "subset": args.cv_subset,
        "seed": args.seed,
        "objective": "held-out reparandum F1 without fragments, counts pooled over folds",
        "results": [{"bias": dict(r.bias), "precision": round(r.precision, 4),
                     "recall": round(r.recall, 4), "f1": round(r.f1, 4)} for r in results],
    }
    return replace(chosen, tag_bias=bias)


def choose_restart_bias(results: list[BiasResult]) -> BiasResult:
    """The best restart F1 among results within :data:`RESTART_GUARD` of the first one.

    The first result is the candidate without restart bias: the reference whose reparandum,
    EDITED (reparandum and restart words together) and utterance-end F1 the choice must not
    trade away. (EDITED F1 joined the guard after the first cross-validation run, where the
    best restart bias under the other two cost it 0.013.)
    """
    reference = results[0]
    allowed = [r for r in results
               if r.f1 >= reference.f1 - RESTART_GUARD
               and r.edited_f1 >= reference.edited_f1 - RESTART_GUARD
               and r.segmentation_f1 >= reference.segmentation_f1 - RESTART_GUARD]
    return max(allowed, key=lambda r: r.restart_f1)


def _tune_restart_bias(args: argparse.Namespace, conversations: list[Conversation],
                       chosen: WordTrainingConfig,
                       metadata: dict[str, object]) -> WordTrainingConfig:
    fixed = {t: v for t, v in chosen.tag_bias if not t.startswith("rs")}
    candidates = [{**fixed, **c} for c in RESTART_BIAS_CANDIDATES]
    results = tune_tag_bias(conversations, chosen, candidates, folds=args.cv_folds,
                            subset=args.cv_subset or None, seed=args.seed, progress=True)
    for result in results:
        shown = ",".join(f"{t}={v:g}" for t, v in result.bias) or "none"
        print(f"bias {shown}: restart precision={result.restart_precision:.4f} "
              f"recall={result.restart_recall:.4f} f1={result.restart_f1:.4f} "
              f"reparandum_no_fragments f1={result.f1:.4f} edited f1={result.edited_f1:.4f} "
              f"segmentation f1={result.segmentation_f1:.4f}", flush=True)
    best = choose_restart_bias(results)
    bias = tuple((t, v) for t, v in best.bias if v != 0.0)
    print("chosen bias " + (",".join(f"{t}={v:g}" for t, v in bias) or "none"), flush=True)
    metadata["restart_bias_cross_validation"] = {
        "folds": args.cv_folds,
        "subset": args.cv_subset,
        "seed": args.seed,
        "objective": "held-out restart F1 without fragments, among biases keeping reparandum, "
                     f"EDITED and utterance-end F1 within {RESTART_GUARD} of no restart bias",
        "results": [{"bias": dict(r.bias), "restart_f1": round(r.restart_f1, 4),
                     "reparandum_f1": round(r.f1, 4), "edited_f1": round(r.edited_f1, 4),
                     "segmentation_f1": round(r.segmentation_f1, 4)} for r in results],
    }
    return replace(chosen, tag_bias=bias)


def run_words(args: argparse.Namespace) -> int:
    if args.out is None and not args.cv_only:
        raise InputError("--out is required (the model file to write) unless --cv-only")
    if args.cv_folds < 2:
        raise InputError(f"--cv-folds must be at least 2, got {args.cv_folds}")
    if args.right < 0:
        raise InputError(f"--right must be >= 0, got {args.right}")
    if args.tag_bias is not None and args.tune_bias:
        raise InputError("--tag-bias and --tune-bias exclude each other")
    if args.tune_bias and args.tune_restart_bias:
        raise InputError("--tune-restart-bias builds on a fixed --tag-bias, not on --tune-bias")
    tag_bias = () if args.tag_bias is None else parse_tag_bias(args.tag_bias)
    conversations = list(read_corpus(args.corpus, split=args.split))
    if not conversations:
        raise InputError(f"{args.corpus}: no conversations (split {args.split!r})")
    base = WordTrainingConfig(c1=args.c1[0], c2=args.c2[0], min_freq=args.min_freq[0],
                              max_iterations=args.max_iterations,
                              restart_span=args.restart_span[0],
                              tag_bias=tag_bias,
                              word_classes=not args.no_word_classes,
                              break_ahead=args.break_ahead,
                              abandon_cues=args.abandon_cues,
                              right=args.right, left=max(WordTrainingConfig().left,
                                                         args.right + 1))
    grid = [{"c1": c1, "c2": c2, "min_freq": m, "restart_span": r}
            for c1, c2, m, r in itertools.product(args.c1, args.c2, args.min_freq,
                                                  args.restart_span)]
    chosen = base
    metadata: dict[str, object] = {
        "created_by": _command_line(args),
        "corpus": args.corpus.name,
        "split": args.split,
        "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    tuning = args.tune_bias or args.tune_restart_bias
    if len(grid) > 1 or (args.cv_only and not tuning):
        results = cross_validate_words(
            conversations, base, grid=grid, folds=args.cv_folds,
            subset=args.cv_subset or None, seed=args.seed, progress=True)
        for result in results:
            c = result.config
            print(f"cv c1={c.c1} c2={c.c2} min_freq={c.min_freq} "
                  f"restart_span={c.restart_span}: "
                  f"reparandum_f1={result.reparandum_f1:.4f} filler_f1={result.filler_f1:.4f} "
                  f"segmentation_f1={result.segmentation_f1:.4f}", flush=True)
        if args.cv_only and not tuning:
            return 0
        best = max(results, key=lambda r: r.objective)
        chosen = best.config
        print(f"chosen c1={chosen.c1} c2={chosen.c2} min_freq={chosen.min_freq} "
              f"restart_span={chosen.restart_span}", flush=True)
        metadata["cross_validation"] = {
            "folds": args.cv_folds,
            "subset": args.cv_subset,
            "seed": args.seed,
            "objective": "mean of offline reparandum F1 and utterance-end F1",
            "results": [
                {"c1": r.config.c1, "c2": r.config.c2, "min_freq": r.config.min_freq,
                 "restart_span": r.config.restart_span,
                 "reparandum_f1": round(r.reparandum_f1, 4), "filler_f1": round(r.filler_f1, 4),
                 "segmentation_f1": round(r.segmentation_f1, 4)}
                for r in results
            ],
        }
    if args.tune_bias:
        chosen = _tune_bias(args, conversations, chosen, metadata)
    if args.tune_restart_bias:
        chosen = _tune_restart_bias(args, conversations, chosen, metadata)
    if tuning and args.cv_only:
        return 0
    print(f"training on {len(conversations)} conversations "
          f"(c1={chosen.c1} c2={chosen.c2} min_freq={chosen.min_freq})", file=sys.stderr,
          flush=True)
    artifact = train_word_artifact(conversations, chosen, metadata=metadata)
    save_artifact(artifact, args.out)
    summary = artifact.metadata.get("training_data", {})
    print(f"wrote {args.out} ({args.out.stat().st_size:,} bytes; "
          f"{summary.get('words', 0):,} words, {summary.get('training_seconds', 0)} s)")
    return 0
