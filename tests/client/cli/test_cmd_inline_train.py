"""`midstream train`, `evaluate` and `corpus stats` on a transcript in inline disfluency markup
(issue 28, item 5). The transcript is invented; the markup is Meteer et al. (1995)'s.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from midstream.client.cli._main import main
from midstream.corpora import CorpusKind, detect_kind, read_corpus

#: An invented help-desk call, written as an annotator would.
CALL = """\
@format midstream-inline 1
# an invented help-desk call
@conversation desk-1
A question: {F uh} can you [ reset + {F um} reset ] my password /
B answer: {D well} i can [ send + {E i mean} send ] you a link /
A acknowledgement: okay /
B question: what [ is + is ] your {F uh} user name /
A answer: [ it is + ] {F um} it is kim at home -/
B agreement: right /
"""


def test_an_inline_transcript_trains_and_evaluates_a_model(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Several invented calls like CALL, so a CRF has something to learn from.
    variants = [("reset", "password"), ("change", "address"), ("close", "account"),
                ("check", "order"), ("move", "booking"), ("cancel", "delivery")]
    body = "".join(CALL.split("\n", 1)[1].replace("desk-1", f"desk-{n}")
                   .replace("reset", verb).replace("password", thing)
                   for n, (verb, thing) in enumerate(variants))
    transcript = tmp_path / "calls.inline"
    transcript.write_text("@format midstream-inline 1\n" + body, encoding="utf-8")
    assert detect_kind(tmp_path) is CorpusKind.INLINE
    assert len(list(read_corpus(transcript))) == 6

    assert main(["corpus", "stats", str(transcript), "--json"]) == 0
    stats = json.loads(capsys.readouterr().out)
    assert stats["conversations"] == 6

    words_model = tmp_path / "words.tagger"
    functions_model = tmp_path / "functions.tagger"
    assert main(["train", "words", str(transcript), "--min-freq", "1", "--max-iterations", "30",
                 "--out", str(words_model)]) == 0
    assert main(["train", "functions", str(transcript), "--scheme", "coarse",
                 "--max-iterations", "30", "--out", str(functions_model)]) == 0
    capsys.readouterr()
    assert main(["evaluate", str(transcript), "--model", str(words_model),
                 "--functions-model", str(functions_model), "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    # Fillers are the easiest role: every "uh"/"um" in these calls is one.
    assert figures["disfluency.filler.f1"] > 0.5
    assert 0.0 <= figures["disfluency.reparandum.f1"] <= 1.0
