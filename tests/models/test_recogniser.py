"""Recogniser conditions for evaluation: no fragments, seeded word errors, gold carried along.

The proportions of substitutions, deletions and insertions are the module's documented ones
(60/25/15: common practice, no source); the word error rate is its usual definition (errors
over reference words, NIST scoring).
"""

from __future__ import annotations

import pytest
from midstream import Conversation, DisfluencyLabel, Repair, Utterance, UtteranceFunction, Word
from midstream.models._recogniser import ERROR_SHARES, RecogniserConditions, as_recognised

L = DisfluencyLabel


def _conversation(n: int = 20_000) -> Conversation:
    # Invented: two speakers taking turns of five words, every tenth word a reparandum.
    words = tuple(Word(text=f"w{i % 50}", speaker="AB"[(i // 5) % 2]) for i in range(n))
    labels = tuple(L.REPARANDUM if i % 10 == 0 else L.FLUENT for i in range(n))
    utterances = tuple(
        Utterance(speaker="AB"[(s // 5) % 2], words=tuple(range(s, s + 5)),
                  function=UtteranceFunction.STATEMENT, fine_tag="sd", fine_class="sd")
        for s in range(0, n, 5))
    return Conversation(id="invented", corpus="demo", words=words, utterances=utterances,
                        labels=labels)


def test_fragments_go_and_labels_and_repairs_follow_the_kept_words() -> None:
    words = (Word(text="th-", speaker="A", fragment=True), Word(text="the", speaker="A"),
             Word(text="uh", speaker="A"), Word(text="the", speaker="A"),
             Word(text="car", speaker="A"))
    conversation = Conversation(
        id="c", corpus="demo", words=words,
        utterances=(Utterance(speaker="A", words=(0, 1, 2, 3, 4),
                              function=UtteranceFunction.STATEMENT, fine_tag="sd",
                              fine_class="sd"),),
        labels=(L.REPARANDUM, L.REPARANDUM, L.FILLER, L.REPAIR, L.FLUENT),
        repairs=(Repair(reparandum=(0, 1), interregnum=(2,), repair_onset=3),))
    out = as_recognised(conversation, RecogniserConditions())
    assert [w.text for w in out.words] == ["the", "uh", "the", "car"]
    assert out.labels == (L.REPARANDUM, L.FILLER, L.REPAIR, L.FLUENT)
    assert out.repairs == (Repair(reparandum=(0,), interregnum=(1,), repair_onset=2),)
    assert out.utterances[0].words == (0, 1, 2, 3)


def test_error_draws_are_deterministic_given_the_seed() -> None:
    conversation = _conversation(2_000)
    a = as_recognised(conversation, RecogniserConditions(word_error_rate=0.1, seed=3))
    b = as_recognised(conversation, RecogniserConditions(word_error_rate=0.1, seed=3))
    c = as_recognised(conversation, RecogniserConditions(word_error_rate=0.1, seed=4))
    assert a == b
    assert a.words != c.words


@pytest.mark.parametrize("rate", [0.1, 0.2])
def test_errors_come_at_the_rate_and_proportions_asked(rate: float) -> None:
    conversation = _conversation()
    n = len(conversation.words)
    out = as_recognised(conversation, RecogniserConditions(word_error_rate=rate, seed=1))
    assert out.labels is not None
    # Inserted words are the only fluent words at positions the invented pattern cannot hold;
    # count them through the label/word pairing instead: every kept or substituted reference
    # word keeps its index order, so the length change is insertions minus deletions.
    expected_change = n * rate * (ERROR_SHARES["insertion"] - ERROR_SHARES["deletion"])
    assert len(out.words) - n == pytest.approx(expected_change, abs=4 * (n * rate) ** 0.5)
    reparanda = sum(label is L.REPARANDUM for label in out.labels)
    # Deletions remove a reparandum word as often as any other: a tenth of them go with rate
    # times the deletion share.
    assert reparanda == pytest.approx(n / 10 * (1 - rate * ERROR_SHARES["deletion"]), rel=0.05)
    changed = sum(1 for w in out.words if not w.text.startswith("w"))
    assert changed == 0  # substitutes are drawn from the conversation's own words
    # Every utterance end is still the last word of its utterance, in time order.
    for utterance in out.utterances:
        assert list(utterance.words) == sorted(utterance.words)


def test_a_rate_outside_zero_to_one_is_refused() -> None:
    with pytest.raises(ValueError, match="word_error_rate"):
        RecogniserConditions(word_error_rate=1.5)
