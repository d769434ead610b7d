"""What the ``midstream bench`` subcommands share: paths, models, the machine, pairing a run
with its baseline.

Not a benchmark itself.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from midstream import build_name
from midstream.models import default_words_model_path

#: The checkout this module runs from (``client/bench`` is two folders down): the corpora are
#: looked for beside it, and ``report`` runs its commands there.
REPO = Path(__file__).resolve().parents[2]
#: The shipped models' folder (``models/weights`` in a checkout).
WEIGHTS = default_words_model_path().parent

# Trains small real models from a few SwDA train conversations, in its own process (the CRF
# trainer forks, which must not happen in a process that already runs gRPC).
_TRAIN_TINY = """
import itertools, sys
from dataclasses import dataclass
from pathlib import Path
from midstream.corpora import read_corpus
from midstream.models.training import (FunctionTrainingOptions, WordTrainingConfig,
                                       save_artifact, train_function_model, train_word_artifact)
swda, out = Path(sys.argv[1]), Path(sys.argv[2])
conversations = list(itertools.islice(read_corpus(swda, split="train"), 12))
save_artifact(train_word_artifact(conversations, WordTrainingConfig(max_iterations=30)),
              out / "words.tagger")
save_artifact(train_function_model(conversations, FunctionTrainingOptions(max_iterations=30)),
              out / "functions.tagger")
"""


def source_arguments(parser: argparse.ArgumentParser) -> None:
    """``--models``, ``--corpus`` and ``--json``, as the in-process benchmarks take them."""
    parser.add_argument("--models", type=Path, default=None)
    parser.add_argument("--corpus", type=Path, default=None,
                        help="SwDA folder (default $MIDSTREAM_CORPORA/swda or "
                             "../shared/corpora/swda)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")


def model_arguments(parser: argparse.ArgumentParser) -> None:
    """``--models`` and ``--train-tiny``, as the benchmarks that serve models take them (see
    :func:`models_folder`)."""
    parser.add_argument("--models", type=Path, default=None,
                        help="model folder (default: the shipped models)")
    parser.add_argument("--train-tiny", type=Path, default=None, metavar="DIR",
                        help="when no models are shipped, train small ones into DIR")


def corpora_root() -> Path:
    """``$MIDSTREAM_CORPORA`` or ``../shared/corpora`` beside the checkout."""
    override = os.environ.get("MIDSTREAM_CORPORA")
    return Path(override) if override else REPO.parent / "shared" / "corpora"


def models_folder(given: Path | None, tiny: Path | None) -> tuple[Path, str]:
    """The model folder to serve, and how it was chosen.

    ``given`` wins; else the shipped weights when present; else tiny models trained into
    ``tiny`` (once: an existing folder with both files is reused).
    """
    if given is not None:
        return given, f"models from {given}"
    if any(WEIGHTS.glob("*.tagger")):
        return WEIGHTS, "the shipped models (models/weights)"
    if tiny is None:
        raise SystemExit("no shipped models in models/weights: pass --models DIR, or "
                         "--train-tiny DIR to train small ones from SwDA train")
    if not ((tiny / "words.tagger").is_file() and (tiny / "functions.tagger").is_file()):
        tiny.mkdir(parents=True, exist_ok=True)
        subprocess.run([sys.executable, "-c", _TRAIN_TINY, str(corpora_root() / "swda"),
                        str(tiny)], check=True)
    return tiny, (f"tiny models trained on 12 SwDA train conversations ({tiny}); "
                  "the shipped models were not available")


def machine() -> dict[str, Any]:
    """The machine and its load, for the report."""
    model = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text(encoding="utf-8").splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    pressure = None
    try:
        # "some avg60": share of the last minute in which a runnable task waited for a CPU.
        first = Path("/proc/pressure/cpu").read_text(encoding="ascii").splitlines()[0]
        pressure = float(first.split()[2].removeprefix("avg60="))
    except (OSError, IndexError, ValueError):
        pass
    return {
        "cpu_pressure_avg60": pressure,
        "nproc": os.cpu_count(),
        "cpus_usable": len(os.sched_getaffinity(0)),
        "cpu_model": model,
        "python": platform.python_version(),
        "build": build_name(),
        "platform": platform.platform(),
        "loadavg": os.getloadavg(),
    }


#: The cores this process may use as started: checked against this, not against the current
#: affinity, so pinning to one core and later to another works (the second check once failed
#: silently and left the load generator on the server's core).
_USABLE_CORES = frozenset(os.sched_getaffinity(0))


def pin_self(core: int | None) -> None:
    """Pin this process to one core (the load generator's), when the machine has it."""
    if core is not None and core in _USABLE_CORES:
        os.sched_setaffinity(0, {core})
        assert os.sched_getaffinity(0) == {core}


@dataclass(frozen=True, slots=True, kw_only=True)
class Paired:
    """A figure and its baseline, measured side by side in the same run, and their ratio.

    Absolute times on a shared machine move with whatever else runs on it; two figures taken
    in turn in one run move together, so their ratio is what a benchmark reports.

    Attributes
    ----------
    measured : float
        The figure (any unit: CPU seconds, microseconds per call, ...).
    baseline : float
        The baseline's figure, in the same unit.

    Examples
    --------
    >>> pair = Paired(measured=3.0, baseline=1.5)
    >>> pair.ratio
    2.0
    >>> pair.line("read_swda", "baseline", unit="s cpu", digits=1)
    'read_swda / baseline: 2.00x (3.0 / 1.5 s cpu)'
    """

    measured: float
    baseline: float

    @property
    def ratio(self) -> float:
        """``measured / baseline`` (infinite for a zero baseline)."""
        return self.measured / self.baseline if self.baseline else math.inf

    def line(self, what: str, against: str, *, unit: str, digits: int = 4) -> str:
        """One printed line: the ratio, then both figures."""
        return (f"{what} / {against}: {self.ratio:.2f}x ({self.measured:.{digits}f} / "
                f"{self.baseline:.{digits}f} {unit})")

    def as_json(self) -> dict[str, float]:
        """``measured``, ``baseline`` and ``ratio``, for a benchmark's ``--json`` output."""
        return {"measured": self.measured, "baseline": self.baseline, "ratio": self.ratio}


def write_json(path: Path | None, figures: dict[str, Any]) -> None:
    """Write a benchmark's figures (with this machine's description) to ``path``, if given."""
    if path is not None:
        path.write_text(json.dumps({"machine": machine(), **figures}, indent=2, sort_keys=True)
                        + "\n", encoding="utf-8")
