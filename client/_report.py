"""The HTML report of ``midstream inspect --html``: plots made by matplotlib, and tables.

The report is one self-contained file: plots are PNGs embedded as base64 ``data:`` URIs, so it
can be mailed or archived without its pictures going missing. Word text appears in the report
(it is the user's own transcript); it is never logged.
"""

from __future__ import annotations

import base64
import html
import io
from collections.abc import Iterable, Sequence

# The object-oriented API without pyplot: no global figure state and no display backend, as
# matplotlib's own guide to embedding in a web server recommends.
import numpy as np
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator
from midstream._types import DisfluencyLabel
from midstream.client._analysis import Analysis, WordTimeline

#: Words drawn in the revision timeline; a longer conversation shows its first ones (and says so).
MAX_TIMELINE_WORDS = 120
#: Rows of the per-word table; words whose label changed come first.
MAX_TABLE_WORDS = 400

_COLOURS: dict[DisfluencyLabel, str] = {
    DisfluencyLabel.FLUENT: "#c8c8c8",
    DisfluencyLabel.FILLER: "#1f77b4",
    DisfluencyLabel.EDIT_TERM: "#9467bd",
    DisfluencyLabel.DISCOURSE_MARKER: "#17becf",
    DisfluencyLabel.REPARANDUM: "#d62728",
    DisfluencyLabel.REPAIR: "#2ca02c",
    DisfluencyLabel.RESTART: "#ff7f0e",
}

_STYLE = """
body { font-family: sans-serif; margin: 2em; max-width: 70em; }
table { border-collapse: collapse; margin: 1em 0; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; font-size: 90%; }
th { background: #eee; }
td.num { text-align: right; }
.caution { color: #664; font-style: italic; }
"""


def _png(figure: Figure) -> str:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=80)
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return f'<img alt="" src="data:image/png;base64,{data}">'


def timeline_figure(words: Sequence[WordTimeline]) -> Figure:
    """Each word a row, each update a column, coloured by the word's label at that update.

    One image for the whole grid (not a bar per change): a long conversation draws as fast as
    a short one. Black ticks mark the updates where a word's label changed; white is before a
    word's first publication.
    """
    shown = list(words[:MAX_TIMELINE_WORDS])
    labels = list(_COLOURS)
    index = {label: i for i, label in enumerate(labels)}
    first = min((c.seq for w in shown for c in w.changes), default=1)
    last = max((c.seq for w in shown for c in w.changes), default=1)
    grid = np.full((max(len(shown), 1), last - first + 1), np.nan)
    ticks_x: list[int] = []
    ticks_y: list[int] = []
    for row, word in enumerate(shown):
        previous = None
        for change, following in zip(word.changes, [*word.changes[1:], None], strict=True):
            stop = following.seq if following is not None else last + 1
            grid[row, change.seq - first:stop - first] = index[change.label]
            if previous is not None and change.label != previous:
                ticks_x.append(change.seq)
                ticks_y.append(row)
            previous = change.label
    figure = Figure(figsize=(10, max(3.0, 0.1 * len(shown) + 1.5)))
    figure.subplots_adjust(left=0.14, right=0.98)
    axes = figure.subplots()
    colours = ListedColormap([_COLOURS[label] for label in labels]).with_extremes(bad="white")
    axes.imshow(np.ma.masked_invalid(grid), aspect="auto", interpolation="nearest",
                cmap=colours, vmin=-0.5, vmax=len(labels) - 0.5,
                extent=(first - 0.5, last + 0.5, len(shown) - 0.5, -0.5))
    if ticks_x:
        axes.scatter(ticks_x, ticks_y, marker="|", color="black", s=30, linewidths=1)
    axes.set_yticks(range(len(shown)))
    axes.set_yticklabels([f"{w.speaker}:{w.text}"[:18] for w in shown], fontsize=5)
    axes.set_xlabel("update (seq)")
    axes.set_ylabel("word (in order sent)")
    axes.set_title("Revision timeline: label of each word over time (ticks: label changed)")
    handles = [Patch(color=colour, label=label.value) for label, colour in _COLOURS.items()]
    axes.legend(handles=handles, fontsize=7, loc="upper right")
    return figure


def confusion_figure(labels: Sequence[DisfluencyLabel], matrix: Sequence[Sequence[int]]) -> Figure:
    figure = Figure(figsize=(6.5, 5.5))
    figure.subplots_adjust(left=0.25, bottom=0.25)
    axes = figure.subplots()
    axes.imshow(matrix, cmap="Blues")
    names = [label.value for label in labels]
    axes.set_xticks(range(len(names)))
    axes.set_xticklabels(names, rotation=45, ha="right", fontsize=8)
    axes.set_yticks(range(len(names)))
    axes.set_yticklabels(names, fontsize=8)
    peak = max((max(row) for row in matrix), default=0)
    for i, row in enumerate(matrix):
        for j, count in enumerate(row):
            if count:
                axes.text(j, i, str(count), ha="center", va="center", fontsize=7,
                          color="white" if count > peak / 2 else "black")
    axes.set_xlabel("final label (stream)")
    axes.set_ylabel("gold label (corpus annotation)")
    axes.set_title("Word labels: gold against final")
    return figure


