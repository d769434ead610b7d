"""The report's SVG plots: well-formed, every word drawn once, marks where the log says."""

from __future__ import annotations

import xml.etree.ElementTree as ET

from midstream import DisfluencyLabel
from midstream.client.cli._analysis import Analysis, LabelChange, WordTimeline
from midstream.client.cli._plots import COLOURS, accuracy_svg, confusion_svg, timeline_svgs
from midstream.client.cli._report import render_report

_SVG = "{http://www.w3.org/2000/svg}"


def _word(index: int) -> WordTimeline:
    """Invented: word i first published at update i, final 3 updates later; every 10th word
    starts fluent and is revised to reparandum one update after it arrived."""
    changes = [LabelChange(seq=index + step, server_time=None, sent=None,
                           label=(DisfluencyLabel.REPARANDUM if index % 10 == 0 and step >= 1
                                  else DisfluencyLabel.FLUENT),
                           confidence=0.9, final=step == 3) for step in range(4)]
    return WordTimeline(word_id=f"w{index}", speaker="A" if index % 7 < 4 else "B",
                        text=f"<w{index}>&", order=index, changes=changes)


def test_every_word_is_drawn_once_across_panels_with_its_text_escaped() -> None:
    words = [_word(i) for i in range(1, 96)]
    panels = [ET.fromstring(svg) for svg in timeline_svgs(words, per_panel=40)]
    assert len(panels) == 3
    names = [t.text for p in panels for t in p.iter(f"{_SVG}text") if t.get("class") == "word"]
    assert names == [f"{w.speaker}: <w{i}>&" for i, w in enumerate(words, 1)]
    for panel in panels:
        assert float(panel.get("width", 0)) >= 800 and float(panel.get("height", 0)) > 100


def test_bars_change_colour_where_the_label_changed_and_end_where_the_word_became_final(
        ) -> None:
    words = [_word(i) for i in range(1, 11)]
    (panel,) = [ET.fromstring(svg) for svg in timeline_svgs(words)]
    bars = [r for r in panel.iter(f"{_SVG}rect") if r.find(f"{_SVG}title") is not None]
    # Nine words one fluent bar each, the tenth a fluent then a reparandum bar.
    assert len(bars) == 11
    assert [b.get("fill") for b in bars].count(COLOURS[DisfluencyLabel.REPARANDUM]) == 1
    ticks = [line for line in panel.iter(f"{_SVG}line") if line.get("stroke-width") == "2"]
    assert len(ticks) == 1
    finals = list(panel.iter(f"{_SVG}circle"))
    assert len(finals) == 10
    # Updates 1..13 span the axis; word 1 (final at 4) ends at the left edge of update 5.
    first = bars[0]
    scale = 680 / 13
    assert abs(float(first.get("width", 0)) - 4 * scale) < 0.2


def test_confusion_and_accuracy_plots_are_well_formed_and_label_their_axes() -> None:
    labels = list(DisfluencyLabel)
    matrix = [[(i + 1) * 3 if i == j else 1 for j in range(len(labels))]
              for i in range(len(labels))]
    confusion = ET.fromstring(confusion_svg(labels, matrix))
    texts = [t.text for t in confusion.iter(f"{_SVG}text")]
    assert "gold label (corpus annotation)" in texts and "final label (stream)" in texts
    assert all(label.value in texts for label in labels)
    accuracy = ET.fromstring(accuracy_svg([(1, 0.5, 40), (2, 0.7, 30), (3, 0.8, 20)]))
    assert len(list(accuracy.iter(f"{_SVG}circle"))) == 3


def test_report_says_why_plots_are_missing_for_an_empty_log() -> None:
    page = render_report(Analysis(conversation_id="c", source="s", words=[], utterances={},
                                  updates=0))
    assert "No timeline: the log holds no word hypotheses." in page
    assert "No confusion matrix: this log carries no gold labels" in page
    assert "<svg" not in page
