"""Stressing a book's dependence settings: sector loadings and degrees of freedom.

Scenario fields (global, and ``sector_loading_shift`` also per sector)::

    sector_loading_shift: -0.1     # add to every sector loading, clipped to [0, 1]
    degrees_of_freedom: 4          # Student-t with nu = 4 (0: keep the book's family)

Loadings form: ``a_s' = clip(a_s + shift + sector.shift, 0, 1)``.  Matrix
form: every off-diagonal entry ``C_st`` moves by ``shift + (shift_s +
shift_t) / 2``, clipped to [-1, 1]; a moved matrix that is no longer a
valid correlation matrix (e.g. no longer positive semi-definite) is refused
with the reason, never repaired: that scenario or sweep point fails, the
others run.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace

import numpy as np

from debtsim.book.dependence import DependenceSpec
from debtsim.book.dependence_section import check_correlation_matrix

__all__ = ["stress_dependence"]


def stress_dependence(
    spec: DependenceSpec | None,
    loading_shift: float,
    sector_shifts: Mapping[str, float],
    degrees_of_freedom: float,
) -> DependenceSpec | None:
    """Return ``spec`` with the scenario's dependence changes applied.

    Parameters
    ----------
    spec : DependenceSpec or None
        The book's dependence settings (None: one factor, Gaussian).
    loading_shift : float
        Global shift of every sector loading (correlation, matrix form).
    sector_shifts : mapping of str to float
        Further shift per sector name.
    degrees_of_freedom : float
        ``nu`` > 2 to use Student-t dependence; 0 keeps the book's family.

    Returns
    -------
    DependenceSpec or None
        Unchanged (the same object) when nothing changes.

    Raises
    ------
    ValueError
        A loading shift on a book without sector factors, or a shifted
        correlation matrix that is no longer valid.
    """
    shifts = {k: v for k, v in sector_shifts.items() if v != 0.0}
    out = spec
    if loading_shift != 0.0 or shifts:
        if spec is None or spec.form == "one-factor":
            raise ValueError(
                "sector_loading_shift needs sector factors in the book (model.sectors or "
                "model.sector_correlation)"
            )
        if spec.loadings is not None:
            loadings = tuple(
                float(np.clip(a + loading_shift + shifts.get(name, 0.0), 0.0, 1.0))
                for name, a in zip(spec.sectors, spec.loadings, strict=True)
            )
            out = replace(spec, loadings=loadings)
        else:
            assert spec.correlation is not None
            c = np.array(spec.correlation, dtype=float)
            h = np.array([shifts.get(name, 0.0) for name in spec.sectors])
            moved = np.clip(c + loading_shift + 0.5 * (h[:, None] + h[None, :]), -1.0, 1.0)
            np.fill_diagonal(moved, 1.0)
            problems = check_correlation_matrix(spec.sectors, moved)
            if problems:
                entry, message = problems[0]
                where = f" (entry {entry})" if entry else ""
                raise ValueError(
                    f"sector_loading_shift makes the sector correlation matrix invalid{where}: "
                    f"it {message}"
                )
            out = replace(spec, correlation=tuple(tuple(float(x) for x in row) for row in moved))
    if degrees_of_freedom:
        base = out if out is not None else DependenceSpec()
        out = replace(base, family="student_t", degrees_of_freedom=float(degrees_of_freedom))
    return out
