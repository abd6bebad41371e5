"""Contributions on the circuit and sample engines; the engine-independent entry point."""

from __future__ import annotations

import numpy as np
import pytest

from debtsim.contributions import allocate
from debtsim.engines.allocation import run_with_contributions
from debtsim.engines.circuit.builder import factor_grid_for
from debtsim.engines.circuit.engine import CircuitEngine
from debtsim.engines.exact.contributions import exact_moments
from debtsim.engines.exact.engine import ExactEngine
from debtsim.engines.sample.engine import SampleEngine
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import measures
from tests.engines.test_exact_contributions import (
    CYCLE_BOOKS,
    LEVELS,
    _rating_book,
    _reference,
)


@pytest.mark.parametrize("name", ["three-cycle with tail", "two-way pair", "figure eight"])
def test_circuit_contributions_equal_brute_force(name: str) -> None:
    """Circuit contributions (statevector patterns) equal enumeration on its nodes to 1e-10.

    Reference: tests/reference.py (independent enumeration of own defaults and live links).
    """
    book = CYCLE_BOOKS[name]
    model = LinkedFactorModel.from_book(book)
    engine = CircuitEngine()
    _, alloc = run_with_contributions(engine, model, LEVELS)
    grid = factor_grid_for(model, None)
    ref = _reference(book, grid.nodes, grid.weights)
    tol = 1e-10 * ref["book"][("es", LEVELS[-1])]
    np.testing.assert_allclose(alloc.loss_std, ref["std"], rtol=0, atol=tol)
    np.testing.assert_allclose(alloc.expected_loss_contagion, ref["el"] - ref["own_el"],
                               rtol=0, atol=tol)
    for j, a in enumerate(LEVELS):
        np.testing.assert_allclose(alloc.var[j], ref[("var", a)], rtol=0, atol=tol)
        np.testing.assert_allclose(alloc.expected_shortfall[j], ref[("es", a)], rtol=0, atol=tol)
        np.testing.assert_allclose(alloc.expected_shortfall_contagion[j],
                                   ref[("es", a)] - ref[("own_es", a)], rtol=0, atol=tol)
        np.testing.assert_allclose(alloc.var_contagion[j],
                                   ref[("var", a)] - ref[("own_var", a)], rtol=0, atol=tol)


def test_sample_contributions_within_four_standard_errors_of_exact() -> None:
    """Sampled contributions agree with exact ones within 4 batch-means standard errors.

    Mid-size linked book (60 obligors, 14 links); the sampler's ES contributions also add
    up to its own ES estimate (Acerbi & Tasche 2002 split of the sampled atom at VaR).
    """
    levels = (0.99, 0.999)
    model = LinkedFactorModel.from_book(_rating_book(60, links=14, seed=8))
    exact = ExactEngine()
    dist = exact.run(model)
    ref = allocate(exact_moments(exact, model, dist, levels))
    law, alloc = run_with_contributions(
        SampleEngine(samples=200_000, seed=5, levels=levels), model, levels)
    se = alloc.standard_error
    assert se is not None
    risk = measures(law, levels)
    slack = 1e-9 * risk.expected_shortfall[0.999]
    for name in ("expected_loss", "loss_std", "expected_shortfall", "economic_capital",
                 "expected_shortfall_contagion", "expected_loss_contagion"):
        got, want, err = getattr(alloc, name), getattr(ref, name), getattr(se, name)
        assert np.all(np.abs(got - want) <= 4 * err + slack), name
    for j, a in enumerate(levels):
        assert alloc.expected_shortfall[j].sum() == pytest.approx(
            risk.expected_shortfall[a], rel=1e-9)
        assert alloc.var[j].sum() == pytest.approx(risk.var[a], rel=1e-9)
        assert alloc.economic_capital[j].sum() == pytest.approx(
            risk.economic_capital[a], rel=1e-9)
    assert alloc.loss_std.sum() == pytest.approx(risk.loss_std, rel=1e-9)


def test_sample_contributions_are_reproducible() -> None:
    """Same book and seed: the same contributions, bit for bit."""
    model = LinkedFactorModel.from_book(_rating_book(30, links=6, seed=2))
    runs = [run_with_contributions(SampleEngine(samples=20_000, seed=9, levels=(0.99,)),
                                   model, (0.99,))[1] for _ in range(2)]
    np.testing.assert_array_equal(runs[0].expected_shortfall, runs[1].expected_shortfall)
    np.testing.assert_array_equal(runs[0].standard_error.expected_shortfall,
                                  runs[1].standard_error.expected_shortfall)


def test_circuit_with_shots_has_no_contributions() -> None:
    """Shots give a sampled law without own/contagion labels: refused with a clear message."""
    model = LinkedFactorModel.from_book(CYCLE_BOOKS["chain"])
    with pytest.raises(ValueError, match="does not compute risk contributions"):
        run_with_contributions(CircuitEngine(shots=100, seed=1), model, LEVELS)
