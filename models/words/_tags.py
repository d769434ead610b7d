"""The word CRF's internal tags and the training sequences built from annotated conversations.

The CRF predicts one internal tag per word that carries more structure than the published
:class:`~midstream.DisfluencyLabel`: it tells the last word of a reparandum (the interruption
point follows it) from the others, and the last word of a restart likewise, and it is crossed
with an utterance-end flag so one decode gives both layers.

=============  =====================================================
tag            meaning
=============  =====================================================
``fl``         fluent word
``fil``        filled pause
``et``         explicit editing term
``dm``         discourse marker
``rp``         reparandum word, not the last
``rp.ip``      last reparandum word (the interruption point follows)
``ro``         repair onset
``rs``         restart word, not the last
``rs.ip``      last restart word
=============  =====================================================

A tag followed by ``/end`` marks a word after which an utterance ends (``fl/end``).
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Final

from midstream import Conversation, DisfluencyLabel, Word

__all__ = [
    "END_SUFFIX",
    "TAG_LABEL",
    "ChannelSequence",
    "channel_sequences",
    "chunk_at_ends",
    "decode_tag",
    "encode_tag",
]

END_SUFFIX: Final = "/end"

#: Published label of each internal disfluency tag.
TAG_LABEL: Final[dict[str, DisfluencyLabel]] = {
    "fl": DisfluencyLabel.FLUENT,
    "fil": DisfluencyLabel.FILLER,
    "et": DisfluencyLabel.EDIT_TERM,
    "dm": DisfluencyLabel.DISCOURSE_MARKER,
    "rp": DisfluencyLabel.REPARANDUM,
    "rp.ip": DisfluencyLabel.REPARANDUM,
    "ro": DisfluencyLabel.REPAIR,
    "rs": DisfluencyLabel.RESTART,
    "rs.ip": DisfluencyLabel.RESTART,
}

#: Tags whose word is followed by an interruption point.
IP_TAGS: Final = frozenset({"rp.ip", "rs.ip"})
#: Tags of words a repair replaces (reparandum or restart).
REPLACED_TAGS: Final = frozenset({"rp", "rp.ip", "rs", "rs.ip"})
#: Tags of the interregnum between an interruption point and the repair.
INTERREGNUM_TAGS: Final = frozenset({"fil", "et", "dm"})

_LABEL_TAG: Final[dict[DisfluencyLabel, str]] = {
    DisfluencyLabel.FLUENT: "fl",
    DisfluencyLabel.FILLER: "fil",
    DisfluencyLabel.EDIT_TERM: "et",
    DisfluencyLabel.DISCOURSE_MARKER: "dm",
    DisfluencyLabel.REPARANDUM: "rp",
    DisfluencyLabel.REPAIR: "ro",
    DisfluencyLabel.RESTART: "rs",
}


def encode_tag(base: str, ends_utterance: bool) -> str:
    """Join a disfluency tag and the utterance-end flag into one CRF tag."""
    return base + END_SUFFIX if ends_utterance else base


def decode_tag(tag: str) -> tuple[str, DisfluencyLabel, bool]:
    """Split a CRF tag into (disfluency tag, published label, ends utterance).

    >>> decode_tag("rp.ip/end")
    ('rp.ip', <DisfluencyLabel.REPARANDUM: 'reparandum'>, True)
    """
    ends = tag.endswith(END_SUFFIX)
    base = tag[: -len(END_SUFFIX)] if ends else tag
    return base, TAG_LABEL[base], ends


@dataclass(frozen=True, slots=True, kw_only=True)
class ChannelSequence:
    """One speaker's words of a conversation in time order, with gold tags.

    ``indices`` are the words' indices in the conversation; ``after_other_speaker[k]`` is true
    when another speaker's word came between word ``k-1`` and word ``k`` of this channel.
    ``tags`` is ``None`` when the conversation has no disfluency annotation; ``ends`` always
    holds the gold utterance ends. ``other_words[k]`` counts the other speakers' words between
    word ``k-1`` and word ``k`` (0 for the channel's first word).
    """

    conversation: str
    speaker: str
    indices: tuple[int, ...]
    words: tuple[Word, ...]
    after_other_speaker: tuple[bool, ...]
    ends: tuple[bool, ...]
    tags: tuple[str, ...] | None
    other_words: tuple[int, ...] = ()


def channel_sequences(conversation: Conversation) -> list[ChannelSequence]:
    """Split a conversation into per-speaker channels with gold tags.

    Utterance ends come from the conversation's utterances (the last word of each); disfluency
    tags from ``labels`` with the interruption points of ``repairs``.
    """
    ends_at = {u.words[-1] for u in conversation.utterances if u.words}
    ip_at = {r.interruption_point for r in conversation.repairs if r.reparandum}
    labels = conversation.labels
    result = []
    for speaker in conversation.speakers:
        indices = [i for i, w in enumerate(conversation.words) if w.speaker == speaker]
        other_words = [0] + [b - a - 1 for a, b in itertools.pairwise(indices)]
        after_other = [n > 0 for n in other_words]
        ends = [i in ends_at for i in indices]
        if indices:
            # A channel's last word ends whatever utterance it is in.
            ends[-1] = True
        tags: tuple[str, ...] | None = None
        if labels is not None:
            tag_list = []
            for position, i in enumerate(indices):
                base = _LABEL_TAG[labels[i]]
                if base in {"rp", "rs"} and _is_last_replaced(
                    position, indices, labels, ip_at
                ):
                    base += ".ip"
                tag_list.append(encode_tag(base, ends[position]))
            tags = tuple(tag_list)
        result.append(
            ChannelSequence(
                conversation=conversation.id,
                speaker=speaker,
                indices=tuple(indices),
                words=tuple(conversation.words[i] for i in indices),
                after_other_speaker=tuple(after_other),
                other_words=tuple(other_words),
                ends=tuple(ends),
                tags=tags,
            )
        )
    return result


def _is_last_replaced(
    position: int,
    indices: Sequence[int],
    labels: Sequence[DisfluencyLabel],
    ip_at: set[int],
) -> bool:
    if indices[position] in ip_at:
        return True
    # Unbalanced or unannotated brackets leave no Repair: fall back on the label sequence.
    if position + 1 >= len(indices):
        return True
    return labels[indices[position + 1]] != labels[indices[position]]


def chunk_at_ends(n: int, ends: Sequence[bool], *, max_length: int) -> Iterator[range]:
    """Cut ``range(n)`` into pieces that end at utterance ends, each at most ``max_length`` long.

    An utterance longer than ``max_length`` is cut where the limit falls.
    """
    start = 0
    last_end = -1
    for i in range(n):
        if ends[i]:
            last_end = i
        if i - start + 1 >= max_length:
            cut = last_end if last_end >= start else i
            yield range(start, cut + 1)
            start = cut + 1
    if start < n:
        yield range(start, n)
