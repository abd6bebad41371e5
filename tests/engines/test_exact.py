"""The ``exact`` engine: semi-analytic loss law conditional on the factor."""

from __future__ import annotations

import importlib.util

import numpy as np
import pytest
from scipy import integrate
from scipy.special import ndtr, ndtri
from scipy.stats import binom, norm

from debtsim.book.records import Book, Link, Obligor
from debtsim.engines.exact.engine import ExactEngine
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import adaptive_grid, gauss_hermite
from debtsim.model.specification import LinkedFactorModel, conditional_default_probability
from debtsim.risk import expected_shortfall, value_at_risk
from tests.reference import enumerate_law

# (ead, pd, lgd, R) per obligor; links as (creditor, debtor, q) on indices.
Spec = tuple[list[tuple[float, float, float, float]], list[tuple[int, int, float]]]

LINKED: dict[str, Spec] = {
    "two_way_pair": (
        [(100.0, 0.05, 0.45, 0.2), (150.0, 0.08, 0.55, 0.3), (60.0, 0.03, 0.45, 0.2)],
        [(0, 1, 0.4), (1, 0, 0.7)],
    ),
    "three_cycle_and_chain": (
        [(100.0, 0.05, 0.45, 0.2), (150.0, 0.08, 0.55, 0.3), (60.0, 0.1, 0.35, 0.12),
         (80.0, 0.04, 0.5, 0.1), (40.0, 0.02, 0.6, 0.25)],
        [(1, 0, 0.4), (2, 1, 0.7), (0, 2, 0.5), (4, 3, 0.6)],
    ),
    "cycle_with_tail": (
        [(100.0, 0.05, 0.45, 0.2), (200.0, 0.1, 0.6, 0.3), (50.0, 0.02, 0.4, 0.0),
         (80.0, 0.07, 0.5, 0.1), (120.0, 0.03, 0.45, 0.25)],
        [(0, 3, 0.6), (1, 0, 0.3), (0, 1, 0.5), (2, 1, 0.4), (4, 2, 0.7), (4, 0, 0.2)],
    ),
    "sure_default_in_cycle": (
        [(100.0, 0.05, 0.45, 0.2), (200.0, 1.0, 0.6, 0.3), (50.0, 0.02, 0.4, 0.15),
         (80.0, 1.0, 0.5, 0.0)],
        [(0, 1, 0.3), (2, 0, 0.5), (1, 2, 0.4)],
    ),
    "odd_exposures": (
        [(123.457, 0.031, 0.413, 0.17), (77.77, 0.09, 0.61, 0.29), (51.3, 0.02, 0.37, 0.08),
         (99.01, 0.06, 0.52, 0.21), (12.345, 0.15, 0.9, 0.33), (300.3, 0.01, 0.25, 0.12)],
        [(0, 1, 0.35), (1, 0, 0.55), (2, 1, 0.45), (3, 2, 0.2), (2, 3, 0.65), (5, 4, 0.9)],
    ),
}


def make_model(spec: Spec) -> LinkedFactorModel:
    obligors, links = spec
    book = Book(
        name="test",
        currency="EUR",
        obligors=tuple(
            Obligor(id=f"O{i}", ead=e, pd=p, lgd=g, asset_correlation=r)
            for i, (e, p, g, r) in enumerate(obligors)
        ),
        links=tuple(Link(creditor=f"O{c}", debtor=f"O{d}", contagion=q) for c, d, q in links),
    )
    return LinkedFactorModel.from_book(book)


def arrays_model(ead, pd, lgd, rho) -> LinkedFactorModel:
    rows = zip(ead, pd, lgd, rho, strict=True)
    return make_model(([(float(e), float(p), float(g), float(r)) for e, p, g, r in rows], []))


def homogeneous(n: int, pd: float, rho: float, lgd: float = 1.0) -> LinkedFactorModel:
    return make_model(([(1.0, pd, lgd, rho)] * n, []))


def rating_book(n: int, seed: int = 0) -> LinkedFactorModel:
    """Heterogeneous book: rating-grade PDs, Basel correlations, lognormal exposures."""
    rng = np.random.default_rng(seed)
    grades = np.array([3e-4, 5e-4, 8e-4, 0.0012, 0.002, 0.003, 0.005, 0.008, 0.012, 0.018,
                       0.027, 0.04, 0.06, 0.09, 0.13, 0.2])
    pd = grades[np.clip(np.round(rng.normal(7, 2.5, n)), 0, grades.size - 1).astype(int)]
    w = (1 - np.exp(-50 * pd)) / (1 - np.exp(-50))
    rho = 0.12 * w + 0.24 * (1 - w)
    lgd = rng.choice([0.25, 0.45, 0.75], n, p=[0.2, 0.6, 0.2])
    ead = rng.lognormal(np.log(250_000), 1.0, n)
    return arrays_model(ead, pd, lgd, rho)


