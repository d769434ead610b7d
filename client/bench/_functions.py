"""Benchmark the utterance-function tagger's per-word cost and the model's load time.

Replays SwDA validation utterances word by word through ``FunctionTagger.label_partial`` (what
the streaming engine does after every word) and prints microseconds per call (median and mean)
beside two baselines measured in the same run: the crfsuite decoding path ``label_partial`` used
before (Viterbi and marginals over the whole window through python-crfsuite, kept privately as
the reference), and computing the current utterance's features alone. The paths take turns over
several rounds, each round with a freshly built tagger (cold caches, as a new conversation has),
so load from other processes hits both alike; the CPU time of the timing thread is printed too,
being less sensitive to that load. Also prints the model's load time (target: at most 1 s) and
checks that both paths gave the same labels.

With ``--coarse PATH`` it also times what the engine does per word when a coarse-function model
serves beside the fine one: both taggers' ``label_partial`` on each call, against the fine
tagger's alone in the same rounds, and prints the ratio (the cost the second CRF adds); then the
whole engine (shipped word model, ``ConversationEngine.add_word`` over the same conversations'
words) with and without the coarse model, rounds alternating, CPU time per word and the ratio.

::

    midstream bench functions [--model PATH] [--conversations 5] [--rounds 3]
    midstream bench functions --coarse models/weights/functions-coarse.tagger
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable
from pathlib import Path

from midstream import Conversation
from midstream.client.bench._kit import WEIGHTS, Paired, corpora_root, write_json
from midstream.corpora import read_corpus
from midstream.models import FunctionTagger, ModelBundle
from midstream.models.probes import UtteranceView, clean_view, utterance_features
from midstream.models.training import load_artifact

Call = tuple[list[UtteranceView], UtteranceView]


def _label_new(tagger: FunctionTagger, context: list[UtteranceView],
               current: UtteranceView) -> str:
    return tagger.label_partial(context, current).label


def _label_crfsuite(tagger: FunctionTagger, context: list[UtteranceView],
                    current: UtteranceView) -> str:
    # The old label_partial was this plus building the guess from the marginals' dict.
    label, marginals = tagger._label_partial_crfsuite(context, current)
    tagger._guess(label, marginals)
    return label


def _time(label: Callable[[FunctionTagger, list[UtteranceView], UtteranceView], str],
          tagger: FunctionTagger, calls: list[Call]) -> tuple[list[float], float, list[str]]:
    """Wall time of each call (us), CPU time of all, and the labels, of one labelling path."""
    clock = time.perf_counter_ns
    costs: list[float] = []
    labels: list[str] = []
    cpu = time.thread_time()
    for context, current in calls:
        started = clock()
        labels.append(label(tagger, context, current))
        costs.append((clock() - started) / 1e3)
    return costs, time.thread_time() - cpu, labels


def _engine_cpu(bundle: ModelBundle, conversations: list[Conversation]) -> float:
    """CPU seconds per word of fresh engines fed the conversations' words in order."""
    cpu = time.thread_time()
    n = 0
    for conversation in conversations:
        engine = bundle.new_engine()
        for i, word in enumerate(conversation.words):
            engine.add_word(f"w{i}", word)
        engine.finish()
        n += len(conversation.words)
    return (time.thread_time() - cpu) / max(n, 1)


class _Pair:
    """Both taggers on each call, as the engine labels with a coarse model beside the fine."""

    def __init__(self, fine: FunctionTagger, coarse: FunctionTagger) -> None:
        self.fine = fine
        self.coarse = coarse

    def label(self, tagger: FunctionTagger, context: list[UtteranceView],
              current: UtteranceView) -> str:
        fine = tagger.label_partial(context, current)
        return fine.label + self.coarse.label_partial(context, current).label


