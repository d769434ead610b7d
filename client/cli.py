"""The ``midstream`` command line as an entry point: ``main(argv)`` returns the exit code.

The console script and ``python -m midstream`` both start here; the commands themselves are
private modules of this package, built on the public APIs of :mod:`midstream.client`,
:mod:`midstream.models` (with :mod:`midstream.models.training` and
:mod:`midstream.models.evaluation`), :mod:`midstream.corpora` and :mod:`midstream.server`.
"""

from midstream.client._cli import main

__all__ = ["main"]
