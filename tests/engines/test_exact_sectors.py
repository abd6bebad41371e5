"""The exact engine with sector factors (loadings form) and Student-t dependence."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import integrate
from scipy.optimize import brentq
from scipy.stats import chi2, multivariate_normal, multivariate_t, norm
from scipy.stats import t as student_t

from debtsim.book.dependence import DependenceSpec
from debtsim.book.records import Book, Link, Obligor
from debtsim.distribution import LossDistribution
from debtsim.engines.exact.engine import ExactEngine
from debtsim.engines.exact.sector_law import chi_square_grid
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import FactorGrid, gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import value_at_risk
from tests.reference import enumerate_sector_law


def sector_book(n: int, sectors: str, links: list[tuple[int, int, float]], *, seed: int) -> Book:
    """Small book with integer losses, obligor ``i`` in sector ``sectors[i % len]``."""
    rng = np.random.default_rng(seed)
    obligors = tuple(
        Obligor(
            id=f"S{i}",
            ead=float(rng.integers(1, 9)) * 100.0,
            pd=float(rng.choice([0.01, 0.03, 0.08])),
            lgd=0.5,
            asset_correlation=float(rng.choice([0.05, 0.15, 0.3])),
            sector=sectors[i % len(sectors)],
        )
        for i in range(n)
    )
    return Book(
        name="sectors",
        currency="EUR",
        obligors=obligors,
        links=tuple(Link(creditor=f"S{c}", debtor=f"S{d}", contagion=q) for c, d, q in links),
    )


def with_sectors(book: Book, loadings: dict[str, float], **kw: object) -> Book:
    spec = DependenceSpec(sectors=tuple(loadings), loadings=tuple(loadings.values()), **kw)  # type: ignore[arg-type]
    return replace(book, dependence=spec)


def law_array(dist: LossDistribution, unit: float = 50.0) -> np.ndarray:
    """Probabilities on the grid ``0, unit, 2 unit, ...``."""
    k = np.round(dist.losses / unit).astype(int)
    assert np.allclose(k * unit, dist.losses)
    out = np.zeros(k.max() + 1)
    out[k] = dist.probabilities
    return out


def diff(a: np.ndarray, b: np.ndarray) -> float:
    n = max(a.size, b.size)
    return float(np.max(np.abs(np.pad(a, (0, n - a.size)) - np.pad(b, (0, n - b.size)))))


def run(book: Book, **kw: object) -> LossDistribution:
    return ExactEngine(**kw).run(LinkedFactorModel.from_book(book))  # type: ignore[arg-type]


BOOK = sector_book(12, "abc", [(0, 1, 0.3), (1, 0, 0.2), (2, 5, 0.5)], seed=7)


# ---------------------------------------------------------------- limits of the model
def test_all_loadings_one_equal_the_one_factor_run() -> None:
    """Every a_s = 1 is the one-factor model (DESIGN.md): same law to 1e-12."""
    one = run(BOOK)
    ones = run(with_sectors(BOOK, {"a": 1.0, "b": 1.0, "c": 1.0}))
    assert diff(law_array(one), law_array(ones)) < 1e-12
    np.testing.assert_allclose(ones.default_probability, one.default_probability, atol=1e-12)
    grid = gauss_hermite(12)
    assert (
        diff(
            law_array(run(BOOK, factor_grid=grid)),
            law_array(run(with_sectors(BOOK, {"a": 1.0, "b": 1.0, "c": 1.0}), factor_grid=grid)),
        )
        < 1e-12
    )


def test_all_loadings_zero_equal_the_convolution_of_sector_books() -> None:
    """a_s = 0: independent sectors, the law is the convolution of one-factor sector books."""
    plain = sector_book(12, "abc", [], seed=8)
    zeros = run(with_sectors(plain, {"a": 0.0, "b": 0.0, "c": 0.0}))
    parts = [
        law_array(run(replace(plain, obligors=tuple(o for o in plain.obligors if o.sector == s))))
        for s in "abc"
    ]
    expected = np.convolve(np.convolve(parts[0], parts[1]), parts[2])
    assert diff(law_array(zeros), expected) < 1e-12


# ---------------------------------------------------------------- brute force on the same nodes
@pytest.mark.parametrize(
    ("links", "loadings"),
    [
        ([], {"a": 0.6, "b": 0.9}),
        ([(0, 2, 0.5), (2, 4, 0.4)], {"a": 0.6, "b": 0.3}),  # a group inside sector a
        ([(0, 1, 0.5), (1, 0, 0.3), (3, 2, 0.7)], {"a": 0.8, "b": 0.4}),  # groups span a and b
    ],
)
@pytest.mark.parametrize("dof", [None, 5.0])
def test_exact_equals_tensor_enumeration_on_same_nodes(
    links: list[tuple[int, int, float]], loadings: dict[str, float], dof: float | None
) -> None:
    """Exact on a tensor Gauss–Hermite (global, sector) grid equals brute force to 1e-10."""
    book = sector_book(5, "ab", links, seed=11)
    kw: dict[str, object] = {}
    if dof is not None:
        kw = {"family": "student_t", "degrees_of_freedom": dof}
    book = with_sectors(book, loadings, **kw)
    g_grid, x_grid = gauss_hermite(5), gauss_hermite(4)
    w_grid = chi_square_grid(dof, panels=2, order=3) if dof is not None else None
    dist = run(book, factor_grid=g_grid, sector_grid=x_grid, mixing_grid=w_grid)
    model = LinkedFactorModel.from_book(book)
    assert model.dependence is not None
    law, dp = enumerate_sector_law(
        model.ead,
        model.lgd,
        model.pd,
        model.asset_correlation,
        model.dependence.sector_of.tolist(),
        list(loadings.values()),
        list(
            zip(
                model.creditor.tolist(),
                model.debtor.tolist(),
                model.contagion.tolist(),
                strict=True,
            )
        ),
        g_grid.nodes,
        g_grid.weights,
        x_grid.nodes,
        x_grid.weights,
        dof=dof,
        mixing_nodes=w_grid.nodes if w_grid else (1.0,),
        mixing_weights=w_grid.weights if w_grid else (1.0,),
    )
    got = {
        round(float(x), 9): float(p) for x, p in zip(dist.losses, dist.probabilities, strict=True)
    }
    worst = max(abs(got.get(k, 0.0) - law.get(k, 0.0)) for k in set(got) | set(law))
    assert worst < 1e-10
    np.testing.assert_allclose(dist.default_probability, dp, atol=1e-10)


# ---------------------------------------------------------------- published references
def pair_book(sectors: tuple[str, str], loadings: dict[str, float], **kw: object) -> Book:
    book = Book(
        name="pair",
        currency="EUR",
        obligors=(
            Obligor("P1", 100.0, 0.02, 1.0, 0.3, sector=sectors[0]),
            Obligor("P2", 200.0, 0.05, 1.0, 0.2, sector=sectors[1]),
        ),
    )
    return with_sectors(book, loadings, **kw)


@pytest.mark.parametrize("sectors", [("farm", "ship"), ("farm", "farm")])
def test_pair_joint_default_is_bivariate_normal(sectors: tuple[str, str]) -> None:
    """P(both default) = Phi2(Phi^-1 p1, Phi^-1 p2; sqrt(R1 R2) a_s a_t) (REFERENCES.md)."""
    loadings = {"farm": 0.7, "ship": 0.4}
    dist = run(pair_book(sectors, loadings))
    joint = float(dist.probabilities[np.isclose(dist.losses, 300.0)][0])
    c = loadings[sectors[0]] * loadings[sectors[1]] if sectors[0] != sectors[1] else 1.0
    rho = math.sqrt(0.3 * 0.2) * c
    expected = multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).cdf(
        [norm.ppf(0.02), norm.ppf(0.05)]
    )
    # scipy.stats.multivariate_normal (Genz's bivariate algorithm) as the reference
    assert joint == pytest.approx(expected, rel=1e-6)
    np.testing.assert_allclose(dist.default_probability, [0.02, 0.05], rtol=1e-10)


def test_pair_joint_default_is_bivariate_t() -> None:
    """Student-t: P(both default) = bivariate t CDF at (t^-1 p1, t^-1 p2) (REFERENCES.md)."""
    nu = 4.0
    loadings = {"farm": 0.7, "ship": 0.4}
    dist = run(pair_book(("farm", "ship"), loadings, family="student_t", degrees_of_freedom=nu))
    joint = float(dist.probabilities[np.isclose(dist.losses, 300.0)][0])
    rho = math.sqrt(0.3 * 0.2) * 0.7 * 0.4
    x = [student_t.ppf(0.02, nu), student_t.ppf(0.05, nu)]
    # scipy.stats.multivariate_t: randomised QMC (Genz & Bretz); its error is ~1e-6 here
    expected = multivariate_t(loc=[0, 0], shape=[[1, rho], [rho, 1]], df=nu, seed=1).cdf(
        x, maxpts=2_000_000
    )

    # an independent one-dimensional check: integrate the Gaussian pair over W (scipy quad)
    def given_w(w: float) -> float:
        s = math.sqrt(w / nu)
        mvn = multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]])
        return float(mvn.cdf([x[0] * s, x[1] * s])) * float(chi2.pdf(w, nu))

    quad = integrate.quad(given_w, 0, np.inf, epsabs=1e-12, limit=200)[0]
    assert joint == pytest.approx(expected, rel=1e-4)
    assert joint == pytest.approx(quad, rel=1e-6)
    np.testing.assert_allclose(dist.default_probability, [0.02, 0.05], rtol=1e-8)


def large_pool(n: int, pd: float, r: float, **kw: object) -> Book:
    book = Book(
        name="pool",
        currency="EUR",
        obligors=tuple(Obligor(f"H{i}", 1.0, pd, 1.0, r, sector="all") for i in range(n)),
    )
    return replace(book, dependence=DependenceSpec(**kw))  # type: ignore[arg-type]


def t_lhp_cdf(x: float, pd: float, r: float, nu: float) -> float:
    """Schloegl & O'Kane (2005): large-pool loss fraction CDF under the t-copula.

    ``P(L <= x) = E_W[Phi((sqrt(1-r) Phi^-1(x) - t_nu^-1(pd) sqrt(W/nu)) / sqrt(r))]``,
    ``W ~ chi^2_nu``, integrated with scipy.integrate.quad.
    """
    c = float(student_t.ppf(pd, nu))

    def f(w: float) -> float:
        return float(
            norm.cdf((math.sqrt(1 - r) * norm.ppf(x) - c * math.sqrt(w / nu)) / math.sqrt(r))
            * chi2.pdf(w, nu)
        )

    return float(integrate.quad(f, 0, np.inf, epsabs=1e-13, limit=200)[0])


@pytest.mark.parametrize("n", [1000, pytest.param(20_000, marks=pytest.mark.slow)])
def test_student_t_large_pool_quantile_matches_schloegl_okane(n: int) -> None:
    """A large homogeneous book's VaR99/99.9 are the t-copula large-pool quantiles (to 1%)."""
    pd, r, nu = 0.01, 0.2, 5.0
    dist = run(large_pool(n, pd, r, family="student_t", degrees_of_freedom=nu))
    for level in (0.99, 0.999):
        lhp = brentq(lambda x, a=level: t_lhp_cdf(x, pd, r, nu) - a, 1e-6, 0.999, xtol=1e-12)
        assert value_at_risk(dist, level) / n == pytest.approx(lhp, rel=0.01)


