"""Benchmark the utterance-function tagger's per-word cost and the model's load time.

Replays SwDA validation utterances word by word through ``FunctionTagger.label_partial`` (what
the streaming engine does after every word) and prints microseconds per call beside a baseline
measured in the same run: computing the current utterance's features alone, the part of each call
that is not CRF decoding. Also prints the model's load time (target: at most 1 s).

::

    .venv/bin/python scripts/bench_functions.py [--model PATH] [--conversations 5]
"""

from __future__ import annotations

import argparse
import os
import time
from pathlib import Path

from midstream.corpora import read_corpus
from midstream.models._functions import FunctionTagger, clean_view, utterance_features

REPO = Path(__file__).resolve().parent.parent


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", type=Path,
                        default=REPO / "models" / "weights" / "functions-swbd42.msm")
    parser.add_argument("--conversations", type=int, default=5)
    args = parser.parse_args()
    corpora = Path(os.environ.get("MIDSTREAM_CORPORA", REPO.parent / "shared" / "corpora"))

    started = time.perf_counter()
    tagger = FunctionTagger.load(args.model)
    load_seconds = time.perf_counter() - started

    calls = []
    for n, conversation in enumerate(read_corpus(corpora / "swda", split="val")):
        if n >= args.conversations:
            break
        views = [clean_view(conversation, u) for u in conversation.utterances]
        for i, utterance in enumerate(conversation.utterances):
            context = views[max(0, i - tagger.context):i]
            for k in range(1, len(utterance.words) + 1):
                calls.append((context, clean_view(conversation, utterance, upto=k)))

    started = time.perf_counter()
    for context, current in calls:
        utterance_features(current, context[-1] if context else None, tagger.config)
    baseline = time.perf_counter() - started

    started = time.perf_counter()
    for context, current in calls:
        tagger.label_partial(context, current)
    decode = time.perf_counter() - started

    per_call = 1e6 * decode / len(calls)
    per_base = 1e6 * baseline / len(calls)
    print(f"model: {args.model.name} ({args.model.stat().st_size / 1e6:.1f} MB), "
          f"load {load_seconds:.3f} s")
    print(f"calls (one per received word): {len(calls)}")
    print(f"label_partial: {per_call:.0f} us/call; features alone: {per_base:.0f} us/call; "
          f"ratio {per_call / per_base:.1f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
