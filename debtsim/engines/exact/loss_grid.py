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

The work is prepared once per run (:class:`SeriesKernel`); at each node one
compiled pass over the classes (:mod:`debtsim.engines.exact.node_kernels`)
adds every class's terms ``(-1)^(r+1) count theta^r / r`` straight into the
window's coefficient array at ``+-r k`` modulo ``W`` (the position advances
by a fixed step), so a node costs ``sum_i R_i`` multiply-adds plus one real
FFT pair, however wide the window, and no array of the book's size beyond
the probabilities.  ``R_i``, the number of terms obligor *i* needs, is the
first ``R >= 1`` with ``theta^(R+1) / ((R+1)(1 - theta)) <= tolerance / n``
(a bound on the dropped tail ``sum_{r>R} theta^r / r``; about 10 terms for
a 1% PD), so the dropped part of ``log G`` is at most ``tolerance`` at every
frequency.  Obligors within about 0.1%
of ``p = 1/2``, where the series converges slowly, are multiplied in exactly
as ``1 - p + p w^k`` at the window's frequencies ``w``; linked groups enter as
their exact joint loss laws, convolved together (:func:`product_law`),
folded onto the window and multiplied in on the same roots of unity.  This
is the recursion-free form of the one-factor loss algorithm of Andersen,
Sidenius & Basu (Risk, 2003).

*Atoms.*  For small books the support is kept exactly: a sorted array of
distinct loss values, built once (it does not depend on the factor), with
one probability row per factor node.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from types import ModuleType

import numpy as np
import scipy.fft as sfft
from scipy.signal import fftconvolve

from debtsim._typing import FloatArray, IntArray

__all__ = [
    "AtomConvolution",
    "HARD_ORDER",
    "NodeState",
    "SERIES_TOLERANCE",
    "SeriesKernel",
    "WINDOW_TAIL",
    "Window",
    "bernstein_halfwidth",
    "compiled",
    "grid_law",
    "product_law",
    "place_window",
]


#: Bound on the summed truncation error of the log-PGF series, per node.
SERIES_TOLERANCE = 1e-14
#: Probability allowed outside a node's window on each side (Bernstein bound).
WINDOW_TAIL = 1e-16
#: Classes needing more series terms than this are multiplied in exactly instead.
HARD_ORDER = 8192


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


@dataclass(frozen=True)
class NodeState:
    """One node's default probabilities of the kernel's classes, with their moments.

    ``mean`` and ``var`` are the conditional mean and variance of the loss in
    grid units; ``bound`` the largest loss of a class that is neither certain
    nor impossible; ``lowest`` and ``highest`` the smallest and largest
    possible loss.
    """

    p: FloatArray
    mean: float
    var: float
    bound: float
    lowest: int
    highest: int

    @property
    def one_minus(self) -> FloatArray:
        """Survival probability ``1 - p`` of each class."""
        return 1.0 - self.p


def compiled() -> ModuleType:
    """Return the compiled per-node kernels (:mod:`debtsim.engines.exact.node_kernels`).

    Imported on first use: numba's import and the kernels' compilation (or
    loading from the on-disk cache) are paid only by runs that need them.
    """
    from debtsim.engines.exact import node_kernels

    return node_kernels


