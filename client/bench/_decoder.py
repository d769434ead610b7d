"""Per-word cost of the streaming word decoder, against two baselines measured in the same run.

For utterances of 10, 100 and 1,000 words streamed through one channel decoder (utterances
closed one after another, as the engine does), every ``append`` is timed. On the very same
windows the decoder decodes, two baselines run:

- *floor*: python-crfsuite tagging the window (Viterbi plus marginals) with every feature
  precomputed, i.e. the C library alone, no feature work and no bookkeeping;
- *naive*: python-crfsuite re-tagging the whole utterance so far on every word (features
  precomputed), what a decoder without a bounded window would pay.

Figures are CPU time of this thread (``time.thread_time_ns``) because the machine may be
shared; wall-clock medians are printed beside them. The three lengths' decoders take the same
words in turn, word by word (see ``_run``), so a busy spell of the machine weighs on every row
alike; ``--rounds`` repeats the whole stream, the rows pool the rounds, and the spread of the
ratio across rounds is printed too. Targets (project targets, no source):
median decoder cost at most 150 us per word, and the 1,000-word over 10-word ratio at most 1.3.

    midstream bench decoder [--model words.tagger] [--words 3000]
    midstream bench decoder --smoke --json out.json      # seconds, for CI

With a boundary model (the shipped ``boundaries.tagger``, or ``--boundary-model``), one more
paired run times the same words given invented times (0.25 s words, 0.05 s apart, 0.8 s of
silence every eight words) through two decoders in turn, one weighing the times with the
boundary model and one without: the ratio of their median per-word CPU time is what weighing
the times costs.

Words come from SwDA's val split when the corpora are found (``$MIDSTREAM_CORPORA`` or
``../shared/corpora``), otherwise from invented sentences.
"""

from __future__ import annotations

import argparse
import json
import random
import statistics
import time
from collections.abc import Sequence
from pathlib import Path

from midstream import Conversation, DisfluencyLabel, Utterance, UtteranceFunction, Word
from midstream.client.bench._kit import corpora_root, machine
from midstream.corpora import read_corpus
from midstream.models import (
    BoundaryModel,
    DecoderConfig,
    ModelBundle,
    WordModel,
    default_boundary_model_path,
    default_words_model_path,
)
from midstream.models.probes import ChannelDecoder, Token, features_at, token_of
from midstream.models.training import WordTrainingConfig, train_word_artifact

_SENTENCES = (
    "we went to the store last week", "i think that is a good idea", "uh the kids like to play",
    "my brother my brother lives in texas", "it was a really nice day",
)


def _invented_words(n: int, seed: int = 0) -> list[str]:
    rng = random.Random(seed)
    out: list[str] = []
    while len(out) < n:
        out += rng.choice(_SENTENCES).split()
    return out[:n]


def _corpus_words(n: int) -> list[str] | None:
    root = corpora_root()
    if not (root / "swda").is_dir():
        return None
    out: list[str] = []
    for conversation in read_corpus(root / "swda", split="val"):
        out += [w.text for w in conversation.words if w.speaker == conversation.speakers[0]]
        if len(out) >= n:
            return out[:n]
    return out or None


def _tiny_model() -> WordModel:
    # Invented demo data: only for timing when no trained model is at hand.
    conversations = []
    for seed in range(6):
        rng = random.Random(seed)
        words: list[Word] = []
        utterances = []
        for turn in range(20):
            speaker = "AB"[turn % 2]
            start = len(words)
            words += [Word(text=t, speaker=speaker) for t in rng.choice(_SENTENCES).split()]
            utterances.append(Utterance(speaker=speaker, words=tuple(range(start, len(words))),
                                        function=UtteranceFunction.STATEMENT, fine_tag="sd",
                                        fine_class="sd"))
        labels = tuple(DisfluencyLabel.FILLER if w.text == "uh" else DisfluencyLabel.FLUENT
                       for w in words)
        conversations.append(Conversation(id=f"demo{seed}", corpus="demo", words=tuple(words),
                                          utterances=tuple(utterances), labels=labels))
    config = WordTrainingConfig(max_iterations=30, min_freq=1)
    return WordModel.from_artifact(train_word_artifact(conversations, config))


def _percentile(values: Sequence[int], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))] / 1000.0


def _no_times(lengths: Sequence[int]) -> dict[int, dict[str, list[int]]]:
    """Empty lists of per-word CPU times (ns), per utterance length and measure."""
    return {length: {"decoder": [], "floor": [], "naive": [], "decoder_wall": []}
            for length in lengths}


