"""The per-node kernel of the exact engine against direct polynomial products."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from debtsim.engines.exact.loss_grid import (
    SeriesKernel,
    Window,
    bernstein_halfwidth,
    grid_law,
    place_window,
)


def _direct_law(k: np.ndarray, p: np.ndarray, count: np.ndarray) -> np.ndarray:
    """Law of sum_c k_c * Binomial(count_c, p_c) by plain convolution (scipy binomial pmf)."""
    law = np.ones(1)
    for kk, pp, cc in zip(k.tolist(), p.tolist(), count.astype(int).tolist(), strict=True):
        pmf = binom.pmf(np.arange(cc + 1), cc, pp)
        spread = np.zeros(cc * kk + 1)
        spread[::kk] = pmf
        law = np.convolve(law, spread)
    return law


@pytest.mark.parametrize("seed", range(4))
def test_kernel_matches_direct_convolution(seed: int) -> None:
    """Classes with p anywhere in [0, 1] (0, 1, exactly and nearly 1/2 included), counts > 1."""
    rng = np.random.default_rng(seed)
    n = 60
    k = rng.integers(1, 12, n)
    p = rng.uniform(0.0, 1.0, n)
    p[:6] = [0.0, 1.0, 0.5, 0.5 + 1e-9, 0.5 - 1e-4, 0.499]
    count = rng.integers(1, 4, n).astype(float)
    expect = _direct_law(k, p, count)
    top = expect.size - 1
    law, truncation = grid_law(k, p, Window(0, top + 1), count=count)
    np.testing.assert_allclose(law, expect, rtol=0, atol=1e-13)
    assert truncation <= 1e-14


def test_kernel_on_a_narrow_window_with_an_extra_addend() -> None:
    """A window placed by the Bernstein bound (1e-16 per tail) plus an extra addend: agree."""
    rng = np.random.default_rng(9)
    n = 400
    k = rng.integers(1, 30, n)
    p = rng.uniform(0.0, 0.3, n)
    count = np.ones(n)
    extra = (5, np.array([0.2, 0.0, 0.5, 0.3]))
    expect = np.convolve(_direct_law(k, p, count), np.r_[np.zeros(5), extra[1]])
    kernel = SeriesKernel(k)
    state = kernel.node(p)
    mean = state.mean + float(np.arange(5, 9) @ extra[1])
    half = bernstein_halfwidth(state.var + float(np.arange(5, 9) ** 2 @ extra[1]), 30.0)
    window = place_window(mean, half, 0, expect.size - 1, expect.size - 1)
    assert window.width < expect.size  # genuinely narrower than the support
    law, _ = kernel.law(state, window, extra)
    np.testing.assert_allclose(law, expect[window.start : window.start + window.width],
                               rtol=0, atol=1e-13)


def test_node_moments() -> None:
    """Mean and variance in grid units are sum p k c and sum p (1 - p) k^2 c."""
    k = np.array([1, 2, 5, 0])
    p = np.array([0.1, 1.0, 0.0, 0.4])
    count = np.array([3.0, 1.0, 2.0, 7.0])
    state = SeriesKernel(k, count).node(p)
    assert state.mean == pytest.approx(0.3 + 2.0)
    assert state.var == pytest.approx(3 * 0.09)
    assert (state.lowest, state.highest, state.bound) == (2, 5, 1.0)
