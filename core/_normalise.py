"""Turn one transcript token into the word a speech recogniser would give, or nothing.

Transcripts carry punctuation, capitals, overlap marks and non-speech events that a recogniser
never emits. :func:`normalise_token` strips them so models train on what they will see live:

- lower case; sentence punctuation (``.,?!;:"``) removed; a question mark never survives, because
  a recogniser does not hear one and it would give the utterance function away;
- non-speech marks return ``None``: ``<laughter>``, ``<<long pause>>`` (and each piece of a
  multi-token ``<<...>>``), ``[noise]``, the overlap mark ``#`` on its own, dashes ``-``/``--``;
- apostrophes inside words stay (``don't``), those at the edges go (``'b'``);
- hyphens inside words stay (``twenty-five``, ``uh-huh``);
- word fragments, written with a trailing dash (``s-``) or, rarely, a leading one (``-s``), keep
  their letters without the dash and are flagged ``fragment=True``: the dash is transcriber
  punctuation like any other, and the flag lets evaluation leave fragments out.

The function is pure and caches recent results (bounded), so it is cheap on repeated tokens.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

#: Characters that are markup or punctuation, never part of a spoken word. Hyphens and
#: apostrophes are handled separately because they can sit inside a word.
_STRIP = re.compile(r"[^\w'\-]|_")
#: Non-speech events: a token that opens or closes an angle-bracket span, or is wholly in
#: square brackets (``[noise]``, the style of other transcription conventions).
_NON_SPEECH = re.compile(r"^\W*<|>\W*$|^\[[^\]]*\]\W*$")


@dataclass(frozen=True, slots=True, kw_only=True)
class NormalisedToken:
    """A recogniser-like word: lower case, no punctuation; ``fragment`` marks a broken-off word."""

    text: str
    fragment: bool = False


@lru_cache(maxsize=65536)
def normalise_token(raw: str) -> NormalisedToken | None:
    """Normalise one whitespace-free transcript token.

    Parameters
    ----------
    raw : str
        A token as written in a transcript, markup characters and punctuation included.

    Returns
    -------
    NormalisedToken or None
        ``None`` when the token is not a spoken word (non-speech mark, punctuation, markup).

    Examples
    --------
    >>> normalise_token("Don't,")
    NormalisedToken(text="don't", fragment=False)
    >>> normalise_token("s-,")
    NormalisedToken(text='s', fragment=True)
    >>> normalise_token("<laughter>.") is None, normalise_token("--") is None
    (True, True)
    """
    if _NON_SPEECH.search(raw):
        return None
    text = _STRIP.sub("", raw.lower())
    # Edge apostrophes quote or mark elision at word edges; hyphens at the edges mark a fragment.
    text = text.strip("'")
    fragment = text.endswith("-") or text.startswith("-")
    text = text.strip("-'")
    if not text:
        return None
    return NormalisedToken(text=text, fragment=fragment)
