"""Conditional loss laws given the factor: the numerical kernels of the exact engine.

Two representations are used.

*Grid.*  Every loss is an integer number ``k`` of grid units.  Given the
factor, the obligors outside linked groups are independent Bernoulli losses,
so the probability generating function of their total is
``G(x) = prod_i (1 - p_i + p_i x^k_i)``.  It is evaluated on the ``W``-th
roots of unity (so the law comes out modulo ``W``, i.e. on a window of ``W``
grid points placed around the conditional mean) through its logarithm::

    log(1 - p + p x^k) = log(1 - p) + sum_r (-1)^(r+1) theta^r x^(r k) / r,
    theta = p / (1 - p)                                     (p <= 1/2)
    log(1 - p + p x^k) = log(p) + k log x + sum_r (-1)^(r+1) theta^r x^(-r k) / r,
    theta = (1 - p) / p                                     (p > 1/2)

The series coefficients of all obligors are summed into one array of length
``W`` (one ``bincount``), so a node costs ``sum_i R_i`` scattered terms plus
one real FFT pair, however wide the window; ``R_i`` is the number of terms
obligor *i* needs for the requested accuracy (about 10 for a 1% PD).
Obligors too close to ``p = 1/2`` for the series to converge quickly are
summed exactly instead (binomial-type laws per distinct loss, see
:func:`bernoulli_sums`); linked groups enter as their exact joint loss laws.
Both are convolved together (:func:`product_law`), folded onto the window
and multiplied in on the same roots of unity.  This is the recursion-free
form of the one-factor loss algorithm of Andersen, Sidenius & Basu (Risk,
2003).

*Atoms.*  For small books the support is kept exactly: a sorted array of
distinct loss values, built once (it does not depend on the factor), with
one probability row per factor node.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from numpy.typing import NDArray
from scipy.signal import fftconvolve

from debtsim._typing import FloatArray

__all__ = [
    "AtomConvolution",
    "HARD_ORDER",
    "SERIES_TOLERANCE",
    "WINDOW_TAIL",
    "Window",
    "bernoulli_sums",
    "bernstein_halfwidth",
    "grid_law",
    "product_law",
    "place_window",
]

IntArray = NDArray[np.int64]

#: Bound on the summed truncation error of the log-PGF series, per node.
SERIES_TOLERANCE = 1e-14
#: Probability allowed outside a node's window on each side (Bernstein bound).
WINDOW_TAIL = 1e-16
#: Classes needing more series terms than this are summed exactly instead.
HARD_ORDER = 512
#: Series orders are rounded up to these values so obligors batch together.
_ORDER_BUCKETS = np.unique(np.round(np.sqrt(2.0) ** np.arange(0, 64)).astype(np.int64))


def bernstein_halfwidth(variance: float, bound: float, tail: float = WINDOW_TAIL) -> float:
    """Distance from the mean beyond which each tail holds at most ``tail``.

    Bernstein's inequality for a sum of independent variables each within
    ``bound`` of its mean: ``P(S - ES >= t) <= exp(-t^2 / (2 (v + bound t / 3)))``.

    Parameters
    ----------
    variance : float
        Variance of the sum.
    bound : float
        Largest deviation of one summand from its mean.
    tail : float
        Allowed probability in each tail.

    Returns
    -------
    float
        The ``t`` solving the bound with equality.

    """
    log_term = np.log(1.0 / tail)
    a = bound * log_term / 3.0
    return float(a + np.sqrt(a * a + 2.0 * log_term * max(variance, 0.0)))


@dataclass(frozen=True)
class Window:
    """Grid points ``start .. start + width - 1`` on which a node's law is computed."""

    start: int
    width: int


