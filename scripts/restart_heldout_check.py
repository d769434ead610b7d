"""Measure on held-out TRAIN folds what second-stage restart decisions could add to the word CRF.

The word CRF finds almost no restarts (``models/weights/words.md``). This script asks, on
training conversations only, where the gold restart words go and whether a small decision made
after the CRF could move them to ``restart``:

1. how a held-out CRF tags the gold restart words of each kind (bracket ``[ X + ]`` and
   abandoned utterance);
2. extra reparandum / restart tag biases on top of the shipped ones (EDITED F1 as objective);
3. restart vs repair per predicted reparandum span: a logistic model (a one-item CRF, as the
   abandoned-unit cues) reads the span, the words after it and the CRF's own marginals, and a
   span judged a restart has its words revised from ``reparandum`` to ``restart``;
4. the abandoned-unit judge trained on the utterance ends the held-out CRF predicts (not on
   gold units), revising a judged unit's last ``--open`` words as the live decoder can;
5. a word-level judge of the words the CRF calls fluent, with a bigram-rarity cue: how often
   the word was followed by the next one in the training conversations outside the held-out
   fold (a restart breaks the phrase off, so the pair should be rare).

Fold CRFs are trained with the shipped model's settings (its recorded hyper-parameters and
feature configuration) on a seeded subset of the training split, dealt as
``--cv-folds 3 --cv-subset 240 --seed 0`` deals it; each decodes its held-out third offline
(whole channels, Viterbi with the shipped tag bias). The judges of 3 and 4 are trained on two
folds' held-out decodes and score the third (grouped by conversation; counts pooled). Val is
never read.

Usage::

    MIDSTREAM_CORPORA=../shared/corpora python scripts/restart_heldout_check.py \\
        [--fold-dir build/restart_folds]

The fold models are kept in ``--fold-dir`` and reused when present (3 of them, about 7 minutes
of CRF training each on the shared two-core machine).
"""

from __future__ import annotations

import argparse
import itertools
import math
import os
from collections import Counter, defaultdict
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
from midstream import Conversation
from midstream.corpora import read_corpus
from midstream.models import WordModel, default_words_model_path
from midstream.models.probes import (
    CLOSED_CLASSES,
    END_SUFFIX,
    WHOLE_UNIT,
    AbandonCues,
    AbandonExample,
    FeatureConfig,
    abandon_features,
    channel_sequences,
    decode_lattice,
    features_at,
    fit_abandon,
    tokens_from_words,
)
from midstream.models.training import (
    WordTrainingConfig,
    load_artifact,
    save_artifact,
    train_word_artifact,
    word_folds,
)

FloatArray = npt.NDArray[np.float64]
_INTERREGNUM = frozenset({"fil", "et", "dm"})
_KEPT = _INTERREGNUM | {"rp", "rp.ip"}
_THRESHOLDS = (0.1, 0.2, 0.3, 0.4, 0.5, 0.7)


@dataclass(frozen=True, slots=True)
class Held:
    """One held-out channel: words, gold and predicted disfluency tags, marginals."""

    conversation: str
    texts: list[str]
    fragment: list[bool]
    gold: list[str]
    predicted: list[str]
    predicted_end: list[bool]
    marginals: FloatArray
    emissions: FloatArray
    abandoned: list[bool]
    other_words: list[int]


def _base(tag: str) -> str:
    return tag.removesuffix(END_SUFFIX)


def _config_of(path: Path) -> WordTrainingConfig:
    artifact = load_artifact(path, expected_kind="words")
    hp = artifact.hyper_parameters
    features = FeatureConfig.from_json(artifact.features)
    return WordTrainingConfig(
        c1=float(hp["c1"]), c2=float(hp["c2"]), min_freq=int(hp["min_freq"]),
        max_iterations=int(hp["max_iterations"]), chunk_length=int(hp["chunk_length"]),
        restart_span=int(hp["restart_span"]),
        tag_bias=tuple(sorted((str(k), float(v)) for k, v in dict(hp["tag_bias"]).items())),
        word_classes=bool(hp["word_classes"]), break_ahead=bool(hp["break_ahead"]),
        right=features.right, left=features.left)


