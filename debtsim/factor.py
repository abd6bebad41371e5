"""Discretisations of the systemic factor ``Z ~ N(0, 1)``."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from numpy.typing import NDArray

__all__ = ["FactorGrid", "gauss_hermite"]


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
