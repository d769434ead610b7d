"""Reading transcript text files with decoding failures reported as format errors."""

from __future__ import annotations

from pathlib import Path

from midstream import TranscriptFormatError


def read_lines(path: Path, *, encoding: str = "utf-8") -> list[str]:
    """The lines of a text file (line ends kept).

    Raises
    ------
    TranscriptFormatError
        A byte sequence is not valid in ``encoding``; the message names the file and line.
    """
    data = path.read_bytes()
    try:
        text = data.decode(encoding)
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise TranscriptFormatError(f"not valid {encoding} text ({exc.reason})",
                                    source=str(path), line=line) from exc
    return text.splitlines(keepends=True)
