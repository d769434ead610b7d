"""The plots of ``midstream inspect --html``, written as inline SVG.

Vector drawings rather than raster images: labels are real text (sharp at any zoom, found by the
browser's search, read by screen readers) in a 12 px font, and a plot costs a few bytes per
mark. The revision timeline is cut into panels of :data:`WORDS_PER_PANEL` words, each with its
own update axis, so every word of a conversation of any length gets a readable row. Nothing
here reads files or prints; every function returns a string.
"""

from __future__ import annotations

import html
import math
from collections.abc import Sequence

from midstream import DisfluencyLabel
from midstream.client.cli._analysis import WordTimeline

__all__ = ["COLOURS", "WORDS_PER_PANEL", "accuracy_svg", "confusion_svg", "legend_svg",
           "timeline_svgs"]

#: Words per timeline panel: about as many rows as a screen shows at a readable size.
WORDS_PER_PANEL = 40

#: Label colours (qualitative, distinguishable in print; fluent grey so disfluencies stand out).
COLOURS: dict[DisfluencyLabel, str] = {
    DisfluencyLabel.FLUENT: "#c8c8c8",
    DisfluencyLabel.FILLER: "#1f77b4",
    DisfluencyLabel.EDIT_TERM: "#9467bd",
    DisfluencyLabel.DISCOURSE_MARKER: "#17becf",
    DisfluencyLabel.REPARANDUM: "#d62728",
    DisfluencyLabel.REPAIR: "#2ca02c",
    DisfluencyLabel.RESTART: "#ff7f0e",
}

_FONT = 12          # px, every label
_SMALL = 11         # px, axis numbers
_ROW = 18           # px per word row
_NAME_WIDTH = 190   # px for the "speaker: word" column
_PLOT_WIDTH = 680   # px for the updates
_NAME_CHARS = 26


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _svg(width: float, height: float, title: str, body: Sequence[str], *, css_class: str) -> str:
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="{css_class}" role="img" '
            f'width="{width:.0f}" height="{height:.0f}" viewBox="0 0 {width:.0f} {height:.0f}" '
            f'font-family="sans-serif" font-size="{_FONT}"><title>{_e(title)}</title>'
            + "".join(body) + "</svg>")


def _text(x: float, y: float, text: str, *, anchor: str = "start", size: int = _FONT,
          extra: str = "") -> str:
    return (f'<text x="{x:.1f}" y="{y:.1f}" text-anchor="{anchor}" font-size="{size}"{extra}>'
            f"{_e(text)}</text>")


def _nice_step(span: float, ticks: int = 8) -> int:
    """A step of 1, 2 or 5 times a power of ten giving about ``ticks`` ticks over ``span``."""
    raw = max(span / ticks, 1.0)
    power = 10 ** math.floor(math.log10(raw))
    for factor in (1, 2, 5, 10):
        if factor * power >= raw:
            return int(factor * power)
    return int(10 * power)


def _runs(word: WordTimeline) -> list[tuple[int, DisfluencyLabel]]:
    """``(first seq, label)`` each time the label (not only its confidence) changed."""
    runs: list[tuple[int, DisfluencyLabel]] = []
    for change in word.changes:
        if not runs or runs[-1][1] != change.label:
            runs.append((change.seq, change.label))
    return runs


def _final_seq(word: WordTimeline) -> int | None:
    return next((change.seq for change in word.changes if change.final), None)


def timeline_svgs(words: Sequence[WordTimeline], *, per_panel: int = WORDS_PER_PANEL
                  ) -> list[str]:
    """The revision timeline of every word, one SVG panel per ``per_panel`` words."""
    return [_timeline_panel(words[start:start + per_panel], start, len(words))
            for start in range(0, len(words), per_panel)]


def _timeline_panel(words: Sequence[WordTimeline], offset: int, total: int) -> str:
    seqs = [change.seq for word in words for change in word.changes]
    first = min(seqs, default=1)
    end = max(seqs, default=1) + 1  # the last update's column ends one seq later
    scale = _PLOT_WIDTH / (end - first)
    top, left = 26, _NAME_WIDTH
    height = top + _ROW * len(words) + 42
    width = left + _PLOT_WIDTH + 12
    title = (f"Words {offset + 1} to {offset + len(words)} of {total}: label of each word at each "
             "update until it became final")
    body = [_text(left, 16, title, extra=' font-weight="bold"')]
    for row, word in enumerate(words):
        y = top + row * _ROW
        if row % 2:
            body.append(f'<rect x="0" y="{y}" width="{width}" height="{_ROW}" fill="#f4f4f4"/>')
        name = f"{word.speaker}: {word.text}"
        if len(name) > _NAME_CHARS:
            name = name[: _NAME_CHARS - 1] + "…"
        body.append(_text(left - 6, y + _ROW - 5, name, anchor="end",
                          extra=f' class="word" data-word-id="{_e(word.word_id)}"'))
        runs = _runs(word)
        final = _final_seq(word)
        # A bar ends where its word became final: nothing about it changes after that.
        last_stop = final + 1 if final is not None else end
        for number, (seq, label) in enumerate(runs):
            stop = runs[number + 1][0] if number + 1 < len(runs) else max(last_stop, seq + 1)
            x = left + (seq - first) * scale
            body.append(
                f'<rect x="{x:.1f}" y="{y + 2}" width="{(stop - seq) * scale:.1f}" '
                f'height="{_ROW - 4}" fill="{COLOURS[label]}"><title>{_e(word.text)}: '
                f"{label.value} from update {seq}</title></rect>")
            if number:
                body.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{y}" y2="{y + _ROW}" '
                            'stroke="black" stroke-width="2"/>')
        if final is not None:
            cx = left + (final - first + 0.5) * scale
            body.append(f'<circle cx="{cx:.1f}" cy="{y + _ROW / 2}" r="3" fill="black">'
                        f"<title>final at update {final}</title></circle>")
    axis_y = top + _ROW * len(words)
    body.append(f'<line x1="{left}" x2="{left + _PLOT_WIDTH}" y1="{axis_y}" y2="{axis_y}" '
                'stroke="#333"/>')
    step = _nice_step(end - first)
    for seq in range(math.ceil(first / step) * step, end, step):
        x = left + (seq - first + 0.5) * scale
        body.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{axis_y}" y2="{axis_y + 4}" '
                    'stroke="#333"/>')
        body.append(_text(x, axis_y + 16, str(seq), anchor="middle", size=_SMALL))
    body.append(_text(left + _PLOT_WIDTH / 2, axis_y + 34, "update (seq)", anchor="middle"))
    return _svg(width, height, title, body, css_class="plot timeline")


