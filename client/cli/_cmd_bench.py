"""``midstream bench``: load a server with many live conversations and measure it; and every
other benchmark, as a subcommand.

Without a subcommand it runs the load generator (below). The subcommands (``midstream bench
decoder``, ``functions``, ``read``, ``ingest``, ``gc``, ``memory``, ``kept``, ``redis``,
``service``, ``soak``, ``report``) live in :mod:`midstream.client.bench`, one module each; each
pairs its run with a baseline measured in the same run and gives the ratio.

::

    midstream bench --target 10.0.0.5:50051 --conversations 500 --corpus corpora/swda
    midstream bench --spawn --conversations 200 --seconds 30 --json     # a local server
    midstream bench --smoke --spawn                                     # a few seconds
    midstream bench --spawn --multiplex -n 1000 --channels 4            # 4 multiplexed streams
    midstream bench --spawn --redis redis://127.0.0.1:6379/0            # the shared log's cost

Each simulated conversation streams real transcript words (a corpus split, ``val`` by default)
one per event at ``--rate`` words per second. The report gives the words per second achieved,
the latency from sending a word to its first hypothesis (p50/p95/p99), errors by status code,
and, when the server is local (``--server-pid`` or ``--spawn``), its CPU use and resident
memory per live conversation. ``--baseline`` sends a trivial ``DescribeModels`` call at the same
rate instead of words, to compare tagging with the bare transport round trip.

``--multiplex`` carries the conversations over one ``FeedMany`` stream per channel, each
sending one frame every ``--tick-ms`` with every word due on it; latency is then timed from each
word's scheduled time (the wait for the next frame included), not from the write.

Latencies include the load generator's own delays: when its CPU use nears 100 % (shown in the
report), the figures describe the generator, not the server; run it on another core or host.
On a virtual machine they also include the hypervisor's: the report gives each CPU's steal time
over the window (time the host ran other guests on it) and warns when it is large enough to
move the tails.

``--spawn --redis URL`` runs the same load twice in one run, on a spawned server without and
then with ``--redis URL``, and reports the ratio of server CPU per word (the shared log's
cost; Redis's own CPU is not counted); ``--repeats K`` runs K such pairs in turn and reports
the median ratio. ``--workers N`` spawns ``serve --workers N`` (the
server's CPU is then its workers' together; no loop-lag figure, each worker has its own loop).
``--scale-out STEPS`` adds, in the same run, the workers ratio: the conversation counts STEPS
run in turn on fresh ``serve --redis URL --workers 1`` and then ``--workers N`` servers (N from
``--workers``, else 2) until one misses ``--p99-ms``, and the largest counts held are divided.
``--write-page FILE`` writes both ratios, with the command line, into a Markdown page
(``docs/benchmarks.md``) in place of the section an earlier run wrote there::

    midstream bench --spawn --redis redis://127.0.0.1:6379/0 -n 300 --channels 32 --repeats 3 \\
        --scale-out 200,300,400,500,600 --write-page docs/benchmarks.md

The kernel hands each connection (not each call) to one worker, so give ``--channels`` well
above the worker count: with the default 4, one worker may well carry three of them.
"""

from __future__ import annotations

import argparse
import asyncio
import functools
import importlib
import json
import math
import os
import selectors
import shlex
import shutil
import signal
import statistics
import subprocess
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from midstream import CorpusNotFoundError, InputError, UnavailableError
from midstream.client.bench import BENCHMARKS
from midstream.client.bench._load import (
    DEFAULT_TICK_S,
    STEAL_NOTABLE_PERCENT,
    LoadConfig,
    ProcessProbe,
    WordScript,
    run_load,
)
from midstream.client.bench._scale_out import (
    Sweep,
    cpu_per_word,
    machine_load,
    section,
    write_section,
)
from midstream.client.bench._scrape import MetricsProbe
from midstream.client.cli._common import DEFAULT_TARGET
from midstream.corpora import read_corpus

