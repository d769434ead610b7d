"""Token normalisation: transcript tokens become what a recogniser would give.

Examples come from SwDA transcript tokens (the Switchboard markup in the corpora README:
fragments end in ``-``, ``<laughter>`` and ``<<long pause>>`` are non-speech, ``#`` marks overlap).
"""

from __future__ import annotations

import re

import pytest
from hypothesis import given
from hypothesis import strategies as st
from midstream import NormalisedToken, normalise_token

#: What a normalised word may contain: word characters, inner hyphens and apostrophes.
_RECOGNISER_WORD = re.compile(r"^[^\W_](?:[\w'-]*[^\W_])?$")


@pytest.mark.parametrize(
    ("raw", "text", "fragment"),
    [
        ("Okay.", "okay", False),
        ("care?", "care", False),  # a question mark never survives: recognisers emit none
        ("Don't,", "don't", False),  # apostrophes inside words stay
        ("'b']]", "b", False),  # quotes around a word go
        ("twenty-five", "twenty-five", False),
        ("Uh-huh.", "uh-huh", False),
        ("#Yeah.#", "yeah", False),  # overlap marks attached to a word
        ("s-,", "s", True),  # SwDA fragment: trailing dash (corpora README)
        ("-s,", "s", True),  # fragment missing its start
        ("tha-", "tha", True),
        ("((word", "word", False),  # uncertain-transcription parentheses
    ],
)
def test_words_are_lower_case_without_punctuation(raw: str, text: str, fragment: bool) -> None:
    assert normalise_token(raw) == NormalisedToken(text=text, fragment=fragment)


@pytest.mark.parametrize(
    "raw",
    ["<laughter>", "<Laughter>.", "<<long", "pause>>", "</noise>", "[noise]", "#", "-", "--",
     "((", "))", "?", ".", "}#", "->", "="],
)
def test_non_speech_and_punctuation_give_nothing(raw: str) -> None:
    assert normalise_token(raw) is None


@given(st.text(max_size=40))
def test_any_token_gives_a_recogniser_word_or_nothing(raw: str) -> None:
    token = normalise_token(raw)
    if token is not None:
        assert "?" not in token.text
        assert token.text == token.text.lower()
        assert _RECOGNISER_WORD.match(token.text), token.text


@given(st.text(max_size=40))
def test_normalising_is_idempotent(raw: str) -> None:
    token = normalise_token(raw)
    if token is not None:
        again = normalise_token(token.text)
        assert again is not None
        assert again.text == token.text
        assert not again.fragment


@given(st.from_regex(r"[A-Za-z][a-z]{0,8}", fullmatch=True))
def test_a_trailing_dash_makes_a_fragment_of_any_word(word: str) -> None:
    assert normalise_token(f"{word}-") == NormalisedToken(text=word.lower(), fragment=True)
    assert normalise_token(f"{word}-,") == NormalisedToken(text=word.lower(), fragment=True)


@given(st.from_regex(r"[a-z<>\[\]#_ ]{0,20}", fullmatch=True))
def test_angle_bracket_marks_are_never_words(inner: str) -> None:
    assert normalise_token(f"<{inner}>") is None
