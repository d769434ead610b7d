"""CPU per word of the server's ingest layer outside the engine, on the ``FeedMany`` path.

No network: each pass builds a servicer in this process, opens ``--conversations`` channels on
one ``ManyStream`` and hands it request frames of ``--per-frame`` one-word events (SwDA val
words, each conversation speaking its own transcript, channels taken in turn as the load
generator of ``midstream bench --multiplex`` does), exactly as gRPC would: each frame is parsed
from bytes, applied by ``ManyStream._frame``, and every reply frame serialised. The in-run
baseline is the engine alone: fresh engines from the same models fed the same words in the same
order through ``add_word``. Opening and closing conversations are outside the timed part (they
are per conversation, not per word).

Figures are CPU time of this process (``time.process_time``), median over ``--repeats``
alternating passes, because the machine may be shared:

* ``engine``: ms per word of ``add_word`` alone;
* ``server``: ms per word of the whole frame path (parse, checks, engine, publishing, wire
  messages, reply frames, serialisation);
* ``outside``: their difference, the layer this benchmark exists to watch.

    .venv/bin/python scripts/bench_ingest.py [--models models/weights] [--repeats 7]
    .venv/bin/python scripts/bench_ingest.py --smoke --json out.json       # seconds, for CI
    .venv/bin/python scripts/bench_ingest.py --profile                     # cProfile one pass
"""

from __future__ import annotations

import argparse
import asyncio
import cProfile
import json
import pstats
import statistics
import time
from typing import Any, cast

from _benchkit import apply_frame, corpora_root, machine, models_folder, source_arguments
from midstream import EndReason, Word
from midstream.client.cli._cmd_bench import load_script
from midstream.models import ModelBundle
from midstream.server import ServerLimits
from midstream.server._many import ManyStream
from midstream.server._metrics import ServerMetrics
from midstream.server._servicer import MidstreamServicer
from midstream.wire import midstream_pb2 as pb

Plan = list[list[tuple[int, str, str, str]]]  # frames of (channel, word id, speaker, text)


def _plan(script_words: list[list[tuple[str, str]]], per_frame: int) -> Plan:
    """Frames of one word per channel, channels in turn, until each spoke its words."""
    order = [(channel + 1, index, *words[index])
             for index in range(max(len(w) for w in script_words))
             for channel, words in enumerate(script_words) if index < len(words)]
    flat = [(channel, f"w{index}", speaker, text) for channel, index, speaker, text in order]
    return [flat[i:i + per_frame] for i in range(0, len(flat), per_frame)]


def _frame_bytes(plan: Plan) -> list[bytes]:
    return [pb.ClientFrame(events=[
        pb.ChannelEvent(channel=channel, event=pb.ClientEvent(words=pb.WordBatch(words=[
            pb.SpokenWord(word_id=word_id, speaker=speaker, text=text)])))
        for channel, word_id, speaker, text in frame]).SerializeToString() for frame in plan]


def engine_pass(bundle: ModelBundle, plan: Plan, conversations: int) -> float:
    """CPU seconds of ``add_word`` alone over the plan."""
    engines = [bundle.new_engine() for _ in range(conversations)]
    words = [[(channel - 1, word_id, Word(text=text, speaker=speaker))
              for channel, word_id, speaker, text in frame] for frame in plan]
    began = time.process_time()
    for frame in words:
        for channel, word_id, word in frame:
            engines[channel].add_word(word_id, word)
    spent = time.process_time() - began
    for engine in engines:
        engine.finish()
    return spent


def open_stream(bundle: ModelBundle, conversations: int
                ) -> tuple[MidstreamServicer, ManyStream]:
    """A servicer in this process and one ``ManyStream`` with channels 1..N open on it."""
    limits = ServerLimits(max_live_conversations=conversations,
                          max_channels_per_stream=conversations)
    servicer = MidstreamServicer(bundle, limits, ServerMetrics())
    stream = ManyStream(servicer, cast(Any, None))  # _frame and _frames never use the context
    apply_frame(stream, pb.ClientFrame(events=[
        pb.ChannelEvent(channel=c, event=pb.ClientEvent(open=pb.OpenConversation()))
        for c in range(1, conversations + 1)]))
    stream._frames()
    return servicer, stream


