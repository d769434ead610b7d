"""What ``midstream bench --spawn --redis URL`` reports about scaling out, and its page section.

Two ratios, each against a baseline measured in the same run:

* the shared log's cost: server CPU per word with ``serve --redis`` ÷ without, the same load
  on the same machine (:func:`cpu_per_word`);
* what a second worker buys: the most conversations held within the latency budget by
  ``serve --redis --workers N`` ÷ by ``--workers 1``, each found by stepping up the
  conversation count (``--scale-out STEPS``) on a fresh server per step (:class:`Sweep`).

:func:`section` renders both as a Markdown section and :func:`write_section` puts it into a
page between two marker comments, replacing what an earlier run left there, so
``midstream bench report`` can carry it over when it rewrites the rest of the page.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from midstream import build_name

__all__ = ["BEGIN", "END", "Sweep", "cpu_per_word", "machine_load", "section",
           "step_passed", "write_section"]

#: The markers around the section in a page (``midstream bench report`` keeps what is
#: between them).
BEGIN = "<!-- midstream bench --redis: begin -->"
END = "<!-- midstream bench --redis: end -->"
#: The page section the block goes before when the page has no markers yet.
_BEFORE = "## Benchmark your own deployment"


def cpu_per_word(summary: dict[str, Any]) -> float:
    """Server CPU milliseconds per word answered in a run's window (NaN when unknown)."""
    server, achieved = summary.get("server"), summary.get("achieved_wps", 0.0)
    if not server or not achieved:
        return math.nan
    return float(10.0 * server["cpu_percent"] / achieved)


def step_passed(summary: dict[str, Any], p99_ms: float) -> bool:
    """Whether a run held its conversations: every one opened, every word answered, no error,
    and the p99 latency within ``p99_ms`` (as ``midstream bench service`` counts a step)."""
    return bool(summary["opened"] == summary["conversations"]
                and summary["error_count"] == 0
                and summary["words_answered"] == summary["words_sent"]
                and summary["latency_ms"]["p99"] <= p99_ms)


@dataclass(slots=True)
class Sweep:
    """Conversation counts run in ascending order on one server setting, until one misses the
    budget. ``measure(n)`` runs a fresh server under ``n`` conversations and returns the load
    generator's summary."""

    workers: int
    p99_ms: float
    steps: list[dict[str, Any]] = field(default_factory=list)

    def run(self, counts: list[int], measure: Callable[[int], dict[str, Any]]) -> None:
        """Run the counts in ascending order; stop after the first that misses the budget
        (a larger count on the same server would only miss it by more)."""
        for n in sorted(counts):
            summary = measure(n)
            passed = step_passed(summary, self.p99_ms)
            self.steps.append({"conversations": n, "passed": passed,
                               "server_cpu_ms_per_word": cpu_per_word(summary),
                               "load": summary})
            if not passed:
                return

    @property
    def largest(self) -> int:
        """The largest count that met the budget (0 when none did)."""
        return max((s["conversations"] for s in self.steps if s["passed"]), default=0)

    def summary(self) -> dict[str, Any]:
        return {"workers": self.workers, "p99_budget_ms": self.p99_ms,
                "largest_passing": self.largest, "steps": self.steps}


def machine_load() -> dict[str, Any]:
    """The machine's CPUs, its load average and CPU pressure now, and the build measured."""
    pressure = None
    try:
        # "some avg60": the share of the last minute in which a runnable task waited for a CPU.
        first = Path("/proc/pressure/cpu").read_text(encoding="ascii").splitlines()[0]
        pressure = float(first.split()[2].removeprefix("avg60="))
    except (OSError, IndexError, ValueError):
        pass
    return {"nproc": os.cpu_count(), "loadavg": [round(x, 2) for x in os.getloadavg()],
            "cpu_pressure_avg60": pressure, "build": build_name()}


def _ms(value: float) -> str:
    return f"{value:.3f}" if math.isfinite(value) else "-"


def _load_text(info: dict[str, Any]) -> str:
    pressure = info.get("cpu_pressure_avg60")
    return (" / ".join(f"{x:.2f}" for x in info["loadavg"])
            + (f", CPU pressure {pressure:.1f} %" if pressure is not None else ""))


def _pairs_text(pairs: list[dict[str, float]]) -> str:
    """How the CPU ratio was formed, with each pair's ms per word."""
    each = ", ".join(f"{_ms(p['plain'])} / {_ms(p['redis'])} ms per word: {p['ratio']:.2f}"
                     for p in pairs)
    if len(pairs) == 1:
        return f"one run without then one with ({each})"
    return (f"median of {len(pairs)} pairs run without then with, in turn (without / with: "
            f"{each})")


