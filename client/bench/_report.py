"""``midstream bench report``: run every benchmark and write ``docs/benchmarks.md`` from their
output.

Runs, one after another, each in its own process (never two at once: they would measure each
other): ``midstream bench decoder`` (the word decoder's per-word cost, its own baselines),
``midstream bench service`` (live conversations per server core, transport and engine
baselines), ``midstream bench memory`` (memory per idle live conversation, engine alone) and
``midstream bench gc`` (cycle-collector pauses on the word path, Python's own thresholds as the
baseline), then writes the Markdown page with the machine, its load, the exact commands and
the tables.

    midstream bench report                         # full: about 15 minutes
    midstream bench report --quick --out /tmp/b.md  # shorter steps
    midstream bench report --reuse /tmp/bench       # rewrite from saved output
    midstream bench report --multiplex              # also the FeedMany sweep

``--shared-log`` also runs ``midstream bench redis`` (the shared Redis log's CPU per word
against none, and Redis's bytes per word) and adds its table.

A section that ``midstream bench --spawn --redis URL --write-page`` wrote into the page (the
shared log's CPU ratio and the workers ratio over gRPC) is carried over as it stands.

``--multiplex`` runs ``midstream bench service`` a second time with ``--multiplex`` (the
conversations carried over a few ``FeedMany`` streams) and adds its table; ``--spin-steps`` runs
that sweep once more at those steps with each server started with ``--spin-idle-cores`` (its
core kept from idling), the other sweep being its baseline. ``--reuse`` shows them whenever the
saved output holds them.

Every run's raw output is kept in ``--work`` (JSON and text), so the page can be rewritten
without measuring again (``--reuse``).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

from midstream.client.bench._kit import REPO, machine, model_arguments, models_folder
from midstream.client.bench._scale_out import BEGIN as SCALE_OUT_BEGIN
from midstream.client.bench._scale_out import END as SCALE_OUT_END
from midstream.client.bench._scale_out import write_section
from midstream.client.bench._service import table as service_table
from midstream.client.cli._cmd_serve import _FULL_COLLECTION_S, _GC_THRESHOLDS

#: How each benchmark runs: a subcommand of this same installation, in a process of its own.
_BENCH = (sys.executable, "-m", "midstream", "bench")


def _run(command: list[str], log: Path) -> str:
    print("running:", " ".join(command), file=sys.stderr, flush=True)
    done = subprocess.run(command, capture_output=True, text=True, check=False, cwd=REPO)
    log.write_text(done.stdout + ("\n--- stderr ---\n" + done.stderr if done.stderr else ""),
                   encoding="utf-8")
    if done.returncode != 0:
        raise SystemExit(f"midstream bench {command[len(_BENCH)]} failed ({done.returncode}); "
                         f"see {log}")
    return done.stdout


def _shown(command: list[str]) -> str:
    """A command as a reader types it from the repository root."""
    parts = ["midstream"] + [str(Path(p).relative_to(REPO)) if p.startswith(str(REPO))
                             else p for p in command[len(_BENCH) - 1:]]
    return " ".join(parts)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        'report', help='run every benchmark and write docs/benchmarks.md',
        description=__doc__.split("\n\n")[0])
    model_arguments(parser)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--smoke", action="store_true",
                        help="every benchmark in its smoke mode (seconds; checks the pipeline)")
    parser.add_argument("--steps", default=None, help="passed to midstream bench service")
    parser.add_argument("--multiplex", action="store_true",
                        help="also run midstream bench service --multiplex (FeedMany streams)")
    parser.add_argument("--multiplex-steps", default=None,
                        help="passed as --steps to midstream bench service --multiplex")
    parser.add_argument("--spin-steps", default=None, metavar="STEPS",
                        help="with --multiplex: also run midstream bench service --multiplex "
                             "--spin-idle-cores at these steps")
    parser.add_argument("--multiplex-channels", type=int, default=None, metavar="N",
                        help="passed as --channels to midstream bench service --multiplex (streams "
                             "the conversations share; its default is 4)")
    parser.add_argument("--shared-log", action="store_true",
                        help="also run midstream bench redis (the shared Redis log's CPU per "
                             "word and Redis bytes per word; starts its own redis-server)")
    parser.add_argument("--work", type=Path, default=Path("/tmp/midstream-bench"))
    parser.add_argument("--reuse", type=Path, default=None, metavar="DIR",
                        help="write the page from the output saved in DIR; measure nothing")
    parser.add_argument("--out", type=Path, default=REPO / "docs" / "benchmarks.md")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:

    work = args.reuse or args.work
    work.mkdir(parents=True, exist_ok=True)
    commands_file = work / "commands.json"
    if args.reuse is None:
        before = machine()
        models, models_note = models_folder(args.models, args.train_tiny)
        model_args = ["--models", str(models)]
        engine_cmd = [*_BENCH, "decoder",
                      "--model", str(models / "words.tagger")]
        service_cmd = [*_BENCH, "service", *model_args,
                       "--json", str(work / "service.json")]
        if args.quick:
            service_cmd.append("--quick")
        if args.steps:
            service_cmd += ["--steps", args.steps]
        memory_cmd = [*_BENCH, "memory", *model_args,
                      "--json", str(work / "memory.json")]
        gc_cmd = [*_BENCH, "gc", *model_args,
                  "--json", str(work / "gc.json")]
        multiplex_cmd = [*_BENCH, "service", *model_args,
                         "--multiplex", "--json", str(work / "service_multiplex.json")]
        if args.quick:
            multiplex_cmd.append("--quick")
        if args.multiplex_steps:
            multiplex_cmd += ["--steps", args.multiplex_steps]
        if args.multiplex_channels:
            multiplex_cmd += ["--channels", str(args.multiplex_channels)]
        spin_cmd = [*_BENCH, "service", *model_args,
                    "--multiplex", "--spin-idle-cores", "--json",
                    str(work / "service_multiplex_spin.json"), "--steps", str(args.spin_steps)]
        if args.multiplex_channels:
            spin_cmd += ["--channels", str(args.multiplex_channels)]
        spinning = bool(args.multiplex and args.spin_steps)
        redis_cmd = [*_BENCH, "redis", *model_args,
                     "--json", str(work / "redis.json")]
        if args.smoke:
            for command in (engine_cmd, service_cmd, memory_cmd, multiplex_cmd, gc_cmd,
                            spin_cmd, redis_cmd):
                command.append("--smoke")
        (work / "redis.json").unlink(missing_ok=True)
        (work / "service_multiplex.json").unlink(missing_ok=True)
        (work / "service_multiplex_spin.json").unlink(missing_ok=True)
        _run(engine_cmd, work / "engine.txt")
        _run(service_cmd, work / "service.txt")
        _run(memory_cmd, work / "memory.txt")
        _run(gc_cmd, work / "gc.txt")
        if args.multiplex:
            _run(multiplex_cmd, work / "service_multiplex.txt")
        if spinning:
            _run(spin_cmd, work / "service_multiplex_spin.txt")
        if args.shared_log:
            _run(redis_cmd, work / "redis.txt")
        commands_file.write_text(json.dumps({
            "engine": _shown(engine_cmd), "service": _shown(service_cmd),
            "service_multiplex": _shown(multiplex_cmd) if args.multiplex else None,
            "service_multiplex_spin": _shown(spin_cmd) if spinning else None,
            "memory": _shown(memory_cmd), "gc": _shown(gc_cmd),
            "redis": _shown(redis_cmd) if args.shared_log else None,
            "machine_before": before, "models": models_note,
            "report": _shown([*_BENCH[:-1], *args.argv]),
            "machine_after": machine()}, indent=2), encoding="utf-8")
    commands = json.loads(commands_file.read_text(encoding="utf-8"))
    service = json.loads((work / "service.json").read_text(encoding="utf-8"))
    memory = json.loads((work / "memory.json").read_text(encoding="utf-8"))
    engine_text = ((work / "engine.txt").read_text(encoding="utf-8")
                   if (work / "engine.txt").exists() else "")
    multiplexed_file = work / "service_multiplex.json"
    multiplexed = (json.loads(multiplexed_file.read_text(encoding="utf-8"))
                   if multiplexed_file.exists() else None)
    spin_file = work / "service_multiplex_spin.json"
    spun = json.loads(spin_file.read_text(encoding="utf-8")) if spin_file.exists() else None
    gc_file = work / "gc.json"
    collector = json.loads(gc_file.read_text(encoding="utf-8")) if gc_file.exists() else None
    redis_file = work / "redis.json"
    shared = json.loads(redis_file.read_text(encoding="utf-8")) if redis_file.exists() else None
    old = args.out.read_text(encoding="utf-8") if args.out.exists() else ""
    args.out.write_text(render(commands, service, memory, engine_text, multiplexed,
                               collector=collector, spun=spun, shared=shared),
                        encoding="utf-8")
    # The section 'midstream bench --spawn --redis ... --write-page' wrote is its own run's:
    # carry it over rather than lose it.
    start, stop = old.find(SCALE_OUT_BEGIN), old.find(SCALE_OUT_END)
    if 0 <= start < stop:
        write_section(args.out, old[start:stop + len(SCALE_OUT_END)] + "\n")
    print(f"wrote {args.out}", file=sys.stderr)
    return 0


def _streams(count: int) -> str:
    return "one `FeedMany` stream" if count == 1 else f"{count} `FeedMany` streams"


def _engine_section(text: str) -> list[str]:
    if not text:
        return ["`midstream bench decoder` gave no output; nothing measured.", ""]
    body = text.split("\n--- stderr ---\n", maxsplit=1)[0].rstrip()
    return ["```", body, "```", ""]


def _load(info: dict[str, Any]) -> str:
    return " / ".join(f"{x:.2f}" for x in info["loadavg"])


def _largest_cell(service: dict[str, Any]) -> str:
    """The largest N that met the budget, saying so when it was also the largest N run (a
    larger one might have met it too)."""
    largest = service["largest_passing"]
    ran = max((step["conversations"] for step in service["steps"]), default=0)
    return (f"**{largest}** conversations ({largest * service['rate']:g} words/s)"
            + (", the largest N run" if largest and largest == ran else ""))


def _runs_note(service: dict[str, Any]) -> str:
    """`` (N=1000: 4 of 5 runs met)`` for the sizes run more than once."""
    counts = [f"N={n}: {r['met']} of {r['of']} runs met"
              for n, r in service.get("runs", {}).items() if r["of"] > 1]
    return f" ({'; '.join(counts)})" if counts else ""


def _quiet_row(service: dict[str, Any], what: str) -> list[str]:
    """A headline row for the runs the hypervisor left alone, when steal was measured and
    some run was disturbed (otherwise it would repeat the row above)."""
    quiet, runs = service.get("quiet_runs"), service.get("runs")
    if quiet is None or quiet == runs:
        return []
    largest = service["largest_passing_quiet"]
    counts = "; ".join(f"N={n}: {q['met']} of {q['of']} quiet runs met"
                       for n, q in quiet.items())
    result = (f"**{largest}** conversations ({largest * service['rate']:g} words/s)" if counts
              else "no run was that quiet")
    return [f"| {what}, counting only runs with steal ≤ {service['steal_notable_percent']:g} % "
            f"of the window on the server's and the generator's cores"
            f"{f' ({counts})' if counts else ''} | {result} | - |"]


def _sweep_section(heading: str, command: str, text: str,
                   service: dict[str, Any]) -> list[str]:
    """A service sweep's section: heading, command, what differs, its largest N, its table."""
    largest = service["largest_passing"]
    return [
        f"## {heading}",
        "",
        f"`{command}`",
        "",
        f"{text} Largest N meeting p99 ≤ {service['p99_budget_ms']:g} ms with no errors: "
        f"**{largest}** ({largest * service['rate']:g} words/s).",
        "",
        *service_table(service["steps"]),
        "",
    ]