def _run(model: WordModel, texts: Sequence[str], lengths: Sequence[int],
         config: DecoderConfig) -> dict[int, dict[str, list[int]]]:
    """Stream ``texts`` as utterances of each of ``lengths`` words; time decoders and baselines.

    One decoder per length, all fed the same word in turn, each ``append`` timed: a busy spell
    of the machine then slows every length alike, where runs one after the other let it land on
    whichever ran during it (the 1000/10 ratio of the same decoder ranged from 1.1 to 1.8 that
    way). The baselines then run over the very windows each decoder decoded, in passes of their
    own: interleaving them with the decoders word by word would let each evict the other's
    working set from the CPU caches between calls and charge that to whichever runs next.
    """
    words = [Word(text=t, speaker="A") for t in texts]
    tokens: list[Token] = [token_of(w) for w in words]
    decoders = {length: ChannelDecoder(model, config) for length in lengths}
    cpu = _no_times(lengths)
    # (key, window size, utterance start) per length
    windows: dict[int, list[tuple[int, int, int]]] = {length: [] for length in lengths}
    starts = dict.fromkeys(lengths, 0)
    for key, word in enumerate(words):
        for length, decoder in decoders.items():
            times = cpu[length]
            wall0 = time.perf_counter_ns()
            cpu0 = time.thread_time_ns()
            decoder.append(key, word)
            times["decoder"].append(time.thread_time_ns() - cpu0)
            times["decoder_wall"].append(time.perf_counter_ns() - wall0)
            # The same window the decoder just decoded: its held open words plus one before.
            windows[length].append((key, min(len(decoder.open_keys) + 1, key + 1),
                                    starts[length]))
            if key + 1 - starts[length] >= length:
                decoder.close_utterance()
                starts[length] = key + 1
    for length in lengths:
        times = cpu[length]
        # Features precomputed for the baselines, on the decoder's view (all words so far).
        for key, window, _ in windows[length]:
            lo = max(0, key + 1 - window - model.config.left)
            known = tokens[lo : key + 1]
            xseq = [dict.fromkeys(features_at(known, i, model.config), 1.0)
                    for i in range(len(known) - window, len(known))]
            cpu0 = time.thread_time_ns()
            model.tagger.tag_with_confidence(xseq)
            times["floor"].append(time.thread_time_ns() - cpu0)
        for key, _, start in windows[length]:
            if length > 100 and key % 10:
                continue  # every tenth word is enough for the slow baseline
            prefix = tokens[start : key + 1]
            full = [dict.fromkeys(features_at(prefix, i, model.config), 1.0)
                    for i in range(len(prefix))]
            cpu0 = time.thread_time_ns()
            model.tagger.tag_with_confidence(full)
            times["naive"].append(time.thread_time_ns() - cpu0)
    return cpu


def _timed(texts: Sequence[str]) -> list[Word]:
    """The words with invented recogniser times (see the module docstring)."""
    words, clock = [], 0.0
    for k, text in enumerate(texts):
        if k and k % 8 == 0:
            clock += 0.8
        words.append(Word(text=text, speaker="A", start=clock, end=clock + 0.25))
        clock += 0.3
    return words