#: Words read from the corpus for the script (enough that conversations rarely repeat).
_SCRIPT_WORDS = 50_000
#: Seconds a spawned server may take to load its models and bind.
_SPAWN_TIMEOUT_S = 120.0
#: Above these the report warns that the generator, not the server, may set the latencies.
_LAG_WARN_MS = 20.0
_CPU_WARN_PERCENT = 90.0
#: What --smoke runs: a few conversations for a few seconds.
_SMOKE = {"conversations": 4, "seconds": 2.0, "ramp": 0.2, "channels": 1}


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    # No abbreviated options: argparse matches abbreviations of this parser's options against
    # a benchmark's own before handing them on ('soak --serve' read as an ambiguous '--server').
    parser = subparsers.add_parser(
        "bench", allow_abbrev=False,
        help="load a server with concurrent conversations and measure latency",
        description="Stream corpus words over N concurrent conversations at a fixed rate and "
                    "report words/s, word-to-hypothesis latency percentiles, errors by status "
                    "and (local servers) CPU and memory per conversation.")
    parser.add_argument("--target", "--server", dest="server", metavar="HOST:PORT",
                        default=None,
                        help=f"the server (default $MIDSTREAM_SERVER or {DEFAULT_TARGET}; "
                             "ignored with --spawn)")
    parser.add_argument("--token", default=None,
                        help="bearer token the server requires (default $MIDSTREAM_TOKEN)")
    parser.add_argument("--tls", action="store_true", help="connect with TLS")
    parser.add_argument("--ca", "--tls-ca", dest="tls_ca", type=Path, default=None,
                        metavar="FILE",
                        help="PEM CA certificates to trust with --tls (default: system roots)")
    parser.add_argument("--conversations", "-n", type=int, default=100, metavar="N",
                        help="concurrent conversations (default 100)")
    parser.add_argument("--rate", type=float, default=3.0, metavar="R",
                        help="words per second per conversation (default 3)")
    parser.add_argument("--seconds", type=float, default=60.0, metavar="T",
                        help="seconds of sending once all conversations are open (default 60)")
    parser.add_argument("--ramp", type=float, default=None, metavar="S",
                        help="seconds over which conversations open (default min(10, N/100))")
    parser.add_argument("--channels", type=int, default=4,
                        help="gRPC connections the conversations share (default 4)")
    parser.add_argument("--corpus", type=Path, default=None, metavar="DIR",
                        help="corpus folder the words come from (default "
                             "$MIDSTREAM_CORPORA/swda)")
    parser.add_argument("--split", default="val", help="corpus split (default val)")
    parser.add_argument("--baseline", action="store_true",
                        help="send DescribeModels calls at the same rate instead of words "
                             "(the transport round trip); with --multiplex, one call per "
                             "stream per frame that has words due")
    parser.add_argument("--multiplex", action="store_true",
                        help="carry the conversations over one FeedMany stream per "
                             "channel, sending one frame of every word due per tick; latency "
                             "is then timed from each word's scheduled time")
    parser.add_argument("--tick-ms", type=float, default=1000 * DEFAULT_TICK_S, metavar="MS",
                        help="with --multiplex: milliseconds between two frames of a stream "
                             f"(default {1000 * DEFAULT_TICK_S:g})")
    local = parser.add_mutually_exclusive_group()
    local.add_argument("--server-pid", type=int, default=None, metavar="PID",
                       help="process id of a local server: report its CPU and memory")
    local.add_argument("--spawn", action="store_true",
                       help="start 'midstream serve' on a free local port for the run")
    parser.add_argument("--server-metrics", default=None, metavar="URL",
                        help="the server's metrics page (as 'midstream serve --metrics-port' "
                             "prints it): report how late its event loop ran over the window "
                             "(automatic with --spawn)")
    parser.add_argument("--models", type=Path, default=None, metavar="DIR",
                        help="with --spawn: the server's model folder (default: shipped)")
    parser.add_argument("--server-cpu", type=int, default=None, metavar="CORE",
                        help="with --spawn: pin the server to this CPU core")
    parser.add_argument("--redis", default=None, metavar="URL",
                        help="with --spawn: run the load twice, without and with 'serve "
                             "--redis URL', and report the ratio of server CPU per word")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="with --spawn: start 'serve --workers N' (needs --redis; every "
                             "run then uses the shared log)")
    parser.add_argument("--scale-out", default=None, metavar="STEPS",
                        help="with --spawn --redis: also run these comma-separated "
                             "conversation counts on 'serve --workers 1' and on '--workers N' "
                             "(N from --workers, else 2) until one misses --p99-ms, and report "
                             "the ratio of the largest counts held")
    parser.add_argument("--repeats", type=int, default=1, metavar="K",
                        help="with --spawn --redis: run the load without and with the log K "
                             "times in turn and report the median of the K ratios (on a "
                             "shared machine one pair says little; default 1)")
    parser.add_argument("--p99-ms", type=float, default=50.0, metavar="MS",
                        help="with --scale-out: the latency budget a count must meet "
                             "(default 50)")
    parser.add_argument("--write-page", type=Path, default=None, metavar="FILE",
                        help="with --spawn --redis: write the ratios and this command into "
                             "the Markdown page FILE (e.g. docs/benchmarks.md), replacing "
                             "the section an earlier run wrote")
    parser.add_argument("--spin-idle-cores", action="store_true",
                        help="with --spawn: start the server with --spin-idle-cores (its "
                             "cores kept from idling; see midstream serve --help)")
    parser.add_argument("--client-cpu", type=int, default=None, metavar="CORE",
                        help="pin this load generator to this CPU core")
    parser.add_argument("--seed", type=int, default=0, help="seed of the send phases")
    parser.add_argument("--smoke", action="store_true",
                        help="a run of a few seconds (4 conversations, 2 s) to check the setup")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(handler=run)
    # The other benchmarks; without one, the load run above (so existing command lines work).
    benchmarks = parser.add_subparsers(
        dest="benchmark", metavar="BENCHMARK", title="benchmarks (default: the load run above)")
    for module in BENCHMARKS:
        importlib.import_module(module).register(benchmarks)


