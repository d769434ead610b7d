"""Check on training conversations what the abandoned-unit decision gains in live decoding.

The cues' threshold is chosen on gold units (``train_abandon_cues``); live, the decoder judges
the units between the ends it predicts. This script measures the difference on the TRAIN split
only: cues are trained on two of three conversation folds (``word_folds``, seed 0) and the word
model's CRF decodes conversations of the third fold word by word. Every judgement is recorded
(the unit's probability, the CRF's end probability at that moment, the open words a revision
would reach) without revising anything, and restart F1 and EDITED F1 (no fragments) are
computed for each threshold and minimum end probability. The CRF is the shipped one, trained
on all of train, so its utterance ends here are better than held out: the figures flatter the
decision, not the other way round.

Usage::

    MIDSTREAM_CORPORA=../shared/corpora python scripts/abandon_live_check.py \\
        [--model models/weights/words.tagger] [--folds 0 1] [--conversations 40]

Runs on the source build only (it wraps the decoder's private judgement method).
"""

from __future__ import annotations

import argparse
import dataclasses
import os
from pathlib import Path
from typing import Any

from midstream import DisfluencyLabel
from midstream.corpora import read_corpus
from midstream.models import WordModel
from midstream.models.probes import (
    AbandonCues,
    ChannelDecoder,
    abandon_examples,
    channel_sequences,
    decode_tag,
    fit_abandon,
)
from midstream.models.training import load_artifact, word_folds

Record = tuple[str, float, float, list[int]]


def _recorder(records: list[Record], channel: list[str]) -> Any:
    def judge(self: Any, lo: int, start: int, path: list[int],
              end_probability: list[float]) -> bool:
        unit = self.next_unit(lo, start, path)
        if unit is None:
            return False
        first, end, features = unit
        entries = self._entries
        keys = [entries[i].key for i in range(max(first, start), end + 1)
                if not self._keeps_label[path[i - lo]]]
        records.append((channel[0], self._abandon.probability(features),
                        end_probability[end - lo], keys))
        return False  # record only: the CRF's own labels stay

    return judge


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", type=Path, default=Path("models/weights/words.tagger"))
    parser.add_argument("--folds", type=int, nargs="+", default=[0, 1])
    parser.add_argument("--conversations", type=int, default=40,
                        help="conversations of each held-out fold to decode")
    args = parser.parse_args()
    corpora = Path(os.environ.get("MIDSTREAM_CORPORA", "../shared/corpora"))
    conversations = list(read_corpus(corpora / "swda", split="train"))
    fold_of = word_folds(conversations, 3)
    artifact = load_artifact(args.model, expected_kind="words")
    records: list[Record] = []
    channels: list[tuple[str, list[DisfluencyLabel], list[DisfluencyLabel], list[bool]]] = []
    channel = [""]
    ChannelDecoder._judge = _recorder(records, channel)  # type: ignore[method-assign]
    for k in args.folds:
        train = [c for j in range(3) if j != k for c in fold_of[j]]
        cues = AbandonCues(weights=fit_abandon(list(abandon_examples(train))), threshold=0.0)
        features = dict(artifact.features)
        features["abandon"] = cues.to_json()
        model = WordModel.from_artifact(dataclasses.replace(artifact, features=features))
        for conversation in fold_of[k][: args.conversations]:
            for sequence in channel_sequences(conversation):
                assert sequence.tags is not None
                channel[0] = f"{conversation.id}/{sequence.speaker}"
                decoder = ChannelDecoder(model)
                final: dict[int, DisfluencyLabel] = {}
                for position, word in enumerate(sequence.words):
                    for state in decoder.append(
                            position, word,
                            after_other_speaker=sequence.after_other_speaker[position],
                            other_words=sequence.other_words[position]):
                        final[state.key] = state.label
                for state in decoder.finish():
                    final[state.key] = state.label
                channels.append((channel[0], [final[i] for i in range(len(sequence.words))],
                                 [decode_tag(t)[1] for t in sequence.tags],
                                 [w.fragment for w in sequence.words]))
    by_channel: dict[str, list[Record]] = {}
    for record in records:
        by_channel.setdefault(record[0], []).append(record)

    def score(threshold: float, min_end: float) -> tuple[float, float, float, float]:
        restart, edited = [0, 0, 0], [0, 0, 0]
        edited_labels = (DisfluencyLabel.RESTART, DisfluencyLabel.REPARANDUM)
        for name, final, gold, fragment in channels:
            predicted = list(final)
            for _, p, p_end, keys in by_channel.get(name, []):
                if p >= threshold and p_end >= min_end:
                    for key in keys:
                        predicted[key] = DisfluencyLabel.RESTART
            for p_label, g_label, frag in zip(predicted, gold, fragment, strict=True):
                _count(restart, p_label is DisfluencyLabel.RESTART,
                       g_label is DisfluencyLabel.RESTART)
                if not frag:
                    _count(edited, p_label in edited_labels, g_label in edited_labels)
        return (_f1(restart), restart[0] / max(restart[0] + restart[1], 1),
                restart[0] / max(restart[0] + restart[2], 1), _f1(edited))

    print(f"folds {args.folds}, {args.conversations} conversations each, "
          f"{len(records)} judgements")
    print("| threshold | min end probability | restart F1 | P | R | EDITED F1 |")
    print("|---|---|---|---|---|---|")
    print("| no decision | | {:.4f} | {:.3f} | {:.3f} | {:.4f} |".format(*score(2.0, 2.0)))
    for threshold in (0.2, 0.3, 0.5, 0.7):
        for min_end in (0.0, 0.5, 0.8, 0.95):
            print(f"| {threshold} | {min_end} | " + "{:.4f} | {:.3f} | {:.3f} | {:.4f} |".format(
                *score(threshold, min_end)))


def _count(counts: list[int], predicted: bool, gold: bool) -> None:
    counts[0] += predicted and gold
    counts[1] += predicted and not gold
    counts[2] += gold and not predicted


def _f1(counts: list[int]) -> float:
    return 2 * counts[0] / (2 * counts[0] + counts[1] + counts[2]) if counts[0] else 0.0


if __name__ == "__main__":
    main()
