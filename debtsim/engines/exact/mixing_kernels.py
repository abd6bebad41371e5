"""Compiled kernel of the sector path: mixing banded node laws (numba).

A sector's conditional loss laws at the nodes of its shared factor grid are
stored as compact rows ``(start, probabilities)``; the law given a global
node is their weighted sum.  The sum touches every stored probability of the
rows with a weight once, so it is a single compiled loop with no temporary
arrays.  Import this module lazily (through
:func:`debtsim.engines.exact.sector_mixing.mix_rows`): numba's import and the
kernel's compilation, or its loading from the on-disk cache, are paid only by
runs that mix sector laws.
"""

from __future__ import annotations

import math

import numba

from debtsim._typing import FloatArray, IntArray

__all__ = ["log_mix", "mix_banded"]


@numba.njit(cache=True, nogil=True)
def mix_banded(
    start: IntArray,
    indptr: IntArray,
    data: FloatArray,
    kept: IntArray,
    weights: FloatArray,
    lo: int,
    out: FloatArray,
) -> None:
    """Add ``weights[k] * row_k`` at ``start[k] - lo`` of ``out`` for every ``k`` in ``kept``.

    Parameters
    ----------
    start, indptr, data : ndarray
        Row ``k`` is ``data[indptr[k]:indptr[k + 1]]`` placed at grid point ``start[k]``.
    kept : ndarray of int
        Rows to add.
    weights : ndarray
        Weight of each row (indexed by row).
    lo : int
        Grid point of ``out[0]``; every kept row must fit in ``out``.
    out : ndarray
        Accumulator, updated in place.
    """
    for k in kept:
        w = weights[k]
        s = start[k] - lo
        a = indptr[k]
        for t in range(indptr[k + 1] - a):
            out[s + t] += w * data[a + t]


@numba.njit(cache=True, nogil=True)
def log_mix(weights: FloatArray, values: FloatArray, out: FloatArray) -> None:
    """``out[g, t] = log sum_k weights[g, k] exp(values[k, t])`` over ``weights[g, k] > 0``.

    Each sum is shifted by its largest term, so nothing overflows and the
    leading term never underflows.

    Parameters
    ----------
    weights : ndarray, shape (m, n)
        Non-negative weights; every row has a positive entry.
    values : ndarray, shape (n, q)
    out : ndarray, shape (m, q)
        Filled in place.
    """
    m, n = weights.shape
    q = values.shape[1]
    for g in range(m):
        for t in range(q):
            top = -math.inf
            for k in range(n):
                if weights[g, k] > 0.0 and values[k, t] > top:
                    top = values[k, t]
            total = 0.0
            for k in range(n):
                w = weights[g, k]
                if w > 0.0:
                    total += w * math.exp(values[k, t] - top)
            out[g, t] = top + math.log(total)