def accuracy_figure(curve: Sequence[tuple[int, float, int]]) -> Figure:
    figure = Figure(figsize=(7, 3.5))
    figure.subplots_adjust(bottom=0.15)
    axes = figure.subplots()
    axes.plot([k for k, _, _ in curve], [a for _, a, _ in curve], "o-")
    axes.set_ylim(0, 1)
    axes.xaxis.set_major_locator(MaxNLocator(integer=True))
    axes.set_xlabel("words of the utterance seen")
    axes.set_ylabel("function accuracy")
    axes.set_title("Utterance function right while the utterance grows (against gold)")
    axes.grid(alpha=0.3)
    return figure


def _table(header: Iterable[str], rows: Iterable[Iterable[object]]) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for value in row:
            numeric = isinstance(value, int | float) and not isinstance(value, bool)
            text = f"{value:.3f}" if isinstance(value, float) else str(value)
            cells.append(f'<td class="num">{html.escape(text)}</td>' if numeric
                         else f"<td>{html.escape(text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _history(word: WordTimeline) -> str:
    parts = []
    previous = None
    for change in word.changes:
        if change.label != previous:
            parts.append(f"{change.label.value}@{change.seq}")
            previous = change.label
    return " → ".join(parts)


def render_report(analysis: Analysis) -> str:
    """The whole report as an HTML document."""
    title = f"Midstream revisions of {analysis.conversation_id or analysis.source}"
    parts = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
             f"</title><style>{_STYLE}</style></head><body><h1>{html.escape(title)}</h1>"]
    changed = sum(1 for w in analysis.words if w.label_changes)
    summary = [
        ("source", analysis.source),
        ("words", len(analysis.words)),
        ("updates", analysis.updates),
        ("utterances", len(analysis.utterances)),
        ("words whose label changed", changed),
        ("label changes", sum(w.label_changes for w in analysis.words)),
    ]
    accuracy = analysis.word_accuracy()
    if accuracy is not None:
        summary.append(("final word-label accuracy against gold", round(accuracy, 4)))
    if analysis.truncated:
        summary.append(("note", "the server's history limit dropped the oldest revisions"))
    parts.append("<h2>Summary</h2>" + _table(("what", "value"), summary))
    reasons = analysis.final_reasons()
    parts.append("<h2>Why words became final</h2>"
                 + _table(("reason", "words"), sorted(reasons.items())))

    parts.append("<h2>Revision timeline</h2>")
    if len(analysis.words) > MAX_TIMELINE_WORDS:
        parts.append(f"<p>The first {MAX_TIMELINE_WORDS} of {len(analysis.words)} words.</p>")
    parts.append(_png(timeline_figure(analysis.words)))

    if analysis.has_gold:
        labels, matrix = analysis.confusion()
        parts.append("<h2>Confusion matrix</h2><p>Gold labels are the corpus annotation named "
                     "in the source; the stream's final labels are compared word by word.</p>")
        parts.append(_png(confusion_figure(labels, matrix)))
        parts.append(_table(["gold \\ final", *(label.value for label in labels)],
                            ([gold.value, *row] for gold, row in zip(labels, matrix,
                                                                    strict=True))))
    if analysis.function_accuracy_by_seen:
        parts.append("<h2>Utterance function against words seen</h2>")
        parts.append(_png(accuracy_figure(analysis.function_accuracy_by_seen)))
        parts.append(_table(("words seen", "accuracy", "utterances"),
                            analysis.function_accuracy_by_seen))

    words = sorted(analysis.words, key=lambda w: (w.label_changes == 0, w.order))
    shown = words[:MAX_TABLE_WORDS]
    parts.append("<h2>Words</h2>")
    if len(words) > len(shown):
        parts.append(f"<p>{len(shown)} of {len(words)} words; those revised first.</p>")
    parts.append(_table(
        ("word", "speaker", "text", "gold", "final", "changes", "labels over time (@seq)",
         "why final"),
        ((w.word_id, w.speaker, w.text, w.gold.value if w.gold else "",
          w.label.value if w.label else "", w.label_changes, _history(w), w.final_reason)
         for w in shown)))
    rows = []
    for utterance_id, history in analysis.utterances.items():
        last = history[-1][1]
        functions: list[str] = []
        for _, state in history:
            if not functions or functions[-1] != state.function.value:
                functions.append(state.function.value)
        rows.append((utterance_id, last.speaker, len(last.word_ids), " → ".join(functions),
                     last.fine_class, round(last.confidence, 3), last.clean_text))
    parts.append("<h2>Utterances</h2>" + _table(
        ("utterance", "speaker", "words", "functions over time", "fine class", "confidence",
         "clean text"), rows))
    parts.append("</body></html>")
    return "\n".join(parts)