def law_error(losses: np.ndarray, probs: np.ndarray, reference: dict[float, float]) -> float:
    mine: dict[float, float] = {}
    for x, p in zip(losses, probs, strict=True):
        key = round(float(x), 6)
        mine[key] = mine.get(key, 0.0) + float(p)
    ref = {round(float(x), 6): float(p) for x, p in reference.items()}
    return max(abs(mine.get(x, 0.0) - ref.get(x, 0.0)) for x in set(mine) | set(ref))


def spec_columns(spec: Spec):
    obligors, links = spec
    ead, pd, lgd, rho = (list(col) for col in zip(*obligors, strict=True))
    return ead, pd, lgd, rho, links


# ---------------------------------------------------------------- brute force
@pytest.mark.parametrize("name", sorted(LINKED))
def test_linked_books_match_enumeration(name: str) -> None:
    """On the same nodes, linked books with cycles equal brute-force enumeration to 1e-9."""
    spec = LINKED[name]
    grid = gauss_hermite(8)
    dist = ExactEngine(factor_grid=grid).run(make_model(spec))
    ead, pd, lgd, rho, links = spec_columns(spec)
    # independent reference: every own-default and live-link pattern (tests/reference.py)
    law, dp = enumerate_law(ead, lgd, pd, rho, links, grid.nodes, grid.weights)
    assert law_error(dist.losses, dist.probabilities, law) < 1e-9
    np.testing.assert_allclose(dist.default_probability, dp, rtol=0, atol=1e-9)
    assert dist.engine == "exact" and dist.samples is None and dist.seed is None
    assert dist.settings["factor_nodes"] == 8
    assert dist.settings["factor_method"] == "gauss-hermite-8"


def test_exact_grid_with_links_matches_enumeration() -> None:
    """Exposures on a common unit use an exact grid, links included, equal to enumeration."""
    obligors = [(200.0 * (i % 4 + 1), 0.02 + 0.01 * i, 0.45, 0.1 + 0.02 * i) for i in range(7)]
    links = [(0, 1, 0.5), (1, 0, 0.3), (2, 1, 0.4), (4, 3, 0.6), (5, 4, 0.2), (3, 5, 0.7)]
    spec: Spec = (obligors, links)
    grid = gauss_hermite(6)
    dist = ExactEngine(factor_grid=grid).run(make_model(spec))
    assert dist.settings["loss_support"] == "exact-grid"
    assert dist.settings["grid_unit"] == pytest.approx(90.0)
    assert dist.diagnostics["discretisation_error"] == 0.0
    ead, pd, lgd, rho, links = spec_columns(spec)
    law, dp = enumerate_law(ead, lgd, pd, rho, links, grid.nodes, grid.weights)
    assert law_error(dist.losses, dist.probabilities, law) < 1e-9
    np.testing.assert_allclose(dist.default_probability, dp, rtol=0, atol=1e-9)


def test_sure_default_is_certain() -> None:
    """An obligor with PD exactly 1 defaults in every scenario and its loss is always there."""
    spec: Spec = ([(100.0, 1.0, 0.5, 0.2), (60.0, 0.05, 0.4, 0.1), (30.0, 0.1, 0.3, 0.3)], [])
    dist = ExactEngine().run(make_model(spec))
    assert dist.default_probability[0] == pytest.approx(1.0, abs=1e-15)
    assert dist.losses[0] == pytest.approx(50.0)
    assert dist.mean == pytest.approx(50.0 + 60 * 0.05 * 0.4 + 30 * 0.1 * 0.3, rel=1e-9)


def test_obligor_order_does_not_matter() -> None:
    """Permuting the obligors (links renumbered) leaves the law unchanged."""
    spec = LINKED["cycle_with_tail"]
    obligors, links = spec
    perm = [3, 0, 4, 1, 2]
    where = {old: new for new, old in enumerate(perm)}
    permuted: Spec = ([obligors[i] for i in perm], [(where[c], where[d], q) for c, d, q in links])
    a = ExactEngine().run(make_model(spec))
    b = ExactEngine().run(make_model(permuted))
    np.testing.assert_allclose(a.losses, b.losses, rtol=1e-12)
    np.testing.assert_allclose(a.probabilities, b.probabilities, rtol=0, atol=1e-12)
    np.testing.assert_allclose(a.default_probability[perm], b.default_probability, atol=1e-12)


