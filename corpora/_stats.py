"""Counts over annotated conversations: what a corpus holds before anyone trains on it.

Disfluency counts (labels, repairs) come from disfluency-annotated conversations only: an
unannotated conversation (``labels is None``) says nothing about how disfluent its speakers were.
Repairs are typed after Shriberg (1994): a *repetition* repairs with the same words, a
*substitution* with different ones, a *deletion* (restart) with none. Shriberg's insertions
(repair = reparandum plus new words) count as substitutions here, because only the repair onset,
not the repair's end, is annotated.

Restarts come in two kinds (``corpora/_restarts.py``): a ``bracket`` restart (a repair
structure with no repair, the deletions above) and an ``abandoned`` utterance (the speaker
broke the utterance off and started afresh: one of the ``incomplete_utterances`` the corpus
marks, most of which are cut off or trailed off instead). ``restarts`` counts each kind's
units, over all conversations (a corpus with a partial disfluency layer still marks abandoned
utterances);
``restart_words`` their words labelled ``restart`` in annotated conversations, a word inside
both kinds counted as abandoned.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field

from midstream import Conversation, DisfluencyLabel, Repair, UtteranceFunction, Word

#: Words a repair comparison skips: they are not what the speaker repairs or repairs with.
_NOT_CONTENT = frozenset({DisfluencyLabel.FILLER, DisfluencyLabel.EDIT_TERM})
#: Repair types, in the order the table prints them.
REPAIR_TYPES: tuple[str, ...] = ("repetition", "substitution", "deletion")
#: The two kinds of restart, in the order the table prints them.
RESTART_KINDS: tuple[str, ...] = ("bracket", "abandoned")


@dataclass(frozen=True, kw_only=True)
class CorpusStats:
    """Counts over a set of conversations.

    ``labels`` and ``repairs`` cover only the ``disfluency_annotated`` conversations, whose words
    number ``annotated_words``; every other count covers all conversations. ``speakers`` counts
    the distinct speakers of each conversation, summed. Mappings hold every key even at zero.
    """

    conversations: int = 0
    disfluency_annotated: int = 0
    speakers: int = 0
    utterances: int = 0
    incomplete_utterances: int = 0
    words: int = 0
    annotated_words: int = 0
    fragments: int = 0
    unbalanced_brackets: int = 0
    labels: dict[str, int] = field(default_factory=dict)
    repairs: dict[str, int] = field(default_factory=dict)
    functions: dict[str, int] = field(default_factory=dict)
    fine_classes: dict[str, int] = field(default_factory=dict)
    restarts: dict[str, int] = field(default_factory=dict)
    restart_words: dict[str, int] = field(default_factory=dict)

    def to_json(self) -> dict[str, object]:
        """The counts as a JSON-ready dict (mapping keys in a stable order)."""
        return {
            "conversations": self.conversations,
            "disfluency_annotated": self.disfluency_annotated,
            "speakers": self.speakers,
            "utterances": self.utterances,
            "incomplete_utterances": self.incomplete_utterances,
            "words": self.words,
            "annotated_words": self.annotated_words,
            "fragments": self.fragments,
            "unbalanced_brackets": self.unbalanced_brackets,
            "labels": dict(self.labels),
            "repairs": dict(self.repairs),
            "restarts": dict(self.restarts),
            "restart_words": dict(self.restart_words),
            "functions": dict(self.functions),
            "fine_classes": dict(sorted(self.fine_classes.items())),
        }


def repair_type(
    repair: Repair, words: tuple[Word, ...], labels: tuple[DisfluencyLabel, ...]
) -> str:
    """Shriberg's (1994) type of one repair: repetition, substitution or deletion.

    A repetition's repair repeats the reparandum word for word: the reparandum's words equal as
    many words of the same speaker from the repair onset on, fillers and editing terms left out
    on both sides; a broken-off reparandum word matches a repair word it begins ("th-", "the").
    """
    if repair.repair_onset is None:
        return "deletion"
    wanted = [words[i] for i in repair.reparandum if labels[i] not in _NOT_CONTENT]
    speaker = words[repair.repair_onset].speaker
    repair_words: list[Word] = []
    index = repair.repair_onset
    while len(repair_words) < len(wanted) and index < len(words):
        if words[index].speaker == speaker and labels[index] not in _NOT_CONTENT:
            repair_words.append(words[index])
        index += 1
    if not wanted or len(repair_words) < len(wanted):
        return "substitution"
    for old, new in zip(wanted, repair_words, strict=True):
        if not (old.text == new.text or (old.fragment and new.text.startswith(old.text))):
            return "substitution"
    return "repetition"


def corpus_stats(conversations: Iterable[Conversation]) -> CorpusStats:
    """Count conversations, words, utterances, disfluency labels and repair types.

    Reads the iterable once, holding one conversation at a time.

    Examples
    --------
    >>> from midstream import Conversation, Word
    >>> corpus_stats([Conversation(id="c", corpus="demo", utterances=(),
    ...                            words=(Word(text="hi", speaker="A"),))]).words
    1
    """
    labels: Counter[str] = Counter({label.value: 0 for label in DisfluencyLabel})
    repairs: Counter[str] = Counter({kind: 0 for kind in REPAIR_TYPES})
    functions: Counter[str] = Counter({function.value: 0 for function in UtteranceFunction})
    fine_classes: Counter[str] = Counter()
    restarts: Counter[str] = Counter(dict.fromkeys(RESTART_KINDS, 0))
    restart_words: Counter[str] = Counter(dict.fromkeys(RESTART_KINDS, 0))
    counts = Counter[str]()
    for conversation in conversations:
        counts["conversations"] += 1
        counts["speakers"] += len(conversation.speakers)
        counts["utterances"] += len(conversation.utterances)
        counts["words"] += len(conversation.words)
        counts["fragments"] += sum(1 for word in conversation.words if word.fragment)
        counts["unbalanced_brackets"] += conversation.unbalanced_brackets
        abandoned_words: set[int] = set()
        for utterance in conversation.utterances:
            functions[utterance.function.value] += 1
            fine_classes[utterance.fine_class] += 1
            counts["incomplete_utterances"] += not utterance.complete
            if utterance.abandoned:
                restarts["abandoned"] += 1
                abandoned_words.update(utterance.words)
        restarts["bracket"] += sum(1 for r in conversation.repairs if r.is_restart)
        if conversation.labels is not None:
            counts["disfluency_annotated"] += 1
            counts["annotated_words"] += len(conversation.words)
            gold = conversation.labels
            labels.update(label.value for label in gold)
            repairs.update(repair_type(r, conversation.words, gold) for r in conversation.repairs)
            for index, label in enumerate(gold):
                if label is DisfluencyLabel.RESTART:
                    restart_words["abandoned" if index in abandoned_words else "bracket"] += 1
    return CorpusStats(
        conversations=counts["conversations"],
        disfluency_annotated=counts["disfluency_annotated"],
        speakers=counts["speakers"],
        utterances=counts["utterances"],
        incomplete_utterances=counts["incomplete_utterances"],
        words=counts["words"],
        annotated_words=counts["annotated_words"],
        fragments=counts["fragments"],
        unbalanced_brackets=counts["unbalanced_brackets"],
        labels=dict(labels),
        repairs=dict(repairs),
        functions=dict(functions),
        fine_classes=dict(fine_classes.most_common()),
        restarts=dict(restarts),
        restart_words=dict(restart_words),
    )
