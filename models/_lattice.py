"""Viterbi and forward-backward over a linear-chain lattice, compiled with numba.

Scores follow crfsuite's first-order CRF (no start or end transitions). The streaming decoder
runs a lattice of about seven positions and eighteen tags for every word, thousands of times a
second; in numpy each step costs several array calls of about a microsecond each on tiny
arrays, which made the lattice the largest part of the per-word cost. Compiled loops do the
same arithmetic in a few microseconds. Work is done in probability space, normalised at every
position, so lattices of any length neither overflow nor underflow.

:func:`chain_end_step` is the utterance-function tagger's per-word step (state scores, forward
and Viterbi at the last position of a chain, marginals) and :func:`chain_carry` its recursions
over the context: crfsuite's operations in crfsuite's order, held to crfsuite within a stated
tolerance (``models/functions/_inference.py``).

This is the one module that uses numba. Kernels are compiled on first use and cached on disk
in the user's cache folder (:func:`kernel_cache_dir`); :func:`warm_up` does that ahead of time
so the first live word does not pay for it. The cache never goes beside this file: in an
installed package that is ``site-packages/midstream/models/__pycache__``, which ``pip
uninstall`` does not remove (it did not write those files), and the folder left behind then
reads as a namespace package named ``midstream`` that shadows a later editable install.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar, cast

import numba
import numpy as np
import numpy.typing as npt

__all__ = [
    "WindowResult",
    "accumulate_rows",
    "chain_carry",
    "chain_end_step",
    "decode_lattice",
    "decode_window",
    "kernel_cache_dir",
    "warm_up",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

_NO_MASK: FloatArray = np.empty(0)

_Kernel = TypeVar("_Kernel", bound=Callable[..., Any])

# numba's setting for its cache folder (NUMBA_CACHE_DIR); numba.config sets its attributes at run
# time, so a type checker cannot see them.
_CACHE_SETTING = "CACHE_DIR"



def kernel_cache_dir() -> Path:
    """The folder numba's on-disk kernel cache uses for this module.

    ``$NUMBA_CACHE_DIR`` when the user set it (numba's own setting), else
    ``$XDG_CACHE_HOME/midstream/kernels`` (``~/.cache/midstream/kernels`` when that is unset, the
    XDG base directory convention). numba keeps a sub-folder per source folder, so several
    clones, virtual environments and the compiled build never share an entry.
    """
    chosen = getattr(numba.config, _CACHE_SETTING)
    if chosen:
        return Path(chosen)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "midstream" / "kernels"


def _jit(func: _Kernel) -> _Kernel:
    # numba chooses a function's cache folder once, when caching is enabled at decoration, from
    # its global setting; set it for the length of that call only, so no other numba user in
    # the process is moved. The dispatcher numba returns is called like the function it wraps.
    saved = getattr(numba.config, _CACHE_SETTING)
    setattr(numba.config, _CACHE_SETTING, str(kernel_cache_dir()))
    try:
        return cast(_Kernel, numba.njit(cache=True, nogil=True)(func))
    finally:
        setattr(numba.config, _CACHE_SETTING, saved)



@_jit
def _potentials(emissions: Any, first: int, last_mask: Any) -> Any:  # pragma: no cover
    n, size = emissions.shape
    potentials = np.empty((n, size))
    for t in range(n):
        top = emissions[t, 0]
        for j in range(1, size):
            top = max(top, emissions[t, j])
        for j in range(size):
            potentials[t, j] = np.exp(emissions[t, j] - top)
    if first >= 0:
        potentials[0, :] = 0.0
        potentials[0, first] = 1.0
    if last_mask.shape[0] == size:
        for j in range(size):
            potentials[n - 1, j] *= last_mask[j]
    return potentials


@_jit
def _viterbi(potentials: Any, exp_transitions: Any, path: Any,
             settle_from: int) -> int:  # pragma: no cover
    n, size = potentials.shape
    best = potentials[0].copy()
    following = np.empty(size)
    pointers = np.zeros((n, size), dtype=np.int64)
    for t in range(1, n):
        top = 0.0
        for j in range(size):
            # Ties go to the lowest index, as numpy's argmax would.
            value = -1.0
            index = 0
            for i in range(size):
                candidate = best[i] * exp_transitions[i, j]
                if candidate > value:
                    value = candidate
                    index = i
            pointers[t, j] = index
            following[j] = value * potentials[t, j]
            top = max(top, following[j])
        if top > 0.0:
            for j in range(size):
                best[j] = following[j] / top
        else:
            best[:] = following
    index = 0
    for j in range(1, size):
        if best[j] > best[index]:
            index = j
    path[n - 1] = index
    for t in range(n - 1, 0, -1):
        index = pointers[t, index]
        path[t - 1] = index
    # Settled prefix: follow the back-pointers of every tag at position settle_from (the
    # newest position whose state scores can no longer change). Once they all meet in one tag
    # at some position, every path any later word can make passes through it, so that tag and
    # everything before it is what the best path will say forever (online Viterbi).
    if settle_from <= 0 or settle_from >= n:
        return -1
    alive = np.ones(size, dtype=np.bool_)
    reached = np.zeros(size, dtype=np.bool_)
    for t in range(settle_from, 0, -1):
        reached[:] = False
        count = 0
        for j in range(size):
            if alive[j]:
                i = pointers[t, j]
                if not reached[i]:
                    reached[i] = True
                    count += 1
        if count == 1:
            return t - 1
        alive[:] = reached
    return -1


@_jit
def _marginals(potentials: Any, exp_transitions: Any, out: Any) -> None:  # pragma: no cover
    n, size = potentials.shape
    total = 0.0
    for j in range(size):
        out[0, j] = potentials[0, j]
        total += potentials[0, j]
    for j in range(size):
        out[0, j] /= total
    for t in range(1, n):
        total = 0.0
        for j in range(size):
            acc = 0.0
            for i in range(size):
                acc += out[t - 1, i] * exp_transitions[i, j]
            out[t, j] = acc * potentials[t, j]
            total += out[t, j]
        for j in range(size):
            out[t, j] /= total
    # Backward pass, folded into the forward messages as it goes: out[t] becomes the marginal.
    beta = np.ones(size)
    weighted = np.empty(size)
    following = np.empty(size)
    for t in range(n - 2, -1, -1):
        for j in range(size):
            weighted[j] = beta[j] * potentials[t + 1, j]
        total = 0.0
        for i in range(size):
            acc = 0.0
            for j in range(size):
                acc += exp_transitions[i, j] * weighted[j]
            following[i] = acc
            total += acc
        for i in range(size):
            beta[i] = following[i] / total
        total = 0.0
        for j in range(size):
            out[t, j] *= beta[j]
            total += out[t, j]
        for j in range(size):
            out[t, j] /= total


# Compiled kernels cannot take keyword-only arguments, hence the long positional lists below.
@_jit
def _decode(  # noqa: PLR0917
    emissions: Any, exp_transitions: Any, first: int, last_mask: Any, path: Any,
            marginals: Any, settle_from: int) -> int:  # pragma: no cover
    potentials = _potentials(emissions, first, last_mask)
    settled = _viterbi(potentials, exp_transitions, path, settle_from)
    _marginals(potentials, exp_transitions, marginals)
    return settled


@_jit
def _decode_window(  # noqa: PLR0917
    scores: Any, lo: int, hi: int, exp_transitions: Any, first: int,
                   last_mask: Any, tag_group: Any, tag_end: Any, path: Any, confidence: Any,
                   end_probability: Any, settle_from: int) -> int:  # pragma: no cover
    emissions = scores[lo:hi]
    n, size = emissions.shape
    marginals = np.empty((n, size))
    settled = _decode(emissions, exp_transitions, first, last_mask, path, marginals,
                      settle_from)
    for t in range(n):
        group = tag_group[path[t]]
        same = 0.0
        ends = 0.0
        for j in range(size):
            if tag_group[j] == group:
                same += marginals[t, j]
            if tag_end[j]:
                ends += marginals[t, j]
        confidence[t] = same
        end_probability[t] = ends
    return settled


@_jit
def _accumulate(scores: Any, state: Any, rows: Any, targets: Any) -> None:  # pragma: no cover
    size = scores.shape[1]
    for k in range(rows.shape[0]):
        row = rows[k]
        if row < 0:
            continue
        target = targets[k]
        for j in range(size):
            scores[target, j] += state[row, j]


@_jit
def _sum_rows(state: Any, rows: Any, start: int, stop: int,
              scores: Any) -> None:  # pragma: no cover
    # crfsuite's state scores of an item: its attribute rows[start:stop] added row by row,
    # from the first row (0.0 when it has none).
    size = state.shape[1]
    if stop == start:
        for j in range(size):
            scores[j] = 0.0
        return
    row = rows[start]
    for j in range(size):
        scores[j] = state[row, j]
    for k in range(start + 1, stop):
        row = rows[k]
        for j in range(size):
            scores[j] += state[row, j]


# crfsuite's arithmetic at the last position of a chain, for the utterance-function tagger. Every
# operation is crfsuite's, in its order: state scores summed attribute row by attribute row,
# exp (numba's, the C library's unless numba brings a vector library; no fast-math, so nothing
# is reassociated or fused), vector sums left to right, scaling by multiplying with 1 / sum.
@_jit
def _chain_end_step(  # noqa: PLR0917
    state: Any, rows: Any, carry_forward: Any, carry_best: Any, group_of: Any,
        groups: Any, sums: Any, out: Any) -> Any:  # pragma: no cover
    size = state.shape[1]
    scores = out[0]
    viterbi = out[1]
    probs = out[2]
    _sum_rows(state, rows, 0, rows.shape[0], scores)
    chained = carry_forward.shape[0] == size
    # probs holds the unscaled forward vector until the scale is known.
    for j in range(size):
        probs[j] = carry_forward[j] * math.exp(scores[j]) if chained else math.exp(scores[j])
    total = probs[0]
    for j in range(1, size):
        total += probs[j]
    if not total < math.inf:
        return -1, 0.0, -1, 0.0
    scale = 1.0 / total if total != 0.0 else 1.0
    best = 0
    top = carry_best[0] + scores[0] if chained else scores[0]
    for j in range(size):
        p = probs[j] * scale
        p *= scale
        probs[j] = p / scale
        value = carry_best[j] + scores[j] if chained else scores[j]
        viterbi[j] = value
        if value > top:
            top = value
            best = j
    for g in range(sums.shape[0]):
        sums[g] = 0.0
    for j in range(size):
        sums[group_of[j]] += probs[j]
    group = groups[0]
    for g in groups:
        if sums[g] > sums[group]:
            group = g
    return best, probs[best], group, sums[group]


@_jit
def _push(  # noqa: PLR0917
    alpha: Any, viterbi: Any, exp_transitions: Any, transitions: Any, forward_out: Any,
        best_out: Any) -> None:  # pragma: no cover
    # sum_i alpha[i] * exp(T[i, j]) (i in order) and max_i viterbi[i] + T[i, j], for every j.
    size = alpha.shape[0]
    for j in range(size):
        total = alpha[0] * exp_transitions[0, j]
        top = viterbi[0] + transitions[0, j]
        for i in range(1, size):
            total += alpha[i] * exp_transitions[i, j]
            top = max(top, viterbi[i] + transitions[i, j])
        forward_out[j] = total
        best_out[j] = top


# crfsuite's forward and Viterbi recursions over a whole chain, one step short of a next position,
# in crfsuite's order (each state score summed row by row from its first row, products summed
# over the previous label in label order, scaling by 1 / the sum added left to right).
@_jit
def _chain_carry(  # noqa: PLR0917
    state: Any, rows: Any, ends: Any, exp_transitions: Any, transitions: Any,
        forward_out: Any, best_out: Any) -> bool:  # pragma: no cover
    size = state.shape[1]
    scores = np.empty(size)
    alpha = np.empty(size)
    viterbi = np.empty(size)
    forward = np.empty(size)
    start = 0
    for position in range(ends.shape[0]):
        stop = ends[position]
        _sum_rows(state, rows, start, stop, scores)
        start = stop
        if position == 0:
            for j in range(size):
                forward[j] = math.exp(scores[j])
                viterbi[j] = scores[j]
        else:
            _push(alpha, viterbi, exp_transitions, transitions, forward, best_out)
            for j in range(size):
                forward[j] *= math.exp(scores[j])
                viterbi[j] = best_out[j] + scores[j]
        total = forward[0]
        for j in range(1, size):
            total += forward[j]
        if not total < math.inf:
            return False
        scale = 1.0 / total if total != 0.0 else 1.0
        for j in range(size):
            alpha[j] = forward[j] * scale
    _push(alpha, viterbi, exp_transitions, transitions, forward_out, best_out)
    return True


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
        ``(n, L)`` state scores (log potentials) of ``n >= 1`` positions.
    exp_transitions
        ``(L, L)`` ``exp`` of the transition weights, from row label to column label, up to
        one constant factor (which changes neither path nor marginals).
    first
        If given, position 0's label is fixed to this index (a finalised left context).
    last_mask
        If given, an ``(L,)`` 0/1 array of labels allowed at the last position.

    Returns
    -------
    path, marginals
        Label indices of the Viterbi path and the ``(n, L)`` marginal probabilities.
    """
    emissions = np.ascontiguousarray(emissions, dtype=np.float64)
    n, size = emissions.shape
    path = np.empty(n, dtype=np.int64)
    marginals = np.empty((n, size))
    _decode(emissions, np.ascontiguousarray(exp_transitions, dtype=np.float64),
            -1 if first is None else first, _NO_MASK if last_mask is None else last_mask,
            path, marginals, -1)
    return path.tolist(), marginals


class WindowResult:
    """Per-position outcome of :func:`decode_window`, as Python lists (cheap to read)."""

    __slots__ = ("confidence", "end_probability", "path", "settled")

    def __init__(self, path: list[int], confidence: list[float],
                 end_probability: list[float], settled: int) -> None:
        self.path = path
        self.confidence = confidence
        self.end_probability = end_probability
        self.settled = settled


def decode_window(
    scores: FloatArray,
    lo: int,
    hi: int,
    exp_transitions: FloatArray,
    *,
    first: int,
    last_mask: FloatArray | None,
    tag_group: IntArray,
    tag_end: npt.NDArray[np.bool_],
    settle_from: int = -1,
) -> WindowResult:
    """Decode rows ``lo:hi`` of ``scores`` and summarise each position for the decoder.

    ``first`` is the fixed tag of position 0 or -1. ``tag_group[t]`` is the published label
    (as an index) of tag ``t``; the confidence of a position is the summed marginal of the tags
    sharing the label of its Viterbi tag. ``tag_end[t]`` flags utterance-end tags; the end
    probability is their summed marginal.

    ``settle_from`` is the last position (relative to ``lo``) whose scores are complete, or -1.
    ``settled`` in the result is the last position whose tag no later position can change:
    the Viterbi back-pointers of every tag at ``settle_from`` meet there. -1 when they do not
    meet (or no position was given).
    """
    n = hi - lo
    path = np.empty(n, dtype=np.int64)
    confidence = np.empty(n)
    end_probability = np.empty(n)
    settled = _decode_window(scores, lo, hi, exp_transitions, first,
                             _NO_MASK if last_mask is None else last_mask, tag_group, tag_end,
                             path, confidence, end_probability, settle_from)
    return WindowResult(path.tolist(), confidence.tolist(), end_probability.tolist(), settled)


def accumulate_rows(scores: FloatArray, state: FloatArray, rows: IntArray,
                    targets: IntArray) -> None:
    """``scores[targets[k]] += state[rows[k]]`` for every ``k`` in order, in place; a negative
    row (an unknown feature) adds nothing."""
    _accumulate(scores, state, rows, targets)


def chain_end_step(
    state: FloatArray,
    rows: IntArray,
    *,
    carry_forward: FloatArray,
    carry_best: FloatArray,
    group_of: IntArray,
    groups: IntArray,
    sums: FloatArray,
    out: FloatArray,
) -> tuple[int, float, int, float]:
    """crfsuite's forward and Viterbi step at the last position of a chain, and its marginals.

    Parameters
    ----------
    state
        ``(A, L)`` state weights, one row per attribute.
    rows
        The rows of the position's attributes, in the order crfsuite sums them (may be empty).
    carry_forward, carry_best
        ``sum_i alpha[i] * exp(T[i, j])`` and ``max_i viterbi[i] + T[i, j]`` from the
        positions before (``(L,)`` each), or both empty when the position opens the chain.
    group_of, groups, sums
        ``group_of[j]`` is the group of label ``j``; ``groups`` the groups that occur, in
        ascending order; ``sums`` (at least ``max(groups) + 1`` long) receives each group's
        summed marginals, added in label order from 0.0.
    out
        At least ``(3, L)``; rows 0, 1 and 2 receive the state scores, the final Viterbi scores
        and the marginals in their first ``L`` places (``sums`` may be a further row of it).

    Returns
    -------
    label, confidence, group, group_confidence
        The Viterbi label (the first of equal scores) and its marginal, and the group with the
        largest summed marginal (the first of equal sums) and that sum. ``label`` is -1 when a
        vector sum is not finite (an exp overflowed): crfsuite's own arithmetic would overflow.
    """
    result: tuple[int, float, int, float] = _chain_end_step(
        state, rows, carry_forward, carry_best, group_of, groups, sums, out)
    return result


def chain_carry(state: FloatArray, rows: IntArray, ends: IntArray, *,
                exp_transitions: FloatArray, transitions: FloatArray,
                forward_out: FloatArray, best_out: FloatArray) -> bool:
    """crfsuite's recursions over a chain, up to the next position's state scores.

    Position ``p`` of the chain has the attributes ``rows[ends[p - 1]:ends[p]]`` (``ends[-1]``
    being 0), summed in that order. ``forward_out[j]`` receives ``sum_i alpha[i] *
    exp_transitions[i, j]`` with ``alpha`` the scaled forward vector of the last position, and
    ``best_out[j]`` ``max_i viterbi[i] + transitions[i, j]``. Returns False, leaving the outputs
    meaningless, when a vector sum is not finite (an exp overflowed, as crfsuite's would).
    """
    done: bool = _chain_carry(state, rows, ends, exp_transitions, transitions,
                              forward_out, best_out)
    return done


def warm_up() -> None:
    """Compile (or load from the disk cache) every kernel now rather than on the first word."""
    scores = np.zeros((2, 2))
    transitions = np.ones((2, 2))
    decode_lattice(scores, transitions, first=0, last_mask=np.ones(2))
    decode_window(scores, 0, 2, transitions, first=-1, last_mask=None,
                  tag_group=np.zeros(2, dtype=np.int64), tag_end=np.ones(2, dtype=np.bool_))
    accumulate_rows(scores, transitions, np.zeros(1, dtype=np.int64),
                    np.zeros(1, dtype=np.int64))
    ints = np.zeros(1, dtype=np.int64)
    # Carried vectors come from a cache as read-only arrays, a type of their own to numba;
    # a chain's first position passes a writable empty one.
    carried = np.ones(2)
    carried.flags.writeable = False
    for carry in (np.zeros(0), carried):
        out = np.zeros((4, 2))
        chain_end_step(transitions, ints, carry_forward=carry, carry_best=carry,
                       group_of=np.zeros(2, dtype=np.int64), groups=ints, sums=out[3],
                       out=out)
    chain_carry(transitions, np.zeros(2, dtype=np.int64), np.array([1, 2], dtype=np.int64),
                exp_transitions=transitions, transitions=transitions,
                forward_out=np.zeros(2), best_out=np.zeros(2))