class SeriesKernel:
    """Conditional loss laws of independent loss classes, prepared once per run.

    Class ``c`` holds ``count[c]`` obligors, each losing ``k[c]`` grid units
    on default with the node's probability ``p[c]``.  At a node the log-PGF
    is summed as in the module notes by a compiled loop over the classes
    (:func:`debtsim.engines.exact.node_kernels.series_terms`): with ``q =
    min(p, 1 - p)`` and ``theta = q / (1 - q)``, each class adds its terms
    ``(-1)^(r+1) count theta^r / r`` straight into the window's coefficient
    array at ``+-r k`` modulo the width.  A class needing more than
    ``hard_order`` terms (``p`` within about 0.1% of 1/2) is multiplied in
    exactly: ``(1 - p + p w^k)^count`` on the window's frequencies ``w``.

    Truncation: class ``c`` stops after the first ``R_c >= 1`` terms with
    ``theta^(R+1) / ((R+1) (1 - theta)) <= tolerance / sum(count)``, a bound
    on the dropped tail ``sum_{r > R} theta^r / r`` of each obligor, so the
    dropped part of ``log G`` is at most ``tolerance`` at every frequency.

    Parameters
    ----------
    k : ndarray of int, shape (n,)
        Grid loss of each class (classes with ``k = 0`` are ignored).
    count : ndarray, shape (n,), optional
        Identical obligors per class (default 1).
    tolerance : float
        Bound on the truncation error of ``log G``.
    hard_order : int
        Classes needing more terms are handled exactly.

    """

    def __init__(
        self,
        k: IntArray,
        count: FloatArray | None = None,
        *,
        tolerance: float = SERIES_TOLERANCE,
        hard_order: int = HARD_ORDER,
    ) -> None:
        k = np.asarray(k, dtype=np.int64)
        count = np.ones(k.size) if count is None else np.asarray(count, dtype=float)
        keep = k > 0
        self._keep: IntArray | None = None if keep.all() else np.flatnonzero(keep)
        self.k = np.ascontiguousarray(k[keep])
        self.count = np.ascontiguousarray(count[keep])
        self.kc = self.k * self.count
        self.k2c = self.k.astype(float) ** 2 * self.count
        self.total = int(np.sum(self.k * np.round(self.count).astype(np.int64)))
        self.kmax = int(self.k.max()) if self.k.size else 0
        self.tolerance = float(tolerance)
        self._total_count = max(float(self.count.sum()), 1.0)
        self.hard_order = int(hard_order)
        self._reciprocal = 1.0 / np.maximum(np.arange(self.hard_order + 2, dtype=np.float64), 1.0)

    @property
    def size(self) -> int:
        """Number of loss-bearing classes."""
        return int(self.k.size)

    def node(self, p: FloatArray) -> NodeState:
        """Moments of the loss at one node, given the classes' default probabilities."""
        p = np.asarray(p, dtype=np.float64)
        if self._keep is not None:
            p = p[self._keep]
        p = np.ascontiguousarray(p)
        if p.size == 0:
            return NodeState(p, 0.0, 0.0, 0.0, 0, 0)
        mean, var, bound, lowest, highest, interior = compiled().node_moments(
            p, self.k, self.kc, self.k2c
        )
        if interior:
            return NodeState(p, mean, var, float(self.kmax), 0, self.total)
        return NodeState(p, mean, var, bound, int(lowest), int(highest))

    def law(
        self,
        state: NodeState,
        window: Window,
        extra: tuple[int, FloatArray] | None = None,
        tolerance: float | None = None,
    ) -> tuple[FloatArray, float]:
        """Conditional loss law on ``window`` (see :func:`grid_law`).

        ``tolerance`` overrides the kernel's bound on the truncation error of
        ``log G`` for this node (the engine loosens it for nodes of tiny
        weight, keeping the weighted sum over nodes within the kernel's bound).
        """
        tol = self.tolerance if tolerance is None else float(tolerance)
        width = window.width
        p = state.p
        coefficients = np.zeros(width)
        const = 0.0
        shift = 0
        truncation = 0.0
        n_hard = 0
        hard = np.empty(0, dtype=np.int64)
        kernels = compiled() if p.size else None
        if kernels is not None:
            hard = np.empty(p.size, dtype=np.int64)
            const, shifted, n_hard = kernels.series_terms(
                p,
                self.k,
                self.count,
                tol / self._total_count,
                self.hard_order,
                self._reciprocal,
                coefficients,
                hard,
            )
            shift = int(round(shifted))
            truncation = tol
        if coefficients.any():
            spectrum = np.exp(sfft.rfft(coefficients) + const)
        else:
            spectrum = np.full(width // 2 + 1, np.exp(const), dtype=complex)
        if kernels is not None and n_hard:
            pick = hard[:n_hard]
            roots = np.exp((-2j * np.pi / width) * np.arange(width))
            kernels.hard_spectrum(p[pick], self.k[pick], self.count[pick], roots, spectrum)
        if extra is not None:
            offset, dense = extra
            folded = np.bincount(
                np.mod(offset + np.arange(dense.size), width), weights=dense, minlength=width
            )
            spectrum *= sfft.rfft(folded)
        law = sfft.irfft(spectrum, width)
        law = np.roll(law, -((window.start - shift) % width))
        return law, truncation


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
    kernel = SeriesKernel(k, count, tolerance=tolerance)
    return kernel.law(kernel.node(p), window, extra)


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
