"""Euler contributions on the exact engine against brute force and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import ndtri
from scipy.stats import multivariate_normal

from debtsim.book.records import Book, Link, Obligor
from debtsim.contributions import Allocation, allocate
from debtsim.engines.allocation import run_with_contributions
from debtsim.engines.exact.contributions import exact_moments
from debtsim.engines.exact.engine import ExactEngine
from debtsim.model.factor_grid import gauss_hermite
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import measures
from tests.engines.test_engines_agree import BOOKS, make_book
from tests.reference import enumerate_states, reference_contributions

LEVELS = (0.9, 0.99)


def _allocation(engine: ExactEngine, book: Book, levels=LEVELS) -> tuple[Allocation, object]:
    model = LinkedFactorModel.from_book(book)
    dist = engine.run(model)
    return allocate(exact_moments(engine, model, dist, levels)), dist


def _reference(book: Book, nodes, weights, levels=LEVELS):
    m = LinkedFactorModel.from_book(book)
    links = list(zip(m.creditor.tolist(), m.debtor.tolist(), m.contagion.tolist(), strict=True))
    prob, own, final = enumerate_states(m.ead, m.lgd, m.pd, m.asset_correlation, links,
                                        nodes, weights)
    return reference_contributions(m.ead, m.lgd, prob, own, final, levels)


CYCLE_BOOKS = {
    **BOOKS,
    # two cycles sharing a member, a tail; non-integer losses keep exact loss values (atoms)
    "figure eight": make_book(
        6, [(0, 1, 0.5), (1, 0, 0.3), (1, 2, 0.45), (2, 1, 0.6), (3, 2, 0.8), (5, 4, 0.35)],
        seed=11),
}


@pytest.mark.parametrize("name", list(CYCLE_BOOKS))
@pytest.mark.parametrize("support", ["default", "atoms"])
def test_contributions_equal_brute_force(name: str, support: str) -> None:
    """Every obligor's EL, std, VaR, ES, capital and their contagion parts match enumeration.

    Reference: tests/reference.py enumerates own defaults and live links state by state and
    applies the definitions of DESIGN.md (Tasche 1999; Acerbi & Tasche 2002).
    """
    book = CYCLE_BOOKS[name]
    grid = gauss_hermite(8)
    if support == "atoms":  # no common loss unit: exact loss values
        book = Book(name=book.name, currency="EUR", links=book.links,
                    obligors=tuple(Obligor(id=o.id, ead=o.ead * (1 + np.pi * 1e-3 * k),
                                           pd=o.pd, lgd=o.lgd,
                                           asset_correlation=o.asset_correlation)
                                   for k, o in enumerate(book.obligors)))
    engine = ExactEngine(factor_grid=grid)
    alloc, dist = _allocation(engine, book)
    if support == "atoms":
        assert dist.settings["loss_support"] == "atoms"
    ref = _reference(book, grid.nodes, grid.weights)
    scale = ref["book"][("es", LEVELS[-1])]
    tol = 1e-10 * scale

    def close(got, want):
        np.testing.assert_allclose(got, want, rtol=0, atol=tol)

    close(alloc.expected_loss, ref["el"])
    close(alloc.expected_loss_contagion, ref["el"] - ref["own_el"])
    close(alloc.loss_std, ref["std"])
    close(alloc.loss_std_contagion, ref["std"] - ref["own_std"])
    for j, a in enumerate(LEVELS):
        close(alloc.var[j], ref[("var", a)])
        close(alloc.var_contagion[j], ref[("var", a)] - ref[("own_var", a)])
        close(alloc.expected_shortfall[j], ref[("es", a)])
        close(alloc.expected_shortfall_contagion[j], ref[("es", a)] - ref[("own_es", a)])
        close(alloc.economic_capital[j], ref[("ec", a)])
        close(alloc.economic_capital_contagion[j], ref[("ec", a)] - ref[("own_ec", a)])


def _rating_book(n: int, *, links: int = 0, seed: int = 3) -> Book:
    rng = np.random.default_rng(seed)
    grades = np.array([0.0005, 0.002, 0.008, 0.02, 0.06, 0.15])
    obligors = tuple(
        Obligor(id=f"B{i}", ead=float(rng.lognormal(12, 1.0)), pd=float(rng.choice(grades)),
                lgd=float(rng.choice([0.25, 0.45, 0.7])),
                asset_correlation=float(rng.choice([0.08, 0.15, 0.24])), sector=f"S{i % 4}")
        for i in range(n)
    )
    pairs = set()
    while len(pairs) < links:
        c, d = rng.integers(0, n, size=2)
        if c != d:
            pairs.add((int(c), int(d)))
    return Book(name="rating", currency="EUR", obligors=obligors,
                links=tuple(Link(creditor=f"B{c}", debtor=f"B{d}",
                                 contagion=float(rng.uniform(0.1, 0.6))) for c, d in pairs))


@pytest.mark.parametrize("links", [0, 25])
def test_sum_rules_on_the_loss_grid(links: int) -> None:
    """Contributions add up to EL, std, VaR, ES and capital of the run (1e-9 relative).

    Euler allocation (Tasche 1999): linear in the positions, so the parts sum to the whole;
    the atom split of Acerbi & Tasche (2002) makes ES add up exactly on a discrete law.
    """
    book = _rating_book(120, links=links)
    engine = ExactEngine(grid_points=2**13)  # a coarse loss grid keeps the test quick
    dist, alloc = run_with_contributions(engine, LinkedFactorModel.from_book(book), (0.99, 0.999))
    assert dist.settings["loss_support"] == "grid"
    # the node laws kept by the run give the same allocation as recomputing them
    again, _ = _allocation(engine, book, (0.99, 0.999))
    np.testing.assert_allclose(again.expected_shortfall, alloc.expected_shortfall, rtol=1e-12)
    risk = measures(dist, (0.99, 0.999))
    assert alloc.expected_loss.sum() == pytest.approx(risk.expected_loss, rel=1e-9)
    assert alloc.loss_std.sum() == pytest.approx(risk.loss_std, rel=1e-9)
    for j, a in enumerate((0.99, 0.999)):
        assert alloc.var[j].sum() == pytest.approx(risk.var[a], rel=1e-9)
        assert alloc.expected_shortfall[j].sum() == pytest.approx(
            risk.expected_shortfall[a], rel=1e-9)
        assert alloc.economic_capital[j].sum() == pytest.approx(
            risk.economic_capital[a], rel=1e-9)
    if links:
        assert alloc.expected_loss_contagion.sum() > 0
        assert alloc.expected_shortfall_contagion[-1].sum() > 0
    else:
        assert not np.any(alloc.expected_shortfall_contagion)


def _homogeneous(n: int, pd: float = 0.01, rho: float = 0.2) -> Book:
    return Book(name="pool", currency="EUR", obligors=tuple(
        Obligor(id=f"H{i}", ead=1.0, pd=pd, lgd=1.0, asset_correlation=rho) for i in range(n)))


def test_homogeneous_book_contributions_are_equal() -> None:
    """Exchangeable obligors get identical contributions: each is the book's figure / n."""
    n = 40
    alloc, dist = _allocation(ExactEngine(), _homogeneous(n), (0.99, 0.999))
    risk = measures(dist, (0.99, 0.999))
    for j, a in enumerate((0.99, 0.999)):
        np.testing.assert_allclose(alloc.expected_shortfall[j],
                                   risk.expected_shortfall[a] / n, rtol=1e-10)
        np.testing.assert_allclose(alloc.var[j], risk.var[a] / n, rtol=1e-10)
    np.testing.assert_allclose(alloc.loss_std, risk.loss_std / n, rtol=1e-10)


