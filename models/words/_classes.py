"""Closed-class word groups of spoken English, for the word CRF's substitution features.

A speaker who repairs without repeating a word usually swaps a word for one of the same kind:
"a- the", "he- she", "is- was", "in- on". Part-of-speech tags would say so, but a live
recogniser gives none, so the features read this fixed table instead: function words by group,
every other word ``-``. The groups are ordinary English grammar (common practice, no source);
the table is stored in each model file, so later edits here never change a trained model.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Final

__all__ = ["CLOSED_CLASSES"]

_GROUPS: Final = {
    # Determiners and possessives.
    "D": "a an the this that these those my your his her our their its some any no every each "
         "another",
    # Subject pronouns, alone or fused with a verb ("it's", "i'm").
    "P": "i you he she we they it there i'm i've i'd i'll you're you've you'd you'll he's he'd "
         "he'll she's she'd she'll we're we've we'd we'll they're they've they'd they'll it's "
         "it'd it'll that's there's",
    "O": "me him us them",
    "R": "in on at to for with from of about by into over under through after before around "
         "between during without against toward towards within upon across behind",
    "C": "and but or so because if when while although though since until unless whether",
    # Auxiliaries, copulas and modals, with their negated forms.
    "A": "is was are were be been being am do does did have has had will would can could should "
         "might may must shall don't doesn't didn't can't couldn't won't wouldn't isn't wasn't "
         "aren't weren't haven't hasn't hadn't shouldn't ain't",
    "W": "what where who why how which whose whom what's where's who's how's",
    "N": "not never",
}


def _table() -> dict[str, str]:
    table: dict[str, str] = {}
    for group, words in _GROUPS.items():
        for word in words.split():
            if word in table:
                raise AssertionError(f"{word!r} is in two word classes")
            table[word] = group
    return dict(sorted(table.items()))


#: Word -> class letter; words not listed are open-class.
CLOSED_CLASSES: Final[Mapping[str, str]] = MappingProxyType(_table())
