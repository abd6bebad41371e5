"""Every engine computes one model: contract checks and cross-engine agreement."""

from __future__ import annotations

import numpy as np
import pytest

from debtsim.book.records import Book, Link, Obligor
from debtsim.distribution import LossDistribution
from debtsim.engines.circuit.engine import CircuitEngine
from debtsim.engines.exact.engine import ExactEngine
from debtsim.engines.sample.engine import SampleEngine
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import expected_shortfall, value_at_risk
from tests.reference import enumerate_law


def make_book(n: int, links: list[tuple[int, int, float]], *, seed: int, k: int = 3) -> Book:
    rng = np.random.default_rng(seed)
    obligors = tuple(
        Obligor(id=f"F{i}", ead=float(rng.choice([100, 250, 400, 1000])) * (1 + i / 7),
                pd=float(rng.choice([0.01, 0.03, 0.08])), lgd=float(rng.choice([0.25, 0.45, 0.6])),
                asset_correlation=float(rng.choice([0.0, 0.12, 0.24])))
        for i in range(n)
    )
    return Book(name="agree", currency="EUR", obligors=obligors,
                links=tuple(Link(creditor=f"F{c}", debtor=f"F{d}", contagion=q)
                            for c, d, q in links),
                factor_qubits=k)


BOOKS = {
    "no links": make_book(5, [], seed=1),
    "chain": make_book(4, [(1, 0, 0.5), (2, 1, 0.4), (3, 2, 0.7)], seed=2),
    "star": make_book(5, [(1, 0, 0.3), (2, 0, 0.6), (3, 0, 0.2), (4, 0, 0.9)], seed=3),
    "two-way pair": make_book(3, [(0, 1, 0.4), (1, 0, 0.25)], seed=4),
    "three-cycle with tail": make_book(
        5, [(0, 1, 0.5), (1, 2, 0.35), (2, 0, 0.6), (3, 2, 0.3), (4, 3, 1.0)], seed=5),
    "certain default": make_book(3, [(1, 0, 0.5), (2, 1, 0.5)], seed=6),
}
# A stressed obligor: PD exactly 1 (stress scenarios may produce it).
_cd = BOOKS["certain default"]
BOOKS["certain default"] = Book(
    name=_cd.name, currency=_cd.currency, links=_cd.links, factor_qubits=_cd.factor_qubits,
    obligors=(Obligor(id="F0", ead=500.0, pd=1.0, lgd=0.5, asset_correlation=0.1),
              *_cd.obligors[1:]))


def reference(book: Book, nodes, weights) -> tuple[dict[float, float], np.ndarray]:
    model = LinkedFactorModel.from_book(book)
    return enumerate_law(model.ead, model.lgd, model.pd, model.asset_correlation,
                         list(zip(model.creditor.tolist(), model.debtor.tolist(),
                                  model.contagion.tolist(), strict=True)),
                         nodes, weights)


def as_dict(dist: LossDistribution) -> dict[float, float]:
    return {round(float(x), 9): float(p) for x, p in zip(dist.losses, dist.probabilities,
                                                         strict=True)}


def assert_same_law(a: dict[float, float], b: dict[float, float], tol: float) -> None:
    keys = set(a) | set(b)
    worst = max(abs(a.get(k, 0.0) - b.get(k, 0.0)) for k in keys)
    assert worst < tol, f"largest probability difference {worst:.3g}"


@pytest.mark.parametrize("name", list(BOOKS))
def test_circuit_and_exact_equal_enumeration_on_same_nodes(name: str) -> None:
    """Circuit and exact engines on the circuit's nodes both equal brute force to 1e-10."""
    book = BOOKS[name]
    model = LinkedFactorModel.from_book(book)
    grid = gauss_hermite(2**book.factor_qubits)
    ref_law, ref_dp = reference(book, grid.nodes, grid.weights)
    circuit = CircuitEngine().run(model)
    exact = ExactEngine(factor_grid=grid).run(model)
    assert_same_law(as_dict(circuit), ref_law, 1e-10)
    assert_same_law(as_dict(exact), ref_law, 1e-10)
    np.testing.assert_allclose(circuit.default_probability, ref_dp, atol=1e-10)
    np.testing.assert_allclose(exact.default_probability, ref_dp, atol=1e-10)


