"""The HTML report of ``midstream inspect --html``: vector plots and tables in one file.

The report is one self-contained file: plots are inline SVG (:mod:`midstream.client.cli._plots`),
so it can be mailed or archived without its pictures going missing, and its labels stay text.
A section that cannot be drawn says why instead of vanishing (no gold labels, no gold
utterance functions). Word text appears in the report (it is the user's own transcript); it is
never logged.
"""

from __future__ import annotations

import html
from collections.abc import Iterable

from midstream.client.cli._analysis import Analysis, WordTimeline
from midstream.client.cli._plots import (
    WORDS_PER_PANEL,
    accuracy_svg,
    confusion_svg,
    legend_svg,
    timeline_svgs,
)

#: Rows of the per-word table; words whose label changed come first.
MAX_TABLE_WORDS = 400

_STYLE = """
body { font-family: sans-serif; margin: 2em; max-width: 70em; }
table { border-collapse: collapse; margin: 1em 0; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; font-size: 90%; }
th { background: #eee; }
td.num { text-align: right; }
svg.plot { display: block; margin: 0.5em 0 1.5em 0; max-width: none; }
p.absent { color: #555; border-left: 4px solid #ccc; padding-left: 0.6em; }
.caution { color: #664; font-style: italic; }
"""


def _absent(reason: str) -> str:
    return f'<p class="absent">{html.escape(reason)}</p>'


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
    if analysis.words:
        panels = timeline_svgs(analysis.words)
        parts.append(f"<p>Each word a row (in the order sent), each update a column, coloured "
                     f"by the word's label after that update; {len(analysis.words)} words in "
                     f"{len(panels)} panel{'s' if len(panels) > 1 else ''} of up to "
                     f"{WORDS_PER_PANEL}, each with its own update axis.</p>")
        parts.append(legend_svg())
        parts.extend(panels)
    else:
        parts.append(_absent("No timeline: the log holds no word hypotheses."))

    parts.append("<h2>Confusion matrix</h2>")
    if analysis.has_gold:
        labels, matrix = analysis.confusion()
        parts.append("<p>Gold labels are the corpus annotation named in the source; the "
                     "stream's final labels are compared word by word.</p>")
        parts.append(confusion_svg(labels, matrix))
        parts.append(_table(["gold \\ final", *(label.value for label in labels)],
                            ([gold.value, *row] for gold, row in zip(labels, matrix,
                                                                    strict=True))))
    else:
        parts.append(_absent(
            "No confusion matrix: this log carries no gold labels to compare the stream's "
            "labels with. A log of a replayed annotated conversation has them "
            "('midstream replay CORPUS --conversation ID --log FILE'); words sent by "
            "'tag' or from a CTM or JSON Lines file do not."))

    parts.append("<h2>Utterance function against words seen</h2>")
    if analysis.function_accuracy_by_seen:
        parts.append(accuracy_svg(analysis.function_accuracy_by_seen))
        parts.append(_table(("words seen", "accuracy", "utterances"),
                            analysis.function_accuracy_by_seen))
    elif analysis.has_gold:
        parts.append(_absent(
            "No function accuracy: the gold annotation of this log gives no utterance "
            "functions to score against."))
    else:
        parts.append(_absent(
            "No function accuracy: this log carries no gold utterances and functions (as for "
            "the confusion matrix above)."))

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
