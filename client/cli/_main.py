"""The ``midstream`` command line: one dispatcher over per-command modules.

Each command lives in its own ``_cmd_<name>`` module exposing ``register(subparsers)``, which adds
a parser whose ``handler`` default takes the parsed arguments and returns an exit code. Only this
module and the command modules print; library code logs or returns.

Exit codes: 0 success, 1 a Midstream error (one line on stderr naming what was wrong), 2 bad
command-line usage (argparse), 3 the server could not be reached, 130 interrupted.

The global options (``-v``, ``--version``) are accepted before the command and after it (and
after a nested command such as ``corpus stats``): people add ``-v`` at the end of a command line
they already typed. ``python -m midstream`` runs this same entry point.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from importlib import metadata

from midstream import MidstreamError, UnavailableError

#: Command modules in the order ``--help`` lists them.
_COMMAND_MODULES: tuple[str, ...] = (
    "midstream.client.cli._cmd_corpus",
    "midstream.client.cli._cmd_tag",
    "midstream.client.cli._cmd_replay",
    "midstream.client.cli._cmd_subscribe",
    "midstream.client.cli._cmd_inspect",
    "midstream.client.cli._cmd_export",
    "midstream.client.cli._cmd_demo",
    "midstream.client.cli._cmd_serve",
    "midstream.client.cli._cmd_bench",
    "midstream.client.cli._cmd_train",
    "midstream.client.cli._cmd_evaluate",
)

Handler = Callable[[argparse.Namespace], int]

EXIT_OK = 0
EXIT_ERROR = 1
EXIT_UNAVAILABLE = 3
EXIT_INTERRUPTED = 130
EXIT_BROKEN_PIPE = 141


_VERBOSE_HELP = "more log output (-v info, -vv debug; debug may include transcript words)"


def version() -> str:
    """The installed distribution's version (``0+unknown`` when run from an uninstalled tree)."""
    try:
        return metadata.version("midstream")
    except metadata.PackageNotFoundError:
        return "0+unknown"


def _add_global_options(parser: argparse.ArgumentParser, *, dest: str) -> None:
    parser.add_argument("-v", "--verbose", dest=dest, action="count", default=0,
                        help=_VERBOSE_HELP)
    parser.add_argument("--version", action="version", version=f"midstream {version()}",
                        help="print the version and exit")


def _command_parsers(parser: argparse.ArgumentParser) -> Iterator[argparse.ArgumentParser]:
    """Every (nested) command parser below ``parser``."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for child in dict.fromkeys(action.choices.values()):  # aliases repeat a parser
                yield child
                yield from _command_parsers(child)


def build_parser() -> argparse.ArgumentParser:
    """Build the full argument parser (every command registered)."""
    parser = argparse.ArgumentParser(
        prog="midstream",
        description="Streaming disfluency and utterance-function tagging of recogniser words.",
    )
    _add_global_options(parser, dest="verbose")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in _COMMAND_MODULES:
        importlib.import_module(name).register(sub)
    # A command's own namespace is merged into the top one after parsing, so each level counts
    # its -v under a name of its own; main() adds them up.
    for depth_parser in _command_parsers(parser):
        _add_global_options(depth_parser,
                            dest="verbose_" + depth_parser.prog.replace(" ", "_"))
    return parser


def verbosity(args: argparse.Namespace) -> int:
    """How many ``-v`` were given, wherever on the command line."""
    return sum(int(value) for name, value in vars(args).items()
               if name == "verbose" or name.startswith("verbose_"))


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``midstream`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    # As typed, for commands that record how their output was made (bench --write-page).
    args.argv = list(sys.argv[1:] if argv is None else argv)
    level = {0: logging.WARNING, 1: logging.INFO}.get(verbosity(args), logging.DEBUG)
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    handler: Handler = args.handler
    try:
        return handler(args)
    except UnavailableError as exc:
        print(f"midstream: {exc}", file=sys.stderr)
        return EXIT_UNAVAILABLE
    except MidstreamError as exc:
        print(f"midstream: {exc}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # The reader of our output went away (``midstream corpus stats ... | head``): nothing
        # is wrong with the command. Point stdout at devnull so the interpreter's final flush
        # does not raise again, and exit as a process killed by SIGPIPE would.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_BROKEN_PIPE


if __name__ == "__main__":
    sys.exit(main())
