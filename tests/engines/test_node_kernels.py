"""The compiled per-node kernels against plain numpy and against exact logarithms.

Oracles: the series of ``log(1 + theta x)`` written term by term in numpy
(positions by ``%``, terms by ``np.add.at``), the principal complex
logarithm ``np.log`` of each factor ``1 - p + p w^k``, direct products of the
factors, and the brute-force convolution of Bernoulli laws.
"""

from __future__ import annotations

import numpy as np
import pytest

from debtsim.engines.exact.loss_grid import SeriesKernel, Window, compiled


def _terms_needed(theta: float, each: float) -> int:
    """First R >= 1 with theta^(R+1) / ((R+1) (1 - theta)) <= each (the documented bound)."""
    r = 1
    while theta ** (r + 1) / ((r + 1) * (1.0 - theta)) > each:
        r += 1
    return r


def _numpy_series(
    p: np.ndarray, k: np.ndarray, count: np.ndarray, each: float, hard_order: int, width: int
) -> tuple[np.ndarray, float, float, list[int]]:
    """The kernel's job in plain numpy, class by class."""
    coefficients = np.zeros(width)
    const = shift = 0.0
    hard: list[int] = []
    for c in range(p.size):
        if p[c] <= 0.0:
            continue
        flip = p[c] > 0.5
        q = 1.0 - p[c] if flip else p[c]
        if q <= 0.0:
            shift += k[c] * count[c]
            continue
        theta = q / (1.0 - q)
        # the bound decreases in R: more than hard_order terms iff it fails at R = hard_order
        h = hard_order + 1
        if theta >= 1.0 or theta**h / (h * (1.0 - theta)) > each:
            hard.append(c)
            continue
        const += count[c] * np.log1p(-q)
        shift += k[c] * count[c] if flip else 0.0
        r = np.arange(1, _terms_needed(theta, each) + 1)
        values = (-1.0) ** (r + 1) * count[c] * theta**r / r
        np.add.at(coefficients, ((-1 if flip else 1) * r * k[c]) % width, values)
    return coefficients, const, shift, hard


