"""Options and handler of ``midstream train functions`` (the utterance-function CRF).

::

    midstream train functions ../shared/corpora/swda --split train --scheme swbd42 \\
        --augment 0.5 --c1 0.1 0.3 --c2 0.01 --cv-folds 3 --cv-subset 300 \\
        --out functions-swbd42.tagger
    midstream train functions my_calls.jsonl --scheme coarse --out functions-coarse.tagger
    midstream train functions ../shared/corpora/swda ../shared/corpora/mrda \\
        ../shared/corpora/maptask --split train --scheme coarse --partner-features \\
        --oversample clarification_request=0 clarification_request=3 --out functions-coarse.tagger

``midstream train`` (:mod:`midstream.client.cli._cmd_train`) registers the sub-command with
:func:`add_training_arguments` and :func:`run`. The corpus is anything
:func:`midstream.corpora.read_corpus` reads (SwDA, MRDA, Map Task, or Midstream JSON Lines of your
own transcripts); several corpora are pooled, and with ``--setting-features on`` each is learnt as
a conversation setting a caller can name (``serve --setting``). Given several
``--c1``/``--c2``/``--oversample``/``--setting-features`` values, the combinations are compared by
conversation-grouped cross-validation on the first ``--cv-subset`` conversations (by id) of each
corpus given (or the ``--cv-share`` fraction of each, which keeps the final training's mix of
corpora), which must be training splits; the best is then trained on all of them. The score of a
combination is, for one corpus, the mean of its gold-segmentation accuracy in the model's own
scheme and its coarse accuracy after three received words; for pooled corpora, the mean over the
corpora of coarse accuracy, coarse macro-F1 over the classes the fold has at least
:data:`MIN_SCORED_SUPPORT` gold utterances of (gold segmentation: so that a corpus's rare classes
count, and every corpus as much as another however many utterances it has, while a class a fold
holds two of does not decide the grid by chance) and the streamed coarse accuracy after three
received words (what a live caller gets: a setting that helps whole conversations can hurt the
bounded window a stream is labelled over).
"""

from __future__ import annotations

import argparse
import itertools
import math
import shlex
import sys
import time
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import TextIO

from midstream import Conversation, InputError
from midstream.corpora import read_corpus
from midstream.models import FunctionTagger
from midstream.models.evaluation import evaluate_functions
from midstream.models.training import (
    SCHEMES,
    FunctionFeatureConfig,
    FunctionTrainingOptions,
    ModelArtifact,
    Scorer,
    cross_validate_biases,
    save_artifact,
    train_function_model,
)


def add_training_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the function model's training options to ``parser``."""
    defaults = FunctionTrainingOptions()
    parser.add_argument("--scheme", choices=SCHEMES, default=defaults.scheme,
                        help="label set: coarse functions, or SWBD-DAMSL 42 classes (SwDA only)")
    parser.add_argument("--c1", type=float, nargs="+", default=[defaults.c1],
                        help="L1 weight(s); several values are compared by cross-validation")
    parser.add_argument("--c2", type=float, nargs="+", default=[defaults.c2],
                        help="L2 weight(s); several values are compared by cross-validation")
    parser.add_argument("--min-freq", type=int, default=defaults.min_freq,
                        help="drop features seen fewer times in training")
    parser.add_argument("--max-iterations", type=int, default=defaults.max_iterations)
    parser.add_argument("--augment", type=float, default=defaults.augment,
                        help="share of utterances cut to a random prefix in an augmented copy")
    parser.add_argument("--seed", type=int, default=defaults.seed)
    parser.add_argument("--partner-features", action="store_true",
                        help="features of how an utterance echoes the partner's just before it "
                             "(repeated words and numbers, short replies, alternatives)")
    parser.add_argument("--opening-features", nargs="+", choices=("off", "on"), default=["off"],
                        help="a feature naming a filler or editing term that opened the "
                             "utterance and was cleaned away (\"sorry\"); 'off on' compares "
                             "both by cross-validation")
    parser.add_argument("--lookback-features", nargs="+", choices=("off", "on"),
                        default=["off"],
                        help="with --partner-features: the partner features also against the "
                             "last utterance of another speaker when the previous one is the "
                             "speaker's own; 'off on' compares both by cross-validation")
    parser.add_argument("--timing-features", nargs="+", choices=("off", "on"),
                        default=["off"],
                        help="when the words carry times: how an utterance starts against the "
                             "other speakers' talk (overlap, gap), alone and with the words of a "
                             "short utterance; 'off on' compares both by cross-validation")
    parser.add_argument("--decode-bias", nargs="+", default=[""],
                        metavar="LABEL=SHIFT[,LABEL=SHIFT...]",
                        help="constant added to a label's score at every utterance after "
                             "training (several values are compared by cross-validation; each "
                             "fold's model is trained once and scored with every value)")
    parser.add_argument("--oversample", nargs="+", default=[""],
                        metavar="LABEL=COPIES[,LABEL=COPIES...]",
                        help="extra copies of a short window around each utterance of a label "
                             "(several values are compared by cross-validation)")
    parser.add_argument("--balance-corpora", nargs="+", choices=("off", "on"), default=["off"],
                        help="train on each pooled corpus about as many utterances as on the "
                             "largest, by repeating the smaller ones (both values: compared by "
                             "cross-validation)")
    parser.add_argument("--setting-features", nargs="+", choices=("off", "on"),
                        default=["off"],
                        help="learn each corpus as a conversation setting a caller can name "
                             "(shared features plus a copy per corpus; both values: compared "
                             "by cross-validation, each corpus scored in its own setting)")
    parser.add_argument("--cv-folds", type=int, default=3,
                        help="folds for comparing several --c1/--c2 values")
    parser.add_argument("--cv-subset", type=int, default=300,
                        help="conversations (first by id) of each corpus used for "
                             "cross-validation (0: all)")
    parser.add_argument("--cv-share", type=float, default=None, metavar="FRACTION",
                        help="instead of --cv-subset: this fraction (0 < F <= 1) of each "
                             "corpus's conversations (first by id), so that the folds mix the "
                             "corpora as the final training does")


