r"""Euler risk contributions: each obligor's share of EL, loss std, VaR, ES and capital.

Engines supply :class:`TailMoments`: per obligor the expectations
``E[L_i]``, ``E[L_i L]``, ``E[L_i 1{L > v}]`` and ``E[L_i 1{L = v}]`` at
each level's VaR ``v``, each also for the own-default part ``L_i O_i``
(``O_i`` the obligor's own default; it implies the final default ``D_i``).
This module turns them into contributions (pure arithmetic, no engine):

* EL: ``E[L_i]``;
* loss std: ``Cov(L_i, L) / sd(L) = (E[L_i L] - E[L_i] E[L]) / sd(L)``;
* VaR_a: ``E[L_i | L = v] = E[L_i 1{L = v}] / P(L = v)`` (the law is
  discrete, so VaR sits on an atom);
* ES_a: ``(E[L_i 1{L > v}] + E[L_i | L = v] (P(L <= v) - a)) / (1 - a)``,
  the atom split of Acerbi & Tasche, so the parts add up to ES exactly;
* economic capital: the book's ``VaR - EL`` shared in proportion to
  ``ES_i - EL_i``.

Each contribution is linear in ``L_i``, so it splits into the own-default
part (``L_i O_i``) and the contagion part (``L_i (D_i - O_i)``: defaults
dragged in along links), the latter obtained as the difference.

References
----------
D. Tasche, "Risk contributions and performance measurement", working paper,
TU Munich (1999).  C. Acerbi and D. Tasche, "On the coherence of expected
shortfall", Journal of Banking & Finance 26 (2002).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from debtsim._typing import FloatArray
from debtsim.book.records import Book
from debtsim.irb import irb_capital_amounts

__all__ = [
    "Allocation",
    "TailMoments",
    "allocate",
    "contribution_columns",
    "contribution_summary",
    "contribution_table",
    "herfindahl",
    "sector_table",
]



@dataclass(frozen=True, eq=False)
class TailMoments:
    """Per-obligor expectations an Euler allocation needs, in currency.

    Attributes
    ----------
    levels : tuple of float
        Confidence levels, ascending.
    expected_loss, expected_loss_own : ndarray, shape (n,)
        ``E[L_i]`` and ``E[L_i O_i]``.
    cross, cross_own : ndarray, shape (n,)
        ``E[L_i L]`` and ``E[L_i O_i L]``.
    grid_expected_loss : ndarray, shape (n,)
        ``E[L_i]`` with the losses the law was computed with (equal to
        ``expected_loss`` unless the engine rounded losses to a grid); it
        pairs with ``cross`` in the covariance.
    tail, tail_own : ndarray, shape (levels, n)
        ``E[L_i 1{L > v_a}]`` and the own-default part.
    atom, atom_own : ndarray, shape (levels, n)
        ``E[L_i 1{L = v_a}]`` and the own-default part.
    var : ndarray, shape (levels,)
        ``v_a``, the book's VaR.
    below, at : ndarray, shape (levels,)
        ``P(L <= v_a)`` and ``P(L = v_a)``.
    mean, std : float
        ``E[L]`` and ``sd(L)`` of the book's law.
    diagnostics : dict
        Engine notes on the accuracy of these figures.
    """

    levels: tuple[float, ...]
    expected_loss: FloatArray
    expected_loss_own: FloatArray
    cross: FloatArray
    cross_own: FloatArray
    grid_expected_loss: FloatArray
    tail: FloatArray
    tail_own: FloatArray
    atom: FloatArray
    atom_own: FloatArray
    var: FloatArray
    below: FloatArray
    at: FloatArray
    mean: float
    std: float
    diagnostics: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Allocation:
    """Risk contributions of every obligor, total and contagion part.

    Attributes
    ----------
    levels : tuple of float
    expected_loss, loss_std : ndarray, shape (n,)
    var, expected_shortfall, economic_capital : ndarray, shape (levels, n)
    expected_loss_contagion, loss_std_contagion : ndarray, shape (n,)
    var_contagion, expected_shortfall_contagion, economic_capital_contagion :
        ndarray, shape (levels, n)
        The part carried by defaults dragged in along links.
    standard_error : Allocation or None
        Standard error of every figure (sampling engines), else None.
    diagnostics : dict
        Engine notes on accuracy (e.g. ``var_window_sensitivity``).
    """

    levels: tuple[float, ...]
    expected_loss: FloatArray
    loss_std: FloatArray
    var: FloatArray
    expected_shortfall: FloatArray
    economic_capital: FloatArray
    expected_loss_contagion: FloatArray
    loss_std_contagion: FloatArray
    var_contagion: FloatArray
    expected_shortfall_contagion: FloatArray
    economic_capital_contagion: FloatArray
    standard_error: Allocation | None = None
    diagnostics: dict[str, Any] = field(default_factory=dict)

    def columns(self) -> dict[str, FloatArray]:
        """Columns of ``contributions.csv`` after ``id`` and ``sector``, in order."""
        main: dict[str, FloatArray] = {
            "expected_loss": self.expected_loss,
            "loss_std": self.loss_std,
        }
        contagion: dict[str, FloatArray] = {
            "expected_loss_contagion": self.expected_loss_contagion,
            "loss_std_contagion": self.loss_std_contagion,
        }
        for j, a in enumerate(self.levels):
            for name, total, part in (
                ("var", self.var, self.var_contagion),
                ("expected_shortfall", self.expected_shortfall, self.expected_shortfall_contagion),
                ("economic_capital", self.economic_capital, self.economic_capital_contagion),
            ):
                main[f"{name}_{a}"] = total[j]
                contagion[f"{name}_{a}_contagion"] = part[j]
        return {**main, **contagion}


def contribution_columns(levels: Sequence[float]) -> list[str]:
    """Measure columns of ``contributions.csv`` for ``levels``, ``irb_capital`` excluded.

    ``expected_loss, loss_std``, then per level ``var_<a>, expected_shortfall_<a>,
    economic_capital_<a>``, then the same names with ``_contagion`` appended.
    """
    main = ["expected_loss", "loss_std"]
    for a in levels:
        main += [f"{name}_{float(a)}" for name in ("var", "expected_shortfall", "economic_capital")]
    return main + [f"{c}_contagion" for c in main]


def _parts(m: TailMoments, own: bool) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """EL, std, VaR and ES contributions of the whole loss or of its own-default part."""
    el = m.expected_loss_own if own else m.expected_loss
    cross = m.cross_own if own else m.cross
    tail = m.tail_own if own else m.tail
    atom = m.atom_own if own else m.atom
    # the covariance pairs E[L_i L] with E[L_i] in the losses the law was computed with;
    # E[L_i O_i] / E[L_i] is the same in either loss unit
    grid_el = m.grid_expected_loss
    if own:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(m.expected_loss > 0, m.expected_loss_own / m.expected_loss, 1.0)
        grid_el = grid_el * ratio
    std = (cross - grid_el * m.mean) / m.std if m.std > 0 else np.zeros_like(el)
    levels = np.asarray(m.levels, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        var = np.where(m.at[:, None] > 0, atom / m.at[:, None], 0.0)
    es = (tail + var * (m.below - levels)[:, None]) / (1.0 - levels)[:, None]
    return el, std, var, es


def allocate(m: TailMoments) -> Allocation:
    """Euler contributions from an engine's moments (see the module notes).

    Parameters
    ----------
    m : TailMoments

    Returns
    -------
    Allocation
        Contributions adding up to EL, std, VaR, ES and economic capital of
        the law the moments came from (VaR on an atom: exactly; economic
        capital exactly by construction).
    """
    el, std, var, es = _parts(m, own=False)
    el_o, std_o, var_o, es_o = _parts(m, own=True)
    capital = m.var - m.mean  # the book's VaR - EL per level
    excess = es - el[None, :]
    excess_o = es_o - el_o[None, :]
    total = excess.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(total[:, None] != 0, excess / total[:, None], 0.0)
        share_o = np.where(total[:, None] != 0, excess_o / total[:, None], 0.0)
    ec = capital[:, None] * share
    ec_o = capital[:, None] * share_o
    return Allocation(
        levels=tuple(m.levels),
        expected_loss=el,
        loss_std=std,
        var=var,
        expected_shortfall=es,
        economic_capital=ec,
        expected_loss_contagion=el - el_o,
        loss_std_contagion=std - std_o,
        var_contagion=var - var_o,
        expected_shortfall_contagion=es - es_o,
        economic_capital_contagion=ec - ec_o,
        diagnostics=dict(m.diagnostics),
    )


def herfindahl(exposure: FloatArray, labels: Sequence[str] | None = None) -> float:
    """Herfindahl–Hirschman index of exposures: ``sum (EAD_k / EAD)^2``.

    Parameters
    ----------
    exposure : ndarray, shape (n,)
        EAD of each obligor.
    labels : sequence of str, optional
        Group of each obligor (e.g. its sector); exposures are summed per
        group first.  Without labels: name concentration.

    Returns
    -------
    float
        In ``(0, 1]``; ``1 / n`` for ``n`` equal exposures.
    """
    ead = np.asarray(exposure, dtype=float)
    total = float(ead.sum())
    if total <= 0:
        return 0.0
    if labels is not None:
        _, inverse = np.unique(np.asarray(list(labels), dtype=object), return_inverse=True)
        ead = np.bincount(inverse.ravel(), weights=ead)
    share = ead / total
    return float(np.sum(share * share))


def contribution_table(book: Book, allocation: Allocation) -> pd.DataFrame:
    """One row per obligor: ``id, sector``, the measures, then ``irb_capital``.

    Columns are those of ``contributions.csv`` (DESIGN.md "Risk
    contributions"); ``irb_capital`` is the Basel II corporate IRB capital
    ``K x EAD`` with each obligor's maturity (a yardstick, see :mod:`debtsim.irb`).
    """
    obligors = book.obligors
    data: dict[str, Any] = {
        "id": [o.id for o in obligors],
        "sector": [o.sector for o in obligors],
    }
    data.update(allocation.columns())
    data["irb_capital"] = irb_capital_amounts(
        np.array([o.pd for o in obligors]),
        np.array([o.lgd for o in obligors]),
        np.array([o.ead for o in obligors]),
        np.array([o.maturity for o in obligors]),
    )
    return pd.DataFrame(data)


def sector_table(table: pd.DataFrame) -> pd.DataFrame:
    """Sum the obligor table by ``sector`` (sectors in order of first appearance)."""
    out = table.drop(columns=["id"]).groupby("sector", sort=False).sum(numeric_only=True)
    return out.reset_index()


def contribution_summary(book: Book, allocation: Allocation, groups: Sequence[Sequence[int]]
                         ) -> dict[str, Any]:
    """Build the ``contributions`` block of ``summary.json``.

    Parameters
    ----------
    book : Book
    allocation : Allocation
    groups : sequence of index sequences
        Linked groups (weakly connected components of two or more obligors).

    Returns
    -------
    dict
        ``totals`` (each contribution column summed), ``contagion_share``
        per measure (contagion part / total), ``by_linked_group`` (ids and
        ES at the highest level with its contagion part), ``herfindahl``
        (``name`` and ``sector``), ``irb_capital`` and, for sampling engines,
        ``standard_error`` of the totals' parts is left to the CSV.
    """
    table = contribution_table(book, allocation)
    numeric = table.drop(columns=["id", "sector"])
    totals = {c: float(numeric[c].sum()) for c in numeric.columns}
    share: dict[str, float | None] = {}
    for c in numeric.columns:
        if c.endswith("_contagion"):
            whole = totals[c[: -len("_contagion")]]
            share[c[: -len("_contagion")]] = totals[c] / whole if whole else None
    top = f"expected_shortfall_{allocation.levels[-1]}" if allocation.levels else None
    by_group = []
    for members in groups:
        idx = list(members)
        entry: dict[str, Any] = {"obligors": [book.obligors[i].id for i in idx]}
        if top is not None:
            entry[top] = float(numeric[top].iloc[idx].sum())
            entry[top + "_contagion"] = float(numeric[top + "_contagion"].iloc[idx].sum())
        by_group.append(entry)
    ead = np.array([o.ead for o in book.obligors])
    return {
        "totals": totals,
        "contagion_share": share,
        "by_linked_group": by_group,
        "herfindahl": {
            "name": herfindahl(ead),
            "sector": herfindahl(ead, [o.sector for o in book.obligors]),
        },
        "irb_capital": totals["irb_capital"],
        "diagnostics": {k: v for k, v in allocation.diagnostics.items()},
    }