@pytest.mark.parametrize("name", list(BOOKS))
def test_engine_contract(name: str) -> None:
    """Each engine's law sums to 1, lies in [0, sum EAD*LGD], and EL = sum of final PD*EAD*LGD."""
    book = BOOKS[name]
    model = LinkedFactorModel.from_book(book)
    top = float(model.loss_given_default.sum())
    engines = [CircuitEngine(), ExactEngine(),
               SampleEngine(samples=20_000, seed=3, importance=False)]
    for engine in engines:
        d = engine.run(model)
        assert d.probabilities.sum() == pytest.approx(1.0, abs=1e-12)
        assert d.losses.min() >= -1e-9 and d.losses.max() <= top * (1 + 1e-12)
        by_obligor = float(d.default_probability @ model.loss_given_default)
        if d.samples is None:
            assert d.mean == pytest.approx(by_obligor, rel=1e-9)
        else:
            # the sampler reports an unreachable obligor's PD exactly (not its sampled
            # frequency), so the identity holds within the sampling error only
            assert abs(d.mean - by_obligor) < 4 * d.diagnostics["expected_loss_standard_error"]
            alone = ~model.reachable_by_links
            assert np.array_equal(d.default_probability[alone], model.pd[alone])


@pytest.mark.parametrize("name", list(BOOKS))
def test_sampler_agrees_with_exact_within_reported_error(name: str) -> None:
    """The sampler's EL and tail measures agree with the exact engine within its error."""
    model = LinkedFactorModel.from_book(BOOKS[name])
    exact = ExactEngine().run(model)
    for importance in (False, True):
        d = SampleEngine(samples=100_000, seed=17, importance=importance).run(model)
        se = d.diagnostics["expected_loss_standard_error"]
        assert abs(d.mean - exact.mean) < 4 * se + 1e-12, (importance, d.mean, exact.mean, se)
        # final default probabilities, binomial error at n samples (generous for IS weights)
        dp = np.clip(exact.default_probability, 0.0, 1.0)
        err = np.sqrt(dp * (1 - dp) / 100_000)
        assert np.all(np.abs(d.default_probability - exact.default_probability) < 6 * err + 1e-9)
    # the tail: P(L > VaR_0.99 of exact) matches
    var = value_at_risk(exact, 0.99)
    d = SampleEngine(samples=100_000, seed=5, importance=True).run(model)
    p_exact = float(exact.probabilities[exact.losses > var].sum())
    p_sample = float(d.probabilities[d.losses > var + 1e-9].sum())
    assert abs(p_sample - p_exact) < max(6 * np.sqrt(p_exact / 100_000), 1e-6)
    assert expected_shortfall(d, 0.99) == pytest.approx(expected_shortfall(exact, 0.99), rel=0.1)


def test_no_link_el_matches_pd_sum() -> None:
    """Without links, EL is sum PD*LGD*EAD: exact to 1e-9, circuit to its node error."""
    book = BOOKS["no links"]
    model = LinkedFactorModel.from_book(book)
    analytic = float(np.sum(model.pd * model.loss_given_default))
    assert ExactEngine().run(model).mean == pytest.approx(analytic, rel=1e-9)
    # Gauss-Hermite with 8 nodes integrates the smooth p(z) to ~1e-4 relative (measured)
    assert CircuitEngine().run(model).mean == pytest.approx(analytic, rel=1e-3)


def test_circuit_reports_node_error_and_run_notes_it() -> None:
    """At R = 0.99 the circuit's fixed nodes misstate PD; the law and the run say so."""
    from debtsim.options import RunOptions
    from debtsim.runner import run_book

    obligors = tuple(Obligor(id=f"S{i}", ead=100.0, pd=0.01, lgd=0.45, asset_correlation=0.99)
                     for i in range(4))
    book = Book(name="steep", currency="EUR", obligors=obligors, factor_qubits=5)
    model = LinkedFactorModel.from_book(book)
    d = CircuitEngine().run(model)
    assert d.diagnostics["factor_node_pd_error"] > 0.05
    # moderate correlation: 32 Gauss-Hermite nodes are accurate (measured ~1e-5 relative)
    calm = CircuitEngine().run(LinkedFactorModel.from_book(BOOKS["no links"]))
    assert calm.diagnostics["factor_node_pd_error"] < 1e-3
    run = run_book(book, RunOptions(engine="circuit", copula=False))
    assert any("factor nodes" in note for note in run.notes)