async def server_pass(bundle: ModelBundle, frames: list[bytes], conversations: int,
                      profile: cProfile.Profile | None = None) -> tuple[float, int, float]:
    """CPU seconds of the frame path over the plan, the reply bytes it produced, and the words
    the server's own counter took in."""
    servicer, stream = open_stream(bundle, conversations)
    sent = 0
    parse, replies = pb.ClientFrame.FromString, stream._frames
    if profile is not None:
        profile.enable()
    began = time.process_time()
    for data in frames:
        apply_frame(stream, parse(data))
        for reply in replies():
            sent += len(reply.SerializeToString())
    spent = time.process_time() - began
    if profile is not None:
        profile.disable()
    stream._end_all(EndReason.CLOSED)
    stream._frames()
    counted = servicer.metrics.registry.get_sample_value("midstream_words_total")
    return spent, sent, counted or 0.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    source_arguments(parser)
    parser.add_argument("--conversations", type=int, default=200)
    parser.add_argument("--words", type=int, default=60, help="words per conversation")
    parser.add_argument("--per-frame", type=int, default=30,
                        help="events per request frame (3,000 words/s at 10 ms ticks)")
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--smoke", action="store_true")
    parser.add_argument("--profile", action="store_true", help="cProfile one server pass")
    args = parser.parse_args()
    if args.smoke:
        args.conversations, args.words, args.repeats = 20, 20, 1
    folder, how = models_folder(args.models, None)
    bundle = ModelBundle.load_directory(folder)
    bundle.warm_up()
    script, where = load_script(args.corpus or corpora_root() / "swda", "val",
                                limit=args.conversations * args.words * 4)
    per_conversation = [[script.word(c, k) for k in range(args.words)]
                        for c in range(args.conversations)]
    plan = _plan(per_conversation, args.per_frame)
    frames = _frame_bytes(plan)
    total = sum(len(f) for f in plan)
    print(f"models: {how}; words: {where}")
    print(f"{args.conversations} conversations x {args.words} words = {total} words, "
          f"{len(frames)} frames of {args.per_frame}")
    if args.profile:
        profile = cProfile.Profile()
        asyncio.run(server_pass(bundle, frames, args.conversations, profile))
        pstats.Stats(profile).sort_stats("tottime").print_stats(30)
        return
    engine_ms: list[float] = []
    server_ms: list[float] = []
    reply_bytes, counted = 0, 0.0
    for _ in range(args.repeats):
        engine_ms.append(engine_pass(bundle, plan, args.conversations) * 1e3 / total)
        spent, reply_bytes, counted = asyncio.run(
            server_pass(bundle, frames, args.conversations))
        server_ms.append(spent * 1e3 / total)
    if counted != total:
        raise SystemExit(f"the server took in {counted:.0f} words of {total}: the pass is broken")
    engine, server = statistics.median(engine_ms), statistics.median(server_ms)
    print(f"reply bytes per word: {reply_bytes / total:.1f}")
    print(f"engine  ms/word: median {engine:.4f}  (runs {' '.join(f'{v:.4f}' for v in engine_ms)})")
    print(f"server  ms/word: median {server:.4f}  (runs {' '.join(f'{v:.4f}' for v in server_ms)})")
    print(f"outside ms/word: {server - engine:.4f}  (server / engine = {server / engine:.2f})")
    if args.json is not None:
        args.json.write_text(json.dumps({
            "machine": machine(), "models": how, "words_from": where, "words": total,
            "conversations": args.conversations, "per_frame": args.per_frame,
            "reply_bytes_per_word": reply_bytes / total,
            "engine_ms_per_word": engine, "server_ms_per_word": server,
            "outside_ms_per_word": server - engine, "server_over_engine": server / engine,
            "runs": {"engine_ms": engine_ms, "server_ms": server_ms},
        }, indent=2), encoding="utf-8")


if __name__ == "__main__":
    main()
