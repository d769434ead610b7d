"""Keep every quality figure in the README, the docs and the model cards tied to its command.

A figure in a Markdown file is written as the number followed by a marker naming the run and
the key that produced it::

    | reparandum F1 | 0.782<!--fig swda-val disfluency.reparandum_no_fragments.f1--> |

The marker is invisible when the page is rendered. Each run is one command, listed in ``RUNS``
(its command line is what the page names beside its table); its last output is kept in
``docs/figures/RUN.json`` with the SHA-256 of every shipped model file it read.

Usage::

    python scripts/figures.py check            # every marker matches its stored run (fast; a test)
    python scripts/figures.py run [RUN ...]    # re-run commands, store output, rewrite markers
    python scripts/figures.py list             # the runs and their commands

``check`` fails when a marker names an unknown run or key, when a shown number is not the stored
value rounded to the shown decimals, or when the shipped models changed since the run (so a
retrained model cannot ship with its predecessor's figures). ``run`` writes each number with
the decimals it already had. Figures that are not model quality (throughput, counts from a
benchmark) are not covered here: the benchmark pages name their own commands.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import re
import subprocess
import sys
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
STORE = REPO / "docs" / "figures"
WEIGHTS = REPO / "models" / "weights"
#: Markdown files whose markers are checked.
PAGES = ("README.md", "DEVELOPERS.md", "docs/*.md", "models/weights/*.md")

MARKER = re.compile(r"(?P<value>-?\d+(?:\.\d+)?)<!--fig (?P<run>[\w.-]+) (?P<key>[\w.-]+)-->")


def _corpus(name: str) -> str:
    return f"$MIDSTREAM_CORPORA/{name}"


#: Each run's command, as the pages name it (``midstream`` is the installed command line;
#: ``$MIDSTREAM_CORPORA`` is ``../shared/corpora`` unless set).
RUNS: dict[str, tuple[str, ...]] = {
    "swda-val": ("midstream", "evaluate", _corpus("swda"), "--split", "val", "--json"),
    "mrda-val": ("midstream", "evaluate", _corpus("mrda"), "--split", "val", "--json"),
    "maptask-val": ("midstream", "evaluate", _corpus("maptask"), "--split", "val", "--json"),
    # The word model alone (no boundary model) on each corpus, as its card compares them.
    **{f"{corpus}-val-words-alone": ("midstream", "evaluate", _corpus(corpus), "--split", "val",
                                     "--no-boundary", "--words-only", "--json")
       for corpus in ("mrda", "maptask", "disfl_qa")},
    # The SwDA 42-class model alone (its coarse function from summed fine marginals), as its
    # card reports it: in its own corpus and in the two others.
    **{f"{corpus}-val-swbd42": ("midstream", "evaluate", _corpus(corpus), "--split", "val",
                                "--functions-only", "--functions-model",
                                "models/weights/functions-swbd42.tagger", "--json")
       for corpus in ("swda", "maptask", "mrda")},
    # Recogniser conditions: no fragments, seeded word errors at 0, 10 and 20 %.
    **{f"swda-val-recognised-{rate}": ("midstream", "evaluate", _corpus("swda"), "--split",
                                       "val", "--as-recognised", "--word-error-rate",
                                       f"0.{rate // 10}" if rate else "0", "--error-seed", "0",
                                       "--json")
       for rate in (0, 10, 20)},
}


@dataclass(frozen=True, kw_only=True)
class Figure:
    """One marked number on a page."""

    page: Path
    line: int
    shown: str
    run: str
    key: str

    @property
    def decimals(self) -> int:
        return len(self.shown.split(".", 1)[1]) if "." in self.shown else 0

    def where(self) -> str:
        return f"{self.page.relative_to(REPO)}:{self.line}"


def pages() -> list[Path]:
    found: list[Path] = []
    for pattern in PAGES:
        found.extend(sorted(REPO.glob(pattern)))
    return found


def figures(paths: Sequence[Path]) -> Iterator[Figure]:
    for path in paths:
        for number, text in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            for match in MARKER.finditer(text):
                yield Figure(page=path, line=number, shown=match["value"], run=match["run"],
                             key=match["key"])


def model_hashes() -> dict[str, str]:
    return {path.name: hashlib.sha256(path.read_bytes()).hexdigest()
            for path in sorted(WEIGHTS.glob("*.tagger"))}


def stored(run: str) -> dict[str, object]:
    path = STORE / f"{run}.json"
    if not path.exists():
        raise LookupError(f"no stored output for run {run!r} ({path.relative_to(REPO)}); "
                          f"make it with: python scripts/figures.py run {run}")
    data: dict[str, object] = json.loads(path.read_text(encoding="utf-8"))
    return data


def render(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}"


def problems() -> list[str]:
    """Everything that makes a marked figure untrustworthy, one line each."""
    found: list[str] = []
    hashes = model_hashes()
    runs: dict[str, dict[str, object]] = {}
    for figure in figures(pages()):
        if figure.run not in RUNS:
            found.append(f"{figure.where()}: unknown run {figure.run!r}")
            continue
        if figure.run not in runs:
            try:
                runs[figure.run] = stored(figure.run)
            except LookupError as exc:
                found.append(f"{figure.where()}: {exc}")
                continue
            if runs[figure.run].get("models") != hashes:
                found.append(f"run {figure.run!r}: the shipped models changed since it was "
                             f"stored; re-run: python scripts/figures.py run {figure.run}")
        output = runs[figure.run].get("figures")
        assert isinstance(output, dict)
        value = output.get(figure.key)
        if not isinstance(value, int | float):
            found.append(f"{figure.where()}: run {figure.run!r} has no number {figure.key!r}")
            continue
        expected = render(float(value), figure.decimals)
        if expected != figure.shown:
            found.append(f"{figure.where()}: shows {figure.shown} for {figure.run} "
                         f"{figure.key}, the run gave {expected}")
    return found


def expand(command: Sequence[str], corpora: str | None = None) -> list[str]:
    """The run's command line for this interpreter, with the corpora folder filled in."""
    corpora = corpora or os.environ.get("MIDSTREAM_CORPORA") or str(
        REPO.parent / "shared" / "corpora")
    words = [word.replace("$MIDSTREAM_CORPORA", corpora) for word in command]
    # The installed command line, run by this interpreter so the active environment is used.
    return [sys.executable, "-m", "midstream", *words[1:]]


