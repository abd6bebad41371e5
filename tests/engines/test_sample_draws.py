"""Tests of the sampler's draws: own defaults by thinning, the compiled cascade, reproducibility.

The own defaults are drawn by geometric skips at a piece's largest
probability and thinned to the exact one (see
:mod:`debtsim.engines.sample.own_draws`); these tests check the law of the
draws directly (binomial counts at fixed and varying factor values,
independence of pairs) and against brute-force enumeration of the model
(tests/reference.py) on small linked books.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import expit, logit, ndtr
from scipy.stats import binomtest

from debtsim.engines.sample.cascade_kernels import cascade
from debtsim.engines.sample.engine import SampleEngine
from debtsim.engines.sample.own_draws import OwnDefaultDraws, SortedRun
from debtsim.engines.sample.scenario_draws import BLOCK, CascadeSampler, ChunkDefaults
from debtsim.engines.sample.thinning_kernels import LEVEL_MAX, LEVEL_MIN
from debtsim.model.factor_grid import gauss_hermite
from tests.engines.test_sample import TINY_BOOKS, make_model
from tests.reference import enumerate_states

#: Two-sided p-value below which a binomial count is called wrong (Bonferroni over ~100 checks).
P_MIN = 1e-5


def _book(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Coefficients ``alpha, gamma`` (p = Phi(alpha z + gamma)) and losses of ``n`` obligors."""
    rng = np.random.default_rng(seed)
    pd = np.exp(rng.uniform(np.log(1e-3), np.log(0.3), n))
    r = rng.uniform(0.05, 0.5, n)
    a = ndtr_inv(pd) / np.sqrt(1 - r)
    b = np.sqrt(r / (1 - r))
    return -b, a, rng.uniform(0.2, 1.0, n)


def ndtr_inv(p: np.ndarray) -> np.ndarray:
    from scipy.special import ndtri

    return np.asarray(ndtri(p))