def test_student_t_huge_dof_is_gaussian() -> None:
    """nu = 1e6 gives the Gaussian law to 1e-4 (the t-copula tends to the Gaussian)."""
    gauss = run(BOOK)
    t = run(replace(BOOK, dependence=DependenceSpec(family="student_t", degrees_of_freedom=1e6)))
    assert diff(law_array(gauss), law_array(t)) < 1e-4
    sectors = with_sectors(BOOK, {"a": 0.5, "b": 0.7, "c": 0.9})
    t_sectors = with_sectors(
        BOOK, {"a": 0.5, "b": 0.7, "c": 0.9}, family="student_t", degrees_of_freedom=1e6
    )
    assert diff(law_array(run(sectors)), law_array(run(t_sectors))) < 1e-4


def test_heavier_tails_raise_the_far_quantile() -> None:
    """Same PDs, Student-t nu=4: the expected loss is kept and VaR99.9 grows."""
    pool = large_pool(400, 0.01, 0.15)
    t_pool = large_pool(400, 0.01, 0.15, family="student_t", degrees_of_freedom=4.0)
    g, t = run(pool), run(t_pool)
    assert float(t.losses @ t.probabilities) == pytest.approx(4.0, rel=1e-9)
    assert float(g.losses @ g.probabilities) == pytest.approx(4.0, rel=1e-9)
    assert value_at_risk(t, 0.999) > 1.3 * value_at_risk(g, 0.999)


