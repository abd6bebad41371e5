r"""Exact conditional laws of final defaults inside one group of linked obligors.

Conditional on the factor, own defaults and link liveness are independent, so
the final defaults of a strongly connected group of obligors (firms that lend
to each other in a cycle) have a law that depends only on

* each member's *seed* probability: own default, or being dragged in by a
  live link from a defaulted debtor outside the group, and
* the contagion of the links inside the group.

For a group ``S`` and a subset ``T``::

    P(final = T) = g(T) * prod_{i not in T} (1 - s_i) * prod_{links T -> S\\T} (1 - q)

where ``g(T)`` is the probability that seeds and live links inside ``T``
reach all of ``T``; summing the same identity over the subsets of ``T`` gives
the recursion ``g(T) = 1 - sum_{U < T} g(U) prod_{i in T\\U}(1 - s_i)
prod_{links U -> T\\U}(1 - q)``, with ``g({}) = 1``.  This is the live-edge
reading of the independent cascade (Kempe, Kleinberg & Tardos, KDD 2003).

The recursion runs level by level in ``|T|``: every subset ``U`` of a
level-``m`` set has fewer members, so a whole level is one array expression
over all pairs ``(U, T)`` (``C(s, m) (2^m - 1)`` of them, ``3^s`` in all),
evaluated for every factor node at once.  The cut factor
``prod_{links U -> R}(1 - q)`` is ``prod_{c in R} h_c(U)`` with
``h_c(U) = prod_{d in U, d -> c}(1 - q)``, tabulated once per member.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import sparse

from debtsim._typing import FloatArray, IntArray

__all__ = ["LARGEST_GROUP", "MAX_GROUP_SIZE", "group_law", "seed_probability"]

#: Largest strongly connected group whose law is computed (3^18 ~ 3.9e8 subset pairs).
LARGEST_GROUP = 18
#: Largest such group the circuit engine loads jointly (its multiplexers grow with it).
MAX_GROUP_SIZE = 14
#: Elements of the largest temporary array (pairs times batch) per step.
_CHUNK_ELEMENTS = 1 << 22
#: Groups up to this size keep their cut matrices cached between calls.
_CACHE_MAX_SIZE = 14
#: Columns whose smallest no-seed product is below this avoid the division form.
_SMALLEST_NO_SEED = 1e-280


def seed_probability(own: FloatArray, survive: FloatArray) -> FloatArray:
    """Probability of being hit from outside the group or defaulting on one's own.

    Parameters
    ----------
    own : ndarray
        Own-default probability given the factor.
    survive : ndarray, broadcastable to ``own``
        Product of ``1 - q`` over live-able links from defaulted outside debtors.

    Returns
    -------
    ndarray
        ``1 - (1 - own) * survive``.
    """
    return 1.0 - (1.0 - own) * survive


def _product_table(factors: FloatArray) -> FloatArray:
    """``table[mask] = prod_{j in mask} factors[j]`` for every mask (shape (2^s, ...))."""
    table = np.ones((1,) + factors.shape[1:])
    for j in range(factors.shape[0]):
        table = np.concatenate([table, table * factors[j]], axis=0)
    return table


def _inflow_tables(s: int, links: Sequence[tuple[int, int, float]]) -> FloatArray:
    """``h[c, U] = prod (1 - q)`` over links ``d -> c`` with ``d`` in ``U``, shape (s, 2^s)."""
    keep = np.ones((s, s))  # keep[c, d]: 1 - q of the link d -> c
    for d, c, q in links:
        keep[int(c), int(d)] *= 1.0 - float(q)
    return _product_table(keep.T).T


def _level_masks(s: int) -> list[IntArray]:
    """Masks of ``s`` bits grouped by their number of set bits."""
    masks = np.arange(1 << s, dtype=np.int64)
    count = np.zeros(masks.size, dtype=np.int64)
    for j in range(s):
        count += (masks >> j) & 1
    order = np.argsort(count, kind="stable")
    bounds = np.searchsorted(count[order], np.arange(s + 2))
    return [order[bounds[m] : bounds[m + 1]] for m in range(s + 1)]


def _subset_pairs(targets: IntArray, m: int) -> tuple[IntArray, IntArray]:
    """Proper subsets ``U`` of each target (all of size ``m``) and the rests ``T - U``.

    Returns arrays of shape ``(targets.size, 2^m - 1)``.
    """
    bits = (targets[:, None] >> np.arange(64)[None, :]) & 1
    rows, cols = np.nonzero(bits)
    pos = cols.reshape(targets.size, m)  # positions of the set bits, ascending
    sub = np.arange((1 << m) - 1, dtype=np.int64)
    choose = (sub[:, None] >> np.arange(m)[None, :]) & 1  # (2^m - 1, m)
    u = choose @ (np.int64(1) << pos).T  # (2^m - 1, targets)
    u = np.ascontiguousarray(u.T)
    return u, targets[:, None] - u


@dataclass(frozen=True)
class _Level:
    """Targets ``T`` of one size and the sparse matrix ``C[T, U] = cut(U, T - U)``, ``U < T``."""

    targets: IntArray
    cut: sparse.csr_matrix


def _cut(inflow: FloatArray, u: IntArray, rest: IntArray) -> FloatArray:
    """``prod_{links U -> R}(1 - q)`` for arrays of subset pairs."""
    out = np.ones(u.shape)
    for c in range(inflow.shape[0]):
        if np.all(inflow[c] == 1.0):
            continue
        hit = ((rest >> c) & 1).astype(bool)
        out[hit] *= inflow[c][u[hit]]
    return out


def _build_levels(s: int, links: tuple[tuple[int, int, float], ...]) -> Iterator[_Level]:
    """Build the recursion's sparse cut matrices, level by level (node-independent)."""
    inflow = _inflow_tables(s, links)
    full = 1 << s
    for m, targets in enumerate(_level_masks(s)):
        if m == 0:
            continue
        per_target = (1 << m) - 1
        step = max(1, _CHUNK_ELEMENTS // per_target)
        for a in range(0, targets.size, step):
            t = targets[a : a + step]
            u, rest = _subset_pairs(t, m)
            matrix = sparse.csr_matrix(
                (_cut(inflow, u, rest).ravel(), u.ravel(), np.arange(t.size + 1) * per_target),
                shape=(t.size, full),
            )
            yield _Level(t, matrix)


@lru_cache(maxsize=4)
def _cached_levels(s: int, links: tuple[tuple[int, int, float], ...]) -> list[_Level]:
    return list(_build_levels(s, links))


def _levels(s: int, links: tuple[tuple[int, int, float], ...]) -> Iterable[_Level]:
    """Cut matrices, cached for small groups (s <= 14: 4.8e6 entries), else built as used."""
    return _cached_levels(s, links) if s <= _CACHE_MAX_SIZE else _build_levels(s, links)


def group_law(
    seed: FloatArray,
    links: Sequence[tuple[int, int, float]],
) -> FloatArray:
    """Joint law of the final defaults of one strongly connected group.

    Parameters
    ----------
    seed : ndarray, shape (..., s)
        Seed probability of each member (see :func:`seed_probability`).
    links : sequence of (debtor, creditor, q)
        Links inside the group, members numbered ``0..s-1``.

    Returns
    -------
    ndarray, shape (..., 2**s)
        ``P(final default set = T)`` with member ``j`` in ``T`` iff bit ``j``
        of the index is set.

    Notes
    -----
    With ``n(T) = prod_{i in T}(1 - s_i)`` the recursion reads
    ``g(T) = 1 - n(T) sum_{U < T} C[T, U] g(U) / n(U)``, a sparse matrix
    (``C``, independent of the factor) times a dense one (``g / n``, one
    column per node).  Columns where ``n(S)`` is below ``1e-280`` (a seed
    certain to within rounding) are computed by the division-free form of
    the same recursion instead.
    """
    seed = np.asarray(seed, dtype=float)
    s = seed.shape[-1]
    if s > LARGEST_GROUP:
        raise ValueError(f"a group of {s} mutually lending obligors exceeds {LARGEST_GROUP}")
    batch = seed.shape[:-1]
    flat = seed.reshape(-1, s)
    full = 1 << s
    key = tuple((int(d), int(c), float(q)) for d, c, q in links)
    # no_seed[mask, b] = prod_{j in mask} (1 - seed_j); rows are states, columns the batch
    no_seed = _product_table(np.ascontiguousarray((1.0 - flat).T))
    safe = no_seed[full - 1] > _SMALLEST_NO_SEED
    g = np.empty((full, flat.shape[0]))
    if safe.any():
        g[:, safe] = _recursion_sparse(_levels(s, key), no_seed[:, safe])
    if not safe.all():
        g[:, ~safe] = _recursion_direct(s, key, no_seed[:, ~safe])
    inflow = _inflow_tables(s, key)
    states = np.arange(full, dtype=np.int64)
    outside = (full - 1) & ~states
    law = g * no_seed[outside] * _cut(inflow, states, outside)[:, None]
    np.clip(law, 0.0, 1.0, out=law)
    return np.ascontiguousarray(law.T).reshape(batch + (full,))


def _recursion_sparse(levels: Iterable[_Level], no_seed: FloatArray) -> FloatArray:
    """``g`` for every state (rows) and column, by the sparse form of the recursion."""
    ratio = np.zeros(no_seed.shape)  # g / n, filled level by level
    ratio[0] = 1.0
    g = np.empty(no_seed.shape)
    g[0] = 1.0
    for level in levels:
        t = level.targets
        g[t] = 1.0 - no_seed[t] * (level.cut @ ratio)
        ratio[t] = g[t] / no_seed[t]
    return g


def _recursion_direct(
    s: int, links: tuple[tuple[int, int, float], ...], no_seed: FloatArray
) -> FloatArray:
    """``g`` by the division-free recursion (for columns with a certain seed)."""
    inflow = _inflow_tables(s, links)
    width = no_seed.shape[1]
    g = np.empty((1 << s, width))
    g[0] = 1.0
    for m, targets in enumerate(_level_masks(s)):
        if m == 0:
            continue
        per_target = (1 << m) - 1
        step = max(1, _CHUNK_ELEMENTS // (per_target * max(width, 1)))
        for a in range(0, targets.size, step):
            t = targets[a : a + step]
            u, rest = _subset_pairs(t, m)
            terms = g[u] * no_seed[rest]  # (targets, subsets, columns)
            terms *= _cut(inflow, u, rest)[:, :, None]
            g[t] = 1.0 - terms.sum(axis=1)
    return g
