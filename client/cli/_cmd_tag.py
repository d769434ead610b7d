"""``midstream tag``: stream words to a server and print the live hypotheses.

Reads JSON Lines word events (``docs/word-events.md``), NIST CTM, WebVTT or NIST STM from a
file or, by default, standard input as lines arrive, so a recogniser's output can be piped
straight in::

    my-recogniser | midstream tag --server 127.0.0.1:50051
    midstream tag call.ctm --json > updates.jsonl
    midstream tag call.vtt --log call.log      # the revision log, as replay --log writes it
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from collections.abc import AsyncIterable, Iterable
from pathlib import Path
from typing import TextIO

from midstream import InputError
from midstream.client._inputs import TimedEvent
from midstream.client._results import ServerEvent, Welcome
from midstream.client.cli._common import (
    add_input_options,
    add_server_options,
    client_from_args,
    load_input,
    stream_lines,
)
from midstream.client.cli._output import Printer, lines_from_thread
from midstream.client.cli._records import (
    LOG_FORMAT,
    GoldWord,
    SentWord,
    dumps,
    event_record,
    word_record,
)
from midstream.client.cli._streaming import Pacing, stream_conversation


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "tag", help="stream words (JSONL, CTM, WebVTT or STM; file or stdin) and print live "
               "hypotheses",
        description="Stream recogniser words to a server and print its live hypotheses: a "
                    "line per utterance redrawn as labels change on a terminal, one line per "
                    "finished utterance otherwise, or JSON Lines with --json.")
    add_input_options(parser, stdin=True)
    add_server_options(parser)
    parser.add_argument("--json", action="store_true",
                        help="print every server event as a JSON line")
    parser.add_argument("--clean", action="store_true",
                        help="show clean text (fillers, editing terms, reparanda, restarts "
                             "removed) instead of marked words")
    parser.add_argument("--rates", action="store_true",
                        help="finish with per-speaker disfluency rates per 100 words "
                             "(automatic estimates for research, not a diagnosis)")
    parser.add_argument("--speed", type=float, default=0.0,
                        help="real-time factor for a file's word times (0: no waiting; "
                             "standard input is always sent as it arrives)")
    parser.add_argument("--id", dest="conversation_id", default=None,
                        help="ask for this conversation id (default: the server assigns one)")
    parser.add_argument("--server-ticks", action="store_true",
                        help="let the server's clock move the conversation on while no word "
                             "arrives, so an utterance closes after a silence of a live pipe "
                             "without tick lines (refused by servers sharing a log)")
    parser.add_argument("--log", type=Path, default=None,
                        help="also write every word sent and event received as JSON Lines "
                             "(the revision log replay --log writes)")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    return asyncio.run(_run(args))


async def _run(args: argparse.Namespace) -> int:
    printer = Printer(sys.stdout, json_lines=args.json, live=sys.stdout.isatty(),
                      clean=args.clean, rates=args.rates)
    events: Iterable[TimedEvent] | AsyncIterable[TimedEvent]
    gold: dict[str, GoldWord] | None = None
    pacing = Pacing()
    if args.input == "-":
        events = lines_from_thread(stream_lines(sys.stdin, "<stdin>", args.format,
                                                 recording=args.recording))
    else:
        loaded = load_input(args)
        events, gold = loaded.events, loaded.gold
        pacing = Pacing(speed=max(args.speed, 0.0))

    log: TextIO | None = None
    if args.log is not None:
        try:
            log = args.log.open("w", encoding="utf-8")
        except OSError as exc:
            raise InputError(f"{args.log}: cannot write the log: {exc.strerror}") from None
    source = "<stdin>" if args.input == "-" else str(args.input)

    def welcome(message: Welcome) -> None:
        if log is not None:
            log.write(dumps({"type": "header", "format": LOG_FORMAT,
                             "conversation_id": message.conversation_id, "source": source,
                             "server": client.target}) + "\n")
            log.write(dumps(event_record(message)) + "\n")
        if args.json:
            # The first record names the conversation, so the output is a log inspect can read.
            printer.event(message)
        else:
            conversation = message.conversation_id
            # A server-chosen id may start with "-"; "--" keeps argparse from taking it for an
            # option when the user pastes the command.
            separator = "-- " if conversation.startswith("-") else ""
            print(f"conversation {conversation}: follow it with "
                  f"'midstream subscribe {separator}{conversation}'", file=sys.stderr, flush=True)

    def word(sent: SentWord) -> None:
        printer.word(sent)
        if log is not None:
            log.write(dumps(word_record(sent)) + "\n")

    def event(received: ServerEvent, sent: int) -> None:
        printer.event(received, sent)
        if log is not None:
            log.write(dumps(event_record(received, sent=sent)) + "\n")

    client = client_from_args(args)
    try:
        async with client:
            await stream_conversation(client, events, pacing=pacing, gold=gold,
                                      conversation_id=args.conversation_id, on_welcome=welcome,
                                      on_word=word, on_event=event,
                                      server_ticks=args.server_ticks)
    finally:
        if log is not None:
            log.close()
    printer.finish()
    return 0
