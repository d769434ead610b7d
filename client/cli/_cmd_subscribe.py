"""``midstream subscribe``: print a conversation's updates from another terminal.

Follows a conversation someone else is streaming, from its current state (a snapshot) or from a
sequence number, reconnecting after a lost connection and saying so when updates were lost.
"""

from __future__ import annotations

import argparse
import asyncio
import sys

from midstream import InputError
from midstream.client.cli._common import add_server_options, client_from_args
from midstream.client.cli._output import Printer


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "subscribe", help="print a conversation's live updates (JSONL or a terminal view)",
        description="Follow a conversation being streamed by another caller and print its "
                    "updates until it ends.")
    parser.add_argument("conversation_id", metavar="ID", help="the conversation to follow")
    add_server_options(parser)
    parser.add_argument("--from-seq", type=int, default=None,
                        help="start from this update (default: a snapshot of the current "
                             "state, then live updates)")
    parser.add_argument("--epoch", type=int, default=0,
                        help="the epoch --from-seq belongs to (printed with every update); "
                             "when the id now names another conversation (another epoch) you "
                             "get a gap notice and a snapshot instead of its updates")
    parser.add_argument("--json", action="store_true",
                        help="print every event as a JSON line")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.from_seq is not None and args.from_seq < 1:
        raise InputError(f"--from-seq counts from 1, got {args.from_seq}")
    if args.epoch < 0:
        raise InputError(f"--epoch is a number from the server (0 or more), got {args.epoch}")
    return asyncio.run(_run(args))


async def _run(args: argparse.Namespace) -> int:
    # A follower never sees the words' text (updates carry ids), so it shows clean text.
    printer = Printer(sys.stdout, json_lines=args.json, live=sys.stdout.isatty(),
                      clean=True, rates=False)
    async with client_from_args(args) as client:
        async for event in client.follow(args.conversation_id, from_seq=args.from_seq,
                                         epoch=args.epoch):
            printer.event(event)
    return 0
