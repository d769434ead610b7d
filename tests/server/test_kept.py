"""Kept records turn back into the states they were made from, and the collector drops them."""

from __future__ import annotations

import gc

from hypothesis import given
from hypothesis import strategies as st
from midstream import (
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)
from midstream.server._kept import (
    pack_update,
    pack_utterance,
    pack_word,
    unpack_update,
    unpack_utterance,
    unpack_word,
)

# Ids as the server lets them through: no control characters.
_ids = st.text(st.characters(blacklist_categories=("Cc", "Cs")), min_size=1, max_size=8)
_unit = st.floats(min_value=0.0, max_value=1.0)
words = st.builds(WordHypothesis, word_id=_ids, speaker=_ids,
                  label=st.sampled_from(DisfluencyLabel), confidence=_unit,
                  revision=st.integers(0, 50), final=st.booleans(),
                  reparandum_of=st.none() | _ids, interruption_point=st.booleans(),
                  text=st.text(max_size=8), start=st.none() | st.floats(0.0, 1e5),
                  end=st.none() | st.floats(0.0, 1e5))
utterances = st.builds(UtteranceHypothesis, utterance_id=_ids, speaker=_ids,
                       word_ids=st.lists(_ids, max_size=5).map(tuple), clean_text=st.text(),
                       function=st.sampled_from(UtteranceFunction), fine_class=st.text(),
                       confidence=_unit, revision=st.integers(0, 50), final=st.booleans())


@given(word=words, utterance=utterances)
def test_states_survive_a_round_trip(word: WordHypothesis,
                                     utterance: UtteranceHypothesis) -> None:
    assert unpack_word(pack_word(word)) == word
    assert unpack_utterance(pack_utterance(utterance)) == utterance


@given(seq=st.integers(1, 10**6), final=st.booleans(),
       ws=st.lists(words, max_size=4), us=st.lists(utterances, max_size=3),
       withdrawn=st.lists(_ids, max_size=3))
def test_updates_survive_a_round_trip(seq: int, final: bool, ws: list[WordHypothesis],
                                      us: list[UtteranceHypothesis],
                                      withdrawn: list[str]) -> None:
    update = HypothesisUpdate(seq=seq, server_time=1.5e9, conversation_final=final,
                              diff=HypothesisDiff(words=tuple(ws), utterances=tuple(us),
                                                  withdrawn_word_ids=tuple(withdrawn)))
    record = pack_update(update, list(map(pack_word, ws)), list(map(pack_utterance, us)))
    assert unpack_update(record) == update


@given(word=words, utterance=utterances)
def test_the_collector_stops_tracking_records(word: WordHypothesis,
                                              utterance: UtteranceHypothesis) -> None:
    # Only plain values inside: no enum member, no object the collector must follow.
    records = [pack_word(word), pack_utterance(utterance)]
    gc.collect()
    assert not any(gc.is_tracked(record) for record in records)