def _multiplexed_section(command: str | None, service: dict[str, Any]) -> list[str]:
    """The FeedMany sweep: its command, how it differs, its table."""
    return _sweep_section(
        "Live conversations per server core, multiplexed (FeedMany)",
        command or "midstream bench service --multiplex",
        f"The same steps, but the conversations ride {_streams(service.get('channels', 4))} "
        f"(one per connection): every {service.get('tick_ms', 10):g} ms "
        "each stream sends one frame holding every word that fell due on it, and the server "
        "answers each frame with one reply frame. Latency is from each word's *scheduled* "
        "time (so the wait for the next frame is inside it) to the first update naming it. "
        "*Baseline*: one `DescribeModels` call per frame, timed the same way.", service)


def _spun_section(command: str | None, service: dict[str, Any]) -> list[str]:
    """The FeedMany sweep again, each server started with ``--spin-idle-cores``."""
    return _sweep_section(
        "The same, server core kept from idling (`midstream serve --spin-idle-cores`)",
        command or "midstream bench service --multiplex --spin-idle-cores",
        "The multiplexed sweep again, run after it, with each server started with "
        "`--spin-idle-cores`: an idle-priority (`SCHED_IDLE`) process spins on the server's "
        "core, so the core never halts between frames; the kernel runs it only when the server "
        "has nothing to do. On a virtual machine a halted CPU goes back to the hypervisor, and "
        "the next frame starts on a cold, just-woken core. The sweep above is this one's "
        "baseline: the same server, load and steps with the core left to idle. *Server CPU* "
        "counts the server process only, not the spinner (which keeps the core 100 % busy "
        "in `top`).", service)


