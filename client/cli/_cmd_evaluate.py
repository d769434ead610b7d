"""``midstream evaluate``: score models on unseen annotated conversations, replayed word by word.

::

    midstream evaluate ../shared/corpora/swda --split val
    midstream evaluate ../shared/corpora/swda --split val --model words.tagger --json
    midstream evaluate calls.jsonl --functions-model functions.tagger

Every speaker channel is streamed one word at a time through the word model's incremental
decoder, with the word times the corpus carries (MRDA's) weighed by the boundary model
(``--boundary-model``, default the shipped one; ``--no-boundary`` for the word model alone), and
scored on what the stream said at each moment (keys documented in
:mod:`midstream.models.words._eval`). The utterance-function figures (``utterance_functions.*``,
from the shipped function model unless ``--functions-model`` names another, skipped with
``--words-only``) are merged into the same report, including
``utterance_functions.predicted_segmentation.word_accuracy``: whole conversations replayed
through the conversation engine, as a live caller would see them. With the shipped models the
coarse figures are the coarse model's and the ``...swbd42`` figures the 42-class model's;
``--functions-only`` skips the word model's figures. ``--setting NAME`` labels the utterance
functions (both kinds of figures) as conversations of that setting, one the coarse function
model learnt apart, and ``--json`` then records it as ``"setting"``. People get the figures as
titled tables (:mod:`midstream.client.cli._figures`), scripts every key with ``--json``.

``--as-recognised`` feeds the words as a speech recogniser would: without the word fragments
transcribers write ("th-"), and with ``--word-error-rate R`` also with seeded substitutions,
deletions and insertions (proportions and how gold labels follow them:
:mod:`midstream.models._recogniser`; ``--error-seed`` picks the draw).
The runs ``swda-val-recognised-*`` of ``scripts/figures.py`` give the model cards' tables at
0 %, 10 % and 20 % errors.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

from midstream import InputError, NotFoundError
from midstream.client.cli._common import add_setting_option
from midstream.client.cli._figures import format_figures
from midstream.corpora import read_corpus
from midstream.models import (
    BoundaryModel,
    DecoderConfig,
    FunctionTagger,
    ModelBundle,
    WordModel,
    default_boundary_model_path,
    default_functions_model_path,
)
from midstream.models.evaluation import (
    RecogniserConditions,
    as_recognised,
    evaluate_engine,
    evaluate_functions,
    evaluate_words,
)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "evaluate", help="score models on annotated conversations, streamed word by word",
        description="Replay annotated conversations word by word through the models and "
                    "print disfluency, incremental and segmentation figures.")
    parser.add_argument("corpus", type=Path, help="a corpus folder or a .jsonl file")
    parser.add_argument("--split", default=None, help="read only this split, e.g. val")
    parser.add_argument("--model", type=Path, default=None,
                        help="word model (.tagger); default: the shipped one")
    parser.add_argument("--functions-model", type=Path, default=None,
                        help="utterance-function model (.tagger); default: the shipped one")
    add_setting_option(parser)
    parser.add_argument("--boundary-model", type=Path, default=None,
                        help="boundary model (.tagger, timing evidence for utterance ends); "
                             "default: the shipped one")
    parser.add_argument("--no-boundary", action="store_true",
                        help="decide utterance ends with the word model alone")
    parser.add_argument("--words-only", action="store_true",
                        help="score the word model only (no utterance functions)")
    parser.add_argument("--functions-only", action="store_true",
                        help="score the utterance functions only (no disfluency figures)")
    parser.add_argument("--lag", type=int, default=None,
                        help="open words at most: a word's label becomes final once settled "
                             "(no later word can change it) or this many words late "
                             "(default: the decoder's, 10)")
    parser.add_argument("--no-settle", action="store_true",
                        help="make every label final exactly --lag words late instead")
    parser.add_argument("--as-recognised", action="store_true",
                        help="feed the words as a recogniser would: no word fragments, and "
                             "the recogniser's clock ticking through every silence of timed "
                             "words (utterances close during a silence, as live)")
    parser.add_argument("--word-error-rate", type=float, default=0.0, metavar="R",
                        help="with --as-recognised: seed word errors at this rate per word "
                             "(0 to 1; substitutions, deletions, insertions 60/25/15)")
    parser.add_argument("--error-seed", type=int, default=0,
                        help="seed of the word-error draws (default 0)")
    parser.add_argument("--limit", type=int, default=0,
                        help="evaluate only the first N conversations (0: all)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.lag is not None and args.lag < 0:
        raise InputError(f"--lag must be >= 0, got {args.lag}")
    if not 0.0 <= args.word_error_rate <= 1.0:
        raise InputError(f"--word-error-rate must be in [0, 1], got {args.word_error_rate}")
    if args.word_error_rate and not args.as_recognised:
        raise InputError("--word-error-rate needs --as-recognised")
    model = WordModel.load(args.model)
    if args.no_boundary and args.boundary_model is not None:
        raise InputError("--boundary-model and --no-boundary exclude each other")
    boundary = None
    if args.boundary_model is not None or (
            not args.no_boundary and default_boundary_model_path().exists()):
        boundary = BoundaryModel.load(args.boundary_model)
    conversations = list(read_corpus(args.corpus, split=args.split))
    if args.limit:
        conversations = conversations[: args.limit]
    if not conversations:
        raise InputError(f"{args.corpus}: no conversations (split {args.split!r})")
    if args.words_only and args.functions_only:
        raise InputError("--words-only and --functions-only exclude each other")
    decoder = DecoderConfig(lag=args.lag, settle=not args.no_settle)
    bundle = None
    if not args.words_only:
        # Before the word figures, which take minutes: an unknown setting is refused at once.
        fine, coarse = _function_taggers(args.functions_model)
        bundle = ModelBundle(word_model=model, function_tagger=fine, infos=(),
                             decoder=decoder,
                             coarse_tagger=None if fine is coarse else coarse,
                             boundary_model=boundary).with_setting(args.setting)
    elif args.setting is not None:
        raise InputError("--setting names how utterance functions are labelled: it needs "
                         "the function figures, which --words-only leaves out")
    if args.as_recognised:
        conditions = RecogniserConditions(word_error_rate=args.word_error_rate,
                                          seed=args.error_seed)
        conversations = [as_recognised(c, conditions) for c in conversations]
    figures: dict[str, float] = {}
    if not args.functions_only:
        figures.update(evaluate_words(conversations, model, config=decoder, progress=True,
                                      boundary=boundary, ticks=args.as_recognised))
    if bundle is not None:
        fine, coarse = bundle.function_tagger, bundle.coarse_tagger
        figures.update(evaluate_functions(conversations, coarse))
        if fine is not coarse:
            fine_figures = evaluate_functions(conversations, fine, replay=False)
            figures.update({k: v for k, v in fine_figures.items() if ".swbd42." in k})
        figures.update(evaluate_engine(conversations, bundle, ticks=args.as_recognised))
    if args.json:
        clean: dict[str, float | str | None] = {
            k: (None if isinstance(v, float) and math.isnan(v) else v)
            for k, v in figures.items()}
        if args.setting is not None:
            # Only when named, so the output of a run without one keeps the keys it always had.
            clean["setting"] = args.setting
        json.dump(clean, sys.stdout, indent=2, sort_keys=True)
        sys.stdout.write("\n")
    else:
        split = f", split {args.split}" if args.split else ""
        count = len(conversations)
        setting = (f"; utterance functions labelled in setting {args.setting!r}"
                   if args.setting is not None else "")
        print(f"{count} conversation{'s' if count != 1 else ''} of {args.corpus}{split}, "
              f"replayed word by word{setting}; --json gives every figure by key\n")
        print(format_figures(figures))
    return 0


def _function_taggers(path: Path | None) -> tuple[FunctionTagger, FunctionTagger]:
    """The fine and the coarse tagger: both the one named, or the shipped ones."""
    if path is not None:
        tagger = FunctionTagger.load(path)
        return tagger, tagger
    fine = FunctionTagger.load(default_functions_model_path())
    try:
        coarse = FunctionTagger.load(default_functions_model_path("coarse"))
    except NotFoundError:
        return fine, fine
    return fine, coarse