def _classes(seed: int, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    k = rng.integers(1, 40, n)
    p = rng.uniform(0.0, 1.0, n)
    p[:8] = [0.0, 1.0, 0.5, 0.5 + 1e-9, 0.5 - 1e-4, 0.499, 1e-12, 1.0 - 1e-12]
    count = rng.integers(1, 5, n).astype(float)
    return k, p, count


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("each", [1e-3, 1e-16])
def test_series_terms_match_numpy(seed: int, each: float) -> None:
    """Same coefficients (1e-12), constant, shift and hard classes as the numpy oracle.

    At ``each = 1e-3`` the last terms kept are of order 1e-4, so a term too
    many or too few would show; widths smaller than ``r k`` test the wrap.
    """
    k, p, count = _classes(seed, 50)
    width = [7, 64, 1000, 37, 128][seed]
    hard_order = 200
    expect, const, shift, hard = _numpy_series(p, k, count, each, hard_order, width)
    kernels = compiled()
    coefficients = np.zeros(width)
    out_hard = np.empty(p.size, dtype=np.int64)
    reciprocal = 1.0 / np.maximum(np.arange(hard_order + 2.0), 1.0)
    got = kernels.series_terms(p, k, count, each, hard_order, reciprocal, coefficients, out_hard)
    np.testing.assert_allclose(coefficients, expect, rtol=0, atol=1e-12)
    assert got[0] == pytest.approx(const, abs=1e-12)
    assert got[1] == shift
    assert out_hard[: got[2]].tolist() == hard
    assert {2, 3} <= set(hard)  # p = 1/2 and 1/2 + 1e-9 never go through the series


@pytest.mark.parametrize("tolerance", [1e-3, 1e-6, 1e-9])
def test_truncation_bound_holds_at_every_frequency(tolerance: float) -> None:
    """|log G from the kept terms - exact log G| <= tolerance at every frequency.

    Exact: the sum over classes of ``count * log(1 - q) + count * log(1 + theta
    w^(+-k))`` with numpy's principal complex logarithm (each ``|theta w^k| <
    1``, so that is the limit of the series).  Truncation is tested in
    isolation: no class is hard (``hard_order`` large, ``p`` away from 1/2).
    """
    rng = np.random.default_rng(4)
    n = 300
    k = rng.integers(1, 50, n)
    p = np.concatenate([rng.uniform(0.001, 0.45, n // 2), rng.uniform(0.55, 0.999, n - n // 2)])
    count = rng.integers(1, 6, n).astype(float)
    width = 256
    each = tolerance / count.sum()
    coefficients = np.zeros(width)
    hard = np.empty(n, dtype=np.int64)
    reciprocal = 1.0 / np.maximum(np.arange(100_002.0), 1.0)
    const, _, n_hard = compiled().series_terms(
        p, k, count, each, 100_000, reciprocal, coefficients, hard
    )
    assert n_hard == 0
    got = np.fft.rfft(coefficients) + const
    flip = p > 0.5
    q = np.where(flip, 1.0 - p, p)
    theta = q / (1.0 - q)
    signed = np.where(flip, -k, k)[:, None] * np.arange(width // 2 + 1)[None, :]
    w_k = np.exp(-2j * np.pi * (signed % width) / width)
    exact = count @ (np.log1p(-q)[:, None] + np.log(1.0 + theta[:, None] * w_k))
    error = np.abs(got - exact)
    assert error.max() <= tolerance + 1e-12  # 1e-12: rounding of the oracle's 900 logarithms
    # and the bound is not vacuous: loosening it a thousandfold shows a larger error
    if tolerance >= 1e-6:
        loose = np.zeros(width)
        compiled().series_terms(p, k, count, each * 1e3, 100_000, reciprocal, loose, hard)
        assert np.abs(np.fft.rfft(loose) + const - exact).max() > error.max()


@pytest.mark.parametrize("integral", [True, False])
def test_hard_spectrum_matches_direct_product(integral: bool) -> None:
    """prod (1 - p + p w^k)^count at every frequency of the window, against numpy (1e-12)."""
    rng = np.random.default_rng(7)
    n, width = 40, 90
    k = rng.integers(1, 500, n)
    p = np.clip(0.5 + rng.normal(0.0, 1e-3, n), 0.0, 1.0)
    p[:3] = [0.5, 0.0, 1.0]
    count = np.ones(n) if integral else rng.integers(1, 4, n).astype(float)
    roots = np.exp(-2j * np.pi * np.arange(width) / width)
    out = np.full(width // 2 + 1, 2.0 + 0.5j)
    compiled().hard_spectrum(p, k, count, roots, out)
    f = np.arange(width // 2 + 1)
    factors = (1.0 - p)[:, None] + p[:, None] * roots[(k[:, None] * f[None, :]) % width]
    expect = (2.0 + 0.5j) * np.prod(factors ** count[:, None], axis=0)
    np.testing.assert_allclose(out, expect, rtol=1e-12, atol=1e-14)


def test_node_moments_match_numpy() -> None:
    """Mean, variance, bound and range of the loss, against numpy sums (1e-12 relative)."""
    rng = np.random.default_rng(8)
    k = rng.integers(1, 100, 500)
    count = rng.integers(1, 4, 500).astype(float)
    p = rng.uniform(0.0, 1.0, 500)
    p[:4] = [0.0, 1.0, 0.0, 1.0]
    k[:4] = [99, 98, 97, 96]
    mean, var, bound, lowest, highest, interior = compiled().node_moments(
        p, k, k * count, k.astype(float) ** 2 * count
    )
    assert mean == pytest.approx(float(np.sum(p * k * count)), rel=1e-12)
    assert var == pytest.approx(float(np.sum(p * (1 - p) * k**2 * count)), rel=1e-12)
    moving = (p > 0) & (p < 1)
    assert bound == k[moving].max()
    assert lowest == np.sum((k * count)[p >= 1])
    assert highest == np.sum((k * count)[p > 0])
    assert not interior


@pytest.mark.parametrize("hard_order", [1, 3, 8192])
def test_law_with_many_hard_classes_matches_brute_force(hard_order: int) -> None:
    """Whatever share of classes goes the exact way, the law is the convolution (1e-13)."""
    rng = np.random.default_rng(11)
    n = 30
    k = rng.integers(1, 9, n)
    p = rng.uniform(0.0, 1.0, n)
    count = rng.integers(1, 4, n).astype(float)
    law = np.ones(1)
    for kk, pp, cc in zip(k, p, count.astype(int), strict=True):
        for _ in range(cc):
            step = np.zeros(kk + 1)
            step[0], step[kk] = 1.0 - pp, pp
            law = np.convolve(law, step)
    kernel = SeriesKernel(k, count, hard_order=hard_order)
    got, truncation = kernel.law(kernel.node(p), Window(0, law.size))
    np.testing.assert_allclose(got, law, rtol=0, atol=1e-13)
    assert truncation == kernel.tolerance


def test_kernels_are_cached_on_disk_and_numba_is_a_dependency() -> None:
    """README (Performance): numba compiles the per-node kernels once and caches them on disk."""
    import tomllib

    from numba.core.caching import NullCache

    from tests.conftest import REPO_ROOT

    kernels = compiled()
    for name in kernels.__all__:
        assert not isinstance(getattr(kernels, name)._cache, NullCache), name
    project = tomllib.loads((REPO_ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert any(d.startswith("numba") for d in project["project"]["dependencies"])
