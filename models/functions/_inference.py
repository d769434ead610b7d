"""The function CRF's arithmetic at the end of a chain: one fast path, crfsuite as its reference.

The streaming tagger needs only the last position of a short chain (a few final context
utterances and the growing one): its Viterbi label and marginals. Both come from the forward
recursions alone (crfsuite's backward vector at the last position is its scale factor, which
the marginal divides out again), so :class:`ChainInference` reads the CRF's weights once and
runs those recursions in the compiled kernels of :mod:`midstream.models._lattice`
(:func:`~midstream.models._lattice.chain_carry` over the context,
:func:`~midstream.models._lattice.chain_end_step` at the last position), following crfsuite's
operations in crfsuite's order. crfsuite itself (through :mod:`midstream.models._crf`) is the
reference: the tests hold the fast path to it within :data:`TOLERANCE`, and a chain whose
``exp`` would overflow (state scores past 709, which no regularised model reaches) is handed to
it, so even then the answer is its own.

Why one compiled path and no numpy one beside it: the kernels label faster in the source and
the compiled build alike, and a second path would have to be held to the reference too
(``models/weights/functions.md``, "Inference", gives the measurement).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import NamedTuple

import numpy as np
import numpy.typing as npt
from midstream.models._crf import CrfTagger
from midstream.models._lattice import chain_carry, chain_end_step
from midstream.models.functions._features import SETTING_MARK, setting_copies, setting_prefix

FloatArray = npt.NDArray[np.float64]

#: How far the fast path may stray from crfsuite (the reference) and still be right: marginals
#: (probabilities) within this much, Viterbi scores (log space) within this much, and the
#: Viterbi label crfsuite's wherever its final score leads the next by more than this. Common
#: practice, no source: far below any difference a label or a published confidence shows, far
#: above the rounding of a few hundred additions in float64.
TOLERANCE = 1e-9


class EndStep(NamedTuple):
    """The last position of a chain: the Viterbi label (index) and its marginal, the coarse
    group (enum index) with the largest summed marginal and that sum, every label's marginal,
    every label's final Viterbi score, and every group's summed marginal (indexed by group)."""

    label: int
    confidence: float
    group: int
    group_confidence: float
    marginals: FloatArray
    scores: FloatArray
    group_sums: FloatArray


class ChainInference:
    """A function CRF's weights and the recursions over them (see the module docstring).

    Parameters
    ----------
    crf
        The trained CRF (its weights are read once; it stays the reference).
    group_of
        The coarse function (enum index) of each of ``crf``'s labels, in label order: the step
        sums the marginals by it.

    Sharing: the arrays are never written after construction and every call works in arrays
    of its own, so one instance may serve any number of threads.
    """

    def __init__(self, crf: CrfTagger, group_of: Sequence[int], *,
                 setting: str | None = None) -> None:
        self._crf = crf
        self._setting = setting
        weights = crf.weights()
        attributes: Mapping[str, int] = weights.attributes
        state = weights.state
        if setting is not None:
            attributes, state = _folded(attributes, state, setting_prefix(setting))
        self.attributes = attributes
        # One all-zero last row, gathered when an utterance has no known attribute at all.
        self._state: FloatArray = np.vstack([state, np.zeros((1, len(crf.labels)))])
        self._transitions: FloatArray = weights.transitions
        # Exponentiated one by one with the C library's exp, as crfsuite does.
        self._exp_transitions: FloatArray = np.array(
            [[math.exp(w) for w in row] for row in weights.transitions.tolist()]).reshape(
            weights.transitions.shape)
        self._size = len(crf.labels)
        self._group_of = np.array(list(group_of), dtype=np.int64)
        groups = sorted(set(group_of))
        self._groups = np.array(groups, dtype=np.int64)
        # The step's work rows: state scores, Viterbi scores, marginals and the group sums
        # (which may need more places than there are labels).
        self._work_width = max(self._size, groups[-1] + 1)
        self._no_carry: FloatArray = np.empty(0)

    def rows(self, features: Iterable[str]) -> tuple[int, ...]:
        """Model rows of the known attributes among ``features``, in their order."""
        get = self.attributes.get
        return tuple(r for r in map(get, features) if r is not None)

    def carry(self, rows: Sequence[int], ends: Sequence[int]) -> tuple[FloatArray, FloatArray]:
        """The forward and Viterbi recursions over a chain of final positions, one step short
        of the next position: ``sum_i alpha[i] * exp(T[i, j])`` with ``alpha`` the scaled
        forward vector of the chain's last position, and ``max_i viterbi[i] + T[i, j]``
        (both read-only).

        Position ``p`` has the attributes ``rows[ends[p - 1]:ends[p]]`` (from 0 for the first),
        summed in that order.

        Raises
        ------
        OverflowError
            An exp overflowed (crfsuite's own arithmetic would).
        """
        forward, best = np.empty(self._size), np.empty(self._size)
        if not chain_carry(self._state, np.array(rows, dtype=np.int64),
                           np.array(ends, dtype=np.int64), exp_transitions=self._exp_transitions,
                           transitions=self._transitions, forward_out=forward, best_out=best):
            raise OverflowError("the context window's recursions overflowed")
        forward.flags.writeable = False
        best.flags.writeable = False
        return forward, best

    def end_step(self, rows: Sequence[int],
                 carry: tuple[FloatArray, FloatArray] | None) -> EndStep:
        """The last position of a chain with the attributes ``rows`` (in crfsuite's order),
        after the chain :meth:`carry` summed (``None`` when it opens the chain).

        Raises
        ------
        OverflowError
            An exp overflowed (crfsuite's own arithmetic would).
        """
        carry_forward, carry_best = carry if carry is not None else (
            self._no_carry, self._no_carry)
        out = np.empty((4, self._work_width))
        k, confidence, group, group_confidence = chain_end_step(
            self._state, np.array(rows, dtype=np.int64), carry_forward=carry_forward,
            carry_best=carry_best, group_of=self._group_of, groups=self._groups, sums=out[3],
            out=out)
        if k < 0:
            raise OverflowError("forward vector overflowed")
        size = self._size
        return EndStep(k, confidence, group, group_confidence, out[2, :size], out[1, :size], out[3])

    def reference(self, xseq: Sequence[Mapping[str, float]]) -> tuple[str, dict[str, float]]:
        """crfsuite's Viterbi label and marginals at the last position of ``xseq`` (one
        feature dictionary per position): what :meth:`end_step` is held to."""
        labels, marginals = self._crf.tag_with_marginals(self.with_copies(xseq))
        return labels[-1], marginals

    def with_copies(self, xseq: Sequence[Mapping[str, float]]) -> list[Mapping[str, float]]:
        """``xseq`` as crfsuite must see it: each position's names, then their setting copies
        (the names :meth:`rows` folds together), when this chain scores a setting."""
        setting = self._setting
        if setting is None:
            return list(xseq)
        return [setting_copies(feats, setting) for feats in xseq]


def _folded(attributes: Mapping[str, int], state: FloatArray,
            prefix: str) -> tuple[dict[str, int], FloatArray]:
    """Attributes and state weights where each shared attribute ``a`` also carries the weights
    of its copy ``prefix + a``, so that a chain fed only shared names scores what crfsuite
    scores on the names with their copies added (``setting_copies``), and the per-word work
    stays one lookup per name. A copy whose shared attribute has no weight (L1 dropped it)
    becomes a row of its own under the shared name; other settings' copies are left out, as no
    shared name reaches them.
    """
    rows: dict[str, list[int]] = {}
    for name, row in attributes.items():
        if name.startswith(prefix):
            rows.setdefault(name[len(prefix):], []).append(row)
        elif not name.startswith(SETTING_MARK):
            # The shared weight first, as crfsuite adds it before the copy's.
            rows.setdefault(name, []).insert(0, row)
    folded = np.zeros((len(rows), state.shape[1]))
    names: dict[str, int] = {}
    for index, (name, own) in enumerate(rows.items()):
        names[name] = index
        for row in own:
            folded[index] += state[row]
    return names, folded
