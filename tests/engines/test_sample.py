"""Tests of the ``sample`` engine: plain Monte Carlo and importance sampling of the cascade."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate
from scipy.special import comb
from scipy.stats import binom, norm

from debtsim.book.records import Book, Link, Obligor
from debtsim.distribution import LossDistribution
from debtsim.engines import make_engine
from debtsim.engines.sample.engine import SampleEngine, plan_importance
from debtsim.engines.sample.scenario_draws import (
    BLOCK,
    exact_log_normaliser,
    thresholds,
)
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from debtsim.options import RunOptions
from debtsim.risk import expected_shortfall, level_key, value_at_risk
from tests.reference import enumerate_law

LEVELS = (0.99, 0.999)


# ------------------------------------------------------------------ helpers
def make_model(ead, lgd, pd, rho, links=()) -> LinkedFactorModel:
    """Model of a small book; ``links`` as (creditor, debtor, q) with indices."""
    obligors = tuple(
        Obligor(id=f"o{i}", ead=ead[i], pd=pd[i], lgd=lgd[i], asset_correlation=rho[i])
        for i in range(len(ead))
    )
    lk = tuple(Link(creditor=f"o{c}", debtor=f"o{d}", contagion=q) for c, d, q in links)
    return LinkedFactorModel.from_book(Book(name="t", currency="EUR", obligors=obligors, links=lk))


def reference_law(ead, lgd, pd, rho, links=(), nodes=64):
    """Brute-force law on many Gauss–Hermite nodes (smooth quantities to ~1e-10)."""
    grid = gauss_hermite(nodes)
    law, dp = enumerate_law(ead, lgd, pd, rho, list(links), grid.nodes, grid.weights)
    losses = np.array(sorted(law))
    probs = np.array([law[x] for x in losses])
    return losses, probs, dp


def homogeneous_counts(n: int, pd: float, rho: float) -> np.ndarray:
    """``P(k of n default)`` of the one-factor model, by quadrature over the factor."""
    c = norm.ppf(pd)

    def p(z: float) -> float:
        return float(norm.cdf((c - math.sqrt(rho) * z) / math.sqrt(1.0 - rho)))

    out = np.empty(n + 1)
    for k in range(n + 1):

        def integrand(z: float, k: int = k) -> float:
            pz = p(z)
            return comb(n, k) * pz**k * (1.0 - pz) ** (n - k) * norm.pdf(z)

        out[k] = integrate.quad(integrand, -12, 12, epsabs=1e-14, epsrel=1e-12, limit=200)[0]
    return out


def tail_estimate(losses, weights, threshold):
    """Unbiased importance-sampling estimate of ``P(L > threshold)`` and its standard error."""
    x = weights * (losses > threshold + 1e-9)
    return float(x.mean()), float(x.std(ddof=1) / math.sqrt(x.size))


# Tiny linked books: (ead, lgd, pd, rho, links as (creditor, debtor, q))
TINY_BOOKS = {
    "chain": (
        [1.0, 2.0, 1.5],
        [0.6, 0.4, 0.8],
        [0.04, 0.08, 0.02],
        [0.2, 0.1, 0.3],
        [(1, 0, 0.6), (2, 1, 0.4)],
    ),
    "star": (
        [2.0, 1.0, 1.0, 3.0],
        [0.5, 0.7, 0.3, 0.4],
        [0.06, 0.02, 0.05, 0.03],
        [0.25, 0.15, 0.2, 0.1],
        [(1, 0, 0.5), (2, 0, 0.3), (3, 0, 0.8)],
    ),
    "two-cycle": (
        [1.0, 2.5],
        [0.5, 0.45],
        [0.05, 0.03],
        [0.2, 0.24],
        [(1, 0, 0.5), (0, 1, 0.7)],
    ),
    "three-cycle": (
        [1.0, 2.0, 1.5],
        [0.5, 0.4, 1.0],
        [0.02, 0.05, 0.01],
        [0.2, 0.1, 0.3],
        [(1, 0, 0.5), (2, 1, 0.3), (0, 2, 0.7)],
    ),
}


# ------------------------------------------------------------- construction
def test_bad_settings_are_refused_with_the_argument_named():
    """Wrong settings raise TypeError/ValueError naming the argument and the value."""
    with pytest.raises(TypeError, match="seed"):
        SampleEngine(samples=10, seed="7")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="samples"):
        SampleEngine(samples=0, seed=1)
    with pytest.raises(ValueError, match="1.5"):
        SampleEngine(samples=10, seed=1, levels=(0.99, 1.5))
    with pytest.raises(ValueError, match="chunk"):
        SampleEngine(samples=10, seed=1, chunk=0)


def test_registry_builds_the_sample_engine():
    """``make_engine('sample', ...)`` gives a SampleEngine with the settings passed."""
    engine = make_engine("sample", RunOptions(samples=123, seed=5, levels=(0.95,)))
    assert isinstance(engine, SampleEngine)
    assert (engine.samples, engine.seed, engine.levels) == (123, 5, (0.95,))


# ------------------------------------------------------- against enumeration
@pytest.mark.parametrize("importance", [False, True])
@pytest.mark.parametrize("name", sorted(TINY_BOOKS))
def test_tiny_linked_books_match_enumeration(name, importance):
    """EL and final default probabilities agree with brute-force enumeration within 4 SE."""
    ead, lgd, pd, rho, links = TINY_BOOKS[name]
    # reference: tests/reference.enumerate_law on 64 Gauss–Hermite nodes
    losses, probs, dp_ref = reference_law(ead, lgd, pd, rho, links)
    el_ref = float(losses @ probs)
    model = make_model(ead, lgd, pd, rho, links)
    dist = SampleEngine(samples=60_000, seed=11, importance=importance).run(model)
    se = dist.diagnostics["expected_loss_standard_error"]
    assert abs(dist.mean - el_ref) < 4 * se
    dp_se = np.asarray(dist.diagnostics["default_probability_standard_error"])
    # an obligor no link reaches has its PD exactly, with no sampling error (by construction)
    alone = ~model.reachable_by_links
    assert np.array_equal(dist.default_probability[alone], np.asarray(pd)[alone])
    assert np.all(dp_se[alone] == 0.0)
    reach = model.reachable_by_links
    # binomial standard error for plain sampling, its weighted form under importance sampling
    if not importance:
        p = dist.default_probability[reach]
        np.testing.assert_allclose(dp_se[reach], np.sqrt(p * (1 - p) / 60_000), rtol=1e-3)
    assert np.all(np.abs(dist.default_probability - dp_ref)[reach] < 4 * dp_se[reach])
    assert dist.settings["importance"] is importance


def test_certain_default_and_zero_lgd_are_handled():
    """A PD of 1 defaults in every scenario and an LGD of 0 adds no loss, with and without IS."""
    ead, lgd, pd, rho = [1.0, 2.0, 1.5], [0.5, 0.0, 0.8], [1.0, 0.05, 0.03], [0.2, 0.1, 0.3]
    links = [(1, 0, 0.5), (2, 1, 0.4)]
    # reference: tests/reference.enumerate_law (handles PD = 1 as p(z) = 1)
    losses, probs, dp_ref = reference_law(ead, lgd, pd, rho, links)
    model = make_model(ead, lgd, pd, rho, links)
    for importance in (False, True):
        dist = SampleEngine(samples=40_000, seed=3, importance=importance).run(model)
        assert dist.default_probability[0] == 1.0
        assert dist.losses.min() >= 0.5 - 1e-12  # the certain loss of obligor 0
        se = dist.diagnostics["expected_loss_standard_error"]
        assert abs(dist.mean - float(losses @ probs)) < 4 * se + 1e-12
        dp_se = np.asarray(dist.diagnostics["default_probability_standard_error"])
        assert np.all(np.abs(dist.default_probability - dp_ref) < 4 * dp_se + 1e-12)


# -------------------------------------------------- independent homogeneous book
@pytest.fixture(scope="module")
def binomial_mixture() -> np.ndarray:
    """Law of the default count of 16 loans, PD 1%, R 0.2 (finite homogeneous book)."""
    return homogeneous_counts(16, 0.01, 0.2)


def test_quadrature_reference_reproduces_published_values(binomial_mixture):
    """The quadrature reproduces the check values of the finite homogeneous book."""
    cdf = np.cumsum(binomial_mixture)
    # REFERENCES.md, finite homogeneous book: n=16, PD=1%, R=0.2
    assert cdf[0] == pytest.approx(0.8708165, abs=5e-8)
    assert cdf[1] == pytest.approx(0.9764032, abs=5e-8)
    assert cdf[2] == pytest.approx(0.9946722, abs=5e-8)
    assert cdf[-1] == pytest.approx(1.0, abs=1e-10)


@pytest.mark.parametrize("importance", [False, True])
def test_homogeneous_book_matches_binomial_mixture(binomial_mixture, importance):
    """CDF values within 4 SE and VaR at 0.99/0.999 equal the binomial-mixture law."""
    n = 16
    model = make_model([1.0] * n, [1.0] * n, [0.01] * n, [0.2] * n)
    engine = SampleEngine(samples=100_000, seed=21, importance=importance)
    scen, _ = engine.simulate(model)
    dist = engine.run(model)
    ref_cdf = np.cumsum(binomial_mixture)
    for k in range(6):
        # unbiased estimate of P(L <= k) = 1 - P(L > k)
        est, se = tail_estimate(scen.losses, scen.weights, float(k))
        assert abs((1 - est) - ref_cdf[k]) < 4 * se
    for a in LEVELS:
        # finite homogeneous book, integrated with scipy.integrate.quad
        k_ref = int(np.searchsorted(ref_cdf, a))
        assert value_at_risk(dist, a) == pytest.approx(float(k_ref))


def test_importance_sampling_reduces_tail_variance(binomial_mixture):
    """At equal samples the IS standard error of P(L > VaR_0.999) is over 2x smaller."""
    n = 16
    model = make_model([1.0] * n, [1.0] * n, [0.01] * n, [0.2] * n)
    var_ref = float(np.searchsorted(np.cumsum(binomial_mixture), 0.999))
    ses = {}
    for importance in (False, True):
        scen, _ = SampleEngine(samples=50_000, seed=5, importance=importance).simulate(model)
        ses[importance] = tail_estimate(scen.losses, scen.weights, var_ref)[1]
    assert ses[False] > 2 * ses[True]
    dist = SampleEngine(samples=50_000, seed=5, importance=True).run(model)
    plain = SampleEngine(samples=50_000, seed=5, importance=False).run(model)
    key = level_key(0.999)
    tail_se = "tail_probability_standard_error"
    assert plain.diagnostics[tail_se][key] > 2 * dist.diagnostics[tail_se][key]


# --------------------------------------------------------------- unbiasedness
UNBIASED_CASES = [
    # (name, model arguments, seed)
    ("homogeneous", ([1.0] * 16, [1.0] * 16, [0.01] * 16, [0.2] * 16, []), 31),
    ("three-cycle", (*TINY_BOOKS["three-cycle"],), 32),
    ("star", (*TINY_BOOKS["star"],), 33),
]


@pytest.mark.parametrize(
    ("name", "args", "seed"), UNBIASED_CASES, ids=[c[0] for c in UNBIASED_CASES]
)
def test_importance_estimates_are_unbiased(name, args, seed, binomial_mixture):
    """IS estimates of P(L > l), the mean weight and ES_0.999 agree with the reference."""
    ead, lgd, pd, rho, links = args
    if name == "homogeneous":
        # finite homogeneous book, integrated with scipy.integrate.quad
        losses, probs = np.arange(17, dtype=float), binomial_mixture
    else:
        # tests/reference.enumerate_law on 64 Gauss–Hermite nodes
        losses, probs, _ = reference_law(ead, lgd, pd, rho, links)
    ref = LossDistribution.from_atoms(
        losses, probs, engine="reference", default_probability=np.zeros(len(ead))
    )
    model = make_model(ead, lgd, pd, rho, links)
    engine = SampleEngine(samples=80_000, seed=seed, importance=True)
    scen, plan = engine.simulate(model)
    assert plan is not None
    w = scen.weights
    assert abs(w.mean() - 1.0) < 4 * w.std(ddof=1) / math.sqrt(w.size)
    checked = 0
    for x in ref.losses[:-1]:
        if np.count_nonzero(scen.losses > x + 1e-9) < 30:
            continue  # too few hits for a trustworthy standard error
        est, se = tail_estimate(scen.losses, w, float(x))
        exact = float(ref.probabilities[ref.losses > x + 1e-9].sum())
        assert abs(est - exact) < 4 * se, (x, est, exact, se)
        checked += 1
    assert checked >= 3
    dist = engine.run(model)
    key = level_key(0.999)
    es_se = dist.diagnostics["expected_shortfall_standard_error"][key]
    assert abs(expected_shortfall(dist, 0.999) - expected_shortfall(ref, 0.999)) < 4 * es_se + 1e-9


def test_interpolated_log_normaliser_matches_the_exact_sum():
    """The Chebyshev interpolant of psi(theta(z), z) matches the exact sum to 1e-9."""
    rng = np.random.default_rng(0)
    n = 200
    model = make_model(
        list(rng.lognormal(0, 1, n)),
        list(rng.uniform(0.2, 0.7, n)),
        list(rng.uniform(0.001, 0.05, n)),
        list(rng.uniform(0.1, 0.3, n)),
    )
    plan = plan_importance(model, LEVELS)
    assert plan is not None
    a, b = thresholds(model)
    scaled = model.loss_given_default / plan.proposal.loss_scale
    for tp in plan.tilts:
        tilt = tp.tilt
        assert tilt.shift < 0 and tilt.psi is not None
        z = np.linspace(*tilt.window, 77)
        exact = exact_log_normaliser(a, b, scaled, tilt.twist(z), z)
        assert np.max(np.abs(tilt.psi(z) - exact)) < 1e-9
    # the higher level is aimed further into the tail
    assert plan.tilts[1].tilt.shift <= plan.tilts[0].tilt.shift
    assert plan.tilts[1].target_loss > plan.tilts[0].target_loss


# ---------------------------------------------------------- reproducibility
def test_same_seed_same_law_whatever_the_chunking():
    """Same seed gives the identical law whatever the chunk and thread counts."""
    ead, lgd, pd, rho, links = TINY_BOOKS["star"]
    model = make_model(ead, lgd, pd, rho, links)
    samples = BLOCK + 1000  # two blocks, the second partial
    runs = [
        SampleEngine(samples=samples, seed=9).run(model),
        SampleEngine(samples=samples, seed=9, chunk=7, workers=1).run(model),
        SampleEngine(samples=samples, seed=9, chunk=1000, workers=2).run(model),
    ]
    for other in runs[1:]:
        np.testing.assert_array_equal(runs[0].losses, other.losses)
        np.testing.assert_array_equal(runs[0].probabilities, other.probabilities)
        # per-obligor sums are added chunk by chunk: equal up to rounding
        np.testing.assert_allclose(
            runs[0].default_probability, other.default_probability, rtol=1e-13
        )
    different = SampleEngine(samples=samples, seed=10).run(model)
    assert not (
        different.losses.size == runs[0].losses.size
        and np.array_equal(different.probabilities, runs[0].probabilities)
    )
    assert runs[0].seed == 9 and runs[0].samples == samples and runs[0].engine == "sample"


def test_generator_seed_gives_fresh_draws():
    """A numpy Generator as seed is accepted; the law records no integer seed."""
    model = make_model(*TINY_BOOKS["chain"][:4], TINY_BOOKS["chain"][4])
    rng = np.random.default_rng(4)
    engine = SampleEngine(samples=2_000, seed=rng, importance=False)
    first, second = engine.run(model), engine.run(model)
    assert first.seed is None
    assert not np.array_equal(first.default_probability, second.default_probability)


# --------------------------------------------------------- outputs and hooks
def test_diagnostics_and_progress():
    """Diagnostics carry per-level errors keyed ``str(float)``; progress reaches the total."""
    model = make_model(*TINY_BOOKS["three-cycle"][:4], TINY_BOOKS["three-cycle"][4])
    calls: list[tuple[int, int]] = []
    samples = 3 * BLOCK + 5
    dist = SampleEngine(samples=samples, seed=1).run(
        model, progress=lambda done, total: calls.append((done, total))
    )
    assert calls[-1] == (samples, samples)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls)
    diag = dist.diagnostics
    for name in ("var_standard_error", "expected_shortfall_standard_error", "tail_probability"):
        assert set(diag[name]) == {"0.99", "0.999"}
    assert diag["expected_loss_standard_error"] > 0
    assert 0 < diag["effective_sample_size"] <= samples
    assert dist.settings["importance"] is True
    assert dist.settings["factor_shift"] < 0
    assert dist.probabilities.sum() == pytest.approx(1.0)


@pytest.mark.slow
def test_large_homogeneous_book_tail_matches_binomial_mixture():
    """On 1,000 loans the IS tail probabilities and VaR agree with the binomial mixture."""
    n, pd, rho = 1000, 0.01, 0.2
    c = norm.ppf(pd)

    def tail(k: int) -> float:
        # finite homogeneous book: P(K > k) = integral of the binomial tail over the factor
        def f(z: float) -> float:
            p = norm.cdf((c - math.sqrt(rho) * z) / math.sqrt(1 - rho))
            return float(binom.sf(k, n, p) * norm.pdf(z))

        return integrate.quad(f, -12, 12, limit=400, epsabs=1e-13, epsrel=1e-10)[0]

    model = make_model([1.0] * n, [1.0] * n, [pd] * n, [rho] * n)
    engine = SampleEngine(samples=200_000, seed=77)
    scen, _ = engine.simulate(model)
    dist = engine.run(model)
    for a in LEVELS:
        v = value_at_risk(dist, a)
        for k in (int(v) - 5, int(v), int(v) + 5):
            est, se = tail_estimate(scen.losses, scen.weights, float(k))
            assert abs(est - tail(k)) < 4 * se
        # the reference quantile lies within one loan of the sampled one
        k_ref = int(v) - 3
        while tail(k_ref) > 1 - a:
            k_ref += 1
        assert abs(v - k_ref) <= 1


def test_exact_log_normaliser_path_gives_the_same_weights(monkeypatch):
    """Forcing the exact per-scenario psi changes the weights by less than 1e-9 relative."""
    import debtsim.engines.sample.engine as sample_module

    model = make_model(*TINY_BOOKS["star"][:4], TINY_BOOKS["star"][4])
    engine = SampleEngine(samples=6_000, seed=2)
    interpolated, plan = engine.simulate(model)
    assert plan is not None and all(t.tilt.psi is not None for t in plan.tilts)
    monkeypatch.setattr(sample_module, "LOG_WEIGHT_TOLERANCE", -1.0)
    exact, plan_exact = engine.simulate(model)
    assert plan_exact is not None and all(t.tilt.psi is None for t in plan_exact.tilts)
    np.testing.assert_array_equal(interpolated.losses, exact.losses)
    np.testing.assert_allclose(interpolated.weights, exact.weights, rtol=1e-9)


def test_exact_log_normaliser_is_zero_where_p_underflows_and_twist_is_large():
    """A term with p(z) = 0 exactly and a twist past e^700 is log(1) = 0, not -inf."""
    a = np.array([-80.0, 0.0])  # p = Phi(-80 - z) underflows to 0 for the first obligor
    b = np.array([1.0, 1.0])
    scaled = np.array([1.0, 1e-6])
    psi = exact_log_normaliser(a, b, scaled, np.array([1e3]), np.array([0.0]))
    # the second term is log(1 - 1/2 + e^(1e-3)/2) computed directly
    assert psi[0] == pytest.approx(math.log(0.5 + 0.5 * math.exp(1e-3)), rel=1e-12)


@pytest.mark.parametrize("rho", [0.99, 0.999])
def test_importance_sampling_is_unbiased_for_asset_correlation_near_one(rho):
    """With R near 1 (p(z) a near step, underflowing to 0) the weights average 1 and EL is right."""
    n = 6
    model = make_model([1000.0] * n, [0.45] * n, [0.01] * n, [rho] * n)
    plan = plan_importance(model, LEVELS)
    assert plan is not None
    for tp in plan.tilts:
        z = np.linspace(*tp.tilt.window, 101)
        assert np.all(np.isfinite(tp.tilt.twist(z)))
    scen, _ = SampleEngine(samples=100_000, seed=4, importance=True).simulate(model)
    w = scen.weights
    assert abs(w.mean() - 1.0) < 4 * w.std(ddof=1) / math.sqrt(w.size)
    # expected loss is sum EAD * LGD * PD whatever the correlation
    el = float(w @ scen.losses) / w.sum()
    el_se = float(np.sqrt(np.sum((w / w.sum()) ** 2 * (scen.losses - el) ** 2)))
    assert abs(el - n * 1000.0 * 0.45 * 0.01) < 4 * el_se


def test_twist_solver_overflow_stays_silent():
    """A near-step p(z) with very unequal exposures plans its tilt without a RuntimeWarning."""
    model = make_model([5.397, 1380479.549], [1.0, 1.0], [0.3, 0.05], [0.99, 0.99])
    plan = plan_importance(model, LEVELS)  # RuntimeWarnings are errors in the test run
    assert plan is not None


def test_error_unknown_when_every_scenario_loses_the_same() -> None:
    """One scenario (or no loss variation) gives no standard error, and the run says so."""
    from debtsim.options import RunOptions
    from debtsim.runner import run_book

    book = Book(name="tiny", currency="EUR", obligors=(
        Obligor(id="A", ead=100.0, pd=0.01, lgd=0.5, asset_correlation=0.1),))
    result = run_book(book, RunOptions(engine="sample", samples=1, copula=False))
    assert result.diagnostics["expected_loss_standard_error"] is None
    assert any("cannot be estimated" in note for note in result.notes)