def _held_out(model: WordModel, conversations: Sequence[Conversation]) -> list[Held]:
    result = []
    for conversation in conversations:
        abandoned = {i for u in conversation.utterances if u.abandoned for i in u.words}
        for channel in channel_sequences(conversation):
            if not channel.words or channel.tags is None:
                continue
            tokens = tokens_from_words(channel.words, channel.after_other_speaker,
                                       channel.other_words)
            emissions = np.stack([model.score(features_at(tokens, i, model.config))
                                  for i in range(len(tokens))])
            path, marginals = decode_lattice(emissions, model.exp_transitions)
            tags = [model.tags[k] for k in path]
            result.append(Held(
                conversation=channel.conversation, texts=[w.text for w in channel.words],
                fragment=[w.fragment for w in channel.words],
                gold=[_base(t) for t in channel.tags], predicted=[_base(t) for t in tags],
                predicted_end=[t.endswith(END_SUFFIX) for t in tags], marginals=marginals,
                emissions=emissions, abandoned=[i in abandoned for i in channel.indices],
                other_words=list(channel.other_words)))
    return result


def _prf(counts: Counter[tuple[str, bool, bool]], name: str) -> str:
    tp, fp, fn = counts[name, True, True], counts[name, True, False], counts[name, False, True]
    p = tp / max(tp + fp, 1)
    r = tp / max(tp + fn, 1)
    f = 2 * p * r / (p + r) if p + r else 0.0
    return f"{f:.4f} ({p:.3f} / {r:.3f})"


def _score(folds: Sequence[Sequence[Held]], labels: Sequence[Sequence[list[str]]]) -> str:
    """Restart F1 (all words), EDITED and reparandum F1 (no fragments), as the evaluation."""
    counts: Counter[tuple[str, bool, bool]] = Counter()
    for channels, fold_labels in zip(folds, labels, strict=True):
        for channel, predicted in zip(channels, fold_labels, strict=True):
            for p, g, fragment in zip(predicted, channel.gold, channel.fragment, strict=True):
                counts["rs", p.startswith("rs"), g.startswith("rs")] += 1
                if not fragment:
                    counts["ed", p[:2] in ("rs", "rp"), g[:2] in ("rs", "rp")] += 1
                    counts["rp", p.startswith("rp"), g.startswith("rp")] += 1
    return " | ".join(_prf(counts, name) for name in ("rs", "ed", "rp"))


Example = tuple[int, list[str], bool, list[int]]  # channel, features, gold, words revised


def _judged(folds: Sequence[Sequence[Held]], examples: Sequence[Sequence[Example]],
            title: str) -> None:
    """Train on two folds' examples, judge the third's, print the scores by threshold."""
    probabilities = []
    for k in range(len(folds)):
        train = [AbandonExample(features=f, abandoned=g, words=1)
                 for j in range(len(folds)) if j != k for _, f, g, _ in examples[j]]
        cues = AbandonCues(weights=fit_abandon(train), threshold=1.0)
        probabilities.append([cues.probability(f) for _, f, _, _ in examples[k]])
    positives = sum(g for fold in examples for _, _, g, _ in fold)
    print(f"\n{title}: {sum(map(len, examples))} judged, {positives} gold positive")
    print("| threshold | revised words | restart F1 (P / R) | EDITED F1 (P / R) "
          "| reparandum F1 (P / R) |")
    print("|---|---|---|---|---|")
    print(f"| no decision | 0 | {_score(folds, [[h.predicted for h in f] for f in folds])} |")
    for threshold in _THRESHOLDS:
        labels = []
        revised = 0
        for channels, fold_examples, fold_p in zip(folds, examples, probabilities, strict=True):
            words: dict[int, set[int]] = defaultdict(set)
            for (c, _, _, cover), p in zip(fold_examples, fold_p, strict=True):
                if p >= threshold:
                    words[c].update(cover)
            revised += sum(map(len, words.values()))
            labels.append([["rs" if i in words[c] else t for i, t in enumerate(h.predicted)]
                           for c, h in enumerate(channels)])
        print(f"| {threshold} | {revised} | {_score(folds, labels)} |")


def _bucket(x: float) -> str:
    return str(min(int(x * 10), 9))