def _collector_section(command: str | None, result: dict[str, Any]) -> list[str]:
    """Cycle-collector pauses per threshold setting (``midstream bench gc`` output)."""
    kept = result["retained"]
    rows = []
    for run in result["passes"]:
        name = ",".join(map(str, run["thresholds"]))
        for generation, g in run["generations"].items():
            if g["collections"]:
                rows.append(f"| {name} | {generation} | {g['collections']} | "
                            f"{g['max_ms']:.1f} | {g['total_ms']:.0f} | {g['freed']} |")
        rows.append(f"| {name} | all | | **{run['max_ms']:.1f}** | "
                    f"{run['total_ms'] / result['words'] * 1e3:.1f} us per word | |")
    return [
        "## Cycle-collector pauses on the word path",
        "",
        f"`{command or 'midstream bench gc'}`",
        "",
        f"In-process (no network), {result['conversations']} live conversations on "
        f"`FeedMany` take {result['words']:,} SwDA val words; `gc.callbacks` time every "
        "collection. A pause holds up every word in flight, so the longest pause bounds what "
        "the collector adds to the latency tail. Baseline: Python's own thresholds "
        f"(700,10,10). `midstream serve` uses {_GC_THRESHOLDS} and a full collection every "
        f"{_FULL_COLLECTION_S:g} s. Objects the collector tracks that stay alive per word "
        "taken in: "
        f"{kept['per_word']:.2f} (kept history is stored untracked).",
        "",
        "| thresholds | generation | collections | longest ms | total ms | objects freed |",
        "|---|---|---|---|---|---|",
        *rows,
        "",
    ]


