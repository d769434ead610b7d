"""The published incremental measures the word evaluation reports, on worked examples.

Edit overhead is Baumann, Buß & Schlangen's ("Evaluation and optimisation of incremental
processors", Dialogue & Discourse 2(1), 2011): unnecessary edits over all edits, the necessary
ones being those a processor that never revises would make. The worked example below is not
the paper's own (it was reconstructed from memory of the definition, without the paper at
hand); it is an invented stream in the paper's manner, one label per word, and its figures
are worked out by hand in the comments.
"""

from __future__ import annotations

import doctest

import pytest
from midstream import DisfluencyLabel
from midstream.models.words import _eval as _eval_words
from midstream.models.words._decoder import ChannelDecoder
from midstream.models.words._eval import EditCounts, evaluate_words
from midstream.models.words._model import WordModel
from midstream.models.words._tags import channel_sequences
from word_kit import invented_conversation, tiny_model

FL, RP, RR, FP = (DisfluencyLabel.FLUENT, DisfluencyLabel.REPARANDUM, DisfluencyLabel.REPAIR,
                  DisfluencyLabel.FILLER)

#: "i want a flight to boston uh to denver" (invented), each word's labels as a stream showed
#: them, oldest first. Edits per word (first label, then each change): 1 1 1 1 2 2 1 2 3 = 14.
#: "flight" is shown twice with the same label (its confidence moved): one edit, not two.
#: "denver" flips to reparandum and back: three edits, of which only the first was needed.
WORKED = [
    [FL],              # i
    [FL],              # want
    [FL],              # a
    [FL, FL],          # flight
    [FL, RP],          # to       (becomes the reparandum once "uh to" arrives)
    [FL, RP],          # boston
    [FP],              # uh
    [FL, RR],          # to       (the repair)
    [FL, RP, FL],      # denver   (a wrong revision, taken back)
]


def test_edit_overhead_on_the_worked_example() -> None:
    counts = EditCounts()
    for labels in WORKED:
        counts.add(labels)
    # 9 words, so 9 necessary edits out of 14: overhead (14 - 9) / 14.
    assert (counts.edits, counts.words) == (14, 9)
    assert counts.overhead == pytest.approx(5 / 14)


def test_a_stream_that_never_revises_has_no_overhead() -> None:
    counts = EditCounts()
    for labels in ([FL], [RP, RP], [RR]):
        counts.add(labels)
    assert counts.overhead == 0.0
    assert EditCounts().overhead == 0.0  # nothing shown: no edits at all


def test_a_right_revision_is_overhead_too() -> None:
    # The measure is about stability, not correctness: "to" and "boston" above were revised
    # to the right label, and still each cost one unnecessary edit.
    counts = EditCounts()
    counts.add([FL, RP])
    assert counts.overhead == pytest.approx(1 / 2)


@pytest.fixture(scope="module")
def model() -> WordModel:
    return tiny_model()


def test_evaluate_words_reports_the_overhead_of_its_stream(model: WordModel) -> None:
    # Replay the same channels through the decoder independently and count edits from every
    # state it reported; the figure evaluate_words reports must be that count's overhead.
    conversations = [invented_conversation(seed) for seed in (300, 301, 302)]
    figures = evaluate_words(conversations, model)
    counts = EditCounts()
    for conversation in conversations:
        for channel in channel_sequences(conversation):
            decoder = ChannelDecoder(model)
            shown: dict[int, list[DisfluencyLabel]] = {}
            other = channel.other_words or (0,) * len(channel.words)
            for key, word in enumerate(channel.words):
                for state in decoder.append(key, word,
                                            after_other_speaker=channel.after_other_speaker[key],
                                            other_words=other[key]):
                    shown.setdefault(state.key, []).append(state.label)
            for state in decoder.finish():
                shown.setdefault(state.key, []).append(state.label)
            for key in range(len(channel.words)):
                counts.add(shown[key])
    assert counts.edits > counts.words  # the tiny model does revise, so the check has teeth
    assert figures["incremental.edit_overhead"] == pytest.approx(counts.overhead)


def test_docstring_examples_run() -> None:
    result = doctest.testmod(_eval_words)
    assert result.attempted > 0 and result.failed == 0