def span_examples(channel: Held, c: int, restart_columns: list[int],
                  reparandum_columns: list[int]) -> Iterator[Example]:
    """One example per predicted reparandum span (``rp``... ``rp.ip``); gold: mostly restart."""
    p, texts, n = channel.predicted, channel.texts, len(channel.texts)
    classes = CLOSED_CLASSES
    i = 0
    while i < n:
        if p[i] not in ("rp", "rp.ip"):
            i += 1
            continue
        j = i
        while j < n and p[j] == "rp":
            j += 1
        e = min(j, n - 1)
        r = e + 1
        between = set()
        while r < n and p[r] in _INTERREGNUM:
            between.add(p[r])
            r += 1
        length = e - i + 1
        prev = "<s>" if i == 0 or channel.predicted_end[i - 1] else texts[i - 1]
        f = ["b", f"len={min(length, 4)}", "w1=" + texts[i], "we=" + texts[e],
             "c1=" + classes.get(texts[i], "-"), "ce=" + classes.get(texts[e], "-"),
             "int=" + ("|".join(sorted(between)) or "none"), "prev=" + prev,
             "pc=" + classes.get(prev, "-")]
        if r < n:
            r1, r2 = texts[r], texts[r + 1] if r + 1 < n else "</s>"
            ahead = texts[r : r + length + 3]
            hits = sum(1 for x in texts[i : e + 1] if x in ahead)
            f += ["r1=" + r1, "rc=" + classes.get(r1, "-"), "wr=" + texts[e] + "|" + r1,
                  "cr=" + classes.get(texts[e], "-") + "|" + classes.get(r1, "-"),
                  "r12=" + r1 + "|" + r2, "p_r=" + p[r],
                  "copy1" if r1 == texts[i] else "nocopy1",
                  f"hits={min(hits, 3)}/{min(length, 3)}",
                  "frag" if channel.fragment[e] else "nofrag"]
        m = channel.marginals[i : e + 1]
        f += ["prs=" + _bucket(float(m[:, restart_columns].sum(1).max())),
              "prp=" + _bucket(float(m[:, reparandum_columns].sum(1).min())),
              "oth" if any(channel.other_words[x] for x in range(i + 1, min(r + 1, n)))
              else "nooth"]
        gold = Counter(g[:2] for g in channel.gold[i : e + 1]).most_common(1)[0][0] == "rs"
        yield c, f, gold, list(range(i, e + 1))
        i = e + 1


def unit_examples(channel: Held, c: int, open_words: int) -> Iterator[Example]:
    """One example per predicted utterance end with a next word; gold: an abandoned unit."""
    start = 0
    for e in range(len(channel.texts) - 1):
        if not channel.predicted_end[e]:
            continue
        texts = channel.texts[start : e + 1]
        f = abandon_features(texts[-WHOLE_UNIT:], fragment=channel.fragment[e],
                             whole=len(texts) <= WHOLE_UNIT, length=len(texts),
                             next_text=channel.texts[e + 1],
                             other_words=channel.other_words[e + 1], classes=CLOSED_CLASSES)
        cover = [i for i in range(max(start, e - open_words + 1), e + 1)
                 if channel.predicted[i] not in _KEPT]
        yield c, f, channel.abandoned[e] and channel.gold[e].startswith("rs"), cover
        start = e + 1


