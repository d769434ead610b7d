"""Clarification requests from the shipped models, streamed through the engine.

The exchanges are invented for this test (a caller arranging a furniture delivery by phone); no
corpus text. An echo check repeats the partner's words to confirm them and a repetition request
asks the partner to say it again: both are clarification requests as docs/labels.md defines them
(ISO 24617-2 checkQuestion and autoNegative feedback on the partner's utterance).
"""

from __future__ import annotations

import pytest
from midstream import UtteranceFunction, UtteranceHypothesis, Word
from midstream.models import ModelBundle

# (speaker, words) turns; each turn is one utterance, its end hinted as a caller would.
_DELIVERY = (
    ("agent", "we can bring the wardrobe on thursday at four fifteen"),
    ("caller", "four fifteen or four fifty"),            # alternative echoing the partner
    ("agent", "four fifteen in the afternoon"),
    ("caller", "okay"),
    ("agent", "the driver will park by the side gate"),
    ("caller", "so by the side gate"),                   # echo check
    ("agent", "yes by the side gate"),
    ("caller", "and do you need me to sign anything"),
    ("agent", "the driver brings a form for the wardrobe"),
    ("caller", "sorry what did you say"),                # repetition request
    ("agent", "he brings a form to sign"),
    ("caller", "right thank you"),
)


@pytest.fixture(scope="module")
def functions() -> dict[str, UtteranceFunction]:
    """Each turn's text to the function of the utterance holding its last word (the word
    model may split a turn or take a word such as "sorry" for an editing term, so the turn's
    own words, not the clean text, find it)."""
    bundle = ModelBundle.load_default()
    engine = bundle.new_engine()
    latest: dict[str, UtteranceHypothesis] = {}
    last_words: dict[str, str] = {}
    n = 0
    for speaker, text in _DELIVERY:
        for token in text.split():
            for u in engine.add_word(f"w{n}", Word(text=token, speaker=speaker)).utterances:
                latest[u.utterance_id] = u
            n += 1
        last_words[text] = f"w{n - 1}"
        for u in engine.hint(speaker, turn_end=True).utterances:
            latest[u.utterance_id] = u
    for u in engine.finish().utterances:
        latest[u.utterance_id] = u
    final = [u for u in latest.values() if u.word_ids]
    assert all(u.final for u in final)
    holding = {w: u.function for u in final for w in u.word_ids}
    return {text: holding[word] for text, word in last_words.items()}


def test_an_echo_check_is_a_clarification_request(
        functions: dict[str, UtteranceFunction]) -> None:
    # The partner's words handed back for confirmation. A bare echo ("the side gate") is,
    # without prosody, what SwDA and MRDA code as an acknowledgement by mimicry (b^m, m), and
    # the model says so too; functions-coarse.md lists such phrasings and what they get.
    assert functions["so by the side gate"] is UtteranceFunction.CLARIFICATION_REQUEST
    assert functions["four fifteen or four fifty"] is UtteranceFunction.CLARIFICATION_REQUEST


def test_a_repetition_request_is_a_clarification_request(
        functions: dict[str, UtteranceFunction]) -> None:
    assert functions["sorry what did you say"] is UtteranceFunction.CLARIFICATION_REQUEST


def test_the_rest_of_the_exchange_is_not_taken_for_clarification(
        functions: dict[str, UtteranceFunction]) -> None:
    # The model must not call everything after the partner's turn a clarification request.
    assert functions["and do you need me to sign anything"] is UtteranceFunction.QUESTION
    assert functions["okay"] is UtteranceFunction.ACKNOWLEDGEMENT
    informs = [text for speaker, text in _DELIVERY if speaker == "agent"]
    taken = [text for text in informs
             if functions[text] is UtteranceFunction.CLARIFICATION_REQUEST]
    assert not taken