def section(result: dict[str, Any], command: str) -> str:
    """The Markdown section for a run's JSON result (what ``--json`` prints), between the
    markers; ``command`` is the command line that produced it."""
    plain = result["plain"]
    ratio = result["cpu_per_word_ratio"]
    before, after = result["machine_before"], result["machine_after"]
    lines = [
        BEGIN,
        "## Shared log and workers over gRPC (`midstream bench --spawn --redis`)",
        "",
        f"`{command}`",
        "",
        f"Written by the command above. {before['nproc']} CPUs, {before['build']} build; load "
        f"average (1 / 5 / 15 min) before the run {_load_text(before)}, after "
        f"{_load_text(after)} (a load above the number of CPUs means other jobs shared them). "
        "Each run starts a fresh `midstream serve` with Redis on the same machine; Redis's own "
        "CPU is not counted. Conversations send SwDA words one per event at "
        f"{plain['rate_per_conversation']:g} words/s each.",
        "",
        "| measure | result | target (issue 25, no source) |",
        "|---|---|---|",
        f"| server CPU per word with `--redis` ÷ without, {plain['conversations']} "
        f"conversations, {plain['seconds']:g} s a run, {_pairs_text(result['cpu_pairs'])} "
        f"| **{ratio:.2f}x** | ≤ 1.3 |",
    ]
    workers = result.get("workers")
    if workers is None:
        lines += [
            "| conversations held at p99 ≤ 50 ms, `--workers 2` ÷ `--workers 1` | not measured "
            "by this run (add `--scale-out STEPS`) | ≥ 1.6 |",
            "",
        ]
    else:
        one, many = workers["sweeps"]
        held = workers["ratio"]
        lines += [
            f"| conversations held at p99 ≤ {one['p99_budget_ms']:g} ms with no errors, "
            f"`--workers {many['workers']}` ÷ `--workers 1` ({many['largest_passing']} / "
            f"{one['largest_passing']}) | **{'-' if held is None else f'{held:.2f}x'}** "
            "| ≥ 1.6 |",
            "",
            "Each step below is a fresh `serve --redis URL --workers W` (not pinned: the "
            "workers take the machine's cores) under N conversations over "
            f"{plain['channels']} connections (the kernel gives each connection, not each "
            "call, to a worker, so a few connections can load one worker alone); the steps "
            "of one setting go up until one misses the budget. Server CPU counts every "
            "worker.",
            "",
            "| workers | N | achieved w/s | p50 ms | p99 ms | errors | server CPU % "
            "| server CPU ms/word | generator CPU % | meets p99 |",
            "|---|---|---|---|---|---|---|---|---|---|",
        ]
        for sweep in workers["sweeps"]:
            for step in sweep["steps"]:
                load = step["load"]
                errors = ", ".join(f"{k} {v}" for k, v in load["errors"].items()) or "0"
                cpu = load["server"]["cpu_percent"] if load["server"] else math.nan
                lines.append(
                    f"| {sweep['workers']} | {step['conversations']} "
                    f"| {load['achieved_wps']:.0f} | {load['latency_ms']['p50']:.1f} "
                    f"| {load['latency_ms']['p99']:.1f} | {errors} | {cpu:.0f} "
                    f"| {_ms(step['server_cpu_ms_per_word'])} "
                    f"| {load['client_cpu_percent']:.0f} "
                    f"| {'yes' if step['passed'] else 'no'} |")
        lines.append("")
    lines.append(END)
    return "\n".join(lines) + "\n"


def write_section(page: Path, text: str) -> None:
    """Put ``text`` (a :func:`section`) into ``page``: in place of the marked block an earlier
    run wrote, else before the page's "Benchmark your own deployment" section, else at its
    end. A missing page is created."""
    old = page.read_text(encoding="utf-8") if page.exists() else ""
    start, stop = old.find(BEGIN), old.find(END)
    if start >= 0 and stop > start:
        new = old[:start] + text + old[stop + len(END):].removeprefix("\n")
    elif (at := old.find(f"\n{_BEFORE}\n")) >= 0:
        new = old[:at + 1] + text + "\n" + old[at + 1:]
    else:
        new = old + ("\n" if old and not old.endswith("\n") else "") + text
    page.write_text(new, encoding="utf-8")