def test_shared_grid_agrees_with_fine_tensor_rule() -> None:
    """The default shared sector grid and a 40-node tensor rule give the same law."""
    book = with_sectors(sector_book(12, "abc", [], seed=9), {"a": 0.5, "b": 0.9, "c": 0.2})
    default = run(book)
    tensor = run(book, sector_grid=gauss_hermite(40))
    assert diff(law_array(default), law_array(tensor)) < 1e-12
    assert "shared" in default.settings["sector_method"]
    assert default.diagnostics["method"] == default.settings["sector_method"]


def test_matrix_form_is_refused_naming_sample() -> None:
    """A general correlation matrix is refused by exact, naming the sample engine."""
    spec = DependenceSpec(sectors=("a", "b"), correlation=((1.0, 0.3), (0.3, 1.0)))
    model = LinkedFactorModel.from_book(replace(sector_book(4, "ab", [], seed=1), dependence=spec))
    engine = ExactEngine()
    reason = engine.refusal(model)
    assert reason is not None and "--engine sample" in reason
    with pytest.raises(EngineRefusedError):
        engine.run(model)


def test_custom_mixing_grid_is_used() -> None:
    """A given mixing grid is used as is (one node at nu: the Gaussian law scaled)."""
    nu = 7.0
    one = FactorGrid(nodes=np.array([nu]), weights=np.ones(1), method="one")
    book = replace(BOOK, dependence=DependenceSpec(family="student_t", degrees_of_freedom=nu))
    dist = run(book, mixing_grid=one)
    assert dist.settings["mixing_nodes"] == 1
    # with W = nu the threshold is t^-1(PD): PDs shift from the Gaussian ones
    model = LinkedFactorModel.from_book(book)
    assert dist.default_probability[3] != pytest.approx(float(model.pd[3]), rel=1e-3)


def test_links_joining_many_sectors_are_refused_naming_sample() -> None:
    """Student-t with a link group across three moving sectors exceeds the tensor limit."""
    book = with_sectors(
        sector_book(6, "abc", [(0, 1, 0.5), (1, 2, 0.5)], seed=2),
        {"a": 0.5, "b": 0.6, "c": 0.7},
        family="student_t",
        degrees_of_freedom=5.0,
    )
    reason = ExactEngine().refusal(LinkedFactorModel.from_book(book))
    assert reason is not None and "--engine sample" in reason and "3 sectors" in reason


def test_contributions_refuse_sector_models_rather_than_ignore_them() -> None:
    """The one-factor moments of the Euler allocation are not used on a sector model."""
    from debtsim.engines.exact.contributions import exact_moments

    book = with_sectors(BOOK, {"a": 0.5, "b": 0.7, "c": 0.9})
    model = LinkedFactorModel.from_book(book)
    engine = ExactEngine()
    with pytest.raises(EngineRefusedError, match="not computed"):
        exact_moments(engine, model, engine.run(model), (0.99,))