def _draw(draws: OwnDefaultDraws, z: np.ndarray, theta: np.ndarray, level: np.ndarray,
          seed: int, scale: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    rows = z.size
    order = np.argsort(z, kind="stable")
    members = np.arange(draws.alpha.size, dtype=np.int64)
    run = SortedRun(key=z[order], scale=(np.ones(rows) if scale is None else scale)[order],
                    theta=theta[order], scen=order.astype(np.int64), members=members,
                    level=level)
    return draws.draw(np.random.default_rng(seed), [run], rows)


@pytest.mark.parametrize("level", [LEVEL_MIN, 7, LEVEL_MAX])
def test_thinning_at_fixed_factor_gives_each_obligor_its_conditional_pd(level):
    """At one factor value every obligor's default count is Binomial(N, p_i(z)) (binomial test)."""
    n = 12
    alpha, gamma, sloss = _book(n, 1)
    draws = OwnDefaultDraws(alpha, gamma, sloss, np.zeros(0, dtype=np.int64))
    z0 = -0.7
    counts = np.zeros(n)
    blocks, rows = 20, BLOCK
    for b in range(blocks):
        z = np.full(rows, z0)
        r, c = _draw(draws, z, np.zeros(rows), np.full(n, level, dtype=np.int64), seed=b)
        counts += np.bincount(c, minlength=n)
        assert np.unique(r * n + c).size == r.size  # no pair twice
    p = ndtr(alpha * z0 + gamma)
    for i in range(n):
        # exact two-sided binomial test (scipy.stats.binomtest)
        assert binomtest(int(counts[i]), blocks * rows, p[i]).pvalue > P_MIN, (i, counts[i], p[i])


def test_thinning_over_spread_factors_and_twists_matches_the_sum_of_probabilities():
    """With z spread and a twist, counts match sum_s p_i(z_s) (twisted) within 5 sd."""
    n = 10
    alpha, gamma, sloss = _book(n, 2)
    draws = OwnDefaultDraws(alpha, gamma, sloss, np.zeros(0, dtype=np.int64))
    rng = np.random.default_rng(5)
    mean = np.zeros(n)
    var = np.zeros(n)
    counts = np.zeros(n)
    for b in range(12):
        z = rng.standard_normal(BLOCK) - 1.5
        theta = np.where(z < -1.0, 0.0, 1.5 + 0.5 * z)  # not monotone in z, some negative
        p = ndtr(alpha[None, :] * z[:, None] + gamma[None, :])
        p = expit(logit(p) + theta[:, None] * sloss[None, :])
        mean += p.sum(0)
        var += (p * (1 - p)).sum(0)
        level = np.array([LEVEL_MIN + (i % (LEVEL_MAX - LEVEL_MIN + 1)) for i in range(n)])
        _, c = _draw(draws, z, theta, level, seed=100 + b)
        counts += np.bincount(c, minlength=n)
    zscore = (counts - mean) / np.sqrt(var)
    assert np.all(np.abs(zscore) < 5.0), zscore


def test_thinning_with_a_second_coordinate_and_mixed_signs():
    """The sector/Student-t form p = Phi(alpha k + gamma c) with c varying, either sign."""
    n = 8
    rng = np.random.default_rng(3)
    alpha = rng.uniform(-1.0, 1.0, n)
    gamma = rng.uniform(-2.5, -0.5, n)
    draws = OwnDefaultDraws(alpha, gamma, np.zeros(n), np.zeros(0, dtype=np.int64))
    mean = np.zeros(n)
    var = np.zeros(n)
    counts = np.zeros(n)
    for b in range(10):
        k = rng.standard_normal(BLOCK)
        c = np.sqrt(rng.chisquare(4.0, BLOCK) / 4.0)
        p = ndtr(alpha[None, :] * k[:, None] + gamma[None, :] * c[:, None])
        mean += p.sum(0)
        var += (p * (1 - p)).sum(0)
        _, cols = _draw(draws, k, np.zeros(BLOCK), np.full(n, 6, dtype=np.int64), 7 + b, scale=c)
        counts += np.bincount(cols, minlength=n)
    assert np.all(np.abs(counts - mean) < 5.0 * np.sqrt(var)), (counts, mean)


def test_thinning_draws_obligors_independently_given_the_factor():
    """At a fixed factor, the joint default count of each pair is Binomial(N, p_i p_j)."""
    n = 6
    alpha, gamma, sloss = _book(n, 4)
    gamma = gamma + 1.0  # larger PDs, so joint counts are informative
    draws = OwnDefaultDraws(alpha, gamma, sloss, np.zeros(0, dtype=np.int64))
    z0 = 0.3
    p = ndtr(alpha * z0 + gamma)
    joint = np.zeros((n, n))
    total = 0
    for b in range(15):
        r, c = _draw(draws, np.full(BLOCK, z0), np.zeros(BLOCK), np.full(n, 5, dtype=np.int64),
                     seed=300 + b)
        d = np.zeros((BLOCK, n))
        d[r, c] = 1.0
        joint += d.T @ d
        total += BLOCK
    for i in range(n):
        for j in range(i + 1, n):
            assert binomtest(int(joint[i, j]), total, p[i] * p[j]).pvalue > P_MIN, (i, j)


def test_certain_defaults_are_added_in_every_scenario():
    """Obligors marked 'always' (PD 1) default in every scenario, once."""
    alpha, gamma, sloss = _book(3, 5)
    draws = OwnDefaultDraws(alpha, gamma, sloss, np.array([1], dtype=np.int64))
    z = np.random.default_rng(0).standard_normal(500)
    members = np.array([0, 2], dtype=np.int64)
    order = np.argsort(z)
    run = SortedRun(key=z[order], scale=np.ones(500), theta=np.zeros(500),
                    scen=order.astype(np.int64), members=members,
                    level=np.full(2, LEVEL_MIN, dtype=np.int64))
    r, c = draws.draw(np.random.default_rng(1), [run], 500)
    assert np.array_equal(np.sort(r[c == 1]), np.arange(500))


# ---------------------------------------------------------------- cascade
def _hash_live(first: int, link_key: int, book_index: int, q: float, s: int) -> bool:
    """Liveness of a link, written out in Python integers (SplitMix64 output function)."""
    mask = (1 << 64) - 1

    def mix(x: int) -> int:
        x ^= x >> 30
        x = (x * 0xBF58476D1CE4E5B9) & mask
        x ^= x >> 27
        x = (x * 0x94D049BB133111EB) & mask
        return x ^ (x >> 31)

    row_key = mix(((first + s + 1) * 0x9E3779B97F4A7C15 + link_key) & mask)
    lkey = mix(((book_index + 1) * 0x94D049BB133111EB) & mask)
    return ((mix((row_key + lkey) & mask) >> 11) * 2.0**-53) < q


def test_compiled_cascade_reaches_exactly_the_live_reachable_obligors():
    """The kernel's contagion defaults equal a plain Python search with the same liveness hash."""
    rng = np.random.default_rng(8)
    n, m = 12, 30
    pairs = set()
    while len(pairs) < m:
        c, d = rng.integers(0, n, 2).tolist()
        if c != d:
            pairs.add((c, d))
    creditor = np.array([c for c, _ in sorted(pairs)])
    debtor = np.array([d for _, d in sorted(pairs)])
    q = rng.uniform(0.1, 0.9, m)
    links = [(int(c), int(d), float(x)) for c, d, x in zip(creditor, debtor, q, strict=True)]
    model = make_model([1.0] * n, [0.5] * n, [0.05] * n, [0.2] * n, links)
    sampler = CascadeSampler(model)
    rows, first, link_key = 300, 4096 * 3, 0x1234567890ABCDEF
    own = rng.random((rows, n)) < 0.1
    own_r, own_c = np.nonzero(own)
    cas_r, cas_c = sampler._cascade(own_r.astype(np.int64), own_c.astype(np.int64), rows, first,
                                    np.uint64(link_key))
    got = {(int(s), int(c)) for s, c in zip(cas_r, cas_c, strict=True)}
    assert len(got) == cas_r.size
    expected = set()
    for s in range(rows):
        final = set(np.flatnonzero(own[s]).tolist())
        stack = list(final)
        while stack:
            d = stack.pop()
            for k in range(m):
                if debtor[k] == d and creditor[k] not in final and _hash_live(
                    first, link_key, k, q[k], s
                ):
                    final.add(int(creditor[k]))
                    stack.append(int(creditor[k]))
        expected |= {(s, c) for c in final - set(np.flatnonzero(own[s]).tolist())}
    assert got == expected


def test_cascade_output_grows_when_many_defaults_spread():
    """A fully live chain from one default reaches every obligor of every scenario."""
    n = 50
    indptr = np.arange(n + 1, dtype=np.int64)  # debtor i lends... i -> i+1 (last to 0)
    creditor = (np.arange(n, dtype=np.int64) + 1) % n
    bar = np.full(n, 2**53, dtype=np.uint64)  # q = 1
    lkey = np.arange(n, dtype=np.uint64)
    rows = 100
    own_r = np.arange(rows, dtype=np.int64)
    own_c = np.zeros(rows, dtype=np.int64)
    r, c = cascade(own_r, own_c, rows, 0, np.uint64(3), indptr, creditor, bar, lkey)
    assert r.size == rows * (n - 1)


# ------------------------------------------------- against the exact model
@pytest.mark.parametrize("name", ["chain", "star", "three-cycle"])
def test_marginal_and_pairwise_final_defaults_match_enumeration(name):
    """Final default frequencies of each obligor and each pair agree with enumeration (5 SE).

    Reference: tests/reference.enumerate_states (every own-default and live-link
    state on 64 Gauss–Hermite nodes).
    """
    ead, lgd, pd, rho, links = TINY_BOOKS[name]
    grid = gauss_hermite(64)
    prob, _own, final = enumerate_states(ead, lgd, pd, rho, list(links), grid.nodes,
                                         grid.weights)
    ref_pair = (final * prob[:, None]).T @ final  # P(D_i D_j), diagonal P(D_i)
    model = make_model(ead, lgd, pd, rho, links)
    n = model.n_obligors
    samples = 60 * BLOCK
    pair = np.zeros((n, n))

    def observe(chunk: ChunkDefaults) -> None:
        d = np.zeros((chunk.losses.size, n))
        d[chunk.own_rows, chunk.own_cols] = 1.0
        d[chunk.contagion_rows, chunk.contagion_cols] = 1.0
        pair[:] += d.T @ d

    CascadeSampler(model, observe=observe).run(samples, np.random.SeedSequence(21))
    freq = pair / samples
    se = np.sqrt(ref_pair * (1 - ref_pair) / samples)
    assert np.all(np.abs(freq - ref_pair) <= 5.0 * se + 1e-12), (freq - ref_pair) / se


# ---------------------------------------------------------- reproducibility
def test_same_seed_same_bits_different_seed_different_draws():
    """Scenario losses, weights and defaults are bit-identical for a seed, whatever the threads."""
    ead, lgd, pd, rho, links = TINY_BOOKS["star"]
    model = make_model(ead, lgd, pd, rho, links)
    samples = 2 * BLOCK + 17
    a, _ = SampleEngine(samples=samples, seed=5, workers=1).simulate(model)
    b, _ = SampleEngine(samples=samples, seed=5, workers=2).simulate(model)
    c, _ = SampleEngine(samples=samples, seed=6, workers=1).simulate(model)
    assert np.array_equal(a.losses, b.losses) and np.array_equal(a.weights, b.weights)
    assert np.array_equal(a.factor, b.factor)
    assert np.array_equal(a.default_weight, b.default_weight)
    assert not np.array_equal(a.losses, c.losses)


@pytest.mark.parametrize("dof", [None, 5.0])
def test_sector_draws_are_reproducible_and_match_their_pds(dof):
    """Sector books: same seed same bits; each obligor's default frequency is its PD (5 SE).

    Without links the final PD is the book's PD, the marginal law of the
    sector (or Student-t) model whatever the loadings.
    """
    from debtsim.engines.sample.sector_draws import SectorSampler
    from debtsim.model.specification import LinkedFactorModel
    from tests.engines.test_exact_sectors import sector_book, with_sectors

    kw = {} if dof is None else {"degrees_of_freedom": dof}
    book = with_sectors(sector_book(9, "ab", [], seed=4), {"a": 0.6, "b": 0.9}, **kw)
    model = LinkedFactorModel.from_book(book)
    first = SectorSampler(model).run(3 * BLOCK, np.random.SeedSequence(2))
    again = SectorSampler(model).run(3 * BLOCK, np.random.SeedSequence(2))
    other = SectorSampler(model).run(3 * BLOCK, np.random.SeedSequence(3))
    assert np.array_equal(first.losses, again.losses)
    assert not np.array_equal(first.losses, other.losses)
    samples = 40 * BLOCK
    scen = SectorSampler(model).run(samples, np.random.SeedSequence(5))
    freq = scen.default_weight / samples
    pd = np.asarray(model.pd, dtype=float)
    assert np.all(np.abs(freq - pd) < 5.0 * np.sqrt(pd * (1 - pd) / samples)), freq - pd
    assert math.isfinite(float(scen.losses.sum()))


def test_work_grows_with_the_defaults_not_obligors_times_scenarios():
    """A block of 4,096 scenarios x 2,000 low-PD obligors draws at most 2^18 uniforms, not 8 M.

    The README's claim for the ``sample`` engine: no draw per obligor and scenario.
    """
    from debtsim.engines.sample.own_draws import REFILL

    n = 2000
    pd = np.full(n, 1e-4)
    r = np.full(n, 0.1)
    alpha = -np.sqrt(r / (1 - r))
    gamma = ndtr_inv(pd) / np.sqrt(1 - r)
    draws = OwnDefaultDraws(alpha, gamma, np.zeros(n), np.zeros(0, dtype=np.int64))
    z = np.random.default_rng(1).standard_normal(BLOCK)
    members = np.arange(n, dtype=np.int64)
    order = np.argsort(z)
    level = draws.levels(z[order], np.ones(BLOCK), np.zeros(BLOCK), members)

    class Counting:
        def __init__(self) -> None:
            self.used = 0
            self.rng = np.random.default_rng(2)

        def random(self, size: int) -> np.ndarray:
            self.used += size
            return self.rng.random(size)

    rng = Counting()
    run = SortedRun(key=z[order], scale=np.ones(BLOCK), theta=np.zeros(BLOCK),
                    scen=order.astype(np.int64), members=members, level=level)
    r_, _ = draws.draw(rng, [run], BLOCK)  # type: ignore[arg-type]
    assert rng.used <= 2 * REFILL < n * BLOCK // 20
    assert r_.size < 5 * n * BLOCK * 1e-4