def place_window(
    mean: float, halfwidth: float, lowest: int, highest: int, top: int
) -> Window:
    """Choose the FFT window of one node.

    Parameters
    ----------
    mean, halfwidth : float
        Conditional mean loss (grid units) and the Bernstein half-width.
    lowest, highest : int
        Smallest and largest loss the node can produce (grid units).
    top : int
        Largest grid point of the whole law (the array holds ``0 .. top``).

    Returns
    -------
    Window
        A window of a fast FFT length covering ``[mean - halfwidth, mean +
        halfwidth]`` intersected with ``[lowest, highest]``, inside ``[0, top]``.

    """
    lo = max(lowest, int(np.floor(mean - halfwidth)))
    hi = min(highest, int(np.ceil(mean + halfwidth)))
    lo = min(lo, hi)
    span = hi - lo + 1
    width = sfft.next_fast_len(span, real=True)
    if width >= top + 1 or span > 0.8 * (top + 1):
        return Window(0, top + 1)
    start = min(lo, top + 1 - width)
    return Window(max(start, 0), width)


def _log_coefficients(
    k: IntArray,
    p: FloatArray,
    count: FloatArray,
    width: int,
    tolerance: float,
    max_order: int,
) -> tuple[FloatArray | None, float, int, IntArray, float]:
    """Log-PGF of independent classes ``(1 - p + p x^k)^count`` modulo ``x^width - 1``.

    Returns
    -------
    coefficients : ndarray, shape (width,), or None
        Series coefficients of the log-PGF, folded modulo ``width`` (None
        when there are no series terms).
    const : float
        Constant term: ``count * log(1 - p)``, or ``count * log p`` for
        flipped classes (``p > 1/2``).
    shift : int
        ``x`` power factored out: ``count * k`` over flipped and certain classes.
    direct : ndarray of int
        Classes too close to ``p = 1/2`` for the series (handled directly).
    truncation : float
        Bound on the dropped part of the series.

    """
    live = (p > 0.0) & (k > 0)
    certain = live & (p >= 1.0)
    shift = int(np.sum(k[certain] * count[certain].astype(np.int64)))
    idx = np.flatnonzero(live & ~certain)
    if idx.size == 0:
        return None, 0.0, shift, np.zeros(0, dtype=np.int64), 0.0
    kk = k[idx]
    pp = p[idx]
    cc = count[idx]
    flip = pp > 0.5
    with np.errstate(over="ignore"):  # the branch not taken overflows for denormal p
        theta = np.where(flip, (1.0 - pp) / pp, pp / (1.0 - pp))
    # order R with theta^(R+1) / ((R+1)(1-theta)) <= tolerance / total count
    each = tolerance / float(cc.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        need = np.ceil(np.log(each * (1.0 - theta)) / np.log(theta)) - 1.0
    need = np.where(theta <= 0.0, 0.0, np.where(theta >= 1.0, np.inf, np.maximum(need, 1.0)))
    far = need > max_order
    series = ~far
    const = float(
        np.sum(cc[series & ~flip] * np.log1p(-pp[series & ~flip]))
        + np.sum(cc[series & flip] * np.log(pp[series & flip]))
    )
    shift += int(np.sum(kk[series & flip] * cc[series & flip].astype(np.int64)))
    signed_k = np.where(flip, -kk, kk)
    bucket = np.searchsorted(_ORDER_BUCKETS, np.where(series, need, 0.0))
    bucket[~series | (need <= 0)] = -1
    coefficients = np.zeros(width)
    truncation = 0.0
    for b in np.flatnonzero(np.bincount(bucket + 1, minlength=_ORDER_BUCKETS.size + 1)[1:]):
        order = int(_ORDER_BUCKETS[b])
        sel = np.flatnonzero(bucket == b)
        th = theta[sel]
        if sel.size >= order:  # many short rows: build column by column
            powers = np.empty((sel.size, order))
            powers[:, 0] = th
            for r in range(1, order):
                np.multiply(powers[:, r - 1], th, out=powers[:, r])
        else:  # few long rows
            powers = np.cumprod(np.broadcast_to(th[:, None], (sel.size, order)), axis=1)
        r_all = np.arange(1, order + 1)
        weight = np.where(r_all % 2 == 1, 1.0, -1.0) / r_all
        coef = powers * weight[None, :]
        if not np.all(cc[sel] == 1.0):
            coef *= cc[sel, None]
        pos = np.mod(signed_k[sel, None] * r_all[None, :], width)
        coefficients += np.bincount(pos.ravel(), weights=coef.ravel(), minlength=width)
        truncation += float(np.sum(cc[sel] * th * powers[:, -1] / ((order + 1) * (1.0 - th))))
    return coefficients, const, shift, idx[far], truncation


def bernoulli_sums(
    k: IntArray, p: FloatArray, count: FloatArray
) -> list[tuple[int, FloatArray]]:
    """Exact laws of sums of independent Bernoulli losses, one per distinct loss.

    For the classes sharing a grid loss ``k`` the number of defaults has a
    (Poisson-)binomial law on ``0 .. m``; it is obtained exactly from its
    characteristic function at the ``m + 1`` roots of unity, then spread on
    the multiples of ``k``.  Used for obligors whose ``p`` is too close to
    1/2 for the log-series to converge quickly.

    Parameters
    ----------
    k : ndarray of int
        Grid loss of each class.
    p : ndarray
        Default probability of the class.
    count : ndarray
        Number of identical obligors in the class.

    Returns
    -------
    list of (offset, probabilities)
        One law per distinct ``k``: value ``offset + t`` with probability
        ``probabilities[t]`` (offset is 0).

    """
    out: list[tuple[int, FloatArray]] = []
    for kk in np.unique(k).tolist():
        sel = k == kk
        pp = p[sel]
        cc = count[sel]
        m = int(round(float(cc.sum())))
        t = np.arange(m + 1)
        root = np.exp((-2j * np.pi / (m + 1)) * t)
        factors = 1.0 - pp[:, None] + pp[:, None] * root[None, :]
        single = cc == 1.0
        values = np.prod(factors[single], axis=0) if single.any() else np.ones(m + 1, complex)
        for row in np.flatnonzero(~single).tolist():
            values *= factors[row] ** cc[row]
        pmf = np.fft.ifft(values).real
        dense = np.zeros(m * kk + 1)
        dense[::kk] = pmf
        out.append((0, dense))
    return out


def product_law(laws: list[tuple[int, FloatArray]]) -> tuple[int, FloatArray]:
    """Law of a sum of independent grid variables, for a batch of nodes.

    Parameters
    ----------
    laws : list of (offset, probabilities)
        Each variable takes the value ``offset + t`` with probability
        ``probabilities[:, t]`` (one row per node).

    Returns
    -------
    offset : int
    probabilities : ndarray, shape (nodes, length)
        Law of the sum: the two shortest factors are convolved first (FFT for
        long ones), so the cost is about ``total length * log^2``.

    """
    heap = [(law.shape[1], i, off, law) for i, (off, law) in enumerate(laws)]
    heapq.heapify(heap)
    counter = len(heap)
    while len(heap) > 1:
        n1, _, off1, a = heapq.heappop(heap)
        n2, _, off2, b = heapq.heappop(heap)
        if min(n1, n2) <= 16:
            short, long_ = (a, b) if n1 <= n2 else (b, a)
            out = np.zeros((a.shape[0], n1 + n2 - 1))
            for t in range(short.shape[1]):
                out[:, t : t + long_.shape[1]] += short[:, t : t + 1] * long_
        else:
            out = fftconvolve(a, b, axes=1)
        heapq.heappush(heap, (out.shape[1], counter, off1 + off2, out))
        counter += 1
    _, _, offset, law = heap[0]
    return offset, law


def grid_law(
    k: IntArray,
    p: FloatArray,
    window: Window,
    *,
    count: FloatArray | None = None,
    extra: tuple[int, FloatArray] | None = None,
    tolerance: float = SERIES_TOLERANCE,
) -> tuple[FloatArray, float]:
    """Conditional loss law on one window of the grid.

    Parameters
    ----------
    k : ndarray of int, shape (n,)
        Grid loss of each class of independent obligors (0 for no loss).
    p : ndarray, shape (n,)
        Conditional default probability of the class, in [0, 1].
    window : Window
        Where the law is wanted; must hold all but a negligible part of it
        (the rest folds in modulo ``window.width``).
    count : ndarray, shape (n,), optional
        Number of identical obligors in each class (default 1).
    extra : (offset, probabilities), optional
        Law of an independent addend (the linked groups): value ``offset + t``
        with probability ``probabilities[t]``.
    tolerance : float
        Bound on the series truncation error of the log-PGF.

    Returns
    -------
    law : ndarray, shape (window.width,)
        ``P(L = window.start + t)``; tiny negative rounding noise is kept.
    truncation : float
        Bound on the dropped series terms (absolute error of ``log G``).

    """
    width = window.width
    count = np.ones(k.size) if count is None else np.asarray(count, dtype=float)
    coefficients, const, shift, direct, truncation = _log_coefficients(
        k, p, count, width, tolerance, HARD_ORDER
    )
    if coefficients is not None:
        spectrum = np.exp(sfft.rfft(coefficients) + const)
    else:
        spectrum = np.full(width // 2 + 1, np.exp(const), dtype=complex)
    laws = bernoulli_sums(k[direct], p[direct], count[direct]) if direct.size else []
    if extra is not None:
        laws.append(extra)
    if laws:
        offset, dense = product_law([(off, law[None, :]) for off, law in laws])
        folded = np.bincount(
            np.mod(offset + np.arange(dense.shape[1]), width), weights=dense[0], minlength=width
        )
        spectrum *= sfft.rfft(folded)
    law = sfft.irfft(spectrum, width)
    law = np.roll(law, -((window.start - shift) % width))
    return law, truncation


class AtomConvolution:
    """Exact loss support shared by every factor node, built item by item.

    The support (distinct loss values) does not depend on the factor, so it
    is built once; :meth:`apply` then turns per-node item laws into per-node
    probabilities on that support.

    Parameters
    ----------
    decimals : int
        Losses equal after rounding to ``decimals`` significant places
        relative to the largest possible loss are merged.
    scale : float
        The largest possible loss (sets the merge tolerance).

    """

    def __init__(self, *, scale: float, decimals: int = 12) -> None:
        self._quantum = max(scale, 1e-300) * 10.0 ** (-decimals)
        self.support: FloatArray = np.zeros(1)
        self._steps: list[tuple[IntArray, int, bool]] = []

    def add(self, atoms: FloatArray) -> None:
        """Convolve the support with an item taking the loss values ``atoms``."""
        atoms = np.asarray(atoms, dtype=float)
        sums = (self.support[:, None] + atoms[None, :]).ravel()
        keys = np.round(sums / self._quantum).astype(np.int64)
        uniq, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
        self.support = sums[first]
        inverse = inverse.reshape(-1, atoms.size)
        # two old values may round onto one new value; then the scatter must accumulate
        clash = any(np.unique(inverse[:, a]).size < inverse.shape[0] for a in range(atoms.size))
        self._steps.append((inverse, uniq.size, clash))

    @property
    def size(self) -> int:
        """Current number of distinct loss values."""
        return int(self.support.size)

    def apply(self, item_laws: list[FloatArray]) -> FloatArray:
        """Per-node probabilities on the support.

        Parameters
        ----------
        item_laws : list of ndarray, shape (nodes, atoms_i)
            Each item's law per node, in the order the items were added.

        Returns
        -------
        ndarray, shape (nodes, support size)

        """
        nodes = item_laws[0].shape[0] if item_laws else 1
        probs = np.ones((nodes, 1))
        for (inverse, size, clash), law in zip(self._steps, item_laws, strict=True):
            new = np.zeros((nodes, size))
            for a in range(inverse.shape[1]):
                if clash:
                    np.add.at(new.T, inverse[:, a], (probs * law[:, a : a + 1]).T)
                else:
                    new[:, inverse[:, a]] += probs * law[:, a : a + 1]
            probs = new
        return probs
