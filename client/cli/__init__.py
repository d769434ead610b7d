"""The ``midstream`` command line, built on the client library: ``main(argv)`` returns the exit
code.

The console script and ``python -m midstream`` both start here. ``_main`` parses the command
line and hands each subcommand to its ``_cmd_*`` module; the terminal view, the inspection
report, the export formats and the output writers sit beside them. The commands use only the
public APIs of :mod:`midstream.client`, :mod:`midstream.models` (with
:mod:`midstream.models.training` and :mod:`midstream.models.evaluation`),
:mod:`midstream.corpora` and :mod:`midstream.server`; nothing here is an API but ``main``.
"""

from midstream.client.cli._main import main

__all__ = ["main"]
