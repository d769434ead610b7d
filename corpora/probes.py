"""The SwDA reader's stages, public for the benchmark that times reading alone.

``midstream bench read`` times :func:`read_swda` against a baseline that reads the same files
(:func:`conversation_files`, :func:`split_numbers`) without parsing them. These are the reader's
own functions, re-exported unchanged so the timed path is the one :func:`read_corpus` takes for
a SwDA folder; they are not a stable API for anything else.
"""

from midstream.corpora._swda import conversation_files, read_swda, split_numbers

__all__ = ["conversation_files", "read_swda", "split_numbers"]