def load_script(corpus: Path | None, split: str, *, limit: int = _SCRIPT_WORDS
                ) -> tuple[WordScript, str]:
    """The word script from a corpus split, and a description of where it came from.

    Raises
    ------
    CorpusNotFoundError
        When no corpus is given and ``$MIDSTREAM_CORPORA/swda`` does not exist.
    """
    if corpus is None:
        root = os.environ.get("MIDSTREAM_CORPORA")
        if not root or not (Path(root) / "swda").is_dir():
            raise CorpusNotFoundError(
                "no corpus to take words from: give --corpus DIR (e.g. a SwDA folder) or set "
                "MIDSTREAM_CORPORA to a folder holding swda/")
        corpus = Path(root) / "swda"
    if not corpus.exists():
        raise CorpusNotFoundError(f"{corpus}: no such corpus folder")
    transcripts: list[list[tuple[str, str]]] = []
    total = 0
    for conversation in read_corpus(corpus, split=split):
        words = [(w.speaker, w.text) for w in conversation.words if w.text]
        if words:
            transcripts.append(words)
            total += len(words)
        if total >= limit:
            break
    if not transcripts:
        raise InputError(f"{corpus} split {split!r}: holds no words")
    return WordScript(transcripts), f"{corpus} ({split}, {len(transcripts)} conversations, " \
                                    f"{total} words)"


@dataclass(frozen=True, slots=True)
class Spawned:
    """A server :func:`spawn_server` started: its address, process id and metrics page."""

    target: str
    pid: int
    metrics_url: str | None


