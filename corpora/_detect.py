"""Tell which kind of corpus a path holds, and read it through the right reader.

The kinds are recognised by what the folder holds, checked in this order:

========== ===============================================================
kind       what marks it
========== ===============================================================
swda       a ``sw*utt/`` folder holding ``.utt`` files
mrda       a ``database/`` folder holding ``.dadb`` files
maptask    a ``moves/`` folder holding ``.moves.xml`` files
disfl_qa   a ``train.json`` or ``dev.json`` file
jsonl      a ``.jsonl`` file, or a folder holding ``.jsonl`` files
inline     an ``.inline`` file, or a folder holding ``.inline`` files
========== ===============================================================

Splits are lists of conversation names, one a line, in ``splits/<split>.txt`` inside the corpus
folder (SwDA conversation numbers, MRDA meeting names, Map Task dialogue names, JSON Lines and
inline-markup conversation ids). Disfl-QA has a file per split instead (``train`` is
``train.json``, ``val`` is ``dev.json``). The test splits of the shipped corpora are held back,
so asking for ``test`` there fails with a message that says so.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from enum import StrEnum
from pathlib import Path

from midstream import Conversation, CorpusNotFoundError
from midstream.corpora._disflqa import read_disflqa
from midstream.corpora._inline import SUFFIX as INLINE_SUFFIX
from midstream.corpora._inline import read_inline
from midstream.corpora._jsonl import read_jsonl
from midstream.corpora._maptask import read_maptask
from midstream.corpora._mrda import read_mrda
from midstream.corpora._swda import read_swda


class CorpusKind(StrEnum):
    """The kinds of corpus :func:`read_corpus` reads."""

    SWDA = "swda"
    MRDA = "mrda"
    MAPTASK = "maptask"
    DISFL_QA = "disfl_qa"
    JSONL = "jsonl"
    INLINE = "inline"


_LOOKED_FOR = ("sw*utt/*.utt (SwDA), database/*.dadb (MRDA), moves/*.moves.xml (Map Task), "
               "train.json or dev.json (Disfl-QA), *.jsonl (Midstream JSON Lines), "
               "*.inline (inline disfluency markup)")
_SPLIT_NAME = re.compile(r"[A-Za-z0-9_-]{1,64}")
_HELD_BACK = ("the test splits of the annotated corpora are held back on purpose: tune on "
              "train, report on val")


def _has(folder: Path, pattern: str) -> bool:
    return next(folder.glob(pattern), None) is not None


def detect_kind(path: Path | str) -> CorpusKind:
    """The kind of corpus at ``path`` (a folder, or a ``.jsonl`` or ``.inline`` file).

    Raises
    ------
    CorpusNotFoundError
        When the path does not exist or holds none of the known kinds; the message names the
        path and what was looked for.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     _ = (Path(folder) / "calls.jsonl").write_text("")
    ...     detect_kind(Path(folder)).value
    'jsonl'
    """
    path = Path(path)
    if path.is_file():
        if path.suffix == ".jsonl":
            return CorpusKind.JSONL
        if path.suffix == INLINE_SUFFIX:
            return CorpusKind.INLINE
        raise CorpusNotFoundError(f"{path}: a file, but not a .jsonl file (nor "
                                  f"{INLINE_SUFFIX}); looked for {_LOOKED_FOR}")
    if not path.is_dir():
        raise CorpusNotFoundError(f"{path}: no such file or folder")
    if _has(path, "sw*utt/*.utt"):
        return CorpusKind.SWDA
    if _has(path, "database/*.dadb"):
        return CorpusKind.MRDA
    if _has(path, "moves/*.moves.xml"):
        return CorpusKind.MAPTASK
    if (path / "train.json").is_file() or (path / "dev.json").is_file():
        return CorpusKind.DISFL_QA
    if _has(path, "*.jsonl"):
        return CorpusKind.JSONL
    if _has(path, f"*{INLINE_SUFFIX}"):
        return CorpusKind.INLINE
    raise CorpusNotFoundError(f"{path}: no corpus of a known kind; looked for {_LOOKED_FOR}")


def split_names(root: Path, split: str) -> tuple[str, ...]:
    """The conversation names listed in ``root/splits/<split>.txt`` (blank lines and ``#``
    comments skipped).

    Raises
    ------
    CorpusNotFoundError
        When the split name is not a plain name or its file does not exist (the message names
        the file and says the test splits are held back).
    """
    if not _SPLIT_NAME.fullmatch(split):
        raise CorpusNotFoundError(f"split {split!r} is not a plain name (letters, digits, _ -)")
    path = root / "splits" / f"{split}.txt"
    if not path.is_file():
        raise CorpusNotFoundError(f"split {split!r}: no file {path}; {_HELD_BACK}")
    lines = path.read_text(encoding="utf-8", errors="replace").splitlines()
    return tuple(name for line in lines if (name := line.strip()) and not name.startswith("#"))


def read_corpus(path: Path | str, *, split: str | None = None) -> Iterator[Conversation]:
    """Read every conversation of the corpus at ``path``, or of one split of it.

    The kind is found by :func:`detect_kind`; the split is checked before anything is read, so
    a missing split fails at once rather than at the first conversation.

    Parameters
    ----------
    path : Path or str
        A corpus folder, a folder of ``.jsonl`` or ``.inline`` files, or one such file.
    split : str, optional
        ``"train"``, ``"val"`` (or another list in ``splits/``); everything when ``None``.

    Raises
    ------
    CorpusNotFoundError
        For an unknown path or kind, or a missing split (the test splits are held back).
    TranscriptFormatError
        While iterating, when a file does not parse.
    """
    path = Path(path)
    kind = detect_kind(path)
    if kind is CorpusKind.DISFL_QA:
        if split == "test":
            raise CorpusNotFoundError(f"split 'test': no file {path / 'test.json'}; {_HELD_BACK}")
        if split not in (None, "train", "val"):
            raise CorpusNotFoundError(f"Disfl-QA has the splits train (train.json) and val "
                                      f"(dev.json), not {split!r}")
        return read_disflqa(path, split=split)
    if kind is CorpusKind.SWDA:
        if split is not None:
            split_names(path, split)  # fail early, with the held-back message
        return read_swda(path, split=split)
    if path.is_file():
        if split is not None:
            raise CorpusNotFoundError(f"{path}: a single file has no splits; put it in a folder "
                                      "with splits/<split>.txt listing conversation ids")
        return read_inline(path) if kind is CorpusKind.INLINE else read_jsonl(path)
    names = None if split is None else split_names(path, split)
    if kind is CorpusKind.MRDA:
        return read_mrda(path, ids=names)
    if kind is CorpusKind.MAPTASK:
        return read_maptask(path, ids=names)
    keep = None if names is None else frozenset(names)
    if kind is CorpusKind.INLINE:
        return _read_folder(path, f"*{INLINE_SUFFIX}", read_inline, keep)
    return _read_folder(path, "*.jsonl", read_jsonl, keep)


def _read_folder(folder: Path, pattern: str, read: Callable[[Path], Iterator[Conversation]],
                 keep: frozenset[str] | None) -> Iterator[Conversation]:
    for file in sorted(folder.glob(pattern)):
        for conversation in read(file):
            if keep is None or conversation.id in keep:
                yield conversation