def _cv_score(scheme: str) -> Scorer:
    def score(tagger: FunctionTagger, held: Sequence[Conversation]) -> dict[str, float]:
        figures = evaluate_functions(held, tagger)
        own = figures[f"utterance_functions.gold_segmentation.{scheme}.accuracy"]
        early = figures["utterance_functions.accuracy_after_words.3"]
        return {"accuracy": own, "after_3": early, "score": (own + early) / 2}
    return score


def train_from_args(args: argparse.Namespace, conversations: Sequence[Conversation],
                    *, out: TextIO | None = None) -> ModelArtifact:
    """Choose hyper-parameters (if several are given) and train on ``conversations``.

    Cross-validation progress goes to ``out`` (standard output when ``None``).
    """
    out = out if out is not None else sys.stdout
    if not conversations:
        raise InputError("the corpus holds no conversations to train on")
    samplings = [parse_oversample(value) for value in args.oversample]
    biases = [parse_decode_bias(value) for value in args.decode_bias]
    base = FunctionTrainingOptions(
        scheme=args.scheme, c1=args.c1[0], c2=args.c2[0], min_freq=args.min_freq,
        max_iterations=args.max_iterations, augment=args.augment, seed=args.seed,
        config=FunctionFeatureConfig(partner=args.partner_features,
                                     opening=args.opening_features[0] == "on",
                                     lookback=args.lookback_features[0] == "on",
                                     timing=args.timing_features[0] == "on"),
        oversample=samplings[0], balance=args.balance_corpora[0] == "on",
        decode_bias=biases[0], setting_features=args.setting_features[0] == "on")
    grid = list(itertools.product(args.c1, args.c2, samplings, args.opening_features,
                                  args.lookback_features, args.balance_corpora,
                                  args.setting_features, args.timing_features))
    chosen = base
    cv: dict[str, object] = {}
    if len(grid) * len(biases) > 1:
        if args.cv_folds < 2:
            raise InputError(f"--cv-folds must be at least 2, got {args.cv_folds}")
        corpora = sorted({c.corpus for c in conversations})
        subset = cv_subset(conversations, count=args.cv_subset, share=args.cv_share)
        score = (_cv_score(args.scheme if args.scheme == "swbd42" else "coarse")
                 if len(corpora) == 1 else _pooled_score(corpora))
        best = -1.0
        for c1, c2, sampling, opening, lookback, balance, setting, timing in grid:
            config = FunctionFeatureConfig(partner=args.partner_features,
                                           opening=opening == "on", lookback=lookback == "on",
                                           timing=timing == "on")
            options = FunctionTrainingOptions(**{**_fields(base), "c1": c1, "c2": c2,
                                                 "oversample": sampling, "config": config,
                                                 "balance": balance == "on",
                                                 "setting_features": setting == "on"})
            results = cross_validate_biases(subset, options, biases, folds=args.cv_folds,
                                            score=score)
            for bias, figures in zip(biases, results, strict=True):
                name = f"c1={c1},c2={c2}" + (
                    f",oversample={_oversample_text(sampling)}" if sampling else "") + (
                    ",opening=on" if opening == "on" else "") + (
                    ",lookback=on" if lookback == "on" else "") + (
                    ",balance=on" if balance == "on" else "") + (
                    ",settings=on" if setting == "on" else "") + (
                    ",timing=on" if timing == "on" else "") + (
                    f",decode_bias={_bias_text(bias)}" if bias else "")
                print(f"cv {name}: " + " ".join(
                    f"{k}={v:.4f}" for k, v in figures.items()), file=out, flush=True)
                cv[name] = {k: None if math.isnan(v) else round(v, 4) for k, v in figures.items()}
                if figures["score"] > best:
                    best, chosen = figures["score"], replace(options, decode_bias=bias)
        print(f"chosen c1={chosen.c1} c2={chosen.c2} "
              f"oversample={_oversample_text(chosen.oversample) or '-'} "
              f"opening={'on' if chosen.config.opening else 'off'} "
              f"lookback={'on' if chosen.config.lookback else 'off'} "
              f"balance={'on' if chosen.balance else 'off'} "
              f"settings={'on' if chosen.setting_features else 'off'} "
              f"timing={'on' if chosen.config.timing else 'off'} "
              f"decode_bias={_bias_text(chosen.decode_bias) or '-'}", file=out, flush=True)
    command = "midstream " + " ".join(shlex.quote(a) for a in sys.argv[1:])
    artifact = train_function_model(conversations, chosen, command=command)
    if cv:
        metadata = dict(artifact.metadata)
        metadata["cross_validation"] = {"folds": args.cv_folds,
                                        "subset": args.cv_subset, "share": args.cv_share,
                                        "grid": cv}
        artifact = ModelArtifact(kind=artifact.kind, labels=artifact.labels, crf=artifact.crf,
                                 features=artifact.features,
                                 hyper_parameters=artifact.hyper_parameters, metadata=metadata)
    return artifact


