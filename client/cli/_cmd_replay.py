"""``midstream replay``: replay a timed transcript to a server at a real-time factor.

The input is a CTM, JSON Lines, WebVTT or STM file, an annotated transcript file, or a corpus
folder with ``--split`` and ``--conversation``. ``--speed 1`` keeps the transcript's own
timing, ``--speed 4`` is four times faster, ``--speed 0`` sends as fast as the server accepts.
``--log FILE`` saves every word sent and every update received (with gold labels when the input
is a corpus conversation or an annotated transcript) for ``midstream inspect``.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path
from typing import TextIO

from midstream import AddWord, InputError
from midstream.client._results import ServerEvent, Welcome
from midstream.client.cli._common import (
    add_input_options,
    add_server_options,
    client_from_args,
    load_input,
)
from midstream.client.cli._output import Printer
from midstream.client.cli._records import LOG_FORMAT, SentWord, dumps, event_record, word_record
from midstream.client.cli._streaming import Pacing, stream_conversation
from tqdm import tqdm


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "replay", help="replay a timed transcript or corpus conversation at a real-time factor",
        description="Replay a CTM, JSON Lines, WebVTT or STM transcript, or one conversation of "
                    "an annotated transcript or corpus folder, to a server with its own timing "
                    "scaled by --speed, showing a progress bar; optionally save the full "
                    "revision log.")
    add_input_options(parser, stdin=False)
    add_server_options(parser)
    parser.add_argument("--speed", type=float, default=1.0,
                        help="real-time factor: 1 real time, 2 twice as fast, 0 no waiting "
                             "(default 1)")
    parser.add_argument("--words-per-second", type=float, default=2.5,
                        help="pace of words that carry no times, in input seconds (default 2.5)")
    parser.add_argument("--log", type=Path, default=None,
                        help="write every word sent and update received as JSON Lines")
    parser.add_argument("--show", action="store_true",
                        help="also print utterances as they finish (off: progress bar only)")
    parser.add_argument("--clean", action="store_true", help="print clean text per utterance")
    parser.add_argument("--rates", action="store_true",
                        help="finish with per-speaker disfluency rates per 100 words "
                             "(automatic estimates for research, not a diagnosis)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.speed < 0:
        raise InputError(f"--speed must be 0 or more, got {args.speed}")
    if args.words_per_second <= 0:
        raise InputError(f"--words-per-second must be above 0, got {args.words_per_second}")
    return asyncio.run(_run(args))


async def _run(args: argparse.Namespace) -> int:
    loaded = load_input(args)
    total = sum(1 for e in loaded.events if isinstance(e.event, AddWord))
    show = args.show or args.clean
    printer = Printer(sys.stdout, json_lines=False, live=False, clean=args.clean,
                      rates=args.rates, quiet=not show)
    log: TextIO | None = None
    if args.log is not None:
        try:
            log = args.log.open("w", encoding="utf-8")
        except OSError as exc:
            raise InputError(f"{args.log}: cannot write the log: {exc.strerror}") from None
    bar = tqdm(total=total, unit="word", desc="replay", disable=args.no_progress,
               file=sys.stderr, leave=False)
    client = client_from_args(args)

    def on_welcome(welcome: Welcome) -> None:
        if log is not None:
            log.write(dumps({"type": "header", "format": LOG_FORMAT,
                             "conversation_id": welcome.conversation_id,
                             "source": loaded.source, "server": client.target}) + "\n")
            log.write(dumps(event_record(welcome)) + "\n")

    def on_word(word: SentWord) -> None:
        printer.word(word)
        bar.update(1)
        if log is not None:
            log.write(dumps(word_record(word)) + "\n")

    def on_event(event: ServerEvent, sent: int) -> None:
        printer.event(event, sent)
        if log is not None:
            log.write(dumps(event_record(event, sent=sent)) + "\n")

    try:
        async with client:
            result = await stream_conversation(
                client, loaded.events, pacing=Pacing(speed=args.speed,
                                                     words_per_second=args.words_per_second),
                gold=loaded.gold, on_welcome=on_welcome, on_word=on_word, on_event=on_event)
    finally:
        bar.close()
        if log is not None:
            log.close()
    printer.finish()
    print(f"replayed {result.words_sent} words of {loaded.source} as conversation "
          f"{result.conversation_id}: {result.updates} updates"
          + (f", log in {args.log}" if args.log is not None else ""), file=sys.stderr)
    return 0