def serve_command(*, models: Path | None, live: int, spin: bool, redis: str | None = None,
                  workers: int = 1) -> list[str]:
    """The ``midstream serve`` command line :func:`spawn_server` runs: room for ``live``
    conversations, all of them on one ``FeedMany`` stream if the load puts them there;
    ``redis``: with the shared log; ``workers``: that many processes (metrics are then left
    off: each worker would serve its own page)."""
    command = [sys.executable, "-m", "midstream.client.cli._main", "serve", "--host", "127.0.0.1",
               "--port", "0", "--grace", "5", "--max-live-conversations", str(live),
               "--limit", f"max_channels_per_stream={live}"]
    if workers == 1:
        command += ["--metrics-host", "127.0.0.1", "--metrics-port", "0"]
    else:
        command += ["--workers", str(workers)]
    if redis is not None:
        command += ["--redis", redis]
    if models is not None:
        command += ["--models", str(models)]
    if spin:
        command.append("--spin-idle-cores")
    return command


@contextmanager
def spawn_server(*, models: Path | None, cpu: int | None, live: int,
                 token: str | None, spin: bool = False, redis: str | None = None,
                 workers: int = 1) -> Iterator[Spawned]:
    """Run ``midstream serve`` on a free local port, its metrics on another; yield where; stop
    it after. ``spin``: start it with ``--spin-idle-cores``; ``redis`` and ``workers`` as
    :func:`serve_command` takes them.

    Raises
    ------
    UnavailableError
        When the server exits or does not report its address in time.
    """
    command = serve_command(models=models, live=live, spin=spin, redis=redis, workers=workers)
    env = dict(os.environ)
    if token:
        env["MIDSTREAM_BENCH_TOKEN"] = token
        command += ["--token-env", "MIDSTREAM_BENCH_TOKEN"]
    if cpu is not None:
        # taskset pins before Python starts, so every thread the server makes inherits it.
        taskset = shutil.which("taskset")
        if taskset is None:
            raise InputError("--server-cpu needs the 'taskset' program (util-linux)")
        command = [taskset, "-c", str(cpu), *command]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                               env=env)
    try:
        assert process.stdout is not None
        with selectors.DefaultSelector() as selector:
            selector.register(process.stdout, selectors.EVENT_READ)
            if not selector.select(timeout=_SPAWN_TIMEOUT_S):
                raise UnavailableError(f"the spawned server did not start within "
                                       f"{_SPAWN_TIMEOUT_S:g} s")
        # It prints "serving on ADDRESS", then "metrics on URL", once both are bound (with
        # workers: "serving on ADDRESS (N workers)" alone).
        line = process.stdout.readline().decode("utf-8", "replace").strip()
        metrics = ("metrics on -" if workers > 1
                   else process.stdout.readline().decode("utf-8", "replace").strip())
        if not (line.startswith("serving on ") and metrics.startswith("metrics on ")):
            code = process.wait(timeout=10)
            raise UnavailableError(f"the spawned server exited ({code}) before serving; run "
                                   f"'{' '.join(command)}' by hand to see why")
        yield Spawned(target=line.removeprefix("serving on ").split()[0], pid=process.pid,
                      metrics_url=None if workers > 1 else metrics.removeprefix("metrics on "))
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        if process.stdout is not None:
            process.stdout.close()


