"""The ``midstream`` command line, built on the client library (:mod:`midstream.client`).

``_main`` parses the command line and hands each subcommand to its ``_cmd_*`` module; the
terminal view, the inspection report, the export formats and the output writers sit beside them.
Nothing here is an API: scripts use :mod:`midstream.client`.
"""
