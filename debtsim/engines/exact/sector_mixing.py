r"""Sector laws on a shared sector-factor grid, mixed and convolved per global node.

Given its sector factor ``Y_s = y`` the obligors of a sector (outside link
groups) are independent, so the sector's conditional loss law depends on
``y`` alone.  The engine builds one
:class:`~debtsim.engines.exact.loss_grid.SeriesKernel` per sector per run
(classes and grid losses do not depend on any factor);
:class:`SectorNodeLaws` computes the law at each node ``y_k`` of the
sector's shared grid on its own narrow window (the one-factor engine's
Bernstein window, cut to the node's Chernoff window) and keeps them as
compact rows ``(start, probabilities)``.

For a global node ``g`` the sector's law is the mixture
``P_s(. | g) = sum_k W[g, k] P_s(. | y_k)`` with the Gaussian weights of
``y`` given ``g`` (:func:`mix_rows`, a compiled banded sum); weights below
:data:`WEIGHT_CUT` are dropped and their mass is reported.  Conditional on
``g`` the sectors are independent, so the total law is the convolution of
the mixed sector laws (:func:`add_global_laws`): one real FFT per sector
and one inverse on a cyclic window of ``M`` points, the summed ranges of
the sector laws cut to the total's Chernoff window when that is shorter.

Chernoff window.  For any ``theta > 0``, ``P(S >= t) <= exp(-theta t) E
e^{theta S}`` (the mirror image with ``theta < 0`` for the lower tail).
Given ``g`` the sector losses are independent mixtures, so ``log E
e^{theta S} = sum_s log sum_k W[g, k] M_{s,k}(theta)``, and ``M_{s,k}`` is
bounded in closed form from the classes (:func:`log_mgf_bounds`: ``log(1 -
p + p e^x) <= p (e^x - 1)``, or ``x + (1 - p) (e^{-x} - 1)`` for ``p >
1/2``).  On a ladder of ``theta`` values (:func:`theta_ladder`) the
smallest such ``t`` for a tail of :data:`~debtsim.engines.exact.loss_grid.WINDOW_TAIL`
gives the window's ends (:func:`chernoff_window`), so the mass the cyclic
convolution folds is at most that on each side, as in the one-factor
engine.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from numpy.typing import NDArray
from scipy import sparse

from debtsim._typing import FloatArray, IntArray
from debtsim.engines.exact.loss_grid import (
    WINDOW_TAIL,
    SeriesKernel,
    bernstein_halfwidth,
    place_window,
)

__all__ = [
    "WEIGHT_CUT",
    "SectorNodeLaws",
    "chernoff_window",
    "chernoff_windows",
    "log_mgf_bounds",
    "mix_rows",
    "mixture_log_mgf",
    "theta_ladder",
    "add_global_laws",
]

#: Mixing weights (rows summing to 1) below this are dropped; their mass is reported.
WEIGHT_CUT = 1e-17
#: Node-law values below this fraction of the node's largest are FFT round-off.
_NOISE_FLOOR = 1e-15


@dataclass
class SectorNodeLaws:
    """Conditional loss laws of one sector at the nodes of its shared grid.

    Row ``k`` holds ``P(L_s = start[k] + t | Y_s = y_k)`` for
    ``t < indptr[k + 1] - indptr[k]`` in ``data[indptr[k]:indptr[k + 1]]``
    (grid units); rows of nodes no global node needs are empty.
    """

    start: IntArray
    indptr: IntArray
    data: FloatArray
    truncation: float
    widest: int

    @classmethod
    def compute(
        cls,
        kernel: SeriesKernel,
        p: FloatArray,
        needed: NDArray[np.bool_],
        top: int,
        log_mgf: FloatArray | None = None,
        thetas: FloatArray | None = None,
    ) -> SectorNodeLaws:
        """Laws at the nodes ``needed`` (boolean per row of ``p``).

        Each node's window is the Bernstein window of the one-factor
        engine, cut to the node's Chernoff window when ``log_mgf`` (bounds
        at ``thetas``, one row per node) is given.

        Parameters
        ----------
        kernel : SeriesKernel
            The sector's loss classes (built once per run).
        p : ndarray, shape (nodes, classes)
            Conditional default probability of each class at each node.
        needed : ndarray of bool, shape (nodes,)
            Nodes whose law is wanted.
        top : int
            Largest grid loss of the sector.
        """
        n = p.shape[0]
        start = np.zeros(n, dtype=np.int64)
        lengths = np.zeros(n, dtype=np.int64)
        rows: list[FloatArray] = []
        truncation = 0.0
        widest = 0
        c_lo = np.full(n, -np.inf)
        c_hi = np.full(n, np.inf)
        if log_mgf is not None and thetas is not None:
            c_lo[needed], c_hi[needed] = chernoff_windows(log_mgf[needed], thetas, WINDOW_TAIL)
            c_lo, c_hi = np.floor(c_lo), np.ceil(c_hi)
        for j in np.flatnonzero(needed).tolist():
            state = kernel.node(p[j])
            half = bernstein_halfwidth(state.var, state.bound)
            lo = max(state.mean - half, float(c_lo[j]))
            hi = min(state.mean + half, float(c_hi[j]))
            mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
            window = place_window(mid, half, state.lowest, state.highest, top)
            widest = max(widest, window.width)
            law, trunc = kernel.law(state, window)
            truncation = max(truncation, trunc)
            law[: max(state.lowest - window.start, 0)] = 0.0
            law[max(state.highest + 1 - window.start, 0) :] = 0.0
            np.clip(law, 0.0, None, out=law)
            law[law < _NOISE_FLOOR * law.max()] = 0.0
            live = np.flatnonzero(law)
            if live.size == 0:  # pragma: no cover - a law always has mass
                continue
            a, b = int(live[0]), int(live[-1]) + 1
            start[j] = window.start + a
            lengths[j] = b - a
            rows.append(law[a:b])
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        data = np.concatenate(rows) if rows else np.zeros(0)
        return cls(start, indptr, data, truncation, widest)


def mix_rows(laws: SectorNodeLaws, weights: FloatArray) -> tuple[int, FloatArray]:
    """``sum_k weights[k] law_k`` on the union of the rows' ranges.

    Parameters
    ----------
    laws : SectorNodeLaws
    weights : ndarray, shape (nodes,)
        Mixing weights; zero weights are skipped (their rows may be empty).

    Returns
    -------
    offset : int
    law : ndarray
        The mixture takes the value ``offset + t`` with probability ``law[t]``.
    """
    kept = np.flatnonzero(weights)
    ends = laws.start[kept] + np.diff(laws.indptr)[kept]
    lo = int(laws.start[kept].min())
    hi = int(ends.max())
    out = np.zeros(hi - lo)
    from debtsim.engines.exact.mixing_kernels import mix_banded

    mix_banded(laws.start, laws.indptr, laws.data, kept, weights, lo, out)
    return lo, out


def theta_ladder(largest_loss: int, top_loss: int, *, step: float = 2.0**0.5) -> FloatArray:
    """Positive ``theta`` values for the Chernoff bounds.

    From ``600 / largest_loss`` (so ``exp(theta k)`` stays finite) down by
    factors ``step`` to about ``1 / (4 top_loss)`` (a spread as wide as the
    whole grid needs no smaller value).  Between two rungs the bound's
    window is at most about 1.5% wider than at the best ``theta``.
    """
    top = 600.0 / max(largest_loss, 1)
    smallest = min(0.25 / max(top_loss, 1), top)
    count = int(np.floor(np.log(top / smallest) / np.log(step))) + 1
    return np.asarray(top / step ** np.arange(count)[::-1], dtype=float)


def log_mgf_bounds(p: FloatArray, k: IntArray, count: FloatArray, theta: FloatArray) -> FloatArray:
    """Upper bounds of ``log E exp(theta L)`` for independent classes, per node.

    Parameters
    ----------
    p : ndarray, shape (nodes, classes)
        Default probability of each class at each node.
    k, count : ndarray, shape (classes,)
        Grid loss and obligors of each class.
    theta : ndarray, shape (m,)
        Any real values (``|theta| k <= 700``).

    Returns
    -------
    ndarray, shape (nodes, m)
        ``sum_c count_c b(p_c, theta k_c)`` with ``b(p, x) = p (e^x - 1)``
        for ``p <= 1/2`` and ``x + (1 - p) (e^{-x} - 1)`` above, each an
        upper bound of ``log(1 - p + p e^x)`` (``log(1 + u) <= u``).
    """
    distinct, key = np.unique(k, return_inverse=True)
    key = key.ravel()
    flip = p > 0.5
    low = np.where(flip, 0.0, p) * count[None, :]
    high = np.where(flip, 1.0 - p, 0.0) * count[None, :]
    onehot = sparse.csr_matrix(
        (np.ones(k.size), (key, np.arange(k.size))), shape=(distinct.size, k.size)
    )
    low = np.asarray((onehot @ low.T).T)
    high = np.asarray((onehot @ high.T).T)
    x = distinct[:, None].astype(float) * theta[None, :]
    flipped_loss = (np.where(flip, 1.0, 0.0) * (count * k)[None, :]).sum(axis=1)
    return np.asarray(
        low @ np.expm1(x) + high @ np.expm1(-x) + flipped_loss[:, None] * theta[None, :],
        dtype=float,
    )


def chernoff_window(log_mgf: FloatArray, theta: FloatArray, tail: float) -> tuple[float, float]:
    """Return ends ``(lo, hi)`` with ``P(S < lo), P(S > hi) <= tail`` from log-MGF bounds.

    Parameters
    ----------
    log_mgf : ndarray, shape (2 m,)
        Upper bounds of ``log E e^{theta S}`` at ``theta`` (``m`` negative
        values, then ``m`` positive ones).
    theta : ndarray, shape (2 m,)
    tail : float
    """
    lo, hi = chernoff_windows(log_mgf[None, :], theta, tail)
    return float(lo[0]), float(hi[0])


def chernoff_windows(
    log_mgf: FloatArray, theta: FloatArray, tail: float
) -> tuple[FloatArray, FloatArray]:
    """:func:`chernoff_window` for many rows of bounds at once (rows x thetas)."""
    t = (np.log(1.0 / tail) + log_mgf) / theta[None, :]
    neg = theta < 0
    return t[:, neg].max(axis=1), t[:, ~neg].min(axis=1)


def mixture_log_mgf(weights: FloatArray, node_log_mgf: FloatArray) -> FloatArray:
    """``log sum_k W[g, k] exp(node_log_mgf[k])`` per global node ``g`` and theta.

    Parameters
    ----------
    weights : ndarray, shape (global nodes, sector nodes)
        Mixing weights (zero for dropped ones).
    node_log_mgf : ndarray, shape (sector nodes, thetas)

    Returns
    -------
    ndarray, shape (global nodes, thetas)
        Summed with each entry shifted by its largest term (no overflow,
        no underflow of the leading term).
    """
    from debtsim.engines.exact.mixing_kernels import log_mix

    used = np.flatnonzero((weights > 0).any(axis=0))
    out = np.empty((weights.shape[0], node_log_mgf.shape[1]))
    log_mix(
        np.ascontiguousarray(weights[:, used]), np.ascontiguousarray(node_log_mgf[used]), out
    )
    return out


def _fold(piece: FloatArray, width: int) -> FloatArray:
    """``piece`` folded modulo ``width`` (unchanged when it already fits)."""
    if piece.size <= width:
        return piece
    pad = (-piece.size) % width
    return np.asarray(np.pad(piece, (0, pad)).reshape(-1, width).sum(axis=0), dtype=float)


def add_global_laws(
    mixture: FloatArray,
    sectors: list[tuple[SectorNodeLaws, FloatArray, FloatArray]],
    dense: list[FloatArray],
    g_weights: FloatArray,
    thetas: FloatArray,
) -> int:
    """Add ``sum_g g_weights[g] P(. | g)`` into ``mixture``; return the widest window.

    Parameters
    ----------
    mixture : ndarray
        Accumulator on the grid ``0 .. mixture.size - 1``.
    sectors : list of (SectorNodeLaws, weights, log_mgf)
        Blocks mixed from shared-grid node laws: the laws, the mixing
        weights (global nodes x sector nodes) and the bounds of the mixed
        law's log-MGF at ``thetas`` (global nodes x thetas).
    dense : list of ndarray, shape (global nodes, block range)
        Other blocks, their law at each global node from grid point 0.
    g_weights : ndarray, shape (global nodes,)
        Weights of the global nodes (times the mixing node's weight).
    thetas : ndarray
        The Chernoff ladder (negative values, then positive ones).
    """
    n_g = g_weights.size
    lo_parts = np.zeros((n_g, len(sectors) + len(dense)), dtype=np.int64)
    hi_parts = np.zeros_like(lo_parts)
    for i, (laws, weights, _) in enumerate(sectors):
        kept = weights > 0
        lengths = np.diff(laws.indptr)
        big = np.iinfo(np.int64).max
        lo_parts[:, i] = np.where(kept, laws.start[None, :], big).min(axis=1)
        hi_parts[:, i] = np.where(kept, (laws.start + lengths - 1)[None, :], -1).max(axis=1)
    for i, law in enumerate(dense, start=len(sectors)):
        live = law != 0
        lo_parts[:, i] = np.argmax(live, axis=1)
        hi_parts[:, i] = law.shape[1] - 1 - np.argmax(live[:, ::-1], axis=1)
    lo = lo_parts.sum(axis=1)
    hi = hi_parts.sum(axis=1)
    if sectors:
        total = np.sum([mgf for _, _, mgf in sectors], axis=0)
        spread_lo = lo_parts[:, len(sectors) :].sum(axis=1)
        spread_hi = hi_parts[:, len(sectors) :].sum(axis=1)
        c_lo, c_hi = chernoff_windows(total, thetas, WINDOW_TAIL)
        lo = np.maximum(lo, np.floor(c_lo).astype(np.int64) + spread_lo)
        hi = np.minimum(hi, np.ceil(c_hi).astype(np.int64) + spread_hi)
    widest = 0
    for g in range(n_g):
        width = sfft.next_fast_len(int(hi[g] - lo[g]) + 1, real=True)
        widest = max(widest, width)
        spectrum: NDArray[np.complex128] | None = None
        for laws, weights, _ in sectors:
            _, piece = mix_rows(laws, weights[g])
            term = sfft.rfft(_fold(piece, width), width)
            spectrum = term if spectrum is None else spectrum * term
        for i, dense_law in enumerate(dense, start=len(sectors)):
            piece = dense_law[g, lo_parts[g, i] : hi_parts[g, i] + 1]
            term = sfft.rfft(_fold(piece, width), width)
            spectrum = term if spectrum is None else spectrum * term
        assert spectrum is not None
        law = sfft.irfft(spectrum, width)
        base = int(lo_parts[g].sum())  # the sum lies at base + t (mod width)
        law = np.roll(law, -((int(lo[g]) - base) % width))[: int(hi[g] - lo[g]) + 1]
        end = min(int(lo[g]) + law.size, mixture.size)
        law = law[: end - int(lo[g])]
        np.clip(law, 0.0, None, out=law)
        law[law < _NOISE_FLOOR * law.max()] = 0.0
        mixture[int(lo[g]) : end] += g_weights[g] * law
    return widest
