"""``midstream demo``: an in-process server and an invented phone call, tagged live.

Starts a server on a free loopback port with the default (shipped) models, or ``--models DIR``,
streams the call in :mod:`midstream.client.cli._demo_script` at about real time, and shows the
labels as they are revised. The call goes in as a recogniser gives it: timed words of a
two-channel NIST CTM file with the recogniser's clock ticking through the silences, no caller
hints, so utterances end where the speakers stop. ``--no-pause`` sends everything at once (for
tests and scripts); ``--write-ctm FILE`` writes the call's CTM file and stops (the README's first
session pipes it into ``midstream tag``).
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path

from midstream import HypothesisUpdate
from midstream.client._client import Client
from midstream.client._results import ServerEvent
from midstream.client.cli._common import add_setting_option
from midstream.client.cli._demo_script import demo_ctm, demo_events
from midstream.client.cli._output import Printer
from midstream.client.cli._records import SentWord
from midstream.client.cli._streaming import Pacing, stream_conversation


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "demo", help="tag an invented phone call live with an in-process server",
        description="Start a server on a free loopback port and stream an invented call (a "
                    "caller books a bicycle repair), showing labels being revised live.")
    parser.add_argument("--models", type=Path, default=None,
                        help="model folder (default: the shipped models)")
    add_setting_option(parser)
    parser.add_argument("--no-pause", action="store_true",
                        help="send the whole call at once instead of at speaking pace")
    parser.add_argument("--speed", type=float, default=1.0,
                        help="real-time factor when pausing (default 1)")
    parser.add_argument("--clean", action="store_true", help="show clean text")
    parser.add_argument("--write-ctm", type=Path, default=None, metavar="FILE",
                        help="write the invented call as a NIST CTM file and stop")
    parser.add_argument("--rates", action="store_true",
                        help="finish with per-speaker disfluency rates per 100 words "
                             "(automatic estimates for research, not a diagnosis)")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.write_ctm is not None:
        args.write_ctm.write_text(demo_ctm(), encoding="utf-8")
        print(f"wrote {args.write_ctm}: an invented call to a bicycle shop, channels shop and "
              "caller")
        return 0
    return asyncio.run(_run(args))


async def _run(args: argparse.Namespace) -> int:
    # The server and its models load only for the demo, not for every command's start-up.
    from midstream.server import MidstreamServer, ServerConfig  # noqa: PLC0415

    live = sys.stdout.isatty()
    printer = Printer(sys.stdout, json_lines=False, live=live, clean=args.clean,
                      rates=args.rates)
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=args.models,
                                          grace_s=2.0, setting=args.setting))
    await server.start()
    print(f"demo server on 127.0.0.1:{server.port}; an invented call to a bicycle shop "
          "(labels marked after words: fil filler, edt editing term, dm discourse marker, "
          "rpd reparandum, fix repair onset, rst restart; ~ not final yet)", flush=True)
    revised = 0

    def on_event(event: ServerEvent, sent: int) -> None:
        nonlocal revised
        if isinstance(event, HypothesisUpdate) and not live:
            # Without a terminal to redraw, say in words which labels changed.
            for word in event.diff.words:
                before = printer.board.words.get(word.word_id)
                if before is not None and before.label != word.label:
                    revised += 1
                    print(f"  revised {printer.board.text_of(word.word_id)!r} ({word.word_id}): "
                          f"{before.label.value} -> {word.label.value}", flush=True)
        elif isinstance(event, HypothesisUpdate):
            revised += sum(1 for w in event.diff.words
                           if w.word_id in printer.board.words
                           and printer.board.words[w.word_id].label != w.label)
        printer.event(event, sent)

    def on_word(word: SentWord) -> None:
        printer.word(word)

    try:
        async with Client(f"127.0.0.1:{server.port}") as client:
            result = await stream_conversation(
                client, demo_events(),
                pacing=Pacing(speed=0.0 if args.no_pause else max(args.speed, 0.0)),
                on_word=on_word, on_event=on_event)
    finally:
        await server.stop(1.0)
    printer.finish()
    print(f"{result.words_sent} words, {result.updates} updates, {revised} label revisions",
          flush=True)
    return 0
