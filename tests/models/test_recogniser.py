"""Recogniser conditions for evaluation: no fragments, seeded word errors, gold carried along.

The proportions of substitutions, deletions and insertions are the module's documented ones
(60/25/15: common practice, no source); the word error rate is its usual definition (errors
over reference words, NIST scoring).
"""

from __future__ import annotations

import doctest
from dataclasses import replace

import pytest
from midstream import Conversation, DisfluencyLabel, Repair, Utterance, UtteranceFunction, Word
from midstream.models import ModelBundle
from midstream.models import _recogniser as recogniser_module
from midstream.models._eval_engine import replay_conversation
from midstream.models._recogniser import (
    ERROR_SHARES,
    RecogniserConditions,
    as_recognised,
    silence_ticks,
)
from midstream.models.boundaries._model import BoundaryModel
from midstream.models.words._eval import evaluate_words
from midstream.models.words._model import WordModel

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


# --- the recogniser's clock through the silences ------------------------------------------------

def _timed(*turns: tuple[str, float, str]) -> Conversation:
    """Invented: ``(speaker, silence before in seconds, words)`` per gold utterance, each word
    0.25 s long and 0.05 s after the one before."""
    words: list[Word] = []
    utterances = []
    clock = 0.0
    for speaker, silence, text in turns:
        clock += silence
        first = len(words)
        for token in text.split():
            words.append(Word(text=token, speaker=speaker, start=clock, end=clock + 0.25))
            clock += 0.3
        clock -= 0.05
        utterances.append(Utterance(speaker=speaker, words=tuple(range(first, len(words))),
                                    function=UtteranceFunction.STATEMENT, fine_tag="sd",
                                    fine_class="sd"))
    return Conversation(id="boiler", corpus="demo", words=tuple(words),
                        utterances=tuple(utterances))


def test_silence_ticks_run_per_speaker_until_that_speaker_speaks_again() -> None:
    conversation = _timed(("A", 0.0, "the boiler is broken"), ("B", 0.4, "oh no"),
                          ("A", 2.0, "since monday"))
    ticks = silence_ticks(conversation, (0.2, 0.5, 1.0, 3.0))
    words = conversation.words
    a_end, b_end = words[3].end, words[5].end
    assert a_end is not None and b_end is not None
    # A's silence after "broken" runs through B's turn until A starts again (3 s is too late).
    a_ticks = [t for t in ticks if t.time in {a_end + m for m in (0.2, 0.5, 1.0)}]
    assert len(a_ticks) == 3
    # Each tick goes before the first word that arrives (ends) after it, in sending order.
    for tick in ticks:
        if tick.before < len(words):
            arrival = words[tick.before].end
            assert arrival is not None and arrival > tick.time
        previous = words[tick.before - 1].end
        assert previous is not None and previous <= tick.time
    assert list(ticks) == sorted(ticks, key=lambda t: (t.before, t.time))
    # Nothing is ticked once the last word has arrived (the end closes everything anyway).
    last = words[-1].end
    assert last is not None and all(t.time < last for t in ticks)
    assert all(t.time < (words[6].start or 0.0) for t in ticks if t.time > b_end + 1.0)


def test_untimed_words_get_no_ticks() -> None:
    conversation = _conversation(50)
    assert silence_ticks(conversation, (0.5, 1.0)) == ()
    assert silence_ticks(_timed(("A", 0.0, "hello there")), ()) == ()


def _report(*, timed: bool = True) -> Conversation:
    # A report, a 1 s pause, an afterthought: two gold utterances of one speaker.
    conversation = _timed(("tenant", 0.0, "the boiler is making a loud noise"),
                          ("tenant", 1.0, "in the basement"))
    if timed:
        return conversation
    return replace(conversation, words=tuple(replace(w, start=None, end=None)
                                             for w in conversation.words))


def test_evaluation_with_ticks_closes_utterances_in_the_silence_as_a_live_stream_does() -> None:
    # With the shipped models the afterthought's own words join it to the report when they
    # arrive; a live caller's clock ticking through the 1 s pause closes the report first
    # (tests/server/test_server_ticks.py shows the server doing so with the same words).
    model, boundary = WordModel.load(), BoundaryModel.load()
    report = _report()
    joined = evaluate_words([report], model, boundary=boundary)
    ticked = evaluate_words([report], model, boundary=boundary, ticks=True)
    assert joined["segmentation.recall"] == 0.5  # only the final end was found
    assert ticked["segmentation.recall"] == 1.0 and ticked["segmentation.precision"] == 1.0
    bundle = ModelBundle.load_default()
    ticks = silence_ticks(report, boundary.silence_marks)
    live = replay_conversation(report, bundle, ticks=ticks)
    assert {u.utterance_id for u in live.values()} == {"tenant.1", "tenant.2"}
    assert live["w6"].word_ids == tuple(f"w{i}" for i in range(7))
    # Without times there is no clock to tick: the figures are exactly those without ticks.
    untimed = _report(timed=False)
    plain = evaluate_words([untimed], model, boundary=boundary)
    with_ticks = evaluate_words([untimed], model, boundary=boundary, ticks=True)
    assert {k: v for k, v in with_ticks.items() if k.startswith("segmentation.")} == {
        k: v for k, v in plain.items() if k.startswith("segmentation.")}
    assert replay_conversation(untimed, bundle) == replay_conversation(
        untimed, bundle, ticks=silence_ticks(untimed, boundary.silence_marks))


def test_the_modules_examples_run() -> None:
    result = doctest.testmod(recogniser_module)
    assert result.attempted > 0 and result.failed == 0