def run(args: argparse.Namespace) -> int:
    if args.smoke:
        args.conversations = min(args.conversations, int(_SMOKE["conversations"]))
        args.seconds = min(args.seconds, float(_SMOKE["seconds"]))
        args.ramp = _SMOKE["ramp"] if args.ramp is None else args.ramp
        args.channels = min(args.channels, int(_SMOKE["channels"]))
    ramp = args.ramp if args.ramp is not None else min(10.0, args.conversations / 100)
    token = args.token or os.environ.get("MIDSTREAM_TOKEN") or None
    script, source = load_script(args.corpus, args.split,
                                 limit=2_000 if args.smoke else _SCRIPT_WORDS)
    if args.client_cpu is not None:
        try:
            os.sched_setaffinity(0, {args.client_cpu})
        except OSError as exc:
            raise InputError(f"--client-cpu {args.client_cpu}: {exc.strerror}") from None

    def configure(target: str, conversations: int | None = None) -> LoadConfig:
        n = args.conversations if conversations is None else conversations
        return LoadConfig(target=target, conversations=n, rate=args.rate,
                          seconds=args.seconds,
                          ramp_s=ramp if conversations is None or args.ramp is not None
                          else min(10.0, n / 100),
                          channels=args.channels,
                          workload="describe" if args.baseline else "feed", token=token,
                          tls=bool(args.tls), tls_ca=args.tls_ca, seed=args.seed,
                          multiplex=bool(args.multiplex), tick_s=args.tick_ms / 1000)

    def measure(redis: str | None, workers: int, conversations: int | None = None
                ) -> dict[str, Any]:
        """One run of the load on a fresh spawned server; its summary."""
        n = args.conversations if conversations is None else conversations
        # The workers comparison leaves the server unpinned: its workers take every core.
        cpu = args.server_cpu if conversations is None else None
        with spawn_server(models=args.models, cpu=cpu, live=max(256, n), token=token,
                          spin=bool(args.spin_idle_cores), redis=redis,
                          workers=workers) as spawned:
            outcome = asyncio.run(run_load(
                configure(spawned.target, conversations), script,
                probe=ProcessProbe(spawned.pid, children=workers > 1),
                lag_probe=(MetricsProbe(spawned.metrics_url) if spawned.metrics_url
                           else None)))
        return outcome.summary()

    if args.spin_idle_cores and not args.spawn:
        raise InputError("--spin-idle-cores applies to a server this command starts: add "
                         "--spawn, or start yours with 'midstream serve --spin-idle-cores'")
    if (args.redis or args.workers != 1 or args.scale_out or args.write_page) \
            and not args.spawn:
        raise InputError("--redis, --workers, --scale-out and --write-page apply to a server "
                         "this command starts: add --spawn")
    if args.workers > 1 and not args.redis:
        raise InputError(f"--workers {args.workers} needs --redis URL (the workers share it)")
    if args.repeats < 1:
        raise InputError(f"--repeats {args.repeats}: give at least 1")
    if (args.scale_out or args.write_page) and not args.redis:
        raise InputError("--scale-out and --write-page compare servers with and without the "
                         "shared log: add --redis URL")
    counts = _counts(args.scale_out) if args.scale_out else []
    if args.write_page and args.workers > 1 and not counts:
        raise InputError(f"--write-page records the shared log's CPU ratio, measured on one "
                         f"worker: drop --workers {args.workers}, or add --scale-out STEPS to "
                         "compare it with one worker")
    if args.spawn:
        if args.tls:
            raise InputError("--spawn starts a plain local server: drop --tls")
        before = machine_load()
        runs: dict[str, dict[str, Any]] = {}
        # With --scale-out the CPU comparison runs on one worker; the sweeps add more.
        compared = args.redis and (args.workers == 1 or counts)
        pairs: list[dict[str, float]] = []
        for _ in range(args.repeats if compared else 1):
            for redis in ([None, args.redis] if compared else [args.redis]):
                runs["redis" if redis else "plain"] = measure(
                    redis, 1 if counts else args.workers)
            if compared:
                plain, shared = (cpu_per_word(runs[k]) for k in ("plain", "redis"))
                pairs.append({"plain": plain, "redis": shared,
                              "ratio": shared / plain if plain > 0 else math.nan})
        sweeps: list[Sweep] = []
        for workers in ((1, max(args.workers, 2)) if counts else ()):
            sweep = Sweep(workers=workers, p99_ms=args.p99_ms)
            sweep.run(counts, functools.partial(measure, args.redis, workers))
            sweeps.append(sweep)
        if len(runs) == 2:
            result = _compare(runs, source, pairs, sweeps, before=before)
            if args.write_page is not None:
                write_section(args.write_page, section(result, _shown(args)))
            if args.json:
                print(json.dumps(result, sort_keys=True))
            else:
                _print_compared(result)
            if any(summary["opened"] == 0 for summary in runs.values()):
                raise UnavailableError(f"no conversation could be opened: "
                                       f"{[s['errors'] for s in runs.values()]}")
            return 0
        summary = next(iter(runs.values()))
    else:
        config = configure(args.server or os.environ.get("MIDSTREAM_SERVER") or DEFAULT_TARGET)
        probe = ProcessProbe(args.server_pid) if args.server_pid is not None else None
        if probe is not None:
            probe.sample()  # fail now, not after the run, when the pid is wrong
        lag_probe = MetricsProbe(args.server_metrics) if args.server_metrics else None
        if lag_probe is not None:
            lag_probe.read()  # likewise for a wrong metrics address
        summary = asyncio.run(run_load(config, script, probe=probe,
                                       lag_probe=lag_probe)).summary()
    summary["corpus"] = source
    if args.json:
        print(json.dumps(summary, sort_keys=True))
    else:
        _print(summary)
    if summary["opened"] == 0:
        raise UnavailableError(f"no conversation could be opened on {summary['target']}: "
                               f"{summary['errors']}")
    return 0