def test_large_homogeneous_book_approaches_vasicek_contribution() -> None:
    """ES contribution of one loan tends to EAD LGD E[p(Z) | Z <= Phi^-1(1 - a)].

    Large-pool limit (Vasicek 2002; REFERENCES.md "Large-pool contribution"): L >= VaR_a is
    the event Z <= Phi^-1(1 - a), and E[p(Z) 1{Z <= c}] = Phi2(Phi^-1(PD), c; sqrt(R)).
    """
    pd, rho, a = 0.01, 0.2, 0.99
    c = ndtri(1 - a)
    joint = multivariate_normal(mean=[0, 0], cov=[[1, np.sqrt(rho)], [np.sqrt(rho), 1]]).cdf(
        [ndtri(pd), c])
    limit = joint / (1 - a)
    errors = []
    for n in (500, 5000):
        alloc, _ = _allocation(ExactEngine(), _homogeneous(n, pd, rho), (a,))
        errors.append(abs(alloc.expected_shortfall[0][0] - limit) / limit)
    assert errors[1] < 0.01  # granularity: O(1/n) away from the limit
    assert errors[1] < errors[0]


@pytest.mark.parametrize("base", [0.5, 1.0])
@pytest.mark.parametrize("name", ["three-cycle with tail", "figure eight"])
def test_group_removal_by_series_and_by_fft_agree_with_brute_force(
    name: str, base: float, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Both ways of removing a linked group from a node's law give the enumerated ES parts.

    base 0.5: the inverse-PGF series wherever it converges; 1.0: always the spectra.
    Reference: tests/reference.py.
    """
    import debtsim.engines.exact.contributions as ec

    monkeypatch.setattr(ec, "_SERIES_MIN_BASE", base)
    book = CYCLE_BOOKS[name]
    grid = gauss_hermite(8)
    engine = ExactEngine(factor_grid=grid)
    alloc, dist = _allocation(engine, book)
    assert dist.settings["loss_support"] != "atoms"
    ref = _reference(book, grid.nodes, grid.weights)
    tol = 1e-10 * ref["book"][("es", LEVELS[-1])]
    for j, a in enumerate(LEVELS):
        np.testing.assert_allclose(alloc.expected_shortfall[j], ref[("es", a)], rtol=0, atol=tol)
        np.testing.assert_allclose(alloc.var_contagion[j],
                                   ref[("var", a)] - ref[("own_var", a)], rtol=0, atol=tol)


@pytest.mark.parametrize("wanted", [[0, 1, 2, 3, 4, 5, 6, 7], [2, 5], [7]])
def test_blocked_rest_rows_equal_the_plain_cyclic_convolution(wanted: list[int]) -> None:
    """Rest-of-book rows by blocks of groups equal those of the law without each group.

    Reference: the law without group g convolved directly (np.convolve, then wrapped onto
    the cyclic window) and its CDF and atoms summed by hand at every point and group loss.
    """
    import debtsim.engines.exact.contributions as ec

    rng = np.random.default_rng(3)
    width = 200
    singles = rng.random(width) * (np.arange(width) < 150)
    singles /= singles.sum()
    groups = []
    for _ in range(8):
        pos = np.unique(np.concatenate([[0], rng.integers(1, 31, size=5)]))
        prob = rng.random(pos.size)
        groups.append((pos.astype(np.int64), prob / prob.sum()))
    rel = np.array([60.0, 120.0])
    wide_rel = np.concatenate([rel - 2, rel + 1])
    reach = [int(p[-1]) for p, _ in groups]
    cap = int(np.sqrt(2.0 * sum(reach) * width / (len(wanted) * 7)))
    blocks = ec._blocks(reach, max(cap, max(reach)))
    assert len(blocks) > 1 or len(wanted) == 8
    got = ec._rest_rows_by_fft(singles, groups, wanted, rel, wide_rel, width)
    assert sorted(got) == sorted(wanted)
    for gi in wanted:
        law = singles.copy()
        for h, (pos, prob) in enumerate(groups):
            if h != gi:
                dense = np.zeros(pos[-1] + 1)
                dense[pos] = prob
                law = np.convolve(law, dense)
        rest = np.bincount(np.arange(law.size) % width, weights=law, minlength=width)

        def cdf(x: float, u: int, rest: np.ndarray = rest) -> float:
            return float(sum(rest[(i - u) % width] for i in range(int(x) + 1)))

        pos = groups[gi][0]
        want = np.array(
            [[cdf(x, u) for u in pos] for x in rel]
            + [[rest[(int(x) - u) % width] for u in pos] for x in rel]
            + [[cdf(x + 1, u) - cdf(x - 2, u) for u in pos] for x in rel]
        )
        np.testing.assert_allclose(got[gi], want, rtol=0, atol=1e-14)


def test_forced_group_states_equal_one_call_per_member() -> None:
    """The batched forced laws equal the group law with one member's own PD set to 1.

    Reference: _group_state_law called once per member with that member's own default
    forced, times its own PD (the definition of P(O_m = 1, final = s)).
    """
    from debtsim.engines.exact.contributions import _group_states
    from debtsim.engines.exact.engine import _group_state_law, _linked_groups

    model = LinkedFactorModel.from_book(CYCLE_BOOKS["figure eight"])
    own = model.conditional_pd(gauss_hermite(8).nodes)
    for g in _linked_groups(model):
        law, forced = _group_states(g, own[:, g.members])
        np.testing.assert_allclose(law, _group_state_law(g, own[:, g.members]), rtol=0,
                                   atol=1e-15)
        for m in range(g.members.size):
            pinned = own[:, g.members].copy()
            pinned[:, m] = 1.0
            np.testing.assert_allclose(
                forced[:, m], own[:, g.members[m], None] * _group_state_law(g, pinned),
                rtol=0, atol=1e-15)
