"""The model's arrays, conditional law and link graph."""

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import multivariate_normal, norm

from debtsim.book.records import Book, Link, Obligor
from debtsim.model.specification import LinkedFactorModel, conditional_default_probability


def book(n: int, links: list[tuple[int, int]]) -> Book:
    obligors = tuple(Obligor(id=f"O{i}", ead=1.0 + i, pd=0.02, lgd=0.45, asset_correlation=0.2)
                     for i in range(n))
    return Book(name="t", currency="EUR", obligors=obligors,
                links=tuple(Link(creditor=f"O{c}", debtor=f"O{d}", contagion=0.3)
                            for c, d in links))


@pytest.mark.parametrize(("p1", "p2", "r1", "r2"),
                         [(0.01, 0.02, 0.2, 0.2), (0.05, 0.003, 0.12, 0.24), (0.1, 0.1, 0.5, 0.1)])
def test_joint_default_matches_bivariate_normal(p1, p2, r1, r2) -> None:
    """Integrating the conditional PDs over the factor gives the bivariate-normal joint PD."""
    # Gaussian copula: P(both) = Phi2(Phi^-1 p1, Phi^-1 p2; sqrt(R1 R2)), scipy.stats.
    rho = np.sqrt(r1 * r2)
    ref = multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).cdf(
        [norm.ppf(p1), norm.ppf(p2)])

    def integrand(z: float) -> float:
        p = conditional_default_probability(np.array([p1, p2]), np.array([r1, r2]), np.array([z]))
        return float(p[0, 0] * p[0, 1] * norm.pdf(z))

    joint, _ = integrate.quad(integrand, -12, 12, epsabs=1e-13, limit=200)
    assert joint == pytest.approx(ref, rel=1e-5)
    # pairwise default correlation, REFERENCES.md formula
    corr = (joint - p1 * p2) / np.sqrt(p1 * (1 - p1) * p2 * (1 - p2))
    corr_ref = (ref - p1 * p2) / np.sqrt(p1 * (1 - p1) * p2 * (1 - p2))
    assert corr == pytest.approx(corr_ref, rel=1e-4)


def test_conditional_pd_integrates_to_pd() -> None:
    """E[p(Z)] = PD (Vasicek 2002)."""
    def integrand(z: float) -> float:
        return float(conditional_default_probability(np.array([0.03]), np.array([0.3]),
                                                     np.array([z]))[0, 0] * norm.pdf(z))

    val, _ = integrate.quad(integrand, -12, 12, epsabs=1e-14)
    assert val == pytest.approx(0.03, rel=1e-9)


def test_pd_of_one_defaults_for_certain() -> None:
    """PD exactly 1 gives conditional PD 1 at every factor value."""
    p = conditional_default_probability(np.array([1.0]), np.array([0.2]), np.linspace(-8, 8, 9))
    assert np.all(p == 1.0)


def test_strong_components_in_topological_order() -> None:
    """Debtors come before creditors; a two-way pair is one group."""
    # 0 lends to 1 (link creditor 0, debtor 1); 1 and 2 lend to each other; 3 lends to 2
    m = LinkedFactorModel.from_book(book(5, [(0, 1), (1, 2), (2, 1), (3, 2)]))
    groups = [tuple(g.tolist()) for g in m.strong_components]
    pos = {i: k for k, g in enumerate(groups) for i in g}
    assert (1, 2) in groups
    assert pos[1] < pos[0] and pos[2] < pos[3]
    assert len(m.cycles) == 1
    assert len(m.components) == 2  # {0,1,2,3} and {4}


def test_without_links_keeps_obligors() -> None:
    """The copula reading drops links only."""
    m = LinkedFactorModel.from_book(book(3, [(0, 1)]))
    plain = m.without_links()
    assert plain.n_links == 0 and plain.n_obligors == 3
    assert np.array_equal(plain.pd, m.pd)
