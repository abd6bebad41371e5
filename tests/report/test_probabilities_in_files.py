"""Probabilities in output files lie in [0, 1]; an obligor no link reaches has uplift exactly 0."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest

import debtsim
from debtsim.book.records import Book, Link, Obligor
from debtsim.distribution import LossDistribution
from debtsim.link_effects import obligor_contagion
from debtsim.model.specification import LinkedFactorModel
from debtsim.studies.scenarios import Scenario

# C is creditor of no link: no default can reach it.  D is the creditor of a link with
# contagion 0: nothing travels on it either.
BOOK = Book(
    "reach",
    "EUR",
    (
        Obligor("A", 100.0, 0.03, 0.5, 0.3),
        Obligor("B", 200.0, 0.02, 0.4, 0.2),
        Obligor("C", 150.0, 0.05, 0.6, 0.25),
        Obligor("D", 120.0, 0.04, 0.5, 0.35),
    ),
    (Link("A", "B", 0.5), Link("B", "C", 0.4), Link("D", "A", 0.0)),
)
UNREACHABLE = [2, 3]


def test_reachability_follows_links_with_contagion() -> None:
    """Only creditors of a link with positive contagion can be reached."""
    model = LinkedFactorModel.from_book(BOOK)
    assert model.reachable_by_links.tolist() == [True, True, False, False]


def test_default_probability_is_clipped_to_unit_interval() -> None:
    """Float noise above 1 (or below 0) never reaches a result."""
    law = LossDistribution(
        losses=np.array([0.0, 1.0]),
        probabilities=np.array([0.5, 0.5]),
        default_probability=np.array([1.0000000000000002, -1e-17]),
        engine="test",
    )
    assert law.default_probability.tolist() == [1.0, 0.0]


def test_uplift_of_unreachable_obligor_is_zero_even_with_noise() -> None:
    """The read-out gives exactly 0 for an unreachable obligor whatever the engine's noise."""
    noisy = [0.04, 0.03, 0.05 - 3.5e-15, 0.04 - 0.0039]
    effect = obligor_contagion(BOOK, noisy)
    assert effect.contagion_uplift[UNREACHABLE].tolist() == [0.0, 0.0]


@pytest.mark.parametrize("engine", ["exact", "circuit", "sample"])
def test_every_engine_gives_zero_uplift_where_no_link_reaches(engine: str) -> None:
    """On every engine the obligors.csv uplift of an unreachable obligor is exactly 0."""
    options = {"samples": 20_000} if engine == "sample" else {}
    result = debtsim.run(BOOK, engine=engine, **options)
    uplift = result.obligors["contagion_uplift"].to_numpy()
    assert uplift[UNREACHABLE].tolist() == [0.0, 0.0]
    assert np.all(uplift[:2] > 0)  # the reachable ones do carry contagion
    final = result.loss_distribution.default_probability
    assert np.all((final >= 0) & (final <= 1))
    if engine == "sample":
        # by construction: the sampled PD of an obligor no link reaches is its PD
        assert final[UNREACHABLE].tolist() == [0.05, 0.04]


def test_stress_files_keep_probabilities_in_unit_interval(tmp_path: Path) -> None:
    """A stress that pushes PDs to 1 writes no probability above 1 in its CSVs."""
    scenarios = [
        Scenario(name="all in", pd_scale=40.0, contagion_scale=3.0),
        Scenario(name="one down", defaulted=("A",)),
    ]
    result = debtsim.stress(BOOK, scenarios, engine="exact")
    debtsim.write_stress(result, tmp_path / "out")
    with open(tmp_path / "out" / "default_probabilities.csv", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    values = [float(row[k]) for row in rows for k in ("pd", "base", "all in", "one down")]
    assert values and all(0.0 <= v <= 1.0 for v in values)
    for sub in ("base", "all-in", "one-down"):
        with open(tmp_path / "out" / sub / "obligors.csv", encoding="utf-8") as fh:
            for row in csv.DictReader(fh):
                assert 0.0 <= float(row["default_probability"]) <= 1.0
