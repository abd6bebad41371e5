r"""Sector factors and the dependence family of a book, as arrays.

Loadings form (one global factor ``G``, independent ``eta_s``)::

    Y_s = a_s G + sqrt(1 - a_s^2) eta_s,      A_i = sqrt(R_i) Y_s(i) + sqrt(1 - R_i) e_i

Matrix form: ``(Y_s)`` standard normal with correlation ``C = B B^T``
(``B`` from the eigen-decomposition, which accepts a singular ``C``).

Student-t family: the asset vector is multiplied by one common
``sqrt(nu / W)``, ``W ~ chi^2_nu``, and the own-default threshold is
``t_nu^-1(PD_i)``; given ``W = w`` and the sector factor ``y``::

    P(own default) = Phi((t_nu^-1(PD_i) sqrt(w / nu) - sqrt(R_i) y) / sqrt(1 - R_i)).

This module describes that structure; it computes no loss law.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.special import ndtr, ndtri, stdtrit

from debtsim._typing import FloatArray, IntArray
from debtsim.book.dependence import DependenceSpec

__all__ = ["FactorStructure", "default_threshold", "sector_conditional_pd"]



def default_threshold(pd: FloatArray, degrees_of_freedom: float | None) -> FloatArray:
    """Own-default threshold: ``Phi^-1(PD)``, or ``t_nu^-1(PD)`` under Student-t.

    ``+inf`` where PD is 1 and ``-inf`` where PD is 0.
    """
    pd = np.clip(np.asarray(pd, dtype=float), 0.0, 1.0)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if degrees_of_freedom is None:
            out = ndtri(pd)
        else:
            out = stdtrit(degrees_of_freedom, pd)
    out = np.where(pd >= 1.0, np.inf, np.where(pd <= 0.0, -np.inf, out))
    return np.asarray(out, dtype=float)


def sector_conditional_pd(
    threshold: FloatArray,
    asset_correlation: FloatArray,
    y: FloatArray,
    scale: FloatArray | float = 1.0,
) -> FloatArray:
    """Own-default probability given a sector factor value (and the t mixing scale).

    Parameters
    ----------
    threshold : ndarray, shape (n,)
        :func:`default_threshold` of each obligor.
    asset_correlation : ndarray, shape (n,)
        ``R`` of each obligor.
    y : ndarray, shape (m,)
        Values of the obligor's sector factor, one per node.
    scale : float or ndarray, shape (m,)
        ``sqrt(w / nu)`` per node under Student-t; 1 for the Gaussian family.

    Returns
    -------
    ndarray, shape (m, n)
        ``Phi((threshold * scale - sqrt(R) y) / sqrt(1 - R))``; exactly 1
        (0) where the threshold is infinite and positive (negative).

    """
    threshold = np.asarray(threshold, dtype=float)
    r = np.asarray(asset_correlation, dtype=float)
    y = np.atleast_1d(np.asarray(y, dtype=float))
    s = np.broadcast_to(np.asarray(scale, dtype=float), y.shape)
    finite = np.isfinite(threshold)
    t = np.where(finite, threshold, 0.0)
    x = (t[None, :] * s[:, None] - np.sqrt(r)[None, :] * y[:, None]) / np.sqrt(1.0 - r)[None, :]
    p = ndtr(x)
    p[:, threshold == np.inf] = 1.0
    p[:, threshold == -np.inf] = 0.0
    return np.asarray(p, dtype=float)


@dataclass(frozen=True, eq=False)
class FactorStructure:
    """Sector factors and dependence family of a model.

    Build with :meth:`from_spec`.

    Attributes
    ----------
    sector_names : tuple of str
        Sectors in the book's order; empty for one global factor.
    sector_of : ndarray of int, shape (n,)
        Sector index of each obligor (0 for all when there are no sectors).
    loading : ndarray, shape (S,) or None
        Loadings form: ``a_s``.
    correlation : ndarray, shape (S, S) or None
        Matrix form: the sector factors' correlation.
    degrees_of_freedom : float or None
        ``nu`` of the Student-t family; None for the Gaussian family.
    sector_qubits : int
        Circuit resolution of each sector register.
    """

    sector_names: tuple[str, ...]
    sector_of: IntArray
    loading: FloatArray | None
    correlation: FloatArray | None
    degrees_of_freedom: float | None
    sector_qubits: int

    @classmethod
    def from_spec(cls, spec: DependenceSpec, sectors: list[str]) -> FactorStructure:
        """Arrays of ``spec`` for obligors naming ``sectors`` (one label each)."""
        index = {name: k for k, name in enumerate(spec.sectors)}
        sector_of = np.array([index.get(s.strip(), 0) for s in sectors], dtype=np.int64)
        sector_of.setflags(write=False)
        loading = correlation = None
        if spec.loadings is not None:
            loading = np.array(spec.loadings, dtype=float)
            loading.setflags(write=False)
        if spec.correlation is not None:
            correlation = np.array(spec.correlation, dtype=float)
            correlation.setflags(write=False)
        return cls(
            sector_names=tuple(spec.sectors),
            sector_of=sector_of,
            loading=loading,
            correlation=correlation,
            degrees_of_freedom=spec.degrees_of_freedom if spec.student_t else None,
            sector_qubits=spec.sector_qubits,
        )

    # ------------------------------------------------------------ form
    @property
    def form(self) -> str:
        """``"loadings"``, ``"matrix"`` or ``"one-factor"``."""
        if self.loading is not None:
            return "loadings"
        if self.correlation is not None:
            return "matrix"
        return "one-factor"

    @property
    def student_t(self) -> bool:
        """Whether the family is Student-t."""
        return self.degrees_of_freedom is not None

    @property
    def family(self) -> str:
        """``"student_t"`` or ``"gaussian"``."""
        return "student_t" if self.student_t else "gaussian"

    @property
    def n_sectors(self) -> int:
        """Number of sector factors (1 when there are none: the global factor)."""
        return max(1, len(self.sector_names))

    @property
    def is_one_factor_gaussian(self) -> bool:
        """True when the structure is the plain one-factor Gaussian model.

        Every loading 1 is that model too, but it is still computed by the
        sector code path (and must agree with it).
        """
        return self.form == "one-factor" and not self.student_t

    def describe(self) -> str:
        """One line for reports, e.g. ``"8 sectors (loadings), Student-t nu=6"``."""
        parts = []
        if self.form == "one-factor":
            parts.append("one global factor")
        else:
            parts.append(f"{len(self.sector_names)} sectors ({self.form})")
        if self.student_t:
            parts.append(f"Student-t nu={self.degrees_of_freedom:g}")
        else:
            parts.append("Gaussian")
        return ", ".join(parts)

    # ------------------------------------------------------------ algebra
    @cached_property
    def sector_correlation_matrix(self) -> FloatArray:
        """Correlation between sector factors, shape (S, S).

        Loadings form: ``a_s a_t`` off the diagonal; one-factor: ``[[1]]``.
        """
        if self.correlation is not None:
            out = np.array(self.correlation, dtype=float)
        elif self.loading is not None:
            out = np.outer(self.loading, self.loading)
            np.fill_diagonal(out, 1.0)
        else:
            out = np.ones((1, 1))
        out.setflags(write=False)
        return out

    @cached_property
    def sector_factor_matrix(self) -> FloatArray:
        """``B`` with ``B B^T`` = the sector correlation, shape (S, rank).

        From the symmetric eigen-decomposition ``C = V diag(l) V^T``: eigenvalues
        within rounding of zero (validated non-negative up to a tolerance) are
        dropped, so a singular matrix gives fewer columns than sectors.
        Rows are rescaled to unit length so every sector factor stays standard
        normal exactly.
        """
        c = self.sector_correlation_matrix
        values, vectors = np.linalg.eigh(0.5 * (c + c.T))
        keep = values > 1e-12 * max(1.0, float(values.max()))
        b = vectors[:, keep] * np.sqrt(values[keep])[None, :]
        norms = np.sqrt(np.sum(b * b, axis=1))
        b = b / norms[:, None]
        b.setflags(write=False)
        return b

    def asset_correlation_between(
        self, r_i: float, sector_i: int, r_j: float, sector_j: int
    ) -> float:
        """Implied asset correlation of two obligors: ``sqrt(R_i R_j) C_st``."""
        c = float(self.sector_correlation_matrix[sector_i, sector_j]) if self.sector_names else 1.0
        return math.sqrt(r_i * r_j) * c