def word_examples(channel: Held, c: int, *, unigrams: Counter[str],
                  bigrams: Counter[tuple[str, str]], restart_columns: list[int],
                  edited_columns: list[int]) -> Iterator[Example]:
    """One example per word the CRF tags fluent with no end after it; gold: a restart word."""
    texts, p = channel.texts, channel.predicted
    classes = CLOSED_CLASSES

    def log_bucket(count: int) -> str:
        return str(min(int(math.log2(count + 1)), 12))

    for i in range(len(texts) - 1):
        if p[i] != "fl" or channel.predicted_end[i]:
            continue
        word, following = texts[i], texts[i + 1]
        seen, pair = unigrams[word], bigrams[word, following]
        start = i == 0 or channel.predicted_end[i - 1]
        f = ["b", "w=" + word, "n=" + following, "bc=" + log_bucket(pair),
             "cond=" + _bucket(5 * pair / seen if seen else 0.0),
             "wc=" + classes.get(word, "-") + "|" + log_bucket(pair), f"st={start}",
             f"stw={start}|{word}",
             "cn=" + classes.get(word, "-") + "|" + classes.get(following, "-"),
             "prs=" + _bucket(2 * float(channel.marginals[i, restart_columns].sum())),
             "ped=" + _bucket(2 * float(channel.marginals[i, edited_columns].sum())),
             "np=" + p[i + 1]]
        if channel.fragment[i]:
            f.append("frag")
        yield c, f, channel.gold[i].startswith("rs"), [i]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path, default=default_words_model_path(),
                        help="whose settings the fold models are trained with")
    parser.add_argument("--fold-dir", type=Path, default=Path("build/restart_folds"))
    parser.add_argument("--subset", type=int, default=240)
    parser.add_argument("--open", type=int, default=7,
                        help="last words of a judged unit that are still open (revisable)")
    args = parser.parse_args()
    corpora = Path(os.environ.get("MIDSTREAM_CORPORA", "../shared/corpora"))
    conversations = list(read_corpus(corpora / "swda", split="train"))
    fold_of = word_folds(conversations, 3, subset=args.subset, seed=0)
    config = _config_of(args.model)
    args.fold_dir.mkdir(parents=True, exist_ok=True)
    folds: list[list[Held]] = []
    models: list[WordModel] = []
    for k in range(3):
        path = args.fold_dir / f"fold{k}_{args.subset}.tagger"
        if not path.exists():
            train = [c for j in range(3) if j != k for c in fold_of[j]]
            save_artifact(train_word_artifact(train, config), path)
        model = WordModel.load(path)
        models.append(model)
        folds.append(_held_out(model, fold_of[k]))
    print(f"fold models: {config}")

    tally: Counter[tuple[str, str]] = Counter()
    for channel in itertools.chain.from_iterable(folds):
        for g, p, abandoned in zip(channel.gold, channel.predicted, channel.abandoned,
                                   strict=True):
            if g.startswith("rs"):
                kind = "abandoned" if abandoned else "bracket"
                tally[kind, p[:2]] += 1
                tally[kind, "all"] += 1
    print("\ngold restart words by the held-out CRF's tag")
    print("| kind | words | tagged rp | tagged rs | tagged fl | other |")
    print("|---|---|---|---|---|---|")
    for kind in ("bracket", "abandoned"):
        total = tally[kind, "all"]
        rest = total - sum(tally[kind, t] for t in ("rp", "rs", "fl"))
        print(f"| {kind} | {total} | {tally[kind, 'rp']} | {tally[kind, 'rs']} "
              f"| {tally[kind, 'fl']} | {rest} |")

    print("\nextra tag bias on top of the shipped one")
    print("| rp | rp.ip | rs | restart F1 (P / R) | EDITED F1 (P / R) | reparandum F1 (P / R) |")
    print("|---|---|---|---|---|---|")
    for rp, ip, rs in itertools.product((0.0, 0.2), (0.0, 0.2, 0.4), (0.0, 0.1)):
        labels = []
        for model, channels in zip(models, folds, strict=True):
            vector = np.array([{"rp": rp, "rp.ip": ip, "rs": rs}.get(_base(t), 0.0)
                               for t in model.tags])
            fold_labels = []
            for channel in channels:
                path, _ = decode_lattice(channel.emissions + vector, model.exp_transitions)
                fold_labels.append([_base(model.tags[x]) for x in path])
            labels.append(fold_labels)
        print(f"| {rp} | {ip} | {rs} | {_score(folds, labels)} |")

    tags = models[0].tags
    restart_columns = [i for i, t in enumerate(tags) if t.startswith("rs")]
    reparandum_columns = [i for i, t in enumerate(tags) if t.startswith("rp")]
    _judged(folds, [[x for c, h in enumerate(f)
                     for x in span_examples(h, c, restart_columns, reparandum_columns)]
                    for f in folds],
            "restart vs repair per predicted reparandum span")
    _judged(folds, [[x for c, h in enumerate(f) for x in unit_examples(h, c, args.open)]
                    for f in folds],
            f"abandoned-unit judge on predicted ends (last {args.open} words revisable)")

    held_ids = [{c.id for c in fold} for fold in fold_of]
    unigrams: list[Counter[str]] = [Counter() for _ in fold_of]
    bigrams: list[Counter[tuple[str, str]]] = [Counter() for _ in fold_of]
    for conversation in conversations:
        for sequence in channel_sequences(conversation):
            texts = [w.text for w in sequence.words]
            for k, ids in enumerate(held_ids):
                if conversation.id not in ids:
                    unigrams[k].update(texts)
                    bigrams[k].update(itertools.pairwise(texts))
    edited_columns = restart_columns + reparandum_columns
    _judged(folds, [[x for c, h in enumerate(f)
                     for x in word_examples(h, c, unigrams=unigrams[k], bigrams=bigrams[k],
                                            restart_columns=restart_columns,
                                            edited_columns=edited_columns)]
                    for k, f in enumerate(folds)],
            "word-level judge of fluent-tagged words with bigram rarity")


if __name__ == "__main__":
    main()
