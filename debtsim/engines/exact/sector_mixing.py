r"""Sector laws on a shared sector-factor grid, mixed and convolved per global node.

Given its sector factor ``Y_s = y`` the obligors of a sector (outside link
groups) are independent, so the sector's conditional loss law depends on
``y`` alone.  :class:`SectorNodeLaws` builds one
:class:`~debtsim.engines.exact.loss_grid.SeriesKernel` per sector per run
(classes and grid losses do not depend on any factor) and computes the law
at each node ``y_k`` of the sector's shared grid on its own narrow window
(a Bernstein window, as the one-factor engine does given ``z``).  The laws
are kept as compact rows ``(start, probabilities)``.

For a global node ``g`` the sector's law is the mixture
``P_s(. | g) = sum_k W[g, k] P_s(. | y_k)`` with the Gaussian weights of
``y`` given ``g`` (:func:`mix_rows`); weights below :data:`WEIGHT_CUT` are
dropped and their mass is reported.  The mixed law's far tails (mass below
``tail`` on each side) are trimmed; conditional on ``g`` the sectors are
independent, so the total law is the convolution of the trimmed sector
laws (:func:`convolve_pieces`), computed on a cyclic window of ``M``
points: the summed ranges of the sector laws, cut to a Chernoff window
when that is shorter.

Chernoff window.  For any ``theta``, ``P(S >= t) <= exp(-theta t) E e^{theta S}``
(``theta > 0``; the mirror image for the lower tail).  Given ``g`` the
sector losses are independent mixtures, so ``log E e^{theta S} = sum_s log
sum_k W[g, k] M_{s,k}(theta)``, and ``M_{s,k}`` is bounded in closed form
from the classes (:func:`log_mgf_bounds`: ``log(1 - p + p e^x) <= p (e^x -
1)``, or ``x + (1 - p) (e^{-x} - 1)`` for ``p > 1/2``).  On a ladder of
``theta`` values the smallest ``t`` with bound ``<= tail`` gives the
window's ends (:func:`chernoff_window`), so the mass folded by the cyclic
convolution is at most ``tail`` on each side.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from numpy.typing import NDArray
from scipy import sparse

from debtsim._typing import FloatArray, IntArray
from debtsim.engines.exact.loss_grid import SeriesKernel, bernstein_halfwidth, place_window

__all__ = [
    "WEIGHT_CUT",
    "SectorNodeLaws",
    "chernoff_window",
    "convolve_pieces",
    "log_mgf_bounds",
    "mix_rows",
    "mixture_log_mgf",
    "theta_ladder",
    "trim_tails",
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
    ) -> SectorNodeLaws:
        """Laws at the nodes ``needed`` (boolean per row of ``p``).

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
        for j in np.flatnonzero(needed).tolist():
            state = kernel.node(p[j])
            half = bernstein_halfwidth(state.var, state.bound)
            window = place_window(state.mean, half, state.lowest, state.highest, top)
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


def trim_tails(offset: int, law: FloatArray, tail: float) -> tuple[int, FloatArray]:
    """Drop each end of ``law`` while the dropped mass stays at most ``tail``."""
    cum = np.cumsum(law)
    total = cum[-1]
    a = int(np.searchsorted(cum, tail, side="right"))
    b = int(np.searchsorted(cum, total - tail, side="left")) + 1
    a = min(a, law.size - 1)
    b = max(min(b, law.size), a + 1)
    return offset + a, law[a:b]


def convolve_pieces(
    pieces: list[tuple[int, FloatArray]], window: tuple[int, int] | None = None
) -> tuple[int, FloatArray]:
    """Law of the sum of independent grid variables given as ``(offset, law)``.

    Parameters
    ----------
    pieces : list of (offset, law)
    window : (lo, hi), optional
        Grid points outside which the sum has negligible mass; the law is
        computed on ``lo .. hi`` (mass outside folds in modulo the FFT
        length).  By default the whole range of the sum (nothing folds).

    Returns
    -------
    offset : int
    law : ndarray
    """
    lo_all = sum(off for off, _ in pieces)
    hi_all = lo_all + sum(p.size for _, p in pieces) - len(pieces)
    lo, hi = lo_all, hi_all
    if window is not None:
        lo, hi = max(window[0], lo_all), min(window[1], hi_all)
    if len(pieces) == 1:
        off, law = pieces[0]
        return lo, law[lo - off : hi + 1 - off]
    length = hi - lo + 1
    width = sfft.next_fast_len(length, real=True)
    spectrum: NDArray[np.complex128] | None = None
    for _, p in pieces:
        folded = (
            p
            if p.size <= width
            else np.bincount(np.arange(p.size) % width, weights=p, minlength=width)
        )
        term = sfft.rfft(folded, width)
        spectrum = term if spectrum is None else spectrum * term
    assert spectrum is not None
    law = sfft.irfft(spectrum, width)
    # the sum lies at lo_all + t (mod width); read it from lo
    law = np.roll(law, -((lo - lo_all) % width))[:length]
    return lo, law


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
    t = (np.log(1.0 / tail) + log_mgf) / theta
    neg = theta < 0
    return float(np.max(t[neg])), float(np.min(t[~neg]))


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
    out = np.empty((weights.shape[0], node_log_mgf.shape[1]))
    step = max(1, (1 << 21) // max(node_log_mgf.size, 1))
    for a in range(0, weights.shape[0], step):
        w = weights[a : a + step, :, None]
        terms = np.where(w > 0, node_log_mgf[None, :, :], -np.inf)
        top = terms.max(axis=1)
        total = np.sum(w * np.exp(terms - top[:, None, :]), axis=1)
        out[a : a + step] = top + np.log(total)
    return out
