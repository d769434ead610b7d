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
        ``(L, L)`` ``exp`` of the transition weights, from row label to column label.
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
    columns = np.arange(size)
    # Viterbi (max-product) and forward (sum-product) in one sweep.
    best = potentials[0] / potentials[0].max()
    alpha = np.empty((n, size))
    alpha[0] = potentials[0] / potentials[0].sum()
    pointers = []
    for t in range(1, n):
        scores = best[:, None] * exp_transitions
        pointer = scores.argmax(axis=0)
        best = scores[pointer, columns] * potentials[t]
        best /= best.max()
        pointers.append(pointer)
        forward = (alpha[t - 1] @ exp_transitions) * potentials[t]
        alpha[t] = forward / forward.sum()
    path = [int(best.argmax())]
    for pointer in reversed(pointers):
        path.append(int(pointer[path[-1]]))
    path.reverse()
    beta = np.empty((n, size))
    beta[n - 1] = 1.0
    for t in range(n - 2, -1, -1):
        backward = exp_transitions @ (beta[t + 1] * potentials[t + 1])
        beta[t] = backward / backward.sum()
    marginals = alpha * beta
    marginals /= marginals.sum(axis=1, keepdims=True)
    return path, marginals
