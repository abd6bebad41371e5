"""The exact engine's sector mixing path: node laws, Chernoff windows, folding."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy.stats import binom

import debtsim.engines.exact.sector_law as sector_law_module
from debtsim.book.dependence import DependenceSpec
from debtsim.book.records import Book, Obligor
from debtsim.distribution import LossDistribution
from debtsim.engines.exact.engine import ExactEngine
from debtsim.engines.exact.loss_grid import SeriesKernel
from debtsim.engines.exact.sector_law import chi_square_grid
from debtsim.engines.exact.sector_mixing import (
    SectorNodeLaws,
    chernoff_window,
    log_mgf_bounds,
    mix_rows,
    mixture_log_mgf,
    theta_ladder,
)
from debtsim.model.specification import LinkedFactorModel


def exact_log_mgf(p: np.ndarray, k: np.ndarray, count: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """``sum_c count_c log(1 - p_c + p_c e^{theta k_c})``: the Bernoulli MGF in closed form."""
    x = theta[None, None, :] * k[None, :, None]
    terms = np.logaddexp(np.log1p(-p)[:, :, None], np.log(p)[:, :, None] + x)
    return np.asarray((terms * count[None, :, None]).sum(axis=1))


def test_log_mgf_bounds_are_upper_bounds_of_the_bernoulli_mgf() -> None:
    rng = np.random.default_rng(3)
    p = np.clip(rng.uniform(0.0, 1.0, (40, 25)) ** rng.uniform(0.3, 4.0, (40, 1)), 1e-12, 1 - 1e-12)
    k = rng.integers(1, 60, 25)
    count = rng.integers(1, 9, 25).astype(float)
    theta = np.concatenate([-theta_ladder(60, 5000)[::-1], theta_ladder(60, 5000)])
    bound = log_mgf_bounds(p, k, count, theta)
    exact = exact_log_mgf(p, k, count, theta)
    assert np.all(bound >= exact - 1e-9 * np.maximum(1.0, np.abs(exact)))
    # tight where the probabilities are small (log(1 + u) ~ u)
    small = log_mgf_bounds(p * 1e-6, k, count, theta[:5])
    np.testing.assert_allclose(small, exact_log_mgf(p * 1e-6, k, count, theta[:5]), rtol=1e-5)


def test_chernoff_window_holds_the_binomial_law() -> None:
    """Window ends against the exact binomial tails (scipy.stats.binom)."""
    n, p, k = 400, 0.03, 3
    theta = np.concatenate([-theta_ladder(k, n * k)[::-1], theta_ladder(k, n * k)])
    mgf = log_mgf_bounds(np.full((1, 1), p), np.array([k]), np.array([float(n)]), theta)[0]
    for tail in (1e-4, 1e-8, 1e-12):
        lo, hi = chernoff_window(mgf, theta, tail)
        assert binom.cdf(np.ceil(lo / k) - 1, n, p) <= tail
        assert binom.sf(np.floor(hi / k), n, p) <= tail
        assert lo < n * p * k < hi < n * k


def test_mixture_log_mgf_is_the_weighted_log_sum() -> None:
    rng = np.random.default_rng(5)
    node = rng.normal(0.0, 300.0, (30, 7))  # spreads of e^300: no naive sum survives
    weights = rng.uniform(0.0, 1.0, (6, 30)) * (rng.uniform(size=(6, 30)) > 0.3)
    got = mixture_log_mgf(weights, node)
    for g in range(6):
        live = weights[g] > 0
        top = node[live].max(axis=0)
        want = top + np.log((weights[g, live, None] * np.exp(node[live] - top)).sum(axis=0))
        np.testing.assert_allclose(got[g], want, rtol=1e-12)


def test_node_laws_and_mixing_match_direct_computation() -> None:
    rng = np.random.default_rng(11)
    k = rng.integers(1, 12, 50)
    kernel = SeriesKernel(k)
    p = rng.uniform(0.001, 0.2, (9, 50))
    needed = np.ones(9, dtype=bool)
    needed[4] = False
    laws = SectorNodeLaws.compute(kernel, p, needed, int(k.sum()))
    weights = rng.uniform(size=9)
    weights[4] = 0.0
    off, mixed = mix_rows(laws, weights)
    want = np.zeros(int(k.sum()) + 1)
    for j in range(9):
        if not needed[j]:
            continue
        law = np.zeros(int(k.sum()) + 1)
        law[0] = 1.0
        for kc, pc in zip(k.tolist(), p[j].tolist(), strict=True):  # direct recursion
            law[kc:] = law[kc:] * (1 - pc) + law[:-kc] * pc
            law[:kc] *= 1 - pc
        want += weights[j] * law
    got = np.zeros_like(want)
    got[off : off + mixed.size] = mixed
    assert np.max(np.abs(got - want)) < 1e-15


# ------------------------------------------------------------ whole runs, path on and off
def big_book(n: int, seed: int) -> Book:
    """Integer losses in 4 sectors: windows where the Chernoff cut binds."""
    rng = np.random.default_rng(seed)
    pd = rng.choice([0.002, 0.01, 0.03, 0.08], n)
    obligors = tuple(
        Obligor(
            f"M{i}",
            float(rng.integers(1, 40)) * 100.0,
            float(pd[i]),
            0.5,
            float(rng.choice([0.08, 0.15, 0.24])),
            sector="abcd"[i % 4],
        )
        for i in range(n)
    )
    spec = DependenceSpec(sectors=tuple("abcd"), loadings=(0.3, 0.55, 0.8, 0.95))
    return Book(name="mixing", currency="EUR", obligors=obligors, dependence=spec)


def run(book: Book, **kw: object) -> LossDistribution:
    return ExactEngine(**kw).run(LinkedFactorModel.from_book(book))  # type: ignore[arg-type]


def on_grid(dist: LossDistribution) -> np.ndarray:
    k = np.round(dist.losses / 50.0).astype(int)
    out = np.zeros(k.max() + 1)
    out[k] = dist.probabilities
    return out


@pytest.mark.parametrize("family", ["gaussian", "student_t"])
def test_mixing_path_equals_full_convolution_path(
    family: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Same nodes, two algorithms: the folded Chernoff windows lose nothing visible."""
    book = big_book(1200, 2)
    kw: dict[str, object] = {}
    if family == "student_t":
        assert book.dependence is not None
        book = replace(
            book,
            dependence=replace(book.dependence, family="student_t", degrees_of_freedom=6.0),
        )
        kw["mixing_grid"] = chi_square_grid(6.0, panels=2, order=4)
    fast = run(book, **kw)
    assert fast.diagnostics["widest_global_window"] < on_grid(fast).size  # folding happened
    assert fast.diagnostics["sector_weight_cut_mass"] < 1e-14
    assert fast.diagnostics["sector_rule_pd_error"] < 1e-10
    monkeypatch.setattr(sector_law_module, "_FAST_SECTORS", False)
    full = run(book, **kw)
    a, b = on_grid(fast), on_grid(full)
    n = max(a.size, b.size)
    a, b = np.pad(a, (0, n - a.size)), np.pad(b, (0, n - b.size))
    assert np.max(np.abs(a - b)) < 1e-13
    assert np.abs(np.cumsum(a) - np.cumsum(b)).max() < 1e-12
    np.testing.assert_allclose(fast.default_probability, full.default_probability, atol=1e-14)
