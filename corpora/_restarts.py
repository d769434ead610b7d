"""Abandoned utterances: the second form of a restart.

A restart (Shriberg 1994, *fresh start*) abandons what was said and repairs it with nothing. The
corpora show it in two forms. Inside an utterance, SwDA brackets it with an empty repair,
``[ X + ]`` (read by :mod:`~midstream.corpora._swda`). Across utterances, the transcribers end a
unit as incomplete and the speaker begins a new one: SwDA's ``-/`` ("end of cut-off unit", the
slash-unit convention of Meteer et al. 1995, *Dysfluency Annotation Stylebook for the
Switchboard Corpus*, whose section on slash units is cited from memory: the stylebook is not in
the corpus folder; checked in the SwDA coders' manual ``doc/manual.august1.html``, §2 "Units to
label", which quotes the convention, and §3 Communicative-Status, which tags an abandoned
utterance ``%`` "together with -/"), MRDA's
``==`` (checked: ``doc/mrda_manual.pdf``, Section 2 "Segmentation": marked where "a speaker
trails off or is interrupted and consequently does not complete his utterance") and Map Task's
``aban`` move flag (an abandoned move: HCRC Dialogue Structure Coding Manual, Carletta et al.
1996; from memory, the manual is not in the corpus folder).

An incomplete unit is also what a transcriber writes where the other speaker cuts the speaker
off, or where the speaker trails off at the end of a turn. Neither is a restart: the speaker
did not start afresh. So an incomplete utterance counts as *abandoned* only when

- the same speaker's next word starts a new utterance (not the continuation of this one or of an
  older one), and
- the other speakers said nothing in between but acknowledgements ("uh-huh", "right": the
  coarse function ``acknowledgement``) or non-verbal lines: the speaker kept the floor.

These rules are ours, settled while reading examples of SwDA's ``-/`` units (train and val)
against the definition above; SwDA val holds 45 units under them, 952 incomplete ones in all
(``midstream corpus stats``). A reader may exclude more candidates where its corpus marks a link
between two units (SwDA's ``--`` written across a backchannel joins one unit split in two).
"""

from __future__ import annotations

from collections.abc import Collection, Sequence

from midstream import UtteranceFunction, Word

__all__ = ["abandoned_utterances"]


def abandoned_utterances(
    words: Sequence[Word],
    utterance_words: Sequence[Sequence[int]],
    functions: Sequence[UtteranceFunction],
    candidates: Collection[int],
    *,
    continued: Collection[int] = (),
) -> set[int]:
    """Which of the ``candidates`` (incomplete utterances) were abandoned for a fresh start.

    Parameters
    ----------
    words : sequence of Word
        The conversation's words in time order.
    utterance_words : sequence of sequences of int
        Each utterance's word indices (ascending), in the conversation's utterance order.
    functions : sequence of UtteranceFunction
        Each utterance's coarse function.
    candidates : collection of int
        Indices of the utterances the corpus marks incomplete.
    continued : collection of int
        Indices of utterances the corpus marks as carrying on an earlier one: never a fresh start.

    Returns
    -------
    set of int
        The candidate indices that count as abandoned (rules in the module docstring).

    Examples
    --------
    >>> from midstream import Word
    >>> ws = [Word(text=t, speaker=s) for t, s in
    ...       [("i", "A"), ("was", "A"), ("uh-huh", "B"), ("we", "A"), ("could", "A")]]
    >>> ack, st = UtteranceFunction.ACKNOWLEDGEMENT, UtteranceFunction.STATEMENT
    >>> abandoned_utterances(ws, [(0, 1), (2,), (3, 4)], [st, ack, st], {0})
    {0}
    """
    owner: dict[int, int] = {}
    for u, indices in enumerate(utterance_words):
        for index in indices:
            owner[index] = u
    result: set[int] = set()
    for u in candidates:
        indices = utterance_words[u]
        if not indices:
            continue
        speaker = words[indices[-1]].speaker
        for index in range(indices[-1] + 1, len(words)):
            other = owner.get(index)
            if words[index].speaker == speaker:
                fresh = (other is not None and other != u and other not in continued
                         and utterance_words[other][0] == index)
                if fresh:
                    result.add(u)
                break
            if other is not None and functions[other] is not UtteranceFunction.ACKNOWLEDGEMENT:
                break  # the other speaker took the floor: cut off, or the turn ended
    return result
