"""Readers that turn annotated conversation corpora into recogniser-like word streams.

``read_corpus`` detects the corpus kind from the folder (SwDA, MRDA, Map Task, Disfl-QA, or a
folder/file of Midstream's own JSON Lines or inline-markup format) and yields
:class:`midstream.Conversation` objects whose words are normalised the way a speech recogniser
would give them. ``normalise_token`` lives in the core (the models normalise live words with
it too) and is re-exported here beside the readers that use it.
"""

from midstream import normalise_token
from midstream.corpora._detect import CorpusKind, detect_kind, read_corpus
from midstream.corpora._inline import read_inline, write_inline
from midstream.corpora._jsonl import read_jsonl, write_jsonl
from midstream.corpora._stats import CorpusStats, corpus_stats

__all__ = [
    "CorpusKind",
    "CorpusStats",
    "corpus_stats",
    "detect_kind",
    "normalise_token",
    "read_corpus",
    "read_inline",
    "read_jsonl",
    "write_inline",
    "write_jsonl",
]