def _counts(steps: str) -> list[int]:
    """``--scale-out``'s comma-separated conversation counts.

    Raises
    ------
    InputError
        When one is not a positive whole number.
    """
    try:
        counts = [int(part) for part in steps.split(",")]
    except ValueError:
        counts = []
    if not counts or min(counts) < 1:
        raise InputError(f"--scale-out {steps!r}: give comma-separated conversation counts "
                         "of at least 1, e.g. 200,300,400")
    return counts


def _shown(args: argparse.Namespace) -> str:
    """The command line as typed (``midstream bench ...``), for the page it writes."""
    argv: list[str] = getattr(args, "argv", None) or sys.argv[1:]
    return shlex.join(["midstream", *argv])


def _compare(runs: dict[str, dict[str, Any]], source: str, pairs: list[dict[str, float]],
             sweeps: list[Sweep], *, before: dict[str, Any]) -> dict[str, Any]:
    """The last two runs of ``--redis`` (``plain`` and ``redis``), each pair's server CPU per
    word and their ratio, the median ratio and, with ``--scale-out``, the two sweeps and the
    ratio of the conversations they held."""
    for summary in runs.values():
        summary["corpus"] = source
        summary["server_cpu_ms_per_word"] = cpu_per_word(summary)
    result: dict[str, Any] = {**runs, "machine_before": before, "machine_after": machine_load(),
                              "cpu_pairs": pairs,
                              "cpu_per_word_ratio": statistics.median(
                                  p["ratio"] for p in pairs)}
    if sweeps:
        one, many = sweeps
        result["workers"] = {
            "sweeps": [sweep.summary() for sweep in sweeps],
            "ratio": many.largest / one.largest if one.largest else None}
    return result


def _print_compared(result: dict[str, Any]) -> None:
    for name in ("plain", "redis"):
        print(f"--- {'without' if name == 'plain' else 'with'} --redis")
        _print(result[name])
    for number, pair in enumerate(result["cpu_pairs"], 1):
        print(f"server CPU per word, pair {number}: {_ms(pair['plain'] * 1000)} us without "
              f"the shared log, {_ms(pair['redis'] * 1000)} us with it: ratio "
              f"{pair['ratio']:.2f}")
    print(f"ratio{' (median of the pairs)' if len(result['cpu_pairs']) > 1 else ''}: "
          f"{result['cpu_per_word_ratio']:.2f} (target at most 1.3)")
    workers = result.get("workers")
    if workers is None:
        return
    for sweep in workers["sweeps"]:
        for step in sweep["steps"]:
            load = step["load"]
            print(f"--workers {sweep['workers']}, {step['conversations']} conversations: "
                  f"{load['achieved_wps']:.0f} words/s, p99 {_ms(load['latency_ms']['p99'])} "
                  f"ms, {load['error_count']} errors: "
                  f"{'held' if step['passed'] else 'missed'}")
    one, many = workers["sweeps"]
    ratio = workers["ratio"]
    print(f"conversations held at p99 <= {one['p99_budget_ms']:g} ms: "
          f"{one['largest_passing']} on --workers 1, {many['largest_passing']} on --workers "
          f"{many['workers']}: ratio {'-' if ratio is None else f'{ratio:.2f}'} "
          "(target at least 1.6)")


