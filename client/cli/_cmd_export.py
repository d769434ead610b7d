"""``midstream export``: a revision log's final hypotheses as CSV, DiAML or inline markup.

::

    midstream export call.log --format csv -o call.csv        # a spreadsheet: utterances, words
    midstream export call.log --format diaml -o call.xml      # ISO 24617-2 dialogue acts
    midstream export call.log --format inline -o call.inline  # a transcript to correct, train on

The log is what ``replay --log`` or ``tag --json`` wrote. The formats are described in
``docs/client.md`` (CSV, DiAML) and ``docs/formats.md`` (inline markup).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from midstream import InputError
from midstream.client.cli._diaml import write_diaml
from midstream.client.cli._outcome import conversation_of, outcome_of, write_csv
from midstream.client.cli._records import read_log
from midstream.corpora import write_inline

FORMATS = ("csv", "diaml", "inline")


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "export", help="write a revision log's final hypotheses as CSV, DiAML or inline markup",
        description="Write the words and utterances a revision log (replay --log, tag --json) "
                    "ended on: CSV (one row per utterance and per word), ISO 24617-2 DiAML "
                    "(dialogue acts on functional segments, with a disfluency layer), or "
                    "inline disfluency markup (a pre-annotated transcript to correct and "
                    "train on).")
    parser.add_argument("log", type=Path, help="a revision log written by 'replay --log' or "
                                               "'tag --json'")
    parser.add_argument("--format", choices=FORMATS, required=True, help="what to write")
    parser.add_argument("-o", "--output", type=Path, required=True, metavar="FILE",
                        help="where to write it")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    outcome = outcome_of(read_log(args.log))
    if not outcome.complete:
        print(f"midstream: note: {args.log} stops before the conversation ended; some "
              "hypotheses were not final", file=sys.stderr)
    try:
        if args.format == "diaml":
            with args.output.open("wb") as binary:
                write_diaml(outcome, binary)
        else:
            with args.output.open("w", encoding="utf-8", newline="") as stream:
                if args.format == "csv":
                    write_csv(outcome, stream)
                else:
                    write_inline([conversation_of(outcome)], stream)
    except OSError as exc:
        raise InputError(f"{args.output}: cannot write: {exc.strerror}") from None
    print(f"wrote {args.output} ({args.format}: {len(outcome.utterances)} utterances, "
          f"{len(outcome.words)} words)", file=sys.stderr)
    return 0
