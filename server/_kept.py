"""Published states as the session keeps them: tuples of plain values.

Why not keep the :class:`~midstream.WordHypothesis` objects themselves: a live server keeps
every conversation's replay buffer, revision history and latest states, about fourteen objects
per word taken in, and Python's cycle collector walks every such object it tracks. With a few
hundred conversations talking, that heap grows by tens of thousands of objects a second, and
each collection of it stopped the event loop for longer as it grew: tens of milliseconds for the
youngest generation, most of a second for a full one (``gc.callbacks`` timings of 700
conversations x 120 words in-process, while this was written), which is what the p99 latency of
a loaded server was made of.

A tuple holding only strings, numbers, booleans and ``None`` cannot be part of a reference
cycle, and the collector stops tracking it the first time it meets it. A tuple holding such
tuples is untracked one collection later (the collector checks a tuple before the tuples inside
it), so records nest at most one level: word ids are joined into one string, and an update
record holds its states' records directly. Kept in this form, history is untracked by the time
it leaves the young generations, however much of it the limits allow. Records are built once per
published state and turned back into objects only when read: snapshots, replays to followers,
``GetRevisions``.
"""

from __future__ import annotations

from typing import Any, Final, TypeAlias, TypeGuard

from midstream import (
    DisfluencyLabel,
    HypothesisDiff,
    HypothesisUpdate,
    UtteranceFunction,
    UtteranceHypothesis,
    WordHypothesis,
)

#: ``(word_id, speaker, label, confidence, revision, final, reparandum_of, interruption_point,
#: text, start, end)``; the text is the engine's own string object, not a copy.
WordRecord: TypeAlias = tuple[str, str, str, float, int, bool, "str | None", bool, str,
                              "float | None", "float | None"]
#: ``(utterance_id, speaker, word ids joined by ID_SEPARATOR, clean_text, function, fine_class,
#: confidence, revision, final)``
UtteranceRecord: TypeAlias = tuple[str, str, str, str, str, str, float, int, bool]
#: ``(seq, server_time, conversation_final, withdrawn ids joined, epoch, number of word records,
#: then the word records and the utterance records)``
UpdateRecord: TypeAlias = tuple[Any, ...]

#: Joins word ids in a record. Ids that reach a session hold no control character (the server
#: refuses them at the edge), so it cannot occur inside one; packing checks anyway.
ID_SEPARATOR: Final = "\x1f"
#: Where a record keeps its revision count.
WORD_REVISION: Final = 4
UTTERANCE_REVISION: Final = 7
#: Where an update record keeps its sequence number.
UPDATE_SEQ: Final = 0
_UPDATE_HEAD = 6

# Value -> member by dict lookup: an enum call goes through its metaclass and costs more.
_LABELS: Final = {label.value: label for label in DisfluencyLabel}
_FUNCTIONS: Final = {function.value: function for function in UtteranceFunction}


def is_word_record(record: WordRecord | UtteranceRecord) -> TypeGuard[WordRecord]:
    """Whether a kept state record is a word's (11 fields; an utterance's has 9)."""
    return len(record) == 11


def is_utterance_record(record: WordRecord | UtteranceRecord) -> TypeGuard[UtteranceRecord]:
    return len(record) == 9


def pack_word(word: WordHypothesis) -> WordRecord:
    return (word.word_id, word.speaker, word.label.value, float(word.confidence), word.revision,
            word.final, word.reparandum_of, word.interruption_point, word.text, word.start,
            word.end)


def unpack_word(record: WordRecord) -> WordHypothesis:
    word_id, speaker, label, confidence, revision, final, reparandum_of, ip, text, start, end = \
        record
    return WordHypothesis(word_id=word_id, speaker=speaker, label=_LABELS[label],
                          confidence=confidence, revision=revision, final=final,
                          reparandum_of=reparandum_of, interruption_point=ip, text=text,
                          start=start, end=end)


def _join(ids: tuple[str, ...]) -> str:
    joined = ID_SEPARATOR.join(ids)
    if joined.count(ID_SEPARATOR) != max(len(ids) - 1, 0) or "" in ids:
        raise ValueError(f"a word id is empty or holds {ID_SEPARATOR!r}: {ids!r}")
    return joined


def _split(joined: str) -> tuple[str, ...]:
    return tuple(joined.split(ID_SEPARATOR)) if joined else ()


def pack_utterance(utterance: UtteranceHypothesis) -> UtteranceRecord:
    return (utterance.utterance_id, utterance.speaker, _join(utterance.word_ids),
            utterance.clean_text, utterance.function.value, utterance.fine_class,
            float(utterance.confidence), utterance.revision, utterance.final)