# ---------------------------------------------------------------- circuit engine
CIRCUIT_AVAILABLE = importlib.util.find_spec("qiskit_aer") is not None


@pytest.mark.skipif(not CIRCUIT_AVAILABLE, reason="circuit engine not present")
@pytest.mark.parametrize("name", ["two_way_pair", "three_cycle_and_chain", "odd_exposures"])
def test_matches_circuit_engine(name: str) -> None:
    """On the circuit's Gauss–Hermite nodes the exact and circuit laws agree to 1e-9."""
    from debtsim.engines.circuit.engine import CircuitEngine

    model = make_model(LINKED[name])
    grid = gauss_hermite(2**model.factor_qubits)
    circuit = CircuitEngine().run(model)
    exact = ExactEngine(factor_grid=grid).run(model)
    reference = dict(zip(circuit.losses.tolist(), circuit.probabilities.tolist(), strict=True))
    assert law_error(exact.losses, exact.probabilities, reference) < 1e-9
    np.testing.assert_allclose(exact.default_probability, circuit.default_probability, atol=1e-9)


# ---------------------------------------------------------------- binomial mixture
def mixture_cdf(k: int, n: int, pd: float, rho: float) -> float:
    """P(at most k of n default): scipy quad of the binomial mixture (REFERENCES.md)."""
    centre = (ndtri(pd) - np.sqrt(1 - rho) * ndtri(min(max((k + 0.5) / n, 1e-12), 1 - 1e-12))) \
        / np.sqrt(rho)

    def f(z: float) -> float:
        p = float(ndtr((ndtri(pd) - np.sqrt(rho) * z) / np.sqrt(1 - rho)))
        return float(binom.cdf(k, n, p) * norm.pdf(z))

    pieces = [-12.0, centre - 1.0, centre - 0.1, centre, centre + 0.1, centre + 1.0, 12.0]
    return sum(integrate.quad(f, a, b, limit=200, epsabs=1e-14, epsrel=1e-12)[0]
               for a, b in zip(pieces[:-1], pieces[1:], strict=True))


def mixture_tail_mean(k: int, n: int, pd: float, rho: float) -> float:
    """E[K 1{K > k}] of the binomial mixture by scipy quad, using E[K 1{K>k}] = n p P(B' >= k)."""
    def f(z: float) -> float:
        p = float(ndtr((ndtri(pd) - np.sqrt(rho) * z) / np.sqrt(1 - rho)))
        return float(n * p * binom.sf(k - 1, n - 1, p) * norm.pdf(z))

    centre = (ndtri(pd) - np.sqrt(1 - rho) * ndtri(k / n)) / np.sqrt(rho)
    pieces = [-12.0, centre - 1.0, centre, centre + 1.0, 12.0]
    return sum(integrate.quad(f, a, b, limit=200, epsabs=1e-14, epsrel=1e-12)[0]
               for a, b in zip(pieces[:-1], pieces[1:], strict=True))


def test_published_sixteen_loan_values() -> None:
    """A 16-loan homogeneous book hits the published binomial-mixture values."""
    dist = ExactEngine().run(homogeneous(16, 0.01, 0.2))
    # REFERENCES.md, finite homogeneous book (scipy quad): n=16, PD=1%, R=0.2
    np.testing.assert_allclose(dist.cdf[:3], [0.8708165, 0.9764032, 0.9946722], atol=5e-8)
    assert dist.settings["loss_support"] == "exact-grid"


def test_small_book_law_equals_binomial_mixture() -> None:
    """Every atom of a 40-loan homogeneous book equals the quad binomial mixture to 1e-9."""
    n, pd, rho = 40, 0.02, 0.25
    dist = ExactEngine().run(homogeneous(n, pd, rho))
    np.testing.assert_allclose(dist.losses, np.arange(dist.losses.size))
    # finite homogeneous book integrated with scipy quad (REFERENCES.md)
    expected = np.array([mixture_cdf(k, n, pd, rho) for k in range(12)])
    np.testing.assert_allclose(dist.cdf[:12], expected, rtol=0, atol=1e-9)