def cv_subset(conversations: Sequence[Conversation], *, count: int,
              share: float | None) -> list[Conversation]:
    """The conversations a grid cross-validates on: of each corpus, the first ``count`` by id
    (0: all), or with ``share`` that fraction of them (at least one).

    A fixed count per corpus mixes the corpora unlike the final training when their
    conversations differ in length (an MRDA meeting holds about nine SwDA conversations'
    utterances); a share keeps the final training's mix.

    Raises
    ------
    InputError
        ``share`` outside (0, 1].
    """
    if share is not None and not 0.0 < share <= 1.0:
        raise InputError(f"--cv-share must be above 0 and at most 1, got {share}")
    subset: list[Conversation] = []
    for corpus in sorted({c.corpus for c in conversations}):
        some = sorted((c for c in conversations if c.corpus == corpus), key=lambda c: c.id)
        if share is not None:
            subset += some[:max(1, round(share * len(some)))]
        else:
            subset += some[:count] if count else some
    return subset


#: Fewest gold utterances of a class in one corpus's held-out fold for its F1 to count in the
#: cross-validation score. Below it one utterance moves the class's F1 by 0.05 or more, so a
#: class a corpus hardly has (SwDA's clarification requests: one to three per fold) would
#: decide the grid by chance. Common practice, no source; the value is a round number, not
#: tuned.
MIN_SCORED_SUPPORT = 20


def supported_macro_f1(figures: Mapping[str, float], prefix: str,
                       min_support: int = MIN_SCORED_SUPPORT) -> float:
    """Mean F1 over the classes with at least ``min_support`` gold utterances under ``prefix``.

    A class predicted but (almost) never gold is left out too: its false alarms already cost
    accuracy, and its F1 is as noisy as a rare class's. With no class that common the result is
    the plain macro-F1.

    Examples
    --------
    >>> f = {"x.macro_f1": 0.5, "x.per_class.a.f1": 0.8, "x.per_class.a.support": 30.0,
    ...      "x.per_class.b.f1": 0.2, "x.per_class.b.support": 2.0}
    >>> supported_macro_f1(f, "x")
    0.8
    """
    head = f"{prefix}.per_class."
    scored = [figures[f"{head}{label}.f1"]
              for label in (name[len(head):-len(".support")] for name in figures
                            if name.startswith(head) and name.endswith(".support"))
              if figures[f"{head}{label}.support"] >= min_support]
    return sum(scored) / len(scored) if scored else figures[f"{prefix}.macro_f1"]