def unpack_utterance(record: UtteranceRecord) -> UtteranceHypothesis:
    (utterance_id, speaker, word_ids, clean_text, function, fine_class, confidence, revision,
     final) = record
    return UtteranceHypothesis(utterance_id=utterance_id, speaker=speaker,
                               word_ids=_split(word_ids), clean_text=clean_text,
                               function=_FUNCTIONS[function], fine_class=fine_class,
                               confidence=confidence, revision=revision, final=final)


def pack_update(update: HypothesisUpdate, words: list[WordRecord],
                utterances: list[UtteranceRecord]) -> UpdateRecord:
    """The record of ``update`` whose states the caller has already packed, in diff order."""
    return (update.seq, update.server_time, update.conversation_final,
            _join(update.diff.withdrawn_word_ids), update.epoch, len(words), *words,
            *utterances)


def unpack_update(record: UpdateRecord) -> HypothesisUpdate:
    seq, server_time, final, withdrawn, epoch, n_words = record[:_UPDATE_HEAD]
    split = _UPDATE_HEAD + n_words
    return HypothesisUpdate(
        seq=seq, server_time=server_time, conversation_final=final, epoch=epoch,
        diff=HypothesisDiff(words=tuple(map(unpack_word, record[_UPDATE_HEAD:split])),
                            utterances=tuple(map(unpack_utterance, record[split:])),
                            withdrawn_word_ids=_split(withdrawn)))


# --- what a record costs --------------------------------------------------------------------
#
# Byte limits count each kept record at an estimate that is never below what it really takes
# (tests/server/test_memory_bound.py measures a filled conversation with tracemalloc against
# the estimate). CPython 3.11 on 64 bits, allocations as tracemalloc counts them, each rounded
# up to 8 bytes: a tuple is 40 bytes + 8 per item + 16 of collector header (while tracked), a
# float 24, an int above 256 28 (32), a str 49 + its length in ASCII (up to 80 + 4 per code
# point otherwise). A string or number shared with another record or the engine is counted
# in every record that holds it, and a record held by the replay buffer, the history and the
# snapshot tables is counted in each: the estimate errs high, never low.

#: A str object without its characters, upper bound.
STR_OVERHEAD: Final = 80
#: A word record without its strings and times: its tuple of eleven (144), confidence (32),
#: revision (32), and the slot that holds it (16).
WORD_RECORD_BYTES: Final = 224
#: A float (a word's start or end time), rounded up.
FLOAT_BYTES: Final = 24
#: An utterance record without its strings: tuple (136), confidence, revision, slot.
UTTERANCE_RECORD_BYTES: Final = 216
#: An update record without its states and per-state slots: tuple head (56 + 6 x 8), seq,
#: server time, the withdrawn-ids string's overhead, slot.
UPDATE_RECORD_BYTES: Final = 56 + 48 + 32 + 32 + STR_OVERHEAD + 16
#: A revision entry around its record: the (seq, time, record) tuple (80), seq, time, slot.
REVISION_ENTRY_BYTES: Final = 80 + 32 + 32 + 16
#: A snapshot table's entry around its record (an ordered dictionary's slot and links).
TABLE_ENTRY_BYTES: Final = 128


def _chars(text: str) -> int:
    # isascii() is O(1) in CPython; a non-ASCII string takes up to 4 bytes per code point.
    return len(text) if text.isascii() else 4 * len(text)


def word_record_bytes(record: WordRecord) -> int:
    """Estimated bytes of a word record (never below its real size)."""
    repaired_by, start, end = record[6], record[9], record[10]
    # The word's text is usually the engine's own string, counted here all the same: the
    # estimate stays high once the engine forgets the word and only the record holds it.
    return (WORD_RECORD_BYTES + 3 * STR_OVERHEAD + _chars(record[0]) + _chars(record[1])
            + _chars(record[8])
            + (STR_OVERHEAD + _chars(repaired_by) if repaired_by is not None else 0)
            + (FLOAT_BYTES if start is not None else 0) + (FLOAT_BYTES if end is not None else 0))


def utterance_record_bytes(record: UtteranceRecord) -> int:
    """Estimated bytes of an utterance record (never below its real size)."""
    return (UTTERANCE_RECORD_BYTES + 5 * STR_OVERHEAD + _chars(record[0]) + _chars(record[1])
            + _chars(record[2]) + _chars(record[3]) + _chars(record[5]))


def update_record_bytes(record: UpdateRecord, states_bytes: int) -> int:
    """Estimated bytes of an update record whose states' records cost ``states_bytes``."""
    return (UPDATE_RECORD_BYTES + 8 * (len(record) - _UPDATE_HEAD) + _chars(record[3])
            + states_bytes)