@pytest.fixture(scope="module")
def big_homogeneous():
    """The 50,000-loan book of the issue: PD 1%, R 0.1928, LGD 45%."""
    model = homogeneous(50_000, 0.01, 0.1928, lgd=0.45)
    return model, ExactEngine().run(model)


def test_big_book_var_and_es_match_binomial_mixture(big_homogeneous) -> None:
    """The 50,000-loan book's VaR and ES at 99.9% equal those of the quad binomial mixture."""
    model, dist = big_homogeneous
    n, pd, rho, a = 50_000, 0.01, 0.1928, 0.999
    var_defaults = int(round(value_at_risk(dist, a) / 0.45))
    # adaptive quad of the binomial mixture: the 99.9% quantile is 7,016 defaults
    below, at = mixture_cdf(var_defaults - 1, n, pd, rho), mixture_cdf(var_defaults, n, pd, rho)
    assert below < a <= at
    assert var_defaults == 7016
    # the law's CDF at the quantile agrees with quad to 1e-8
    assert dist.cdf[var_defaults] == pytest.approx(at, abs=1e-8)
    # Acerbi-Tasche ES of the mixture from quad
    es_ref = (mixture_tail_mean(var_defaults, n, pd, rho) + var_defaults * (at - a)) / (1 - a)
    assert expected_shortfall(dist, a) / 0.45 == pytest.approx(es_ref, rel=1e-6)
    assert dist.mean == pytest.approx(n * pd * 0.45, rel=1e-9)


def test_big_book_var_near_vasicek_limit(big_homogeneous) -> None:
    """VaR99.9 of 50,000 loans lies within 0.1% of the large-book limit; 128 GH nodes do not."""
    model, dist = big_homogeneous
    n, pd, rho, a = 50_000, 0.01, 0.1928, 0.999
    # Vasicek (Risk, 2002) large homogeneous book: quantile of the loss fraction
    limit = n * ndtr((ndtri(pd) + np.sqrt(rho) * ndtri(a)) / np.sqrt(1 - rho))
    assert limit == pytest.approx(7014.2, abs=0.05)
    assert value_at_risk(dist, a) / 0.45 == pytest.approx(limit, rel=1e-3)
    # a fixed Gauss-Hermite rule snaps the quantile to a node: about 7% too high
    snapped = ExactEngine(factor_grid=gauss_hermite(128)).run(model)
    assert value_at_risk(snapped, a) / 0.45 > 1.05 * limit


def test_refining_factor_grid_does_not_move_tail(big_homogeneous) -> None:
    """Doubling the factor resolution moves VaR and ES at 99.9% by less than 0.01%."""
    model, dist = big_homogeneous
    fine = ExactEngine(factor_resolution=2 * ExactEngine().factor_resolution).run(model)
    assert fine.settings["factor_nodes"] > 1.8 * dist.settings["factor_nodes"]
    for level in (0.99, 0.999):
        assert value_at_risk(fine, level) == pytest.approx(value_at_risk(dist, level), rel=1e-4)
        assert expected_shortfall(fine, level) == pytest.approx(
            expected_shortfall(dist, level), rel=1e-4
        )


# ---------------------------------------------------------------- heterogeneous books
@pytest.fixture(scope="module")
def rating_3000():
    model = rating_book(3000, seed=3)
    return model, ExactEngine().run(model)


def test_refining_heterogeneous_book_does_not_move_tail(rating_3000) -> None:
    """Finer factor grid and 4x finer loss grid move VaR/ES at 99.9% by less than 0.1%."""
    model, dist = rating_3000
    assert dist.settings["loss_support"] == "grid"
    finer_factor = ExactEngine(factor_resolution=3.0, factor_order=12).run(model)
    finer_loss = ExactEngine(grid_points=4 * dist.settings["grid_points"]).run(model)
    for other in (finer_factor, finer_loss):
        for level in (0.99, 0.999):
            assert value_at_risk(other, level) == pytest.approx(value_at_risk(dist, level),
                                                                rel=1e-3)
            assert expected_shortfall(other, level) == pytest.approx(
                expected_shortfall(dist, level), rel=1e-3
            )


