"""Viterbi and forward-backward over a short linear-chain lattice, in numpy.

Scores follow crfsuite's first-order CRF (no start or end transitions). Work is done in
probability space, rescaled at every step, which needs fewer numpy calls per step than log space
(the per-word decoder runs this thousands of times a second on windows of about ten words).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["decode_lattice"]

FloatArray = npt.NDArray[np.float64]

#: Longest lattice decoded without rescaling at every step (positions).
_UNSCALED_MAX = 16


def decode_lattice(
    emissions: FloatArray,
    exp_transitions: FloatArray,
    *,
    first: int | None = None,
    last_mask: FloatArray | None = None,
) -> tuple[list[int], FloatArray]:
    """Best label path and per-position marginals.

    Parameters
    ----------
    emissions
        ``(n, L)`` state scores (log potentials) of ``n`` positions.
    exp_transitions
        ``(L, L)`` ``exp`` of the transition weights, from row label to column label, up to
        one constant factor (which changes neither path nor marginals); keep its largest
        entry near 1 so that short windows need no rescaling.
    first
        If given, position 0's label is fixed to this index (a finalised left context).
    last_mask
        If given, an ``(L,)`` 0/1 array of labels allowed at the last position.

    Returns
    -------
    path, marginals
        Label indices of the Viterbi path and the ``(n, L)`` marginal probabilities.
    """
    n, size = emissions.shape
    potentials = np.exp(emissions - emissions.max(axis=1, keepdims=True))
    if first is not None:
        potentials[0] = 0.0
        potentials[0, first] = 1.0
    if last_mask is not None:
        potentials[n - 1] = potentials[n - 1] * last_mask
    # Scaling keeps products in range; windows this short cannot underflow without it
    # (every factor is at least exp(-(score range)) and float64 reaches exp(-708)).
    scale = n > _UNSCALED_MAX
    transitions = exp_transitions
    columns = np.arange(size)
    best = potentials[0]
    pointers = []
    for t in range(1, n):
        scores = best[:, None] * transitions
        pointer = scores.argmax(axis=0)
        best = scores[pointer, columns] * potentials[t]
        if scale:
            best = best / best.max()
        pointers.append(pointer)
    path = [int(best.argmax())]
    for pointer in reversed(pointers):
        path.append(int(pointer[path[-1]]))
    path.reverse()
    alpha = np.empty((n, size))
    alpha[0] = potentials[0]
    beta = np.empty((n, size))
    beta[n - 1] = 1.0
    for t in range(1, n):
        forward = (alpha[t - 1] @ transitions) * potentials[t]
        alpha[t] = forward / forward.sum() if scale else forward
        backward = transitions @ (beta[n - t] * potentials[n - t])
        beta[n - 1 - t] = backward / backward.sum() if scale else backward
    marginals = alpha * beta
    marginals /= marginals.sum(axis=1, keepdims=True)
    return path, marginals
