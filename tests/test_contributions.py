"""Allocation arithmetic, concentration indices and the run's contribution outputs."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import debtsim
from debtsim.book.records import Book, Link, Obligor
from debtsim.contributions import contribution_columns, herfindahl


def test_herfindahl_closed_forms() -> None:
    """HHI = sum of squared exposure shares: 1/n for n equal names; sector sums first."""
    assert herfindahl(np.full(8, 5.0)) == pytest.approx(1 / 8)
    assert herfindahl(np.array([3.0, 1.0])) == pytest.approx(0.75**2 + 0.25**2)
    assert herfindahl(np.array([1.0, 1.0, 2.0]), ["a", "a", "b"]) == pytest.approx(0.5)


def _book() -> Book:
    obligors = tuple(
        Obligor(id=f"N{i}", ead=1000.0 * (i + 1), pd=0.02 + 0.01 * (i % 3), lgd=0.45,
                asset_correlation=0.15, sector="energy" if i < 3 else "retail",
                maturity=1.0 + i % 5)
        for i in range(6)
    )
    links = (Link(creditor="N1", debtor="N0", contagion=0.4),
             Link(creditor="N0", debtor="N1", contagion=0.3))
    return Book(name="t", currency="EUR", obligors=obligors, links=links)


def test_run_result_contributions_and_files(tmp_path) -> None:
    """The run's DataFrame has the contract columns, adds up, and is written as CSV files."""
    result = debtsim.run(_book(), engine="exact", levels=(0.99, 0.999))
    table = result.contributions
    assert list(table.columns) == (["id", "sector"] + contribution_columns((0.99, 0.999))
                                   + ["irb_capital"])
    assert table["expected_shortfall_0.999"].sum() == pytest.approx(
        result.measures.expected_shortfall[0.999], rel=1e-9)
    assert table["economic_capital_0.99"].sum() == pytest.approx(
        result.measures.economic_capital[0.99], rel=1e-9)
    # only the two linked obligors carry a contagion part
    assert (table["expected_loss_contagion"].to_numpy()[2:] == 0).all()
    assert (table["expected_loss_contagion"].to_numpy()[:2] > 0).all()
    out = result.write(tmp_path / "run")
    loaded = pd.read_csv(out / "contributions.csv")
    assert list(loaded.columns) == list(table.columns)
    sectors = pd.read_csv(out / "sectors.csv")
    assert list(sectors["sector"]) == ["energy", "retail"]
    np.testing.assert_allclose(sectors["irb_capital"].sum(), table["irb_capital"].sum())
    summary = json.loads((out / "summary.json").read_text())
    block = summary["contributions"]
    assert block["herfindahl"]["name"] == pytest.approx(
        herfindahl(np.array([o.ead for o in _book().obligors])))
    assert block["irb_capital"] == pytest.approx(table["irb_capital"].sum())
    assert 0 < block["contagion_share"]["expected_shortfall_0.999"] < 1
    assert block["by_linked_group"][0]["obligors"] == ["N0", "N1"]
    assert "Where the tail comes from" in (out / "report.html").read_text()



def test_sector_books_run_without_contributions(tmp_path) -> None:
    """A sector-factor book runs and writes its report; it has no allocation (None).

    The moments condition on one Gaussian factor, so they are not applied to sector models.
    """
    from tests.engines.test_exact_sectors import BOOK, with_sectors

    book = with_sectors(BOOK, {"a": 0.5, "b": 0.7, "c": 0.9})
    result = debtsim.run(book, engine="exact", copula=False)
    assert result.allocation is None and result.contributions is None
    out = result.write(tmp_path / "run")
    assert not (out / "contributions.csv").exists()
    assert json.loads((out / "summary.json").read_text())["contributions"] is None