def _shared_section(command: str | None, result: dict[str, Any]) -> list[str]:
    """The shared Redis log's cost (``midstream bench redis`` output)."""
    ratios = ", ".join(f"{r:.2f}" for r in result["cpu_ratios"])
    return [
        "## Shared Redis log (`serve --redis`)",
        "",
        f"`{command or 'midstream bench redis'}`",
        "",
        f"In-process (no network between caller and server), {result['conversations']} "
        f"conversations take {result['words_per_pass']:,} SwDA val words one per event, "
        "without and with every session's journal (the pass ends when the writer has sent "
        "everything to Redis); passes alternate. Redis's own CPU is not counted.",
        "",
        "| measure | result | target (project brief, no source) |",
        "|---|---|---|",
        f"| server CPU per word with the log ÷ without, median of {result['repeats']} "
        f"(each: {ratios}) | **{result['cpu_ratio_median']:.2f}x** | ≤ 1.3 |",
        f"| ms per word without / with | {result['ms_per_word_plain']:.3f} / "
        f"{result['ms_per_word_shared']:.3f} | - |",
        f"| Redis bytes per word: update stream / input events / all keys | "
        f"{result['update_stream_bytes_per_word']:.0f} / "
        f"{result['event_stream_bytes_per_word']:.0f} / {result['all_bytes_per_word']:.0f} "
        "| - |",
        "",
    ]


