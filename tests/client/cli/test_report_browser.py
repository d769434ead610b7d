"""The HTML report as a person sees it: rendered by a real headless browser (Debian's chromium).

A probe script added to a copy of the report measures the page after layout: every plot's box
on screen, and whether a known word's label is the element actually drawn at its place. The
page is loaded from a file with networking features off; nothing leaves the machine.
Where chromium is missing the tests skip, naming the package; under ``CI=true`` they fail
(``.ci/run`` installs it).
"""

from __future__ import annotations

import html
import json
import math
import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    Served,
    models_dir_fixture,
    served_fixture,
)
from midstream.client.cli._main import main
from midstream.client.cli._plots import WORDS_PER_PANEL

pytestmark = pytest.mark.corpus

_CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                   "--no-first-run", "--disable-background-networking",
                   "--disable-component-update", "--disable-sync", "--window-size=1280,900")

#: Runs after layout; writes what it measured as JSON into <pre id="probe">.
_PROBE = """
<script>
(function () {
  const box = (el) => { const r = el.getBoundingClientRect(); return {w: r.width, h: r.height}; };
  const out = {plots: [], legend: null, word: null, absent: []};
  for (const svg of document.querySelectorAll("svg.plot")) {
    out.plots.push(Object.assign({kind: svg.getAttribute("class")}, box(svg)));
  }
  const legend = document.querySelector("svg.legend");
  if (legend) { out.legend = box(legend); }
  const wanted = document.body.getAttribute("data-probe-word");
  const texts = Array.from(document.querySelectorAll("svg.timeline text.word"));
  const index = texts.findIndex((t) => t.textContent.endsWith(": " + wanted));
  if (index >= 0) {
    const el = texts[index];
    el.scrollIntoView({block: "center"});
    const r = el.getBoundingClientRect();
    const hit = document.elementFromPoint(r.left + r.width / 2, r.top + r.height / 2);
    const style = getComputedStyle(el);
    out.word = {index: index, text: el.textContent, w: r.width, h: r.height,
                drawn: hit === el, fontPx: parseFloat(style.fontSize),
                visibility: style.visibility, display: style.display,
                panel: Array.from(document.querySelectorAll("svg.timeline"))
                            .indexOf(el.closest("svg"))};
  }
  for (const p of document.querySelectorAll("p.absent")) {
    out.absent.push(Object.assign({text: p.textContent}, box(p)));
  }
  const pre = document.createElement("pre");
  pre.id = "probe";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
"""