def _pooled_score(corpora: Sequence[str]) -> Scorer:
    def score(tagger: FunctionTagger, held: Sequence[Conversation]) -> dict[str, float]:
        result: dict[str, float] = {}
        parts: list[float] = []
        prefix = "utterance_functions.gold_segmentation.coarse"
        for corpus in corpora:
            mine = [c for c in held if c.corpus == corpus]
            if not mine:
                continue
            # A model that learnt the corpora as settings is scored as a caller naming the
            # conversation's setting uses it; its shared weights alone are reported beside.
            own = tagger.for_setting(corpus) if corpus in tagger.settings else tagger
            figures = evaluate_functions(mine, own)
            if own is not tagger:
                shared = evaluate_functions(mine, tagger, replay=False)
                result[f"{corpus}.shared_accuracy"] = shared[f"{prefix}.accuracy"]
            accuracy = figures[f"{prefix}.accuracy"]
            macro = figures[f"{prefix}.macro_f1"]
            supported = supported_macro_f1(figures, prefix)
            early = figures["utterance_functions.accuracy_after_words.3"]
            result[f"{corpus}.accuracy"] = accuracy
            result[f"{corpus}.macro_f1"] = macro
            result[f"{corpus}.supported_macro_f1"] = supported
            result[f"{corpus}.after_3"] = early
            for label in ("question", "clarification_request"):
                result[f"{corpus}.{label}_f1"] = figures.get(
                    f"{prefix}.per_class.{label}.f1", 0.0)
            parts += [accuracy, supported, early]
        result["score"] = sum(parts) / len(parts) if parts else 0.0
        return result
    return score


def parse_oversample(text: str) -> tuple[tuple[str, int], ...]:
    """``"label=copies,label=copies"`` (empty: none) as :class:`FunctionTrainingOptions` takes it.

    Examples
    --------
    >>> parse_oversample("clarification_request=3")
    (('clarification_request', 3),)
    """
    pairs: list[tuple[str, int]] = []
    for part in filter(None, text.split(",")):
        label, sep, copies = part.partition("=")
        if not sep or not label or not copies.isdigit():
            raise InputError(f"--oversample {part!r}: expected LABEL=COPIES, e.g. "
                             "clarification_request=3")
        if int(copies):
            pairs.append((label, int(copies)))
    return tuple(pairs)


def parse_decode_bias(text: str) -> tuple[tuple[str, float], ...]:
    """``"label=shift,label=shift"`` (empty: none) as :class:`FunctionTrainingOptions` takes it.

    Examples
    --------
    >>> parse_decode_bias("clarification_request=1.5,question=0.5")
    (('clarification_request', 1.5), ('question', 0.5))
    """
    pairs: list[tuple[str, float]] = []
    for part in filter(None, text.split(",")):
        label, sep, shift = part.partition("=")
        try:
            value = float(shift)
        except ValueError:
            value = math.nan
        if not sep or not label or not math.isfinite(value):
            raise InputError(f"--decode-bias {part!r}: expected LABEL=SHIFT, e.g. "
                             "clarification_request=1.5")
        if value:
            pairs.append((label, value))
    return tuple(pairs)


def _bias_text(pairs: Sequence[tuple[str, float]]) -> str:
    return ",".join(f"{label}={shift:g}" for label, shift in pairs)


def _oversample_text(pairs: Sequence[tuple[str, int]]) -> str:
    return ",".join(f"{label}={copies}" for label, copies in pairs)


def _fields(options: FunctionTrainingOptions) -> dict[str, object]:
    return {name: getattr(options, name) for name in options.__dataclass_fields__}


def run(args: argparse.Namespace) -> int:
    """Handler of ``midstream train functions``: read, choose, train, write ``args.out``."""
    started = time.monotonic()
    conversations = [c for corpus in args.corpus for c in read_corpus(corpus, split=args.split)]
    artifact = train_from_args(args, conversations)
    save_artifact(artifact, args.out)
    size = args.out.stat().st_size
    print(f"wrote {args.out} ({size / 1e6:.1f} MB, {len(artifact.labels)} labels, "
          f"{time.monotonic() - started:.0f} s)")
    return 0
