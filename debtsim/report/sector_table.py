"""The sector table of ``debtsim check``: size, exposure, PD and implied correlation.

Nothing here runs an engine.  For a book with sector factors it lists, per
sector, the obligors, their exposure (EAD) and mean PD, and the implied
asset correlation of two distinct obligors: inside a sector the mean of
``sqrt(R_i R_j)`` over pairs; between sectors *s* and *t* the mean of
``sqrt(R_i R_j) C_st`` (``C_st = a_s a_t`` in the loadings form, the given
matrix otherwise).  Student-t dependence leaves these correlations as they
are and adds tail dependence.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from debtsim.book.records import Book
from debtsim.model.specification import LinkedFactorModel

__all__ = ["SectorRow", "SectorTable", "format_sector_table", "sector_table"]


@dataclass(frozen=True, slots=True)
class SectorRow:
    """One sector's figures."""

    name: str
    loading: float | None
    obligors: int
    exposure: float
    mean_pd: float
    inside_correlation: float | None  # None for a sector of one obligor


@dataclass(frozen=True, slots=True)
class SectorTable:
    """Per-sector figures and the implied between-sector asset correlations.

    Attributes
    ----------
    dependence : str
        One line describing the structure (sectors, form, family).
    rows : tuple of SectorRow
        In the book's sector order.
    between : ndarray, shape (S, S)
        Mean implied asset correlation of an obligor of sector *s* and one of
        sector *t* (diagonal: inside the sector, over distinct pairs).
    """

    dependence: str
    rows: tuple[SectorRow, ...]
    between: NDArray[np.float64]


def sector_table(book: Book) -> SectorTable | None:
    """Return the sector table of ``book``, or None when it states no sector factors."""
    model = LinkedFactorModel.from_book(book)
    structure = model.dependence
    if structure is None or not structure.sector_names:
        return None
    root_r = np.sqrt(np.asarray(model.asset_correlation, dtype=float))
    c = structure.sector_correlation_matrix
    names = structure.sector_names
    count = np.bincount(structure.sector_of, minlength=len(names))
    sum_root = np.bincount(structure.sector_of, weights=root_r, minlength=len(names))
    sum_r = np.bincount(structure.sector_of, weights=root_r**2, minlength=len(names))
    exposure = np.bincount(structure.sector_of, weights=model.ead, minlength=len(names))
    sum_pd = np.bincount(structure.sector_of, weights=model.pd, minlength=len(names))
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_root = np.where(count > 0, sum_root / count, np.nan)
        between = np.outer(mean_root, mean_root) * c
        pairs = count * (count - 1.0)
        inside = np.where(pairs > 0, (sum_root**2 - sum_r) / pairs, np.nan)
    np.fill_diagonal(between, inside)
    rows = tuple(
        SectorRow(
            name=names[s],
            loading=float(structure.loading[s]) if structure.loading is not None else None,
            obligors=int(count[s]),
            exposure=float(exposure[s]),
            mean_pd=float(sum_pd[s] / count[s]) if count[s] else float("nan"),
            inside_correlation=float(inside[s]) if count[s] > 1 else None,
        )
        for s in range(len(names))
    )
    return SectorTable(structure.describe(), rows, between)


def format_sector_table(table: SectorTable, currency: str = "") -> str:
    """Render the table as aligned plain text (no trailing newline).

    The first block lists each sector; the second the implied asset
    correlation matrix (rows and columns in the same order, ``-`` where a
    sector has too few obligors).
    """
    money = f"exposure{f' ({currency})' if currency else ''}"
    header = ("sector", "loading", "obligors", money, "mean PD", "corr inside")
    lines = [
        tuple(
            [
                r.name,
                "-" if r.loading is None else f"{r.loading:.3g}",
                f"{r.obligors:,}",
                f"{r.exposure:,.2f}",
                f"{100 * r.mean_pd:.3g}%",
                "-" if r.inside_correlation is None else f"{r.inside_correlation:.4f}",
            ]
        )
        for r in table.rows
    ]
    widths = [max(len(h), *(len(row[k]) for row in lines)) for k, h in enumerate(header)]

    def fmt(row: tuple[str, ...]) -> str:
        first = f"{row[0]:<{widths[0]}}"
        rest = "  ".join(f"{v:>{w}}" for v, w in zip(row[1:], widths[1:], strict=True))
        return f"{first}  {rest}"

    out = [f"Dependence: {table.dependence}", "", fmt(header)]
    out += [fmt(row) for row in lines]
    names = [r.name for r in table.rows]
    cell = max(8, *(len(n) for n in names))
    out += ["", "Implied asset correlation between obligors (row sector, column sector):"]
    out.append(" " * cell + "  " + "  ".join(f"{n:>{cell}}" for n in names))
    for s, name in enumerate(names):
        values = ["-" if not np.isfinite(v) else f"{v:.4f}" for v in table.between[s].tolist()]
        out.append(f"{name:<{cell}}  " + "  ".join(f"{v:>{cell}}" for v in values))
    return "\n".join(out)
