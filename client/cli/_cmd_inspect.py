"""``midstream inspect``: the per-word revision timeline of a saved log or a live conversation.

For each word: its labels over time (``label@seq``), when each changed, and why it became final
(it left the tagger's window, its utterance closed, or the conversation ended). ``--html FILE``
writes a report with vector plots (revision timeline of every word; confusion matrix and
utterance-function accuracy against words seen when the log carries gold labels, and why not
when it does not) and tables.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path

from midstream import InputError
from midstream.client.cli._analysis import Analysis, analyse, log_from_history
from midstream.client.cli._common import add_server_options, client_from_args
from midstream.client.cli._records import read_log


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "inspect", help="per-word revision timeline of a revision log or live conversation",
        description="Show how each word's label changed over time and why it became final, "
                    "from a revision log (replay --log, tag --json) or from a server "
                    "(--conversation ID); --html writes a report with plots.")
    parser.add_argument("log", nargs="?", type=Path, default=None,
                        help="a revision log written by 'replay --log' or 'tag --json'")
    parser.add_argument("--conversation", metavar="ID", default=None,
                        help="inspect a conversation the server keeps instead of a log")
    add_server_options(parser)
    parser.add_argument("--html", type=Path, default=None, help="write an HTML report here")
    parser.add_argument("--word", action="append", default=None, metavar="ID",
                        help="show only this word (repeatable)")
    parser.add_argument("--changed", action="store_true",
                        help="show only words whose label changed")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if (args.log is None) == (args.conversation is None):
        raise InputError("give either a revision log file or --conversation ID, not both")
    analysis = analyse(read_log(args.log)) if args.log is not None else asyncio.run(_live(args))
    _print_timeline(analysis, words=set(args.word or ()), changed_only=args.changed)
    if args.html is not None:
        from midstream.client.cli._report import render_report  # noqa: PLC0415 - only reports

        try:
            args.html.write_text(render_report(analysis), encoding="utf-8")
        except OSError as exc:
            raise InputError(f"{args.html}: cannot write the report: {exc.strerror}") from None
        print(f"report written to {args.html}", file=sys.stderr)
    return 0


async def _live(args: argparse.Namespace) -> Analysis:
    async with client_from_args(args) as client:
        history = await client.revisions(args.conversation)
        ended = any(c.ended for c in await client.list_conversations()
                    if c.conversation_id == history.conversation_id)
    analysis = analyse(log_from_history(history, ended=ended))
    analysis.truncated = history.truncated
    return analysis


def _print_timeline(analysis: Analysis, *, words: set[str], changed_only: bool) -> None:
    print(f"conversation {analysis.conversation_id or '?'} ({analysis.source}): "
          f"{len(analysis.words)} words, {analysis.updates} updates")
    if analysis.truncated:
        print("note: the server's history limit dropped the oldest revisions")
    for word in analysis.words:
        if words and word.word_id not in words:
            continue
        if changed_only and not word.label_changes:
            continue
        steps = []
        previous = None
        for change in word.changes:
            if change.label != previous:
                steps.append(f"{change.label.value}@{change.seq}({change.confidence:.2f})")
                previous = change.label
        gold = f"  gold={word.gold.value}" if word.gold is not None else ""
        print(f"{word.word_id:>8} {word.speaker:>6} {word.text[:20]:<20} "
              f"{' -> '.join(steps)}  [{word.final_reason}]{gold}")
    accuracy = analysis.word_accuracy()
    if accuracy is not None:
        print(f"final word-label accuracy against gold: {accuracy:.3f}")
    reasons = analysis.final_reasons()
    print("why final: " + ", ".join(f"{reason} {count}" for reason, count in sorted(
        reasons.items())))