def _chromium() -> str:
    found = shutil.which("chromium") or (
        "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
    if found is None:
        reason = ("chromium is not installed (Debian package 'chromium': apt-get install -y "
                  "chromium); the report was not checked in a browser")
        if os.environ.get("CI") == "true":
            pytest.fail(f"CI=true: {reason}; .ci/run should have installed it")
        pytest.skip(reason)
    return found


def _seen_by_browser(report: Path, word: str, tmp_path: Path) -> dict[str, Any]:
    """What the browser laid out for ``report``, with ``word`` the timeline label to look for."""
    page = report.read_text(encoding="utf-8")
    probed = page.replace("<body>", f'<body data-probe-word="{html.escape(word)}">', 1)
    probed = probed.replace("</body>", _PROBE + "</body>", 1)
    copy = tmp_path / f"probe-{report.name}"
    copy.write_text(probed, encoding="utf-8")
    profile = tmp_path / f"chromium-profile-{report.stem}"  # fresh: no state between runs
    done = subprocess.run(
        [_chromium(), *_CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--dump-dom",
         copy.as_uri()],
        capture_output=True, text=True, timeout=180, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    match = re.search(r'<pre id="probe">(.*?)</pre>', done.stdout, re.DOTALL)
    assert match is not None, f"the probe did not run; chromium said:\n{done.stderr[-2000:]}"
    result: dict[str, Any] = json.loads(html.unescape(match.group(1)))
    return result


def _invented_call(words: int) -> str:
    """A two-speaker CTM (invented, not corpus text) whose last words are 'the zanzibar order'."""
    turns = [("A", "well i want to uh i need to book the the repair for my bike"),
             ("B", "sure what is wrong with it"),
             ("A", "the chain i mean the gears make a noise"),
             ("B", "okay we can look at it on monday")]
    lines, time = [";; an invented call (not corpus text)"], 0.0
    spoken: list[tuple[str, str]] = []
    while len(spoken) < words - 3:
        for speaker, text in turns:
            spoken += [(speaker, token) for token in text.split()]
    spoken = [*spoken[: words - 3], ("B", "the"), ("B", "zanzibar"), ("B", "order")]
    for speaker, token in spoken:
        lines.append(f"call9 {speaker} {time:.2f} 0.20 {token}")
        time += 0.25
    return "\n".join(lines) + "\n"


def _report(argv: list[str], log: Path, out: Path) -> None:
    assert main([*argv, "--speed", "0", "--log", str(log), "--no-progress"]) == 0
    assert main(["inspect", str(log), "--html", str(out)]) == 0


def test_report_without_gold_draws_every_word_and_says_what_is_absent(
        served: Served, tmp_path: Path) -> None:
    words = 300
    ctm = tmp_path / "call9.ctm"
    ctm.write_text(_invented_call(words), encoding="utf-8")
    report = tmp_path / "call9.html"
    _report(["replay", str(ctm), "--server", served.target], tmp_path / "call9.jsonl", report)

    seen = _seen_by_browser(report, "zanzibar", tmp_path)
    timelines = [p for p in seen["plots"] if "timeline" in p["kind"]]
    # Every word has its row: the whole conversation, in panels, each drawn at a real size.
    assert len(timelines) == math.ceil(words / WORDS_PER_PANEL)
    assert all(p["w"] >= 800 and p["h"] >= 200 for p in timelines[:-1]), timelines
    assert seen["legend"] is not None and seen["legend"]["h"] > 10
    # The 299th word is drawn, readable and not covered, in the last panel.
    word = seen["word"]
    assert word is not None, "the word 'zanzibar' has no label in the timeline"
    assert word["text"] == "B: zanzibar" and word["index"] == words - 2
    assert word["drawn"] and word["visibility"] == "visible" and word["display"] != "none"
    assert word["fontPx"] >= 11 and word["h"] >= 10 and word["w"] > 30
    assert word["panel"] == len(timelines) - 1
    # No gold labels: no confusion matrix or function plot, and the page says why.
    assert not [p for p in seen["plots"] if "confusion" in p["kind"] or "accuracy" in p["kind"]]
    reasons = " ".join(p["text"] for p in seen["absent"] if p["h"] > 0)
    assert "No confusion matrix: this log carries no gold labels" in reasons
    assert "No function accuracy" in reasons


def test_report_with_gold_draws_the_confusion_matrix_and_accuracy_curve(
        served: Served, swda_dir: Path, tmp_path: Path) -> None:
    report = tmp_path / "sw4802.html"
    _report(["replay", str(swda_dir), "--split", "val", "--conversation", "sw4802",
             "--server", served.target], tmp_path / "sw4802.jsonl", report)
    # "interacting": a word of sw4802 that occurs once in it, its 248th (SwDA transcript).
    seen = _seen_by_browser(report, "interacting", tmp_path)
    kinds = [p["kind"] for p in seen["plots"]]
    assert kinds.count("plot confusion") == 1 and kinds.count("plot accuracy") == 1
    for plot in seen["plots"]:
        assert plot["w"] >= 400 and plot["h"] >= 200, plot
    assert seen["word"] is not None and seen["word"]["drawn"]
    assert seen["word"]["index"] == 247  # beyond the 120 words the old report drew
    assert seen["absent"] == []