def execute(run: str) -> None:
    # From the repository root: runs name shipped model files by their repository path.
    result = subprocess.run(expand(RUNS[run]), capture_output=True, text=True, check=False,
                            cwd=REPO)
    if result.returncode != 0:
        raise SystemExit(f"run {run!r} failed:\n{result.stderr[-4000:]}")
    output = json.loads(result.stdout)
    STORE.mkdir(parents=True, exist_ok=True)
    record = {"command": " ".join(RUNS[run]), "models": model_hashes(), "figures": output}
    (STORE / f"{run}.json").write_text(json.dumps(record, indent=2, sort_keys=True) + "\n",
                                       encoding="utf-8")


def rewrite(runs: set[str]) -> int:
    changed = 0
    for path in pages():
        text = path.read_text(encoding="utf-8")

        def replace(match: re.Match[str]) -> str:
            nonlocal changed
            if match["run"] not in runs:
                return match[0]
            output = stored(match["run"])["figures"]
            assert isinstance(output, dict)
            value = output.get(match["key"])
            if not isinstance(value, int | float):
                return match[0]
            shown = match["value"]
            decimals = len(shown.split(".", 1)[1]) if "." in shown else 0
            new = render(float(value), decimals)
            changed += new != shown
            return f"{new}<!--fig {match['run']} {match['key']}-->"

        new_text = MARKER.sub(replace, text)
        if new_text != text:
            path.write_text(new_text, encoding="utf-8")
    return changed


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    sub = parser.add_subparsers(dest="action", required=True)
    sub.add_parser("check", help="check every marked figure against its stored run")
    run_parser = sub.add_parser("run", help="re-run commands and rewrite marked figures")
    run_parser.add_argument("runs", nargs="*", help="runs to re-run (default: all)")
    sub.add_parser("list", help="list the runs and their commands")
    args = parser.parse_args(argv)
    if args.action == "list":
        for name, command in RUNS.items():
            print(f"{name}: {' '.join(command)}")
        return 0
    if args.action == "run":
        chosen = args.runs or list(RUNS)
        unknown = sorted(set(chosen) - set(RUNS))
        if unknown:
            raise SystemExit(f"unknown runs: {', '.join(unknown)} (known: {', '.join(RUNS)})")
        for name in chosen:
            print(f"running {name}: {' '.join(RUNS[name])}", file=sys.stderr)
            execute(name)
        print(f"{rewrite(set(chosen))} figures changed", file=sys.stderr)
    found = problems()
    for line in found:
        print(line, file=sys.stderr)
    return 1 if found else 0


if __name__ == "__main__":
    raise SystemExit(main())