def _time_features(tagger: FunctionTagger, calls: list[Call]) -> list[float]:
    clock = time.perf_counter_ns
    costs: list[float] = []
    for context, current in calls:
        started = clock()
        utterance_features(current, context[-1] if context else None, tagger.config)
        costs.append((clock() - started) / 1e3)
    return costs


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'functions', help='time the function tagger per word against crfsuite',
        description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path,
                        default=WEIGHTS / "functions-swbd42.tagger")
    parser.add_argument("--conversations", type=int, default=5)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--coarse", type=Path, default=None,
                        help="a coarse-function model served beside --model: time both")
    parser.add_argument("--corpus", type=Path, default=None, metavar="DIR",
                        help="SwDA folder (default $MIDSTREAM_CORPORA/swda)")
    parser.add_argument("--smoke", action="store_true",
                        help="one conversation, one round (seconds)")
    parser.add_argument("--json", type=Path, default=None, metavar="FILE",
                        help="also write the figures here")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    swda = args.corpus or corpora_root() / "swda"
    if args.smoke:
        args.conversations, args.rounds = 1, 1

    started = time.perf_counter()
    tagger = FunctionTagger.load(args.model)
    load_seconds = time.perf_counter() - started
    artifact = load_artifact(args.model, expected_kind="utterance_functions")

    calls: list[Call] = []
    # Calls that open an utterance meet a new context window (one per utterance); the rest
    # reuse it.
    opening: list[bool] = []
    conversations: list[Conversation] = []
    for n, conversation in enumerate(read_corpus(swda, split="val")):
        if n >= args.conversations:
            break
        conversations.append(conversation)
        views = [clean_view(conversation, u) for u in conversation.utterances]
        for i, utterance in enumerate(conversation.utterances):
            context = views[max(0, i - tagger.context):i]
            for k in range(1, len(utterance.words) + 1):
                # After the last word, the view that then becomes context, as the engine does.
                last = k == len(utterance.words)
                calls.append((context, views[i] if last else
                              clean_view(conversation, utterance, upto=k)))
                opening.append(k == 1)

    new: list[float] = []
    old: list[float] = []
    new_cpu = old_cpu = 0.0
    features: list[float] = []
    differ = 0
    coarse = (load_artifact(args.coarse, expected_kind="utterance_functions")
              if args.coarse is not None else None)
    alone: list[float] = []
    both: list[float] = []
    alone_cpu = both_cpu = 0.0
    # Compile (or load from the disk cache) the kernels before timing, as the server does while
    # loading models: a one-off per process, not a cost per call.
    _time(_label_new, FunctionTagger.from_artifact(artifact), calls[:200])
    for _ in range(args.rounds):
        costs, cpu, new_labels = _time(_label_new, FunctionTagger.from_artifact(artifact), calls)
        new.extend(costs)
        new_cpu += cpu
        costs, cpu, old_labels = _time(_label_crfsuite, FunctionTagger.from_artifact(artifact),
                                       calls)
        old.extend(costs)
        old_cpu += cpu
        features.extend(_time_features(tagger, calls))
        differ += sum(a != b for a, b in zip(new_labels, old_labels, strict=True))
        if coarse is not None:
            fine_tagger = FunctionTagger.from_artifact(artifact)
            costs, cpu, _ = _time(_label_new, fine_tagger, calls)
            alone.extend(costs)
            alone_cpu += cpu
            pair = _Pair(FunctionTagger.from_artifact(artifact),
                         FunctionTagger.from_artifact(coarse))
            costs, cpu, _ = _time(pair.label, pair.fine, calls)
            both.extend(costs)
            both_cpu += cpu

    def line(name: str, costs: list[float]) -> str:
        return (f"{name}: median {statistics.median(costs):.1f} us/call, "
                f"mean {statistics.fmean(costs):.1f} us/call")

    print(f"model: {args.model.name} ({args.model.stat().st_size / 1e6:.1f} MB), "
          f"load {load_seconds:.3f} s")
    print(f"calls (one per received word): {len(calls)} x {args.rounds} rounds")
    print(line("label_partial (compiled forward step, cached context)", new))
    firsts = [c for c, first in zip(new, opening * args.rounds, strict=True) if first]
    others = [c for c, first in zip(new, opening * args.rounds, strict=True) if not first]
    print(f"  of which the first word of an utterance (new context window): median "
          f"{statistics.median(firsts):.1f} us/call over {len(firsts)} calls; later words: "
          f"median {statistics.median(others):.1f} us/call over {len(others)} calls")
    print(line("baseline: crfsuite over the window (the old path)", old))
    print(line("baseline: current utterance's features alone", features))
    medians = Paired(measured=statistics.median(old), baseline=statistics.median(new))
    means = Paired(measured=statistics.fmean(old), baseline=statistics.fmean(new))
    print(f"old/new: {medians.ratio:.1f}x median, {means.ratio:.1f}x mean")
    # CPU time of this thread only: less sensitive than wall time to other processes.
    total = len(calls) * args.rounds
    print(f"CPU time per call: label_partial {1e6 * new_cpu / total:.1f} us, crfsuite path "
          f"{1e6 * old_cpu / total:.1f} us, ratio {old_cpu / new_cpu:.1f}x")
    print(f"labels differing between the paths: {differ}")
    figures: dict[str, object] = {
        "model": str(args.model), "load_s": load_seconds, "calls": len(calls),
        "rounds": args.rounds, "label_partial_us": statistics.median(new),
        "crfsuite_us": statistics.median(old), "features_us": statistics.median(features),
        "crfsuite_over_label_partial": medians.as_json(), "labels_differing": differ}
    if coarse is not None:
        print(line("fine tagger alone (label_partial)", alone))
        print(line("fine and coarse taggers (label_partial each)", both))
        ratio = statistics.median(both) / statistics.median(alone)
        print(f"fine+coarse / fine alone: {ratio:.2f}x median, "
              f"CPU time {both_cpu / alone_cpu:.2f}x")
        words = ModelBundle.load_default().word_model
        fine_only = ModelBundle(word_model=words, function_tagger=tagger, infos=())
        with_coarse = ModelBundle(word_model=words, function_tagger=tagger, infos=(),
                                  coarse_tagger=FunctionTagger.from_artifact(coarse))
        one: list[float] = []
        two: list[float] = []
        for bundle in (fine_only, with_coarse):  # compile the kernels before timing
            _engine_cpu(bundle, conversations[:1])
        for _ in range(args.rounds):
            one.append(_engine_cpu(fine_only, conversations))
            two.append(_engine_cpu(with_coarse, conversations))
        print(f"engine CPU per word: fine model only {1e6 * statistics.median(one):.1f} us, "
              f"with the coarse model {1e6 * statistics.median(two):.1f} us, ratio "
              f"{statistics.median(two) / statistics.median(one):.2f}x (median of "
              f"{args.rounds} rounds)")
        figures["engine_with_coarse_over_fine"] = Paired(
            measured=statistics.median(two), baseline=statistics.median(one)).as_json()
    write_json(args.json, figures)
    return 0

