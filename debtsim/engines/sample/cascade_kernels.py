"""Compiled kernels (numba) of the cascade along live links and of the per-scenario tallies.

Imported only inside the functions that draw (numba's import is not paid by
the CLI's ``--help`` or ``check``).  The liveness of a link is the
counter-based hash of the scenario and the link (SplitMix64's output
function, the same stream as before these kernels); no random number is
drawn here.

Cascade
    Per scenario, depth first from the own defaults along the links whose
    creditor has not defaulted yet; a link is live when the uniform of
    ``mix64(row_key + link_key)`` is below its contagion probability.
    Liveness is a fixed function of (scenario, link), so the final defaults
    are the obligors reachable from the own defaults along live links
    whatever the order of the search.
"""

from __future__ import annotations

import numba
import numpy as np
from numpy.typing import NDArray

from debtsim._typing import FloatArray, IntArray

__all__ = ["cascade", "tally"]

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_S11 = np.uint64(11)
_ONE = np.uint64(1)


@numba.njit(cache=True, nogil=True)
def _mix64(x: np.uint64) -> np.uint64:  # pragma: no cover - compiled
    """SplitMix64 output function."""
    x = x ^ (x >> _S30)
    x = x * _MIX1
    x = x ^ (x >> _S27)
    x = x * _MIX2
    x = x ^ (x >> _S31)
    return x


@numba.njit(cache=True, nogil=True)
def _cascade(
    own_r: IntArray,
    own_c: IntArray,
    rows: int,
    first: int,
    link_key: np.uint64,
    indptr: IntArray,
    creditor: IntArray,
    bar: NDArray[np.uint64],
    lkey: NDArray[np.uint64],
    n: int,
    out_r: IntArray,
    out_c: IntArray,
) -> int:  # pragma: no cover - compiled
    counts = np.zeros(rows + 1, dtype=np.int64)
    for t in range(own_r.size):
        counts[own_r[t] + 1] += 1
    for s in range(rows):
        counts[s + 1] += counts[s]
    fill = counts[:-1].copy()
    by_row = np.empty(own_r.size, dtype=np.int64)
    for t in range(own_r.size):
        s = own_r[t]
        by_row[fill[s]] = own_c[t]
        fill[s] += 1
    mark = np.zeros(n, dtype=np.int64)
    stack = np.empty(n, dtype=np.int64)
    cap = out_r.size
    n_out = 0
    for s in range(rows):
        stamp = s + 1
        top = 0
        for t in range(counts[s], counts[s + 1]):
            c = by_row[t]
            mark[c] = stamp
            if indptr[c + 1] > indptr[c]:
                stack[top] = c
                top += 1
        if top == 0:
            continue
        row_key = _mix64((np.uint64(first + s) + _ONE) * _GOLDEN + link_key)
        while top > 0:
            top -= 1
            d = stack[top]
            for pos in range(indptr[d], indptr[d + 1]):
                c = creditor[pos]
                if mark[c] == stamp:
                    continue
                # uniform (top 53 bits) < q  <=>  top 53 bits < ceil(q 2^53)
                if (_mix64(row_key + lkey[pos]) >> _S11) < bar[pos]:
                    mark[c] = stamp
                    if n_out >= cap:
                        return -1
                    out_r[n_out] = s
                    out_c[n_out] = c
                    n_out += 1
                    if indptr[c + 1] > indptr[c]:
                        stack[top] = c
                        top += 1
    return n_out


def cascade(
    own_r: IntArray,
    own_c: IntArray,
    rows: int,
    first: int,
    link_key: np.uint64,
    indptr: IntArray,
    creditor: IntArray,
    bar: NDArray[np.uint64],
    lkey: NDArray[np.uint64],
) -> tuple[IntArray, IntArray]:
    """(scenario, obligor) pairs defaulted by contagion only, for ``rows`` scenarios.

    Parameters
    ----------
    own_r, own_c : ndarray of int
        Own defaults: scenario (0 .. rows-1) and obligor.
    rows : int
        Scenarios.
    first : int
        Index of the first scenario in the run (keys the liveness draws).
    link_key : uint64
        The run's link key.
    indptr, creditor, bar, lkey : ndarray
        Links as CSR by debtor: creditor, liveness bar (``ceil(q 2^53)`` of the
        contagion probability ``q``) and 64-bit key of each.

    Returns
    -------
    rows, cols : ndarray of int
        Scenario and obligor of each contagion default.

    """
    n = indptr.size - 1
    cap = max(1024, 2 * own_r.size)
    while True:
        out_r = np.empty(cap, dtype=np.int64)
        out_c = np.empty(cap, dtype=np.int64)
        done = int(_cascade(own_r, own_c, rows, first, np.uint64(link_key), indptr, creditor,
                            bar, lkey, n, out_r, out_c))
        if done >= 0:
            return out_r[:done], out_c[:done]
        cap *= 4


@numba.njit(cache=True, nogil=True)
def _tally(
    rows: IntArray,
    cols: IntArray,
    loss: FloatArray,
    weights: FloatArray,
    losses: FloatArray,
    dw: FloatArray,
    dw2: FloatArray,
) -> None:  # pragma: no cover - compiled
    for t in range(rows.size):
        s = rows[t]
        c = cols[t]
        w = weights[s]
        losses[s] += loss[c]
        dw[c] += w
        dw2[c] += w * w


def tally(
    rows: IntArray,
    cols: IntArray,
    loss: FloatArray,
    weights: FloatArray,
    losses: FloatArray,
    dw: FloatArray,
    dw2: FloatArray,
) -> None:
    """Add defaults ``(rows, cols)`` in place, in the order given.

    ``losses[s] += loss[c]``, ``dw[c] += weights[s]`` and ``dw2[c] += weights[s]^2``
    for each pair ``(s, c)``.
    """
    _tally(rows, cols, loss, weights, losses, dw, dw2)
