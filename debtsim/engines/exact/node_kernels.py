"""Compiled per-node kernels of the exact engine's grid mode (numba).

One factor node needs, for every loss class, its conditional default
probability, the moments of the loss, and the terms of its log-PGF series on
the window (see :mod:`debtsim.engines.exact.loss_grid`).  Each of these is one
pass over the classes with a few floating-point operations per class, so
they are written as loops compiled by numba: no temporary arrays of the
book's size, no per-round passes.  Every kernel works on one node and keeps
no state, so nodes can be processed in any batches with the same result.

This module imports numba; import it lazily (through
:func:`debtsim.engines.exact.loss_grid.compiled`) so that commands which do
not compute a grid law never pay for it.  Kernels are compiled on first use
and cached on disk (``cache=True``), so later processes reuse the machine code.
Floating-point errors follow numpy's rules (``error_model="numpy"``: a
division by zero gives an infinity, not an exception).
"""

from __future__ import annotations

import cmath
import math

import numba
import numpy as np
from numpy.typing import NDArray

from debtsim._typing import FloatArray, IntArray

__all__ = [
    "hard_spectrum",
    "node_moments",
    "series_terms",
]

_jit = numba.njit(cache=True, nogil=True, error_model="numpy")


@_jit
def node_moments(
    p: FloatArray, k: IntArray, kc: FloatArray, k2c: FloatArray
) -> tuple[float, float, float, float, float, bool]:
    """Moments and range of one node's loss (grid units), in one pass.

    Parameters
    ----------
    p : ndarray, shape (n,)
        Default probability of each class.
    k, kc, k2c : ndarray, shape (n,)
        Grid loss, ``k * count`` and ``k^2 * count`` of each class.

    Returns
    -------
    mean, var : float
        ``sum p k count`` and ``sum p (1 - p) k^2 count``.
    bound : float
        Largest ``k`` of a class with ``0 < p < 1``.
    lowest, highest : float
        ``sum k count`` over classes with ``p >= 1`` and with ``p > 0``.
    interior : bool
        Whether every ``p`` is strictly between 0 and 1.

    """
    mean = 0.0
    var = 0.0
    bound = 0
    lowest = 0.0
    highest = 0.0
    interior = True
    for c in range(p.size):
        pc = p[c]
        mean += pc * kc[c]
        var += pc * (1.0 - pc) * k2c[c]
        if pc > 0.0:
            highest += kc[c]
            if pc >= 1.0:
                lowest += kc[c]
                interior = False
            elif k[c] > bound:
                bound = k[c]
        else:
            interior = False
    return mean, var, float(bound), lowest, highest, interior


@_jit
def series_terms(
    p: FloatArray,
    k: IntArray,
    count: FloatArray,
    each: float,
    hard_order: int,
    reciprocal: FloatArray,
    coefficients: FloatArray,
    hard: IntArray,
) -> tuple[float, float, int]:
    """Add every class's log-PGF series to ``coefficients`` (one node).

    For a class with ``q = min(p, 1 - p)`` and ``theta = q / (1 - q)``, term
    ``r`` is ``(-1)^(r+1) count theta^r / r`` at position ``r k`` (``p <=
    1/2``) or ``-r k`` (``p > 1/2``) modulo the window width ``W =
    coefficients.size``; the position advances by a fixed step, so no
    modulo is taken per term.  The class stops after the first ``R >= 1``
    with ``theta^(R+1) / ((R+1) (1 - theta)) <= each``: the dropped tail
    ``sum_{r>R} theta^r / r`` is at most that, per obligor.

    Parameters
    ----------
    p : ndarray, shape (n,)
        Default probability of each class at the node.
    k : ndarray of int, shape (n,)
        Grid loss of each class (> 0).
    count : ndarray, shape (n,)
        Obligors per class.
    each : float
        Truncation bound per obligor (the node's tolerance over the total count).
    hard_order : int
        A class needing more terms is not summed but listed in ``hard``.
    reciprocal : ndarray, shape (hard_order + 1,) or longer
        ``1 / r`` (entry 0 unused).
    coefficients : ndarray, shape (W,)
        Accumulator (added to).
    hard : ndarray of int, shape (n,)
        Receives the indices of the classes left out, first ``n_hard`` entries.

    Returns
    -------
    const : float
        ``sum count log(1 - q)`` over the summed classes.
    shift : float
        ``sum k count`` over the summed classes with ``p > 1/2``.
    n_hard : int
        Number of classes listed in ``hard``.

    """
    width = coefficients.size
    # theta at most this surely stops within hard_order terms: theta^(H+1) <= each / 2
    if each > 0.0:
        check = min(0.5, (0.5 * each) ** (1.0 / (hard_order + 1.0)))
    else:
        check = 0.0
    const = 0.0
    compensation = 0.0  # Neumaier summation of const
    shift = 0.0
    n_hard = 0
    for c in range(p.size):
        pc = p[c]
        if pc <= 0.0:
            continue
        flip = pc > 0.5
        q = 1.0 - pc if flip else pc
        kk = k[c]
        cnt = count[c]
        if q <= 0.0:  # certain default: only the shift
            shift += kk * cnt
            continue
        theta = q / (1.0 - q)
        stop = each * (1.0 - theta)
        if theta > check and (
            theta >= 1.0 or theta ** (hard_order + 1.0) > stop * (hard_order + 1.0)
        ):
            hard[n_hard] = c
            n_hard += 1
            continue
        term = cnt * math.log1p(-q)
        total = const + term
        if abs(const) >= abs(term):
            compensation += (const - total) + term
        else:
            compensation += (term - total) + const
        const = total
        step = kk % width
        if flip:
            shift += kk * cnt
            step = (width - step) % width
        pos = step
        power = theta  # theta^r
        value = cnt * theta  # (-1)^(r+1) count theta^r
        r = 1
        while True:
            coefficients[pos] += value * reciprocal[r]
            nxt = power * theta
            if nxt <= stop * (r + 1):
                break
            r += 1
            power = nxt
            value *= -theta
            pos += step
            if pos >= width:
                pos -= width
    return const + compensation, shift, n_hard


@_jit
def hard_spectrum(
    p: FloatArray,
    k: IntArray,
    count: FloatArray,
    roots: NDArray[np.complex128],
    out: NDArray[np.complex128],
) -> None:
    """Multiply ``out`` by ``prod_c (1 - p_c + p_c w^k_c)^count_c``, exactly.

    ``w = roots[f]`` at frequency ``f = 0 .. out.size - 1``; ``roots`` holds
    the ``W``-th roots of unity ``exp(-2 pi i j / W)``, and the index of
    ``w^k`` advances by ``k mod W`` per frequency.

    Parameters
    ----------
    p, k, count : ndarray, shape (n,)
        The classes multiplied in exactly (typically ``p`` near 1/2, where
        the series converges slowly).
    roots : ndarray of complex, shape (W,)
        Roots of unity of the window width.
    out : ndarray of complex, shape (W // 2 + 1,)
        The spectrum, multiplied in place.

    """
    width = roots.size
    for c in range(p.size):
        pc = p[c]
        one = 1.0 - pc
        step = k[c] % width
        cnt = count[c]
        power = cnt != 1.0
        idx = 0
        for f in range(out.size):
            term = one + pc * roots[idx]
            if power:
                if term.real == 0.0 and term.imag == 0.0:
                    term = 0j
                else:
                    term = cmath.exp(cnt * cmath.log(term))
            out[f] *= term
            idx += step
            if idx >= width:
                idx -= width