def _boundary_pair(model: WordModel, boundary: BoundaryModel, texts: Sequence[str],
                   config: DecoderConfig, rounds: int) -> tuple[float, float]:
    """Median CPU us per word without and with the boundary model, the two decoders in turn."""
    words = _timed(texts)
    without: list[int] = []
    with_: list[int] = []
    for _ in range(rounds):
        plain = ChannelDecoder(model, config)
        joined = ChannelDecoder(model, config, boundary)
        for key, word in enumerate(words):
            for decoder, times in ((plain, without), (joined, with_)):
                cpu0 = time.thread_time_ns()
                decoder.append(key, word)
                times.append(time.thread_time_ns() - cpu0)
    return _percentile(without, 0.5), _percentile(with_, 0.5)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'decoder', help='time the word decoder per word against crfsuite alone',
        description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path, default=None,
                        help="word model (.tagger); default: the shipped one")
    parser.add_argument("--words", type=int, default=3000,
                        help="words per round (at least 1,000, the longest utterance)")
    parser.add_argument("--rounds", type=int, default=3,
                        help="times the whole stream is repeated")
    parser.add_argument("--lag", type=int, default=None,
                        help="most open words; default as served (see DecoderConfig)")
    parser.add_argument("--no-settle", action="store_true",
                        help="finalise words exactly --lag words late instead of once settled")
    parser.add_argument("--smoke", action="store_true", help="a few hundred words, for CI")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    parser.add_argument("--boundary-model", type=Path, default=None,
                        help="boundary model (.tagger) for the timed pair; default: the shipped "
                             "one when present")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    n_words = 300 if args.smoke else args.words
    rounds = 1 if args.smoke else max(args.rounds, 1)
    path = args.model or default_words_model_path()
    if path.exists() and not args.smoke:
        model, source = WordModel.load(path), str(path)
    else:
        model, source = _tiny_model(), "tiny model on invented data"
    texts = (None if args.smoke else _corpus_words(max(n_words, 1000))) or _invented_words(
        max(n_words, 1000))
    lengths = (10, 100, 1000)
    ModelBundle.warm_up()  # compile the kernels before timing, as the server does at start-up
    # One untimed pass, so first-use costs (kernel dispatch for each window shape, allocator
    # growth) are not charged to whichever row happens to run first.
    config = DecoderConfig(lag=args.lag, settle=not args.no_settle)
    _run(model, texts[:300], (10,), config)
    lag = ChannelDecoder(model, config).max_open
    runs = max(n_words, *lengths)
    finality = "settled or" if config.settle else "exactly"
    print(f"model: {source}; {runs} words per round, {rounds} rounds, the "
          f"three lengths' decoders in turn; final {finality} "
          f"{lag} words late; CPU time per word (us)")
    header = (f"{'utterance':>9} {'decoder':>8} {'p99':>8} {'wall':>8} {'floor':>8} "
              f"{'naive':>8} {'dec/floor':>9} {'naive/dec':>9}")
    print(header)
    pooled = _no_times(lengths)
    round_ratios: list[float] = []
    stream = texts[:runs] if len(texts) >= runs else (
        list(texts) * (runs // len(texts) + 1))[:runs]
    for _ in range(rounds):
        measured = _run(model, stream, lengths, config)
        for length, times in measured.items():
            for key, values in times.items():
                pooled[length][key] += values
        round_ratios.append(_percentile(measured[1000]["decoder"], 0.5)
                            / _percentile(measured[10]["decoder"], 0.5))
    medians: dict[int, float] = {}
    rows: dict[str, dict[str, float]] = {}
    spent_ns = 0
    decoded = 0
    for length in lengths:
        times = pooled[length]
        decoder = _percentile(times["decoder"], 0.5)
        medians[length] = decoder
        spent_ns += sum(times["decoder"])
        decoded += len(times["decoder"])
        floor = _percentile(times["floor"], 0.5)
        naive = _percentile(times["naive"], 0.5)
        p99 = _percentile(times["decoder"], 0.99)
        print(f"{length:>9} {decoder:>8.1f} {p99:>8.1f} "
              f"{_percentile(times['decoder_wall'], 0.5):>8.1f} {floor:>8.1f} {naive:>8.1f} "
              f"{decoder / floor:>9.2f} {naive / decoder:>9.2f}")
        rows[str(length)] = {"decoder_us": decoder,
                             "decoder_p99_us": p99,
                             "floor_us": floor, "naive_us": naive}
    ratio = medians[1000] / medians[10]
    print(f"ratio decoder median 1000-word / 10-word utterances: {ratio:.2f} (target <= 1.3)")
    print(f"the same ratio round by round: {min(round_ratios):.2f} to {max(round_ratios):.2f} "
          f"(median {statistics.median(round_ratios):.2f}, {rounds} rounds)")
    print(f"decoder median at 1000 words: {medians[1000]:.1f} us (target <= 150 us)")
    mean_cpu = statistics.fmean([medians[k] for k in lengths])
    print(f"mean of medians: {mean_cpu:.1f} us")
    # Throughput from the mean, not the median: slow words count in full.
    throughput = decoded / (spent_ns / 1e9)
    print(f"decoder throughput: {throughput:,.0f} words per CPU second (target >= 10,000)")
    boundary_path = args.boundary_model or default_boundary_model_path()
    pair: dict[str, float] = {}
    if boundary_path.exists() and not args.smoke:
        plain_us, joined_us = _boundary_pair(model, BoundaryModel.load(boundary_path),
                                             stream, config, rounds)
        pair = {"without_us": plain_us, "with_us": joined_us, "ratio": joined_us / plain_us}
        print(f"timed words, median per word: {plain_us:.1f} us without the boundary model, "
              f"{joined_us:.1f} us with it ({boundary_path.name}); ratio {pair['ratio']:.2f}")
    if args.json is not None:
        args.json.write_text(json.dumps({
            "machine": machine(), "model": source, "words_per_round": runs,
            "rounds": rounds, "lag": lag, "settle": config.settle, "rows": rows,
            "ratio_1000_over_10": ratio, "round_ratios": round_ratios,
            "words_per_cpu_s": throughput, "boundary_pair": pair,
        }, indent=2), encoding="utf-8")
    return 0

