"""``midstream evaluate``: score models on unseen annotated conversations, replayed word by word.

::

    midstream evaluate ../shared/corpora/swda --split val
    midstream evaluate ../shared/corpora/swda --split val --model words.msm --json
    midstream evaluate calls.jsonl --functions-model functions.msm

Every speaker channel is streamed one word at a time through the word model's incremental
decoder, with the word times the corpus carries (MRDA's) weighed by the boundary model
(``--boundary-model``, default the shipped one; ``--no-boundary`` for the word model alone), and
scored on what the stream said at each moment (keys documented in
:mod:`midstream.models._eval_words`). The utterance-function figures (``utterance_functions.*``,
from the shipped function model unless ``--functions-model`` names another, skipped with
``--words-only``) are merged into the same report, including
``utterance_functions.predicted_segmentation.word_accuracy``: whole conversations replayed
through the conversation engine, as a live caller would see them.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

from midstream._errors import InputError
from midstream.corpora import read_corpus
from midstream.models._boundary import BoundaryModel, default_boundary_model_path
from midstream.models._bundle import ModelBundle, default_functions_model_path
from midstream.models._decoder import DecoderConfig
from midstream.models._eval_engine import evaluate_engine
from midstream.models._eval_functions import evaluate_functions
from midstream.models._eval_words import evaluate_words
from midstream.models._functions import FunctionTagger
from midstream.models._wordmodel import WordModel


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "evaluate", help="score models on annotated conversations, streamed word by word",
        description="Replay annotated conversations word by word through the models and "
                    "print disfluency, incremental and segmentation figures.")
    parser.add_argument("corpus", type=Path, help="a corpus folder or a .jsonl file")
    parser.add_argument("--split", default=None, help="read only this split, e.g. val")
    parser.add_argument("--model", type=Path, default=None,
                        help="word model (.msm); default: the shipped one")
    parser.add_argument("--functions-model", type=Path, default=None,
                        help="utterance-function model (.msm); default: the shipped one")
    parser.add_argument("--boundary-model", type=Path, default=None,
                        help="boundary model (.msm, timing evidence for utterance ends); "
                             "default: the shipped one")
    parser.add_argument("--no-boundary", action="store_true",
                        help="decide utterance ends with the word model alone")
    parser.add_argument("--words-only", action="store_true",
                        help="score the word model only (no utterance functions)")
    parser.add_argument("--lag", type=int, default=None,
                        help="open words at most: a word's label becomes final once settled "
                             "(no later word can change it) or this many words late "
                             "(default: the decoder's, 10)")
    parser.add_argument("--no-settle", action="store_true",
                        help="make every label final exactly --lag words late instead")
    parser.add_argument("--limit", type=int, default=0,
                        help="evaluate only the first N conversations (0: all)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.lag is not None and args.lag < 0:
        raise InputError(f"--lag must be >= 0, got {args.lag}")
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
    decoder = DecoderConfig(lag=args.lag, settle=not args.no_settle)
    figures = evaluate_words(conversations, model, config=decoder, progress=True,
                             boundary=boundary)
    if not args.words_only:
        tagger = FunctionTagger.load(args.functions_model or default_functions_model_path())
        figures.update(evaluate_functions(conversations, tagger))
        bundle = ModelBundle(word_model=model, function_tagger=tagger, infos=(),
                             decoder=decoder, boundary_model=boundary)
        figures.update(evaluate_engine(conversations, bundle))
    if args.json:
        clean = {k: (None if isinstance(v, float) and math.isnan(v) else v)
                 for k, v in figures.items()}
        json.dump(clean, sys.stdout, indent=2, sort_keys=True)
        sys.stdout.write("\n")
    else:
        width = max(len(k) for k in figures)
        for key in sorted(figures):
            print(f"{key:<{width}}  {figures[key]:.4f}")
    return 0
