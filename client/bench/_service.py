"""Find how many live conversations one server core carries at a word rate, within a latency budget.

The server (``midstream serve``) runs pinned to one core and this load generator on another.
For each step N (default 100, 250, 500, 1000, 1500) a fresh server gets N concurrent
conversations of SwDA val words at ``--rate`` words/s each for ``--seconds`` seconds; a step
passes when the p99 latency from a word's send to its first hypothesis is within ``--p99-ms``
and nothing failed. Stepping goes on while the server keeps up (no errors, 90 % of the offered
words answered within the window) and stops at the first step where it does not. Two baselines
are measured in the same run, so the headline figures are ratios, not machine-dependent times:

* transport: the same N callers making one trivial ``DescribeModels`` call per would-be word
  on the same server (what a round trip through gRPC costs without tagging);
* engine: the conversation engine alone, in this process on the server's core, fed the same
  words (how many words/s the models manage without the service around them).

    midstream bench service                       # full: 60 s per step
    midstream bench service --quick               # 15 s steps
    midstream bench service --smoke --json out.json
    midstream bench service --multiplex --steps 500,1000,1200

``--multiplex`` carries each step's conversations over one ``FeedMany`` stream per channel
(``midstream bench --multiplex``): one frame per stream every ``--tick-ms`` with every word due,
latency timed from each word's scheduled time; the transport baseline is then one
``DescribeModels`` call per frame, timed the same way. ``--spin-idle-cores`` starts each server
with ``midstream serve --spin-idle-cores`` (an idle-priority spinner keeps its core from
halting between frames).

``--redis URL`` starts each server with ``midstream serve --redis URL`` (the shared log);
``--workers N`` (needs ``--redis``) with ``--workers N``, unpinned (the workers take every
core), the server's CPU then being its workers' together. Running the sweep with ``--workers
2`` and again with ``--workers 1`` compares the conversations held within the budget.

Absolute figures depend on the machine and on what else runs on it (see the load average
printed first); compare ratios.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import sys
import time
from pathlib import Path
from typing import Any

from midstream import InputError, Word
from midstream.client.bench._kit import (
    corpora_root,
    machine,
    model_arguments,
    models_folder,
    pin_self,
)
from midstream.client.bench._load import (
    DEFAULT_TICK_S,
    STEAL_NOTABLE_PERCENT,
    LoadConfig,
    ProcessProbe,
    WordScript,
    run_load,
)
from midstream.client.bench._scrape import MetricsProbe
from midstream.client.cli._cmd_bench import bucket_text, load_script, spawn_server
from midstream.models import ModelBundle

_FULL_STEPS: tuple[int, ...] = (100, 250, 500, 1000, 1500)
_QUICK_STEPS: tuple[int, ...] = (50, 100, 250, 500, 1000)
_MULTIPLEX_STEPS: tuple[int, ...] = (500, 1000, 1200, 1500)
_MULTIPLEX_QUICK_STEPS: tuple[int, ...] = (250, 500, 1000, 1200)
#: A step "keeps up" when this share of the offered words is answered within the window.
_KEEPS_UP = 0.9


def engine_rate(models: Path, script: WordScript, *, words: int, conversations: int = 50
                ) -> dict[str, Any]:
    """Words per CPU second of the engine alone, interleaving ``conversations`` engines."""
    bundle = ModelBundle.load_directory(models)
    # Load the compiled kernels first, as the server does while loading models; otherwise
    # their first-call load falls inside the timed loop.
    bundle.warm_up()
    engines = [bundle.new_engine() for _ in range(conversations)]
    feed = []
    for index in range(words):
        number = index % conversations
        speaker, text = script.word(number, index // conversations)
        feed.append((engines[number], f"w{index}", Word(text=text, speaker=speaker)))
    cpu = time.process_time()
    wall = time.perf_counter()
    for engine, word_id, word in feed:
        engine.add_word(word_id, word)
    cpu = time.process_time() - cpu
    wall = time.perf_counter() - wall
    return {"words": words, "conversations": conversations, "cpu_s": round(cpu, 3),
            "wall_s": round(wall, 3), "words_per_cpu_s": round(words / cpu, 1),
            "cpu_ms_per_word": round(1000 * cpu / words, 4)}


def one_step(args: argparse.Namespace, models: Path, script: WordScript, n: int,
             generator_cores: list[int]) -> dict[str, Any]:
    """One step: a fresh pinned server, the tagging load, then the transport baseline."""
    ramp = min(10.0, n / 100)
    workers = args.workers
    with spawn_server(models=models, cpu=args.server_core if workers == 1 else None,
                      live=max(256, n), token=None, spin=args.spin_idle_cores,
                      redis=args.redis, workers=workers) as spawned:
        target = spawned.target
        probe = ProcessProbe(spawned.pid, children=workers > 1)
        mode = {"multiplex": args.multiplex, "tick_s": args.tick_ms / 1000}
        load = asyncio.run(run_load(LoadConfig(
            target=target, conversations=n, rate=args.rate, seconds=args.seconds, ramp_s=ramp,
            channels=args.channels, **mode), script, probe=probe,
            lag_probe=MetricsProbe(spawned.metrics_url) if spawned.metrics_url else None,
        )).summary()
        base = asyncio.run(run_load(LoadConfig(
            target=target, conversations=n, rate=args.rate, seconds=args.baseline_seconds,
            ramp_s=0.0, channels=args.channels, workload="describe", **mode), script,
            probe=probe)).summary()
    server = load["server"]
    answered = max(load["answered_in_window"], 1)
    cpu_per_word = server["cpu_percent"] / 100 * load["measured_s"] / answered
    base_answered = max(base["answered_in_window"], 1)
    base_cpu_per_call = base["server"]["cpu_percent"] / 100 * base["measured_s"] / base_answered
    passed = (load["latency_ms"]["p99"] <= args.p99_ms and load["error_count"] == 0
              and load["opened"] == n and load["words_answered"] == load["words_sent"])
    kept_up = (load["error_count"] == 0
               and load["achieved_wps"] >= _KEEPS_UP * load["offered_wps"])
    return {"conversations": n, "passed": passed, "kept_up": kept_up, "load": load,
            "steal_ms": steal_by_role(load["steal"], args.server_core, generator_cores),
            "baseline": base,
            "server_cpu_ms_per_word": round(1000 * cpu_per_word, 4),
            "server_cpu_ms_per_baseline_call": round(1000 * base_cpu_per_call, 4),
            "p99_ratio_to_baseline": round(load["latency_ms"]["p99"]
                                           / max(base["latency_ms"]["p99"], 1e-3), 2),
            "p50_ratio_to_baseline": round(load["latency_ms"]["p50"]
                                           / max(base["latency_ms"]["p50"], 1e-3), 2)}


def steal_by_role(steal: dict[str, Any] | None, server_core: int,
                  generator_cores: list[int]) -> dict[str, float] | None:
    """The window's steal time on the server's core and the most on any generator core."""
    per_cpu = steal["per_cpu_ms"] if steal is not None else []
    if not all(0 <= c < len(per_cpu) for c in (server_core, *generator_cores)):
        return None
    return {"server_core": per_cpu[server_core],
            "generator_core": max(per_cpu[c] for c in generator_cores)}


def table(steps: list[dict[str, Any]]) -> list[str]:
    """The steps as a Markdown table."""
    lines = [
        "| N | offered w/s | achieved w/s | p50 ms | p95 ms | p99 ms | errors | server CPU % "
        "| server CPU ms/word | KiB/conv (open) | baseline p50 / p99 ms | p99 / baseline p99 "
        "| generator CPU % | generator send lag p99 ms | steal ms server / generator core "
        "| server loop lag p99 / worst ms | meets p99 |",
        "|" + "---|" * 17,
    ]
    for s in steps:
        load, base, server = s["load"], s["baseline"], s["load"]["server"]
        lat, blat = load["latency_ms"], base["latency_ms"]
        errors = ", ".join(f"{k} {v}" for k, v in load["errors"].items()) or "0"
        lines.append(
            f"| {s['conversations']} | {load['offered_wps']:.0f} | {load['achieved_wps']:.0f} "
            f"| {lat['p50']:.1f} | {lat['p95']:.1f} | {lat['p99']:.1f} | {errors} "
            f"| {server['cpu_percent']:.0f} | {s['server_cpu_ms_per_word']:.3f} "
            f"| {server['bytes_per_open_conversation'] / 1024:.1f} "
            f"| {blat['p50']:.1f} / {blat['p99']:.1f} | {s['p99_ratio_to_baseline']:.1f}x "
            f"| {load['client_cpu_percent']:.0f} | {load['send_lag_ms']['p99']:.1f} "
            f"| {_steal_cell(s.get('steal_ms'))} | {_lag_cell(load.get('server_loop_lag'))} "
            f"| {'yes' if s['passed'] else 'no'} |")
    return lines


def _steal_cell(steal: dict[str, float] | None) -> str:
    return "-" if steal is None else f"{steal['server_core']:.0f} / {steal['generator_core']:.0f}"


def _lag_cell(lag: dict[str, Any] | None) -> str:
    # Absent from JSON written before the loop lag was measured.
    if lag is None or "error" in lag or not lag.get("probes"):
        return "-"
    return f"{bucket_text(lag['p99_ms'])} / {bucket_text(lag['max_ms'])}"


def runs_by_size(results: list[dict[str, Any]], *, quiet_only: bool = False
                 ) -> dict[int, tuple[int, int]]:
    """For each conversation count run, in first-run order: (runs that met the budget, runs).

    ``quiet_only`` counts only the runs the hypervisor left alone (:func:`disturbed`); a size
    with no such run is left out.
    """
    runs: dict[int, tuple[int, int]] = {}
    for step in results:
        if quiet_only and disturbed(step) is not False:
            continue
        met, total = runs.get(step["conversations"], (0, 0))
        runs[step["conversations"]] = (met + bool(step["passed"]), total + 1)
    return runs


def disturbed(step: dict[str, Any]) -> bool | None:
    """Whether steal on the server's or the generator's core passed the notable share of the
    window; None when steal was not measured (not Linux, or JSON from before it was)."""
    steal, seconds = step.get("steal_ms"), float(step["load"]["measured_s"])
    if steal is None or seconds <= 0:
        return None
    worst: float = max(steal["server_core"], steal["generator_core"])
    return worst / 10 / seconds > STEAL_NOTABLE_PERCENT


def largest_met(runs: dict[int, tuple[int, int]]) -> int:
    """The largest size every run of which met the budget (0 when none did)."""
    return max([n for n, (met, total) in runs.items() if met == total], default=0)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'service', help='live conversations per server core, stepped, with baselines',
        description=__doc__.split("\n\n")[0])
    model_arguments(parser)
    parser.add_argument("--corpus", type=Path, default=None,
                        help="corpus of the words (default $MIDSTREAM_CORPORA/swda or "
                             "../shared/corpora/swda)")
    parser.add_argument("--split", default="val")
    parser.add_argument("--steps", default=None,
                        help="comma-separated conversation counts (default "
                             f"{','.join(map(str, _FULL_STEPS))}); a count given several "
                             "times is run that many times and counts as met only if every "
                             "run met the budget (add --all-steps to go on past a failed run)")
    parser.add_argument("--rate", type=float, default=3.0, help="words/s per conversation")
    parser.add_argument("--seconds", type=float, default=60.0, help="seconds per step")
    parser.add_argument("--baseline-seconds", type=float, default=20.0)
    parser.add_argument("--p99-ms", type=float, default=50.0, help="latency budget (p99)")
    parser.add_argument("--channels", type=int, default=4)
    parser.add_argument("--multiplex", action="store_true",
                        help="carry the conversations over one FeedMany stream per channel "
                             f"(default steps {','.join(map(str, _MULTIPLEX_STEPS))})")
    parser.add_argument("--tick-ms", type=float, default=1000 * DEFAULT_TICK_S,
                        help="with --multiplex: milliseconds between two frames of a stream")
    parser.add_argument("--server-core", type=int, default=0)
    parser.add_argument("--spin-idle-cores", action="store_true",
                        help="start each server with 'midstream serve --spin-idle-cores' (its "
                             "core kept from idling by an idle-priority spinner)")
    parser.add_argument("--client-core", type=int, default=1)
    parser.add_argument("--redis", default=None, metavar="URL",
                        help="start each server with 'midstream serve --redis URL'")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="start each server with '--workers N' (needs --redis; unpinned)")
    parser.add_argument("--engine-words", type=int, default=20_000)
    parser.add_argument("--all-steps", action="store_true",
                        help="run every step even after one fails")
    parser.add_argument("--quick", action="store_true",
                        help=f"15 s steps {','.join(map(str, _QUICK_STEPS))}, 10 s baselines")
    parser.add_argument("--smoke", action="store_true",
                        help="one 2 s step of 4 conversations (checks the setup)")
    parser.add_argument("--json", type=Path, default=None, metavar="FILE",
                        help="also write every figure to FILE as JSON")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.workers > 1 and not args.redis:
        raise InputError("--workers needs --redis URL")
    steps = _MULTIPLEX_STEPS if args.multiplex else _FULL_STEPS
    if args.quick:
        args.seconds, args.baseline_seconds = 15.0, 10.0
        steps = _MULTIPLEX_QUICK_STEPS if args.multiplex else _QUICK_STEPS
    if args.smoke:
        steps, args.seconds, args.baseline_seconds, args.engine_words = (4,), 2.0, 2.0, 400
    if args.steps:
        steps = tuple(int(s) for s in args.steps.split(","))

    models, models_note = models_folder(args.models, args.train_tiny)
    corpus = args.corpus or corpora_root() / "swda"
    script, source = load_script(corpus, args.split,
                                 limit=2_000 if args.smoke else 50_000)
    info = machine()
    print(f"machine: {info['nproc']} CPUs ({info['cpu_model']}), Python {info['python']} "
          f"({info['build']} build), "
          f"load average {' '.join(f'{x:.2f}' for x in info['loadavg'])}, CPU pressure "
          f"(some, avg60) {info['cpu_pressure_avg60']}%")
    print(f"models: {models_note}")
    print(f"words: {source}")
    if args.multiplex:
        print(f"transport: {args.channels} FeedMany streams, a frame every "
              f"{args.tick_ms:g} ms each; latency from each word's scheduled time")
    if args.spin_idle_cores:
        print("server: midstream serve --spin-idle-cores (its core kept from idling)")

    # The engine baseline runs on the core the server will use, before any server starts.
    pin_self(args.server_core)
    engine = engine_rate(models, script, words=args.engine_words)
    print(f"engine alone: {engine['words_per_cpu_s']:,.0f} words per CPU second "
          f"({engine['cpu_ms_per_word']:.3f} ms/word, {engine['conversations']} interleaved "
          f"conversations)")
    pin_self(args.client_core)
    generator_cores = sorted(os.sched_getaffinity(0))
    print(f"load generator on core(s) {generator_cores}, server on core {args.server_core}")

    results: list[dict[str, Any]] = []
    for n in steps:
        print(f"step: {n} conversations x {args.rate:g} words/s for {args.seconds:g} s ...",
              file=sys.stderr, flush=True)
        results.append(one_step(args, models, script, n, generator_cores))
        # Past a missed budget, go on while the server keeps up: its CPU figures at real load
        # stay useful on a machine whose other jobs set the latency tails.
        if not (results[-1]["passed"] or results[-1]["kept_up"] or args.all_steps):
            break
    runs = runs_by_size(results)
    # A size given several times (--steps 1000,1000,1000) counts only if every run met the
    # budget: on a shared machine one lucky run says little.
    largest = largest_met(runs)
    # The same over the runs whose window the hypervisor left alone: on a virtual machine,
    # steal stalls the server and the generator alike and lands in the tails.
    quiet = runs_by_size(results, quiet_only=True)
    largest_quiet = largest_met(quiet)
    print()
    print("\n".join(table(results)))
    print()
    # CPU ratios at the busiest step (fixed costs best amortised); latency ratios at the
    # largest step that kept up (past it, queueing in the server dominates the tails).
    busiest = max(results, key=lambda s: s["load"]["answered_in_window"])
    kept = [s for s in results if s["kept_up"]] or results
    steady = max(kept, key=lambda s: s["conversations"])
    service_ratio = busiest["server_cpu_ms_per_word"] / max(engine["cpu_ms_per_word"], 1e-9)
    transport_ratio = busiest["server_cpu_ms_per_word"] / max(
        busiest["server_cpu_ms_per_baseline_call"], 1e-9)
    print(f"largest N meeting p99 <= {args.p99_ms:g} ms at {args.rate:g} words/s with no "
          f"errors{' (multiplexed)' if args.multiplex else ''}: {largest}"
          + (" (none of the steps)" if not largest else "")
          + (" (in every run of it)" if largest and runs[largest][1] > 1 else ""))
    for n, (met, total) in runs.items():
        if total > 1:
            print(f"N={n}: met the p99 budget with no errors in {met} of {total} runs")
    steal_known = any(disturbed(step) is not None for step in results)
    for n, (_, total) in runs.items():
        if steal_known and quiet.get(n, (0, 0))[1] < total:
            q_met, q_total = quiet.get(n, (0, 0))
            print(f"N={n}: {total - q_total} of {total} runs had steal above "
                  f"{STEAL_NOTABLE_PERCENT:g} % of the window on the server's or generator's "
                  f"core; the other {q_total} met the budget in {q_met}")
    if steal_known and quiet != runs:
        print(f"largest N meeting the budget in every run with steal <= "
              f"{STEAL_NOTABLE_PERCENT:g} %: {largest_quiet}")
    per_core = 1000 / max(busiest["server_cpu_ms_per_word"], 1e-9)
    print(f"projection from server CPU time (N={busiest['conversations']}): "
          f"{per_core:,.0f} words/s = {per_core / args.rate:,.0f} conversations at "
          f"{args.rate:g} words/s per fully free core (not a latency measurement)")
    print(f"server CPU per word / engine CPU per word: {service_ratio:.2f}x "
          f"(at N={busiest['conversations']})")
    print(f"server CPU per word / server CPU per DescribeModels call: {transport_ratio:.2f}x")
    print(f"p99 latency / DescribeModels p99 at N={steady['conversations']} (the largest N "
          f"the server kept up with): {steady['p99_ratio_to_baseline']:.2f}x")
    if args.json is not None:
        args.json.write_text(json.dumps({
            "machine": info, "models": models_note, "words": source, "rate": args.rate,
            "seconds": args.seconds, "p99_budget_ms": args.p99_ms, "engine": engine,
            "steps": results, "largest_passing": largest,
            "runs": {str(n): {"met": met, "of": total} for n, (met, total) in runs.items()},
            "quiet_runs": {str(n): {"met": met, "of": total}
                           for n, (met, total) in quiet.items()},
            "largest_passing_quiet": largest_quiet,
            "steal_notable_percent": STEAL_NOTABLE_PERCENT,
            "multiplex": args.multiplex, "tick_ms": args.tick_ms if args.multiplex else None,
            "spin_idle_cores": args.spin_idle_cores,
            "channels": args.channels, "server_core": args.server_core,
            "generator_cores": generator_cores,
            "service_to_engine_cpu_ratio": round(service_ratio, 3),
            "projected_words_per_core": round(per_core, 1),
            "projected_conversations_per_core": round(per_core / args.rate, 1),
            "projected_from_step": busiest["conversations"],
            "cpu_ratios_at_step": busiest["conversations"],
            "latency_ratio_at_step": steady["conversations"],
            "service_to_transport_cpu_ratio": round(transport_ratio, 3),
            "argv": sys.argv[1:],
        }, indent=2, sort_keys=True), encoding="utf-8")
    return 0

