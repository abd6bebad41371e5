"""Frozen record of a book's dependence settings: sector factors and the copula family.

Read from the book's ``model:`` section by :mod:`debtsim.book.dependence_section`;
turned into arrays by :mod:`debtsim.model.dependence`.  Without any of these
settings a book has no :class:`DependenceSpec` at all and keeps the one-factor
Gaussian model.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "DEFAULT_SECTOR_QUBITS",
    "DEPENDENCE_FAMILIES",
    "DependenceSpec",
]

#: Circuit resolution of each sector register when ``model.sector_qubits`` is not given.
DEFAULT_SECTOR_QUBITS = 2
#: Allowed values of ``model.dependence``.
DEPENDENCE_FAMILIES: tuple[str, ...] = ("gaussian", "student_t")


@dataclass(frozen=True, slots=True)
class DependenceSpec:
    """Sector factors and dependence family of a book, as validated.

    Attributes
    ----------
    sectors : tuple of str
        Sector names in the order the book lists them; empty when the book
        states no sector factors (one global factor).
    loadings : tuple of float or None
        Loadings form: ``a_s`` = corr(sector factor, global factor), one per
        sector, each in [0, 1].
    correlation : tuple of tuple of float or None
        Matrix form: the sector factors' correlation matrix, rows and columns
        in ``sectors`` order (symmetric, unit diagonal, positive semi-definite).
    family : str
        ``"gaussian"`` or ``"student_t"``.
    degrees_of_freedom : float or None
        ``nu`` (> 2) for ``student_t``; None for ``gaussian``.
    sector_qubits : int
        Circuit resolution of each sector register (``2**k`` nodes).
    correlation_source : str
        Where the matrix came from (a CSV path, ``"inline"``), for reports.
    """

    sectors: tuple[str, ...] = ()
    loadings: tuple[float, ...] | None = None
    correlation: tuple[tuple[float, ...], ...] | None = None
    family: str = "gaussian"
    degrees_of_freedom: float | None = None
    sector_qubits: int = DEFAULT_SECTOR_QUBITS
    correlation_source: str = ""

    @property
    def form(self) -> str:
        """``"loadings"``, ``"matrix"`` or ``"one-factor"`` (no sectors stated)."""
        if self.loadings is not None:
            return "loadings"
        if self.correlation is not None:
            return "matrix"
        return "one-factor"

    @property
    def student_t(self) -> bool:
        """Whether the dependence family is Student-t."""
        return self.family == "student_t"
