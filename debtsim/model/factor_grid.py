"""Discretisations of the systemic factor ``Z ~ N(0, 1)``."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from numpy.polynomial.legendre import leggauss
from numpy.typing import NDArray

__all__ = ["FactorGrid", "adaptive_grid", "gauss_hermite"]


@dataclass(frozen=True, eq=False)
class FactorGrid:
    """Factor nodes and probability weights summing to one.

    Attributes
    ----------
    nodes : ndarray, shape (m,)
        Factor values, ascending.
    weights : ndarray, shape (m,)
        Probability of each node; sums to 1.
    method : str
        How the grid was made, for reports.
    """

    nodes: NDArray[np.float64]
    weights: NDArray[np.float64]
    method: str

    def __len__(self) -> int:
        return int(self.nodes.shape[0])


def gauss_hermite(count: int) -> FactorGrid:
    """Gauss–Hermite nodes for the standard normal factor.

    Parameters
    ----------
    count : int
        Number of nodes, >= 1.

    Returns
    -------
    FactorGrid
        Probabilists' Gauss–Hermite nodes (weight ``exp(-z^2/2)``) with weights
        normalised to sum to 1; exact for polynomials of degree ``2 count - 1``.

    Notes
    -----
    Uses :func:`numpy.polynomial.hermite_e.hermegauss`.
    """
    if count < 1:
        raise ValueError(f"count must be >= 1, got {count}")
    nodes, weights = hermegauss(count)
    weights = weights / weights.sum()
    order = np.argsort(nodes)
    return FactorGrid(nodes=nodes[order], weights=weights[order], method=f"gauss-hermite-{count}")


def adaptive_grid(
    density: Callable[[NDArray[np.float64]], NDArray[np.float64]],
    *,
    lower: float = -8.5,
    upper: float = 8.5,
    order: int = 8,
    probe: int = 801,
    max_nodes: int = 20_000,
) -> FactorGrid:
    """Composite Gauss–Legendre rule for ``Z ~ N(0, 1)``, dense where asked.

    The interval ``[lower, upper]`` is cut into panels so that each panel
    holds about ``order`` nodes' worth of ``density`` (nodes per unit of
    ``z``); each panel carries an ``order``-point Gauss–Legendre rule and
    every node's weight is its Legendre weight times the normal density.

    Parameters
    ----------
    density : callable
        Maps an array of factor values to the wanted number of nodes per
        unit of ``z`` there (positive).  Make it large where the integrand
        changes fast, e.g. where a large book's conditional loss law is
        narrow compared with how fast its mean moves.
    lower, upper : float
        Integration limits; the normal mass outside is dropped (about
        ``2e-17`` for the defaults) and the weights renormalised to sum to 1.
    order : int
        Gauss–Legendre nodes per panel, >= 1.
    probe : int
        Number of equally spaced points at which ``density`` is evaluated
        to place the panels.
    max_nodes : int
        Refuse (ValueError) to build more nodes than this.

    Returns
    -------
    FactorGrid
        Nodes ascending, weights summing to 1, method
        ``"adaptive-gauss-legendre-<panels>x<order>"``.

    """
    if not upper > lower:
        raise ValueError(f"upper must exceed lower, got [{lower}, {upper}]")
    if order < 1:
        raise ValueError(f"order must be >= 1, got {order}")
    if probe < 2:
        raise ValueError(f"probe must be >= 2, got {probe}")
    z = np.linspace(lower, upper, probe)
    rho = np.asarray(density(z), dtype=float)
    if rho.shape != z.shape or not np.all(np.isfinite(rho)) or np.any(rho <= 0):
        raise ValueError("density must return positive finite values, one per probe point")
    # cumulative node count (trapezoid), then cut it into panels of `order` nodes each
    cum = np.concatenate(([0.0], np.cumsum(0.5 * (rho[1:] + rho[:-1]) * np.diff(z))))
    panels = max(1, int(np.ceil(cum[-1] / order)))
    if panels * order > max_nodes:
        raise ValueError(
            f"the factor grid would need {panels * order} nodes, more than max_nodes={max_nodes}"
        )
    edges = np.interp(np.linspace(0.0, cum[-1], panels + 1), cum, z)
    edges[0], edges[-1] = lower, upper
    x, w = leggauss(order)
    half = 0.5 * np.diff(edges)
    mid = 0.5 * (edges[1:] + edges[:-1])
    nodes = (mid[:, None] + half[:, None] * x[None, :]).ravel()
    weights = (half[:, None] * w[None, :]).ravel() * np.exp(-0.5 * nodes**2)
    weights = weights / weights.sum()
    return FactorGrid(
        nodes=nodes, weights=weights, method=f"adaptive-gauss-legendre-{panels}x{order}"
    )
