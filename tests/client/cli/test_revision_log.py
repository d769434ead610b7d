"""The revision log: written records read back as the same events, and what inspect derives."""

from __future__ import annotations

import pytest
from midstream import (
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    TranscriptFormatError,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.client import Ended, EndReason, Gap, GapReason, Reconnected, Snapshot, Welcome
from midstream.client._results import ServerEvent
from midstream.client.cli._analysis import FinalReason, analyse
from midstream.client.cli._records import (
    GoldWord,
    SentWord,
    dumps,
    event_record,
    parse_log,
    word_record,
)
from midstream.client.cli._view import RATES_CAUTION, disfluency_rates, rates_table

F, R, P = DisfluencyLabel.FLUENT, DisfluencyLabel.REPARANDUM, DisfluencyLabel.REPAIR


def _word(word_id: str, label: DisfluencyLabel, *, final: bool = False, revision: int = 0,
          speaker: str = "A") -> WordHypothesis:
    return WordHypothesis(word_id=word_id, speaker=speaker, label=label, confidence=0.75,
                          revision=revision, final=final)


def _utt(words: tuple[str, ...], function: UtteranceFunction, *, final: bool = False,
         utterance_id: str = "u1") -> UtteranceHypothesis:
    return UtteranceHypothesis(utterance_id=utterance_id, speaker="A", word_ids=words,
                               clean_text="x", function=function, fine_class="sd",
                               confidence=0.6, revision=0, final=final)


def _update(seq: int, words: tuple[WordHypothesis, ...] = (),
            utterances: tuple[UtteranceHypothesis, ...] = (), *, final: bool = False
            ) -> HypothesisUpdate:
    return HypothesisUpdate(seq=seq, server_time=1000.0 + seq,
                            diff=HypothesisDiff(words=words, utterances=utterances),
                            conversation_final=final)


def test_every_event_kind_round_trips() -> None:
    events: list[ServerEvent] = [
        Welcome(conversation_id="c1", next_seq=1),
        _update(1, (_word("w1", F),), (_utt(("w1",), UtteranceFunction.QUESTION),)),
        Gap(first_missing=2, oldest_kept=5, reason=GapReason.EVICTED),
        Snapshot(seq=6, words=(_word("w1", R, final=True),), utterances=(),
                 conversation_final=False),
        Reconnected(from_seq=7, attempt=2),
        Ended(reason=EndReason.CLOSED, last_seq=6),
    ]
    gold = GoldWord(label=R, utterance=0, function=UtteranceFunction.QUESTION, fine_class="qy")
    word = SentWord(word_id="w1", speaker="A", text="what", start=0.5, end=0.7, sent=1, gold=gold)
    lines = [dumps(word_record(word))] + [dumps(event_record(e, sent=1)) for e in events]
    log = parse_log(lines, "log.jsonl")
    assert log.words == [word]
    assert [e for e, _ in log.events] == events
    assert log.conversation_id == "c1" and log.has_gold


@pytest.mark.parametrize(("record", "field"), [
    ('{"type": "mystery"}', "type"),
    ('{"type": "update", "seq": 1, "server_time": 1, "words": [{"id": "w1"}], '
     '"utterances": []}', "speaker"),
    ('{"type": "update", "seq": 1, "server_time": 1, "words": [{"id": "w1", "speaker": "A", '
     '"label": "shouting", "confidence": 1, "revision": 0, "final": false}], "utterances": []}',
     "words"),
])
def test_bad_log_lines_name_line_and_field(record: str, field: str) -> None:
    with pytest.raises(TranscriptFormatError) as caught:
        parse_log(['{"type": "header", "conversation_id": "c"}', record], "run.log")
    assert (caught.value.source, caught.value.line, caught.value.field) == ("run.log", 2, field)


def _sent(word_id: str, sent: int, label: DisfluencyLabel, utterance: int,
          function: UtteranceFunction) -> str:
    return dumps(word_record(SentWord(
        word_id=word_id, speaker="A", text=word_id, start=None, end=None, sent=sent,
        gold=GoldWord(label=label, utterance=utterance, function=function))))


def test_analysis_explains_finality_and_scores_what_the_stream_said() -> None:
    q, s = UtteranceFunction.QUESTION, UtteranceFunction.STATEMENT
    lines = [
        _sent("w1", 1, R, 0, q), _sent("w2", 2, P, 0, q), _sent("w3", 3, F, 0, q),
        _sent("w4", 4, F, 1, s),
        # w1 first fluent (utterance a statement), revised to reparandum once w2 arrives.
        dumps(event_record(_update(1, (_word("w1", F),), (_utt(("w1",), s),)))),
        dumps(event_record(_update(2, (_word("w1", R, revision=1), _word("w2", P)),
                                   (_utt(("w1", "w2"), q),)))),
        # w1 leaves the window: final in an update that closes no utterance.
        dumps(event_record(_update(3, (_word("w1", R, final=True, revision=1), _word("w3", F)),
                                   (_utt(("w1", "w2", "w3"), q),)))),
        # w2, w3 final together with their utterance.
        dumps(event_record(_update(4, (_word("w2", P, final=True), _word("w3", F, final=True),
                                       _word("w4", F)),
                                   (_utt(("w1", "w2", "w3"), q, final=True),
                                    _utt(("w4",), q, utterance_id="u2"))))),
        dumps(event_record(_update(5, (_word("w4", F, final=True),),
                                   (_utt(("w4",), q, final=True, utterance_id="u2"),),
                                   final=True))),
    ]
    analysis = analyse(parse_log(lines, "hand.log"))
    by_id = {w.word_id: w for w in analysis.words}
    assert [c.label for c in by_id["w1"].changes] == [F, R, R]
    assert by_id["w1"].label_changes == 1
    assert by_id["w1"].final_reason == FinalReason.LEFT_WINDOW
    assert by_id["w2"].final_reason == FinalReason.UTTERANCE_CLOSED
    assert by_id["w4"].final_reason == FinalReason.CONVERSATION_ENDED
    # Final labels against gold: all four right.
    assert analysis.word_accuracy() == 1.0
    labels, matrix = analysis.confusion()
    assert matrix[labels.index(R)][labels.index(R)] == 1
    assert sum(map(sum, matrix)) == 4
    # Words seen: after 1 word the stream said statement for a question (wrong) and question
    # for a statement (wrong); after 2 and 3 words of the question it said question (right).
    assert analysis.function_accuracy_by_seen == [(1, 0.0, 2), (2, 1.0, 1), (3, 1.0, 1)]


def test_rates_count_final_labels_per_100_words_with_the_caution() -> None:
    words = [_word(f"a{i}", F) for i in range(8)] + [
        _word("a8", DisfluencyLabel.FILLER), _word("a9", R), _word("b0", P, speaker="B")]
    rates = {r.speaker: r for r in disfluency_rates(words)}
    assert rates["A"].words == 10 and rates["B"].words == 1
    assert rates["A"].per_100(DisfluencyLabel.FILLER) == pytest.approx(10.0)
    assert rates["A"].disfluent_per_100 == pytest.approx(20.0)  # filler + reparandum
    assert rates["B"].per_100(P) == pytest.approx(100.0)
    assert RATES_CAUTION in rates_table(list(rates.values()))