def test_expected_loss_exact_with_arbitrary_exposures(rating_3000) -> None:
    """Exposures that are no multiple of the grid unit still give EL = sum PD*LGD*EAD to 1e-9."""
    model, dist = rating_3000
    assert not dist.diagnostics["grid_exact"]
    target = float(np.sum(model.pd * model.lgd * model.ead))
    assert dist.mean == pytest.approx(target, rel=1e-9)
    np.testing.assert_allclose(dist.default_probability, model.pd, rtol=1e-9)
    # losses are exact multiples of the reported unit
    unit = dist.settings["grid_unit"]
    np.testing.assert_allclose(dist.losses / unit, np.round(dist.losses / unit), atol=1e-6)
    assert dist.probabilities.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.all(dist.probabilities >= 0)


def test_rounded_grid_error_within_reported_bound() -> None:
    """A rounded grid's VaR/ES differ from the exact-support law by less than the reported error."""
    rng = np.random.default_rng(11)
    n = 16
    model = arrays_model(rng.uniform(10, 200, n), rng.uniform(0.01, 0.15, n),
                         rng.uniform(0.2, 0.8, n), rng.uniform(0.05, 0.35, n))
    exact = ExactEngine().run(model)
    assert exact.settings["loss_support"] == "atoms"
    rounded = ExactEngine(exact_support_limit=1, grid_points=4096).run(model)
    assert rounded.settings["loss_support"] == "grid"
    error = rounded.diagnostics["discretisation_error"]
    assert 0 < error < 0.01 * value_at_risk(exact, 0.99)
    assert rounded.mean == pytest.approx(exact.mean, rel=1e-9)
    for level in (0.9, 0.99, 0.999):
        assert abs(value_at_risk(rounded, level) - value_at_risk(exact, level)) <= error
        assert abs(expected_shortfall(rounded, level) - expected_shortfall(exact, level)) <= error


def test_rounded_grid_with_links_close_to_exact_support() -> None:
    """With links, the grid law (forced) agrees with the exact-support law within its error."""
    obligors, links = LINKED["odd_exposures"]
    extra = [(37.3 + 11.1 * i, 0.02 + 0.005 * i, 0.45, 0.15) for i in range(10)]
    spec: Spec = (obligors + extra, links + [(7, 8, 0.5), (8, 9, 0.25)])
    model = make_model(spec)
    exact = ExactEngine().run(model)
    assert exact.settings["loss_support"] == "atoms"
    rounded = ExactEngine(exact_support_limit=1, grid_points=8192).run(model)
    assert rounded.settings["linked_groups"] == 3
    error = rounded.diagnostics["discretisation_error"]
    assert rounded.mean == pytest.approx(exact.mean, rel=1e-9)
    np.testing.assert_allclose(rounded.default_probability, exact.default_probability, atol=1e-12)
    for level in (0.99, 0.999):
        assert abs(value_at_risk(rounded, level) - value_at_risk(exact, level)) <= error


def test_expected_loss_with_links_uses_final_default_probabilities() -> None:
    """With links EL equals sum of final PD * LGD * EAD to 1e-9, above the copula EL."""
    rng = np.random.default_rng(5)
    n = 400
    obligors = [(float(e), float(p), float(g), float(r)) for e, p, g, r in zip(
        rng.lognormal(4, 1, n), rng.uniform(0.005, 0.05, n), rng.uniform(0.2, 0.7, n),
        rng.uniform(0.1, 0.3, n), strict=True)]
    links = [(i + 1, i, 0.4) for i in range(0, 60, 3)] + [(i, i + 1, 0.3) for i in range(0, 60, 3)]
    model = make_model((obligors, links))
    dist = ExactEngine().run(model)
    assert dist.settings["loss_support"] == "grid"
    final = float(np.sum(dist.default_probability * model.ead * model.lgd))
    assert dist.mean == pytest.approx(final, rel=1e-9)
    assert final > float(np.sum(model.pd * model.ead * model.lgd))


# ---------------------------------------------------------------- refusal, hooks, grid
def test_refuses_large_link_group_naming_sampler() -> None:
    """A linked group above the limit is refused with a message that names the sample engine."""
    obligors = [(100.0, 0.02, 0.45, 0.2)] * 20
    links = [(i + 1, i, 0.3) for i in range(19)]
    model = make_model((obligors, links))
    engine = ExactEngine(max_component_size=16)
    reason = engine.refusal(model)
    assert reason is not None and "20 linked obligors" in reason and "sample" in reason
    with pytest.raises(EngineRefusedError, match="sample"):
        engine.run(model)
    assert ExactEngine(max_component_size=20).refusal(model) is None


