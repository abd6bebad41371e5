"""Lending cycles in the exact engine: brute-force agreement and the size limit of 18."""

from __future__ import annotations

import numpy as np

from debtsim.engines.exact.engine import ExactEngine
from debtsim.model.factor_grid import gauss_hermite
from tests.engines.test_exact import law_error, make_model, spec_columns
from tests.reference import enumerate_law


def _ring(size: int, chords: list[tuple[int, int, float]] | None = None):
    obligors = [(100.0 + 37.0 * i, 0.01 + 0.007 * i, 0.45, 0.1 + 0.01 * i) for i in range(size)]
    links = [((i + 1) % size, i, 0.2 + 0.05 * (i % 5)) for i in range(size)]
    return obligors, links + (chords or [])


def test_ring_with_chords_matches_brute_force_enumeration() -> None:
    """A 5-member ring with two chords: law and final PDs equal full enumeration to 1e-9."""
    spec = _ring(5, [(2, 0, 0.5), (4, 1, 0.35)])
    grid = gauss_hermite(6)
    dist = ExactEngine(factor_grid=grid).run(make_model(spec))
    ead, pd, lgd, rho, links = spec_columns(spec)
    law, dp = enumerate_law(ead, lgd, pd, rho, links, grid.nodes, grid.weights)
    assert law_error(dist.losses, dist.probabilities, law) < 1e-9
    np.testing.assert_allclose(dist.default_probability, dp, rtol=0, atol=1e-9)


def test_cycles_up_to_eighteen_are_accepted() -> None:
    """A ring of 18 is accepted by default; a ring of 19 is refused naming the limit 18."""
    assert ExactEngine().refusal(make_model(_ring(18))) is None
    reason = ExactEngine().refusal(make_model(_ring(19)))
    assert reason is not None and "18" in reason and "sample" in reason
