"""Engine CPU per word on timed input with the partner gap read, against the same engine with
it switched off, in alternating rounds of one run (a ratio, not a timing to quote alone).

    MIDSTREAM_CORPORA=../shared/corpora .venv/bin/python scripts/timing_cost.py MODELS_DIR

Streams the first ``--words`` words of the first MRDA val meeting (with its word times) through
``ModelBundle.new_engine()`` of ``MODELS_DIR``, whose coarse function model should have timing
features (``train functions --timing-features on``; for a model without them the engine reads
no gap, and the two modes are the same). "off" tells each engine not to read the gap, so every
view is untimed.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time
from pathlib import Path

from midstream.corpora import read_corpus
from midstream.models import ModelBundle


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("models", type=Path)
    parser.add_argument("--words", type=int, default=3000)
    parser.add_argument("--rounds", type=int, default=4)
    args = parser.parse_args()
    bundle = ModelBundle.load_directory(args.models)
    corpora = Path(os.environ.get("MIDSTREAM_CORPORA", "../shared/corpora"))
    words = next(iter(read_corpus(corpora / "mrda", split="val"))).words[:args.words]

    def per_word(timed: bool) -> float:
        engine = bundle.new_engine()
        engine._timed = timed
        began = time.process_time()
        for i, word in enumerate(words):
            engine.add_word(f"w{i}", word)
        engine.finish()
        return (time.process_time() - began) / len(words) * 1e6

    rounds: dict[str, list[float]] = {"on": [], "off": []}
    per_word(True)  # warm the taggers' shared caches once, outside the rounds
    for r in range(args.rounds):
        # Alternating which mode goes first, so neither gains from the other's warmer caches.
        for mode in (("on", "off") if r % 2 == 0 else ("off", "on")):
            rounds[mode].append(per_word(mode == "on"))
    on, off = statistics.median(rounds["on"]), statistics.median(rounds["off"])
    print(f"{len(words)} words, {args.rounds} rounds each: partner gap read {on:.1f} us/word, "
          f"not read {off:.1f} us/word (CPU, medians), ratio {on / off:.3f}")


if __name__ == "__main__":
    main()
