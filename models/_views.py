"""The utterance as the function tagger sees it, and the check of one a caller built.

Kept apart from :mod:`~midstream.models._functions` because that module may be compiled
(``core/_build.py``): a compiled dataclass checks its field types itself and a compiled function
its argument types, so a caller's malformed view would raise a bare ``TypeError`` before
:func:`check_view` could name the problem as an :class:`~midstream.InputError`. Here, as plain
Python, the view holds whatever it was given until it is checked.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

from midstream._errors import InputError

__all__ = ["UtteranceView", "check_view"]


@dataclass(frozen=True, slots=True, kw_only=True)
class UtteranceView:
    """One utterance as the function tagger sees it.

    Parameters
    ----------
    speaker
        Speaker id; only equality with the previous utterance's speaker is used.
    words
        The cleaned words, lower case, in order (disfluent words already removed).
    removed
        How many words were removed as filler, editing term, reparandum or restart.
    complete
        ``False`` while the utterance may still grow; ``True`` once it has ended (an abandoned
        utterance too: a live stream cannot tell abandoned from ended, so training does not
        either).
    """

    speaker: str
    words: tuple[str, ...]
    removed: int = 0
    complete: bool = True

    def prefix(self, n: int) -> UtteranceView:
        """The view after only the first ``n`` cleaned words (incomplete when ``n`` is short)."""
        if n >= len(self.words):
            return self
        return UtteranceView(speaker=self.speaker, words=self.words[:n], removed=self.removed,
                             complete=False)


def check_view(view: object) -> UtteranceView:
    """Return ``view`` if it is a well-formed :class:`UtteranceView`, else raise InputError."""
    if not isinstance(view, UtteranceView):
        raise InputError(f"expected an UtteranceView, got {type(view).__name__}")
    words = view.words
    if not isinstance(words, tuple) or not all(map(isinstance, words, itertools.repeat(str))):
        raise InputError("UtteranceView.words must be a tuple of strings")
    if view.removed < 0:
        raise InputError(f"UtteranceView.removed must be >= 0, got {view.removed}")
    return view
