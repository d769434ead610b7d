"""Reader for Disfl-QA (Gupta et al., Findings of ACL 2021): written questions with disfluencies.

Each item pairs a crowd-written disfluent question with the fluent question it came from. The
reader recovers the disfluency structure by aligning the two (both normalised like recogniser
words):

1. A longest common subsequence of the fluent tokens inside the disfluent ones, preferring the
   *latest* disfluent copy of a repeated word, so in "what do petrologists no what do unstable
   isotope studies indicate" the retained "what do" is the second one (the repair), not the first.
2. Each maximal run of disfluent tokens left out is a deleted span. Its interregnum is the longest
   run at its end made of :data:`EDIT_TERMS` and :data:`FILLED_PAUSES` (matched greedily from the
   end, longest phrase first); the rest is the reparandum. The first retained word after the span
   is the repair onset. A span with nothing retained after it is a restart (no repair onset); a
   span that is only editing terms has no reparandum and no repair structure.
3. Labels: reparandum words ``REPARANDUM`` (``RESTART`` for a restart), interregnum words
   ``FILLER`` (filled pauses) or ``EDIT_TERM``, the repair onset ``REPAIR``, the rest ``FLUENT``.

Only an item whose fluent question is an exact subsequence of the disfluent one has a faithful
in-place structure. Otherwise (about 18% of ``train.json``: corrections placed at the end, "no
sorry it was Warsaw", rewordings, typos in one of the two) the conversation is still given, with
``labels=None`` and no repairs, so it is never scored as fluent.

Each question with at least one word is one :class:`Conversation` (id = the item's SQuAD id,
one speaker ``"A"``, one utterance with function ``question``). Splits: ``train`` is
``train.json``, ``val`` is ``dev.json``; the test file is held back.

How the editing-term list was derived
-------------------------------------
From ``train.json`` only: over the items with an in-place structure, count for each 1- to
3-token phrase the questions whose deleted spans contain it, and the questions whose fluent
original contains it. A phrase is an editing term when it occurs in the deleted spans of at
least 20 training questions and in at least 90% of all questions that contain it at all (deleted
span or fluent original): "no" (3,066 vs 54), "or" (1,377 vs 87), "sorry" (612 vs 0)... while
"like" (66 vs 13) and "well" (21 vs 18) fail. Candidates were taken from the most frequent
span-final phrases and from Shriberg's (1994) examples of editing terms; longer phrases made
only of listed ones ("no i mean") are left to the greedy match. ``tests/corpora/test_disflqa.py``
recounts both figures for every listed phrase.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Sequence
from pathlib import Path

from midstream import (
    Conversation,
    CorpusNotFoundError,
    DisfluencyLabel,
    Repair,
    TranscriptFormatError,
    Utterance,
    UtteranceFunction,
    Word,
    normalise_token,
)

#: Editing terms found in the training data (see the module docstring for the rule).
EDIT_TERMS: tuple[str, ...] = (
    "no", "wait", "sorry", "oops", "rather", "instead", "actually", "or", "oh",
    "i mean", "i meant", "meant to say", "make that", "scratch that", "tell me",
)
#: Filled pauses among the interregnum words: the same rule, and these spell hesitations.
FILLED_PAUSES: tuple[str, ...] = ("uh", "um", "umm", "er")

_PHRASES: tuple[tuple[str, ...], ...] = tuple(sorted(
    (tuple(p.split()) for p in (*EDIT_TERMS, *FILLED_PAUSES)), key=len, reverse=True))
_FILLED = frozenset(FILLED_PAUSES)
_SPLIT_FILES = {"train": "train.json", "val": "dev.json"}
#: Longest question accepted, in tokens: the longest in the corpus is far shorter, and the
#: alignment's table grows with the square of the length.
MAX_TOKENS = 400
_SPEAKER = "A"


def tokens(text: str) -> list[str]:
    """The recogniser-like words of a question (punctuation and case dropped)."""
    out = []
    for raw in text.split():
        token = normalise_token(raw)
        if token is not None:
            out.append(token.text)
    return out


def retained(disfluent: Sequence[str], fluent: Sequence[str]) -> tuple[list[bool], bool]:
    """Which disfluent tokens the fluent question keeps, and whether it keeps all of its own.

    A longest common subsequence, traced back from the end so that each fluent token takes the
    latest disfluent token it can: repairs follow their reparanda.

    Examples
    --------
    >>> keep, exact = retained("what do x no what do y".split(), "what do y".split())
    >>> [t for t, k in zip("what do x no what do y".split(), keep) if not k], exact
    (['what', 'do', 'x', 'no'], True)
    """
    n, m = len(disfluent), len(fluent)
    table = [[0] * (m + 1) for _ in range(n + 1)]
    for i in range(n):
        row, below = table[i], table[i + 1]
        for j in range(m):
            below[j + 1] = (row[j] + 1 if disfluent[i] == fluent[j]
                            else max(row[j + 1], below[j]))
    keep = [False] * n
    i, j = n, m
    while i > 0 and j > 0:
        if disfluent[i - 1] == fluent[j - 1] and table[i][j] == table[i - 1][j - 1] + 1:
            keep[i - 1] = True
            i, j = i - 1, j - 1
        elif table[i - 1][j] >= table[i][j - 1]:
            i -= 1
        else:
            j -= 1
    return keep, table[n][m] == m


def _interregnum_start(span: Sequence[str]) -> int:
    """Position in ``span`` where its trailing run of editing terms and filled pauses starts."""
    end = len(span)
    while end > 0:
        for phrase in _PHRASES:
            if end >= len(phrase) and tuple(span[end - len(phrase):end]) == phrase:
                end -= len(phrase)
                break
        else:
            break
    return end


def structure(disfluent: Sequence[str], keep: Sequence[bool]
              ) -> tuple[tuple[DisfluencyLabel, ...], tuple[Repair, ...]]:
    """Labels and repair structures from the retained-token mask of an in-place item."""
    labels = [DisfluencyLabel.FLUENT] * len(disfluent)
    repairs = []
    i = 0
    while i < len(disfluent):
        if keep[i]:
            i += 1
            continue
        j = i
        while j < len(disfluent) and not keep[j]:
            j += 1
        cut = i + _interregnum_start(disfluent[i:j])
        reparandum, interregnum = tuple(range(i, cut)), tuple(range(cut, j))
        onset = j if j < len(disfluent) else None
        for k in interregnum:
            labels[k] = (DisfluencyLabel.FILLER if disfluent[k] in _FILLED
                         else DisfluencyLabel.EDIT_TERM)
        for k in reparandum:
            labels[k] = (DisfluencyLabel.REPARANDUM if onset is not None
                         else DisfluencyLabel.RESTART)
        if reparandum:
            if onset is not None:
                labels[onset] = DisfluencyLabel.REPAIR
            repairs.append(Repair(reparandum=reparandum, interregnum=interregnum,
                                  repair_onset=onset))
        i = j
    return tuple(labels), tuple(repairs)


def parse_item(item_id: str, item: object, *, source: str = "") -> Conversation | None:
    """One Disfl-QA item (``{"original": ..., "disfluent": ...}``) as a conversation.

    Returns ``None`` for an item whose disfluent question holds no word (two items of
    ``train.json`` hold only quotes or a space): there is nothing to tag.

    Raises
    ------
    TranscriptFormatError
        When the item is not an object with string fields ``original`` and ``disfluent``, or a
        question is longer than :data:`MAX_TOKENS` words.
    """
    if not isinstance(item, dict):
        raise TranscriptFormatError(f"item {item_id!r} is not an object", source=source,
                                    field=item_id)
    texts = {}
    for key in ("original", "disfluent"):
        value = item.get(key)
        if not isinstance(value, str):
            raise TranscriptFormatError(f"item {item_id!r} needs a string {key!r}",
                                        source=source, field=key)
        texts[key] = tokens(value)
        if len(texts[key]) > MAX_TOKENS:
            raise TranscriptFormatError(f"item {item_id!r} has more than {MAX_TOKENS} words",
                                        source=source, field=key)
    disfluent, fluent = texts["disfluent"], texts["original"]
    if not disfluent:
        return None
    keep, exact = retained(disfluent, fluent)
    labels, repairs = structure(disfluent, keep) if exact else (None, ())
    words = tuple(Word(text=t, speaker=_SPEAKER) for t in disfluent)
    utterance = Utterance(speaker=_SPEAKER, words=tuple(range(len(words))),
                          function=UtteranceFunction.QUESTION, fine_tag="question",
                          fine_class="question")
    return Conversation(id=item_id, corpus="disfl_qa", words=words, utterances=(utterance,),
                        labels=labels, repairs=repairs)


def read_disflqa(root: Path, *, split: str | None = None) -> Iterator[Conversation]:
    """Read Disfl-QA questions from the corpus folder ``root``, in file order.

    Parameters
    ----------
    root : Path
        The folder holding ``train.json`` and ``dev.json``.
    split : {"train", "val"}, optional
        One split; both, train first, when ``None``.

    Raises
    ------
    CorpusNotFoundError
        For the ``test`` split (held back) or another unknown split, or a missing file.
    TranscriptFormatError
        When a file is not a JSON object of items.
    """
    if split is None:
        names = list(_SPLIT_FILES.values())
    elif split in _SPLIT_FILES:
        names = [_SPLIT_FILES[split]]
    elif split == "test":
        raise CorpusNotFoundError(f"{root / 'test.json'}: the Disfl-QA test split is held back "
                                  "on purpose; tune on train, report on val")
    else:
        raise CorpusNotFoundError(f"unknown Disfl-QA split {split!r} (train, val)")
    for name in names:
        path = root / name
        if not path.is_file():
            raise CorpusNotFoundError(f"Disfl-QA file {path} not found")
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise TranscriptFormatError(f"not JSON: {exc}", source=str(path)) from None
        if not isinstance(data, dict):
            raise TranscriptFormatError("expected a JSON object of items", source=str(path))
        for item_id, item in data.items():
            conversation = parse_item(item_id, item, source=str(path))
            if conversation is not None:
                yield conversation