def test_progress_hook_reaches_total() -> None:
    """The progress hook is called per node batch and ends at the node count."""
    calls: list[tuple[int, int]] = []
    ExactEngine(node_batch=16).run(homogeneous(30, 0.02, 0.2), progress=lambda d, t: calls.append(
        (d, t)))
    assert len(calls) > 1 and calls[-1][0] == calls[-1][1]


def test_adaptive_grid_integrates_the_normal() -> None:
    """The composite Gauss–Legendre grid integrates moments and default probabilities."""
    grid = adaptive_grid(lambda z: 4.0 + 40.0 * np.exp(-0.5 * (z + 3.0) ** 2))
    assert grid.weights.sum() == pytest.approx(1.0, abs=1e-15)
    assert np.all(np.diff(grid.nodes) > 0)
    assert grid.weights @ grid.nodes == pytest.approx(0.0, abs=1e-11)
    assert grid.weights @ grid.nodes**2 == pytest.approx(1.0, abs=1e-11)
    assert grid.weights @ grid.nodes**4 == pytest.approx(3.0, abs=1e-10)
    for pd, rho in ((1e-4, 0.24), (0.01, 0.12), (0.2, 0.3)):
        p = conditional_default_probability(np.array([pd]), np.array([rho]), grid.nodes)[:, 0]
        assert grid.weights @ p == pytest.approx(pd, rel=1e-10)
    dense = np.sum((grid.nodes > -4) & (grid.nodes < -2))
    assert dense > 2 * np.sum((grid.nodes > 2) & (grid.nodes < 4))


def test_default_grid_dense_where_large_book_is_sharp(big_homogeneous) -> None:
    """The default grid puts far more nodes in the tail region of a large book than elsewhere."""
    model, dist = big_homogeneous
    grid = ExactEngine().default_factor_grid(model)
    assert len(grid) == dist.settings["factor_nodes"]
    tail = np.sum((grid.nodes > -4.5) & (grid.nodes < -2.0))
    right = np.sum((grid.nodes > 2.0) & (grid.nodes < 4.5))
    assert tail > 5 * right


# ---------------------------------------------------------------- large book (slow)
@pytest.mark.slow
def test_twenty_thousand_obligor_book() -> None:
    """A 20,000-obligor heterogeneous book: EL to 1e-9, stable tail under refinement."""
    model = rating_book(20_000, seed=1)
    dist = ExactEngine().run(model)
    target = float(np.sum(model.pd * model.lgd * model.ead))
    assert dist.mean == pytest.approx(target, rel=1e-9)
    finer = ExactEngine(factor_resolution=3.0, grid_points=2**19).run(model)
    for level in (0.99, 0.999):
        assert value_at_risk(finer, level) == pytest.approx(value_at_risk(dist, level), rel=1e-3)
        assert expected_shortfall(finer, level) == pytest.approx(
            expected_shortfall(dist, level), rel=1e-3
        )


def test_default_grid_with_pd_near_one_beside_a_small_pd() -> None:
    """PD 0.999999 next to a small-PD obligor gives a modest grid and the brute-force law."""
    # 1 - p(z) of the near-certain default rounds to 0 where its slope does not; the node
    # density once divided by that zero variance and asked for 2.7e8 nodes (ValueError)
    spec: Spec = (
        [(6.308, 0.05, 0.45, 0.99), (2.099, 0.999999, 0.3, 0.9), (1874.245, 0.002, 0.45, 0.9)],
        [(2, 0, 1.0), (0, 2, 0.5)],
    )
    model = make_model(spec)
    engine = ExactEngine()
    grid = engine.default_factor_grid(model)
    assert len(grid) < 2000
    dist = engine.run(model)
    ead, pd, lgd, rho, links = spec_columns(spec)
    # independent reference on the same nodes (tests/reference.py)
    law, dp = enumerate_law(ead, lgd, pd, rho, links, grid.nodes, grid.weights)
    assert law_error(dist.losses, dist.probabilities, law) < 1e-9
    np.testing.assert_allclose(dist.default_probability, dp, rtol=0, atol=1e-9)


def test_denormal_conditional_pd_raises_no_warning() -> None:
    """An R = 0.99 obligor, whose p(z) goes denormal in the tail, runs without a RuntimeWarning."""
    # RuntimeWarnings are errors in the test run; the exact EL is EAD * LGD * PD
    model = make_model(([(3.885, 0.002, 0.0, 0.2), (5.261, 0.05, 0.45, 0.99)], []))
    dist = ExactEngine().run(model)
    assert dist.mean == pytest.approx(5.261 * 0.45 * 0.05, rel=1e-12)