def render(commands: dict[str, Any], service: dict[str, Any], memory: dict[str, Any],
           engine_text: str, multiplexed: dict[str, Any] | None = None, *,
           collector: dict[str, Any] | None = None, spun: dict[str, Any] | None = None,
           shared: dict[str, Any] | None = None) -> str:
    """The benchmarks page; ``multiplexed`` is ``midstream bench service --multiplex`` output,
    ``spun`` the same with ``--spin-idle-cores``, ``collector`` is ``midstream bench gc`` output,
    ``shared`` is ``midstream bench redis`` output."""
    m0, m1 = commands["machine_before"], commands["machine_after"]
    eng = service["engine"]
    steps = service["steps"]
    # Same choices as midstream bench service (recomputed so older JSON renders the same way): CPU
    # ratios at the busiest step, the latency ratio at the largest step the server kept up with.
    busiest = max(steps, key=lambda s: s["load"]["answered_in_window"])
    kept = [s for s in steps if s.get("kept_up", s["passed"]) or (s["load"]["achieved_wps"]
            >= 0.9 * s["load"]["offered_wps"] and not s["load"]["error_count"])] or steps
    steady = max(kept, key=lambda s: s["conversations"])
    engine_ratio = busiest["server_cpu_ms_per_word"] / max(eng["cpu_ms_per_word"], 1e-9)
    transport_ratio = busiest["server_cpu_ms_per_word"] / max(
        busiest["server_cpu_ms_per_baseline_call"], 1e-9)
    per_core = 1000 / max(busiest["server_cpu_ms_per_word"], 1e-9)
    held, alone = memory["service"], memory["engine"]
    per_conv = held.get("bytes_per_conversation", 0)
    bare = memory["bare_stream"]
    bare_bytes = bare.get("bytes_per_conversation", 0)
    lines = [
        "# Benchmarks",
        "",
        "Generated by `midstream bench report` from the output of the other benchmarks; do "
        "not edit by hand. **Absolute times depend on the machine and on whatever else ran on "
        "it; the headline figures are ratios against baselines measured in the same run.**",
        "",
        "## Machine",
        "",
        f"- {m0['nproc']} CPUs: {m0['cpu_model']}; Python {m0['python']}, "
        f"{m0.get('build', 'source')} build; {m0['platform']}",
        f"- load average (1 / 5 / 15 min) before the run: {_load(m0)}; after: {_load(m1)}; "
        f"CPU pressure (share of the last minute some runnable task waited for a CPU, "
        f"/proc/pressure/cpu) before: {m0.get('cpu_pressure_avg60')}%, after: "
        f"{m1.get('cpu_pressure_avg60')}%. The machine is shared with other developers' jobs: "
        "a load above the number of CPUs means the pinned server core (and the load "
        "generator's) was shared too, so measured latencies and capacities are pessimistic; "
        "CPU time per word is less affected.",
        f"- models: {commands.get('models', service['models'])}",
        f"- words: {service['words']}",
        "",
        "## Headline",
        "",
        "| measure | result | target (project brief, no source) |",
        "|---|---|---|",
        f"| largest N with p99 word→hypothesis ≤ {service['p99_budget_ms']:g} ms at "
        f"{service['rate']:g} words/s for {service['seconds']:g} s, no errors, server on one "
        f"core | {_largest_cell(service)} | 1,000 |",
        *_quiet_row(service, "the same"),
        *([f"| the same, conversations multiplexed over "
           f"{_streams(multiplexed.get('channels', 4))}{_runs_note(multiplexed)} "
           f"| {_largest_cell(multiplexed)} | 1,000 |",
           *_quiet_row(multiplexed, "the same, multiplexed")]
          if multiplexed else []),
        *([f"| the same, multiplexed, server core kept from idling (`serve "
           f"--spin-idle-cores`){_runs_note(spun)} "
           f"| {_largest_cell(spun)} | 1,000 |",
           *_quiet_row(spun, "the same, multiplexed, core kept from idling")]
          if spun else []),
        f"| p99 latency ÷ p99 of the trivial RPC at the same N and rate, at the largest N "
        f"the server kept up with (N={steady['conversations']}) "
        f"| {steady['p99_ratio_to_baseline']:.2f}x | - |",
        f"| server CPU per word ÷ engine-alone CPU per word (N={busiest['conversations']}) "
        f"| {engine_ratio:.2f}x | - |",
        f"| server CPU per word ÷ server CPU per trivial RPC (DescribeModels, "
        f"N={busiest['conversations']}) | {transport_ratio:.2f}x | - |",
        f"| whole engine alone (both CRFs, bookkeeping), words per CPU second "
        f"| {eng['words_per_cpu_s']:,.0f} | 10,000 |",
        f"| memory per idle live conversation (server RSS growth ÷ N, N={held['opened']}, "
        f"{held['words_each']} words each) | {per_conv / 1024:.1f} KiB | ≤ 50 KiB |",
        f"| of which the engine alone (tracemalloc) | {alone['bytes_per_engine'] / 1024:.1f} KiB "
        f"| - |",
        f"| baseline: an open gRPC stream with no conversation | {bare_bytes / 1024:.1f} KiB "
        f"| - |",
        f"| projection from server CPU time (not measured latency): words/s per free core "
        f"(N={busiest['conversations']}) | {per_core:,.0f} "
        f"= {per_core / service['rate']:,.0f} conversations at "
        f"{service['rate']:g} words/s | 3,000 words/s |",
        "",
        "## Live conversations per server core",
        "",
        f"`{commands['service']}`",
        "",
        f"The server runs pinned to core {service.get('server_core', 0)} (`taskset`), the load "
        f"generator on core(s) {service.get('generator_cores', '1 (not recorded)')}. Each "
        "step starts a fresh server, opens N conversations, then each sends one SwDA val word "
        f"per event at {service['rate']:g} words/s (past the last transcript, each lap of "
        "conversations starts further into the transcripts, so no two conversations speak the "
        "same words in step: runs before 2026-12-03 let them, which flattered the shared "
        "caches). Latency is from just before a word is "
        "written to the first update naming it. *Baseline*: the same N callers each making one "
        "`DescribeModels` call per would-be word on the same server (a round trip with no "
        "tagging). *Server CPU ms/word* is the server's CPU time over the window divided by the "
        "words answered in it. *Generator CPU* near 100 %, or a *generator send lag* (how late "
        "the generator wrote words against its schedule) well above a few ms, means the load "
        "generator itself was short of CPU: its stalls are then inside the latencies, which "
        "no longer describe the server alone. *Steal* is the time the hypervisor ran other "
        "guests on the server's and the generator's cores during the window (`/proc/stat`): "
        "both processes stall, so it lands in the tails though neither did more work; a run "
        "with more than " + f"{service.get('steal_notable_percent', 0.1):g}" + " % of the "
        "window on either core counts as disturbed. *Server loop lag* is how late the server's "
        "event loop ran a callback due every 0.1 s over the window (its "
        "`midstream_loop_lag_seconds` histogram, read at the window's start and end; a "
        "histogram gives the bucket a percentile fell in, so the cell is a range): a lag near "
        "the budget means the server itself was busy or stalled, a small one puts a miss on "
        "the transport or the generator. Stepping goes on while the server keeps up (no "
        "errors, at least 90 % of the offered words answered in the window), so CPU figures "
        "exist at real load even when the latency budget is missed.",
        "",
        *service_table(steps),
        "",
        f"Engine alone (this process, pinned to the server's core, {eng['conversations']} "
        f"interleaved conversations, {eng['words']:,} words): "
        f"{eng['cpu_ms_per_word']:.3f} ms CPU per word = {eng['words_per_cpu_s']:,.0f} words "
        "per CPU second.",
        "",
        *(_multiplexed_section(commands.get("service_multiplex"), multiplexed)
          if multiplexed else []),
        *(_spun_section(commands.get("service_multiplex_spin"), spun) if spun else []),
        "## Memory per idle live conversation",
        "",
        f"`{commands['memory']}`",
        "",
        "| measure | conversations | words each | per conversation |",
        "|---|---|---|---|",
        f"| server RSS growth ÷ live idle conversations | {held['opened']} | "
        f"{held['words_each']} | {per_conv / 1024:.1f} KiB |",
        f"| engine alone (tracemalloc, Python heap) | {alone['conversations']} | "
        f"{alone['words_each']} | {alone['bytes_per_engine'] / 1024:.1f} KiB |",
        f"| baseline: open gRPC stream, no `open` (no session, no engine) | {bare['opened']} "
        f"| 0 | {bare_bytes / 1024:.1f} KiB |",
        "",
        f"Errors while holding: {held['errors'] or 'none'}. RSS counts pages, so small N is "
        "noisy; the server figure includes gRPC stream state and buffers, the session, its "
        "replay buffer and history.",
        "",
        *(_collector_section(commands.get("gc"), collector) if collector else []),
        *(_shared_section(commands.get("redis"), shared) if shared else []),
        "## Word decoder alone",
        "",
        f"`{commands['engine']}` (owned by the word-model work; its output verbatim):",
        "",
        *_engine_section(engine_text),
        "## Benchmark your own deployment",
        "",
        "`midstream bench` without a subcommand is the load generator the service tables "
        "use. Point it at any server; "
        "give `--server-pid` when the server runs on the same host to get its CPU and memory, "
        "`--server-metrics URL` (its `midstream serve --metrics-port` page, any host) to get how "
        "late its event loop ran, or `--spawn` to start a local `midstream serve` for the run "
        "(both come with it):",
        "",
        "```",
        "midstream bench --target HOST:PORT --conversations 500 --rate 3 --seconds 60 \\",
        "    --corpus ../shared/corpora/swda --split val \\",
        "    [--token T | --tls --tls-ca ca.pem] [--json]",
        "midstream bench --spawn --models DIR --server-cpu 0 --client-cpu 1 -n 200",
        "midstream bench --baseline ...      # DescribeModels at the same rate: transport only",
        "midstream bench --multiplex ...     # conversations over a few FeedMany streams",
        "midstream bench --target HOST:PORT --server-metrics http://HOST:9464/metrics ...",
        "midstream bench --smoke --spawn     # a few seconds, checks the setup",
        "# the shared log's CPU per word with/without --redis, and conversations held at p99 <=",
        "# 50 ms on --workers 2 / --workers 1, in one run; writes both into this page:",
        "midstream bench --spawn --redis redis://127.0.0.1:6390/0 -n 300 --seconds 60 "
        "--channels 32 --repeats 3 \\",
        "    --scale-out 200,300,400,500,600,700,800,900,1000,1200 --write-page docs/benchmarks.md",
        "```",
        "",
        "It reports words/s achieved, p50/p95/p99 latency from a word's send to its first "
        "hypothesis, errors by gRPC status (plus `OPEN_TIMEOUT` / `SETTLE_TIMEOUT`, the "
        "generator's own), the generator's CPU use (near 100 %: the figures describe the "
        "generator, move it to another core or host) and, for a local server, its CPU use and "
        "RSS growth per open conversation; with its metrics page, the server's loop lag (a "
        "lag near the latency budget says the server's core, not the network, is the limit). "
        "`midstream serve --max-live-conversations N` raises "
        "the server's limit (default 256) for runs above it.",
        "",
        "## Reproduce",
        "",
        *(["This page measured the compiled build (README, \"The compiled build\"): install it, "
           "or let `./scripts/test` leave one in `build/compiled` and run each command below "
           "with `PYTHONPATH=build/compiled` in front.", ""]
          if m0.get("build") == "compiled" else []),
        "```",
        commands.get("report", "midstream bench report")
        + "   # everything, writes this page",
        commands["engine"],
        commands["service"],
        *([commands["service_multiplex"]] if commands.get("service_multiplex") else []),
        *([commands["service_multiplex_spin"]] if commands.get("service_multiplex_spin")
          else []),
        commands["memory"],
        *([commands["gc"]] if commands.get("gc") else []),
        *([commands["redis"]] if commands.get("redis") else []),
        "midstream bench --target HOST:PORT --conversations 500 --corpus DIR   # any server",
        "```",
        "",
    ]
    return "\n".join(lines)

