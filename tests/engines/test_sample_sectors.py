"""The sample engine with sector factors (both forms) and Student-t dependence."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from debtsim.book.dependence import DependenceSpec
from debtsim.engines.sample.engine import SampleEngine
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import expected_shortfall, value_at_risk
from tests.engines.test_exact_sectors import run, sector_book, with_sectors

N = 100_000
# obligor i is in sector "abc"[i % 3]: group {0, 3, 6} inside a, {1, 5} spanning b and c
LINKED = sector_book(10, "abc", [(0, 3, 0.4), (3, 0, 0.3), (6, 3, 0.6), (1, 5, 0.5)], seed=21)


def tail_prob(dist, threshold: float) -> float:  # type: ignore[no-untyped-def]
    return float(dist.probabilities[dist.losses > threshold + 1e-9].sum())


@pytest.mark.parametrize("dof", [None, 5.0])
@pytest.mark.parametrize("importance", [False, True])
def test_sampler_agrees_with_exact_on_linked_sector_book(
    dof: float | None, importance: bool
) -> None:
    """EL, final PDs and P(L > VaR99 exact) agree with exact within the sampler's error."""
    kw: dict[str, object] = (
        {} if dof is None else {"family": "student_t", "degrees_of_freedom": dof}
    )
    book = with_sectors(LINKED, {"a": 0.7, "b": 0.4, "c": 0.9}, **kw)
    exact = run(book)
    d = SampleEngine(samples=N, seed=4, importance=importance).run(
        LinkedFactorModel.from_book(book)
    )
    se = d.diagnostics["expected_loss_standard_error"]
    assert abs(d.mean - exact.mean) < 4 * se
    dp_se = np.asarray(d.diagnostics["default_probability_standard_error"])
    assert np.all(np.abs(d.default_probability - exact.default_probability) < 5 * dp_se + 1e-9)
    var = value_at_risk(exact, 0.99)
    p = tail_prob(exact, var)
    assert abs(tail_prob(d, var) - p) < max(6 * np.sqrt(p / N), 1e-6)
    assert expected_shortfall(d, 0.99) == pytest.approx(expected_shortfall(exact, 0.99), rel=0.1)
    assert d.settings["importance"] is importance


def test_matrix_form_equal_to_loadings_agrees_with_exact() -> None:
    """A matrix a_s a_t (unit diagonal) is the loadings model: sample(matrix) ~ exact(loadings)."""
    a = {"a": 0.7, "b": 0.4, "c": 0.9}
    names = tuple(a)
    matrix = tuple(tuple(1.0 if s == t else a[s] * a[t] for t in names) for s in names)
    loadings_book = with_sectors(LINKED, a)
    matrix_book = replace(LINKED, dependence=DependenceSpec(sectors=names, correlation=matrix))
    exact = run(loadings_book)
    d = SampleEngine(samples=N, seed=9).run(LinkedFactorModel.from_book(matrix_book))
    assert abs(d.mean - exact.mean) < 4 * d.diagnostics["expected_loss_standard_error"]
    var = value_at_risk(exact, 0.99)
    p = tail_prob(exact, var)
    assert abs(tail_prob(d, var) - p) < max(6 * np.sqrt(p / N), 1e-6)


def test_singular_matrix_runs_and_keeps_pds() -> None:
    """A rank-one matrix (all sectors one factor) keeps every PD; ties sectors fully."""
    names = ("a", "b", "c")
    ones = tuple(tuple(1.0 for _ in names) for _ in names)
    book = replace(
        sector_book(9, "abc", [], seed=3),
        dependence=DependenceSpec(sectors=names, correlation=ones),
    )
    model = LinkedFactorModel.from_book(book)
    d = SampleEngine(samples=N, seed=2).run(model)
    dp_se = np.asarray(d.diagnostics["default_probability_standard_error"])
    # no links: every obligor is unreachable, so its PD is kept exactly (error 0)
    assert np.all(np.abs(d.default_probability - model.pd) <= 5 * dp_se)
    # rank one: the same law as the one-factor book (exact engine, no sectors)
    one = run(replace(book, dependence=None))
    assert abs(d.mean - one.mean) < 4 * d.diagnostics["expected_loss_standard_error"]


def test_same_seed_same_numbers() -> None:
    """Reproducible: the same seed gives the same law."""
    model = LinkedFactorModel.from_book(with_sectors(LINKED, {"a": 0.7, "b": 0.4, "c": 0.9}))
    one = SampleEngine(samples=20_000, seed=8).run(model)
    two = SampleEngine(samples=20_000, seed=8).run(model)
    assert np.array_equal(one.losses, two.losses)
    assert np.array_equal(one.probabilities, two.probabilities)