def legend_svg() -> str:
    """The timeline's key: a swatch per label, the change tick and the final dot."""
    items: list[str] = []
    x = 4.0
    for label, colour in COLOURS.items():
        items.append(f'<rect x="{x:.0f}" y="4" width="14" height="14" fill="{colour}"/>')
        items.append(_text(x + 18, 16, label.value))
        x += 24 + 7.2 * len(label.value)
    items.append(f'<line x1="{x:.0f}" x2="{x:.0f}" y1="3" y2="19" stroke="black" '
                 'stroke-width="2"/>')
    items.append(_text(x + 6, 16, "label changed"))
    x += 110
    items.append(f'<circle cx="{x:.0f}" cy="11" r="3" fill="black"/>')
    items.append(_text(x + 8, 16, "final"))
    return _svg(x + 50, 24, "Key to the timeline colours and marks", items,
                css_class="legend")


def confusion_svg(labels: Sequence[DisfluencyLabel], matrix: Sequence[Sequence[int]]) -> str:
    """Counts of words by gold label (rows) and the stream's final label (columns)."""
    cell, left, top = 58, 150, 130
    n = len(labels)
    width, height = left + cell * n + 20, top + cell * n + 20
    peak = max((max(row) for row in matrix), default=0) or 1
    body = [_text(left + cell * n / 2, 14, "final label (stream)", anchor="middle",
                  extra=' font-weight="bold"'),
            _text(14, top + cell * n / 2, "gold label (corpus annotation)", anchor="middle",
                  extra=f' font-weight="bold" transform="rotate(-90 14 {top + cell * n / 2})"')]
    for j, label in enumerate(labels):
        x = left + j * cell + cell / 2
        body.append(_text(x, top - 8, label.value, extra=f' transform="rotate(-45 {x} {top - 8})"'))
    for i, (label, row) in enumerate(zip(labels, matrix, strict=True)):
        y = top + i * cell
        body.append(_text(left - 8, y + cell / 2 + 4, label.value, anchor="end"))
        for j, count in enumerate(row):
            share = count / peak
            # White to dark blue with the count; text flips to white on the dark half.
            shade = tuple(round(255 - share * (255 - c)) for c in (8, 81, 156))
            body.append(f'<rect x="{left + j * cell}" y="{y}" width="{cell}" height="{cell}" '
                        f'fill="rgb{shade}" stroke="#ddd"><title>gold {label.value}, final '
                        f"{labels[j].value}: {count}</title></rect>")
            if count:
                colour = "white" if share > 0.5 else "black"
                body.append(_text(left + j * cell + cell / 2, y + cell / 2 + 4, str(count),
                                  anchor="middle", extra=f' fill="{colour}"'))
    return _svg(width, height, "Word labels: gold against final", body,
                css_class="plot confusion")


def accuracy_svg(curve: Sequence[tuple[int, float, int]]) -> str:
    """Utterance-function accuracy against words of the utterance seen (points joined)."""
    left, top, plot_w, plot_h = 60, 20, 560, 220
    width, height = left + plot_w + 20, top + plot_h + 50
    ks = [k for k, _, _ in curve]
    low, high = min(ks, default=1), max(ks, default=1)
    span = max(high - low, 1)

    def x_of(k: float) -> float:
        return left + (k - low) / span * plot_w

    def y_of(value: float) -> float:
        return top + (1.0 - value) * plot_h

    body: list[str] = []
    for tenth in range(0, 11, 2):
        y = y_of(tenth / 10)
        body.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{y:.1f}" y2="{y:.1f}" '
                    'stroke="#ddd"/>')
        body.append(_text(left - 6, y + 4, f"{tenth / 10:.1f}", anchor="end", size=_SMALL))
    for k in range(low, high + 1, _nice_step(span, 10)):
        body.append(_text(x_of(k), top + plot_h + 16, str(k), anchor="middle", size=_SMALL))
    points = " ".join(f"{x_of(k):.1f},{y_of(a):.1f}" for k, a, _ in curve)
    body.append(f'<polyline points="{points}" fill="none" stroke="#1f77b4" stroke-width="2"/>')
    for k, accuracy, count in curve:
        body.append(f'<circle cx="{x_of(k):.1f}" cy="{y_of(accuracy):.1f}" r="4" fill="#1f77b4">'
                    f"<title>{k} words seen: {accuracy:.3f} over {count} utterances</title>"
                    "</circle>")
    body.append(f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" '
                'stroke="#333"/>')
    body.append(_text(left + plot_w / 2, height - 8, "words of the utterance seen",
                      anchor="middle"))
    body.append(_text(14, top + plot_h / 2, "function accuracy", anchor="middle",
                      extra=f' transform="rotate(-90 14 {top + plot_h / 2})"'))
    return _svg(width, height, "Utterance function right while the utterance grows", body,
                css_class="plot accuracy")