def _ms(value: float) -> str:
    return f"{value:.1f}" if math.isfinite(value) else "-"


def bucket_text(bucket: list[float | None] | None) -> str:
    """A histogram bucket ``[lower, upper]`` (ms) as text: ``"2-5"``, ``"> 2500"``."""
    if bucket is None:
        return "-"
    lower, upper = bucket
    if upper is None:
        return f"> {lower:g}"
    return f"{lower:g}-{upper:g}"


def _print(s: dict[str, Any]) -> None:
    what = "DescribeModels calls" if s["workload"] == "describe" else "words"
    if s["workload"] == "describe" and s["multiplex"]:
        what = "words (one DescribeModels call per frame)"
    print(f"target {s['target']}: {s['opened']}/{s['conversations']} conversations open, "
          f"{s['rate_per_conversation']:g} {what}/s each, {s['measured_s']:.1f} s")
    if s["multiplex"]:
        print(f"  carried by   {s['channels']} FeedMany streams, one frame per "
              f"{s['tick_ms']:g} ms tick each")
    print(f"  words from   {s['corpus']}")
    print(f"  offered      {s['offered_wps']:.1f} {what}/s")
    print(f"  achieved     {s['achieved_wps']:.1f} {what}/s answered in the window "
          f"({s['words_answered']} of {s['words_sent']} answered in all)")
    lat = s["latency_ms"]
    print(f"  latency ms   p50 {_ms(lat['p50'])}  p95 {_ms(lat['p95'])}  p99 {_ms(lat['p99'])}  "
          f"max {_ms(lat['max'])}   (word "
          f"{'scheduled' if s['multiplex'] else 'sent'} -> its first hypothesis)")
    lag = s["send_lag_ms"]
    print(f"  send lag ms  p99 {_ms(lag['p99'])}   load generator CPU "
          f"{s['client_cpu_percent']:.0f} %")
    if lag["p99"] > _LAG_WARN_MS or s["client_cpu_percent"] > _CPU_WARN_PERCENT:
        print(f"  warning      the load generator fell behind its schedule (send lag p99 "
              f"{lag['p99']:.0f} ms) or ran out of CPU: latencies include its own delays")
    steal = s["steal"]
    if steal is not None:
        cpus = ", ".join(f"cpu{n} {ms:.0f}" for n, ms in enumerate(steal["per_cpu_ms"]))
        print(f"  steal ms     {cpus}   (this host's CPUs held by the hypervisor for other "
              f"guests; at most {steal['max_percent']:.2f} % of the window)")
        if steal["max_percent"] > STEAL_NOTABLE_PERCENT:
            print("  warning      the hypervisor took CPU time from this machine during the "
                  "window: latency tails include those stalls")
    loop = s["server_loop_lag"]
    if loop is not None:
        if "error" in loop:
            print(f"  loop lag     not measured: {loop['error']}")
        elif loop["probes"]:
            print(f"  loop lag ms  p50 {bucket_text(loop['p50_ms'])}  p99 "
                  f"{bucket_text(loop['p99_ms'])}  worst {bucket_text(loop['max_ms'])}   (how "
                  f"late the server's event loop ran a 0.1 s probe; {loop['probes']} probes)")
    errors = ", ".join(f"{k} {v}" for k, v in s["errors"].items()) or "none"
    print(f"  errors       {errors}")
    server = s["server"]
    if server is not None:
        print(f"  server       CPU {server['cpu_percent']:.0f} %, RSS "
              f"{server['rss_before_bytes'] / 2**20:.1f} -> "
              f"{server['rss_after_bytes'] / 2**20:.1f} MiB, "
              f"{server['bytes_per_open_conversation'] / 1024:.1f} KiB per open conversation, "
              f"{server['bytes_per_conversation_after'] / 1024:.1f} KiB after sending")
