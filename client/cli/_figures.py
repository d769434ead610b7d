"""``midstream evaluate``'s human output: its dotted figure keys laid out as tables.

The ``--json`` output keeps every key as it is (scripts read it); a person reads tables. Keys
are grouped by their structure, not by a list of names, so a figure added later still shows:

- ``<prefix>.<row>.<metric>`` with ``metric`` one of precision, recall, f1, support: one table
  per prefix, a row per ``row`` (``disfluency.filler.f1`` is row ``filler`` of ``disfluency``);
  rows whose support is 0 (classes absent from the scored conversations) are left out, and the
  table says how many;
- ``<prefix>.<step>`` with ``step`` a whole number or ``end``: one row across the steps
  (``utterance_functions.accuracy_after_words.3``);
- anything else: ``figure  value`` lines under its prefix (a prefix holding one such figure
  joins its parent's: ``incremental.final_decision_delay_words.mean`` is the line
  ``final_decision_delay_words (mean)`` under ``incremental``).

Counts (keys ending in ``.count``, ``.support``, ``.words``) print as whole numbers, everything
else with three decimals; NaN (nothing to score, e.g. no disfluency-annotated conversation)
prints as ``n/a``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

_METRICS = ("precision", "recall", "f1", "support")
_COUNT_SUFFIXES = (".count", ".support", ".words")

#: Headings for the groups evaluate reports today; other prefixes are shown as they are.
_TITLES: dict[str, str] = {
    "disfluency": "Disfluency roles: final streaming labels, word by word",
    "disfluency.offline": "Same model, whole channels decoded at once",
    "disfluency.restart": "Restarts by kind (bracket with an empty repair; abandoned "
                          "utterance)",
    "incremental": "Incremental behaviour",
    "incremental.reparandum_f1_at_delay": "Reparandum F1 of the labels as they stood N words "
                                          "after each word arrived",
    "": "Utterance ends",
    "utterance_functions.accuracy_after_words": "Utterance function accuracy after N words of "
                                                "the utterance (end: the whole utterance)",
    "utterance_functions.gold_segmentation.coarse": "Utterance functions, coarse classes, gold "
                                                    "segmentation",
    "utterance_functions.gold_segmentation.coarse.per_class": "Coarse classes",
    "utterance_functions.gold_segmentation.swbd42": "Utterance functions, SWBD-DAMSL 42 "
                                                    "classes, gold segmentation",
    "utterance_functions.gold_segmentation.swbd42.per_class": "SWBD-DAMSL classes",
    "utterance_functions.predicted_segmentation": "Whole conversations through the engine "
                                                  "(predicted segmentation)",
}


def _is_count(key: str) -> bool:
    return key.endswith(_COUNT_SUFFIXES)


def _cell(key: str, value: float) -> str:
    if math.isnan(value):
        return "n/a"
    if _is_count(key):
        return str(round(value))
    return f"{value:.3f}"


def _is_step(part: str) -> bool:
    return part.isdigit() or part == "end"


@dataclass(slots=True)
class _Group:
    """The keys of one prefix, sorted into the three shapes above."""

    rows: dict[str, dict[str, str]] = field(default_factory=dict)
    supports: dict[str, float] = field(default_factory=dict)
    steps: dict[str, str] = field(default_factory=dict)
    scalars: dict[str, str] = field(default_factory=dict)


def _grid(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    """Left-aligned first column, right-aligned numbers, two spaces apart, indented by two."""
    table = [list(header), *(list(row) for row in rows)]
    widths = [max(len(row[i]) for row in table) for i in range(len(header))]
    lines = []
    for row in table:
        cells = [row[0].ljust(widths[0]), *(cell.rjust(width) for cell, width in
                                            zip(row[1:], widths[1:], strict=True))]
        lines.append("  " + "  ".join(cells).rstrip())
    return lines


def _fold_lone_figures(groups: dict[str, _Group]) -> None:
    """Move a group holding one plain figure into its parent (``x.delay.mean`` -> ``delay mean``).

    A table with a heading and one line is noise; the parent's table reads the same figure.
    """
    for prefix in list(groups):
        group = groups[prefix]
        parent, _, last = prefix.rpartition(".")
        if (len(group.scalars) == 1 and not group.rows and not group.steps and last
                and parent in groups):
            ((name, text),) = group.scalars.items()
            groups[parent].scalars[f"{last} ({name})"] = text
            del groups[prefix]


def format_figures(figures: Mapping[str, float]) -> str:
    """``figures`` (evaluate's dotted keys) as titled plain-text tables, one per group."""
    groups: dict[str, _Group] = {}
    for key in sorted(figures):
        value = figures[key]
        parts = key.split(".")
        if parts[-1] in _METRICS and len(parts) >= 2:
            prefix, row, metric = ".".join(parts[:-2]), parts[-2], parts[-1]
            group = groups.setdefault(prefix, _Group())
            group.rows.setdefault(row, {})[metric] = _cell(key, value)
            if metric == "support":
                group.supports[row] = value
        elif len(parts) >= 2 and _is_step(parts[-1]):
            groups.setdefault(".".join(parts[:-1]), _Group()).steps[parts[-1]] = _cell(key, value)
        else:
            prefix = ".".join(parts[:-1])
            groups.setdefault(prefix, _Group()).scalars[parts[-1]] = _cell(key, value)
    _fold_lone_figures(groups)
    blocks: list[str] = []
    for prefix, group in groups.items():
        title = _TITLES.get(prefix, prefix)
        lines = [title]
        if group.scalars:
            lines += _grid(("figure", "value"), list(group.scalars.items()))
        if group.steps:
            steps = sorted(group.steps, key=lambda s: (s == "end", int(s) if s.isdigit() else 0))
            if group.scalars:
                lines.append("")
            lines += _grid(("after", *steps), [("value", *(group.steps[s] for s in steps))])
        if group.rows:
            metrics = [m for m in _METRICS if any(m in cells for cells in group.rows.values())]
            kept = [row for row in group.rows if group.supports.get(row, 1.0) != 0.0]
            if group.scalars or group.steps:
                lines.append("")
            lines += _grid(("", *metrics), [(row, *(group.rows[row].get(m, "") for m in metrics))
                                            for row in kept])
            dropped = len(group.rows) - len(kept)
            if dropped:
                lines.append(f"  ({dropped} classes with no gold example left out)")
        blocks.append("\n".join(lines))
    if any(math.isnan(value) for value in figures.values()):
        blocks.append("n/a: nothing to score (e.g. no disfluency-annotated conversation)")
    return "\n\n".join(blocks)
