"""The vectorised group law against the original recursion and a brute-force count."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from debtsim.model.linked_group_law import LARGEST_GROUP, group_law
from tests.model.group_law_oracle import group_law as oracle_group_law


def _random_links(s: int, rng: np.random.Generator, extra: int) -> list[tuple[int, int, float]]:
    """A ring through all members (so the group is strongly connected) plus random chords."""
    links = {(i, (i + 1) % s): float(rng.uniform(0.05, 0.95)) for i in range(s)} if s > 1 else {}
    for d, c in rng.integers(0, s, (extra, 2)).tolist():
        if d != c:
            links[(d, c)] = float(rng.uniform(0.0, 1.0))
    return [(d, c, q) for (d, c), q in links.items()]


def _brute_force(seed: np.ndarray, links: list[tuple[int, int, float]]) -> np.ndarray:
    """Enumerate seed patterns and live-link patterns; final set by graph search."""
    s = seed.size
    law = np.zeros(1 << s)
    for seeds in itertools.product((0, 1), repeat=s):
        p_seed = float(np.prod([seed[j] if seeds[j] else 1 - seed[j] for j in range(s)]))
        for live in itertools.product((0, 1), repeat=len(links)):
            p = p_seed * float(np.prod([q if on else 1 - q
                                        for (_d, _c, q), on in zip(links, live, strict=True)]))
            final = {j for j in range(s) if seeds[j]}
            stack = list(final)
            while stack:
                d0 = stack.pop()
                for (d, c, _q), on in zip(links, live, strict=True):
                    if on and d == d0 and c not in final:
                        final.add(c)
                        stack.append(c)
            law[sum(1 << j for j in final)] += p
    return law


@pytest.mark.parametrize("s", range(1, 5))
def test_matches_brute_force_enumeration(s: int) -> None:
    """Small groups: every final-set probability equals the full enumeration to 1e-14."""
    rng = np.random.default_rng(s)
    links = _random_links(s, rng, extra=2)
    seed = rng.uniform(0.0, 0.6, s)
    np.testing.assert_allclose(group_law(seed, links), _brute_force(seed, links), atol=1e-14)


@pytest.mark.parametrize("s", range(1, 12))
def test_matches_original_recursion(s: int) -> None:
    """Every size the original pure-Python recursion runs quickly: agreement to 1e-12."""
    rng = np.random.default_rng(100 + s)
    links = _random_links(s, rng, extra=s)
    seed = rng.uniform(0.0, 0.4, (3, 2, s))  # batch dims as the engines pass them
    new = group_law(seed, links)
    assert new.shape == (3, 2, 1 << s)
    np.testing.assert_allclose(new, oracle_group_law(seed, links), rtol=0, atol=1e-12)


def test_certain_and_near_certain_seeds() -> None:
    """Columns with seeds at (or within 1e-40 of) 1 take the division-free path; same law."""
    rng = np.random.default_rng(7)
    s = 7
    links = _random_links(s, rng, extra=4)
    seed = rng.uniform(0.0, 0.3, (5, s))
    seed[1, 0] = 1.0
    seed[2, :] = 1.0 - 1e-40
    seed[3, :] = 0.0
    new = group_law(seed, links)
    np.testing.assert_allclose(new, oracle_group_law(seed, links), rtol=0, atol=1e-12)
    assert new[3, 0] == 1.0  # no seed: nobody defaults
    np.testing.assert_allclose(new.sum(axis=1), 1.0, atol=1e-12)


def test_twelve_member_ring_matches_oracle_on_one_node() -> None:
    """A 12-member ring at one node (the old recursion takes seconds): agreement to 1e-12."""
    rng = np.random.default_rng(14)
    links = _random_links(12, rng, extra=0)
    seed = rng.uniform(0.001, 0.05, 12)
    new = group_law(seed, links)
    np.testing.assert_allclose(new, oracle_group_law(seed, links), rtol=0, atol=1e-12)


def test_limit_is_eighteen() -> None:
    """Groups up to 18 members are accepted; larger ones are refused with a clear error."""
    assert LARGEST_GROUP == 18
    with pytest.raises(ValueError, match="exceeds 18"):
        group_law(np.full(19, 0.01), [])
