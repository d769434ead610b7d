"""The word checks at the edge refuse exactly by Unicode category, whatever shortcut they take.

The rule (from the project's limits): ids and speakers may not hold a control character
(category ``Cc``); word text needs at least one character outside categories ``C*`` and
``Z*``. The reference here is ``unicodedata.category`` itself, character by character.
"""

from __future__ import annotations

import unicodedata

import pytest
from midstream import EventError, Word
from midstream.server import ServerLimits
from midstream.server._limits import check_id, check_word

_LIMITS = ServerLimits()
# Every ASCII and Latin-1 character and the next block: all of Cc and its neighbours.
_CHARACTERS = [chr(c) for c in range(0x300)] + ["\u2028", "\u200b", "\u3000", "\ufeff"]


@pytest.mark.parametrize("char", _CHARACTERS, ids=lambda c: f"U+{ord(c):04X}")
def test_a_control_character_in_an_id_is_refused_and_nothing_else(char: str) -> None:
    value = f"a{char}b"
    if unicodedata.category(char) == "Cc":
        with pytest.raises(EventError, match="control character"):
            check_id(value, "word_id", _LIMITS)
        with pytest.raises(EventError, match="control character"):
            check_word("w1", Word(text="yes", speaker=value), _LIMITS)
    else:
        check_id(value, "word_id", _LIMITS)
        check_word(value, Word(text="yes", speaker="A"), _LIMITS)


@pytest.mark.parametrize("char", _CHARACTERS, ids=lambda c: f"U+{ord(c):04X}")
def test_text_needs_a_character_outside_control_and_separator_categories(char: str) -> None:
    text = f" {char}\t"
    if unicodedata.category(char)[0] in "CZ":
        with pytest.raises(EventError, match="whitespace or control"):
            check_word("w1", Word(text=text, speaker="A"), _LIMITS)
    else:
        check_word("w1", Word(text=text, speaker="A"), _LIMITS)


@pytest.mark.parametrize("value", ["", " ", "\t\u3000"])
def test_blank_ids_and_speakers_are_refused_as_empty(value: str) -> None:
    with pytest.raises(EventError, match="is empty"):
        check_word(value, Word(text="yes", speaker="A"), _LIMITS)
    with pytest.raises(EventError, match=r"speaker of word 'w1'.* is empty"):
        check_word("w1", Word(text="yes", speaker=value), _LIMITS)
