"""Scenario drawing for the ``sample`` engine: factor, own defaults, live links, cascade.

One scenario is a factor value ``z``, the own defaults given ``z`` and the
final defaults they reach along live links.  Scenarios are drawn in fixed
*blocks* of :data:`BLOCK` scenarios; each block has its own PCG64 streams
spawned from the run's :class:`numpy.random.SeedSequence`, so the result
depends on the seed and the scenario count only, never on how the work is
split into chunks or threads.

Own defaults
    Given ``z``, obligor *i* defaults on its own with ``p_i(z) =
    Phi(t_i(z))``, ``t_i(z) = (Phi^-1(PD_i) - sqrt(R_i) z) / sqrt(1 - R_i)``
    (twisted under importance sampling).  No uniform is drawn per obligor
    and scenario: the block's scenarios are sorted by ``z`` (within each
    mixture component) and each obligor's defaults are drawn on pieces of
    sorted scenarios by geometric skips at the piece's largest probability,
    thinned to the exact ``p_i(z_s)`` (:mod:`debtsim.engines.sample.own_draws`):
    the model's law exactly, at a cost proportional to the defaults.
Links
    Whether link *k* is live in scenario *s* is decided by a counter-based
    draw: the SplitMix64 output function applied to the sum of a
    per-scenario key (the ``s``-th output of a SplitMix64 stream keyed from
    the seed) and a per-link key.  It is looked at only for links whose
    debtor defaulted and whose creditor has not, at most once per scenario,
    and it is the same whatever the chunking.
Cascade
    Per scenario, depth first from the own defaults along live links
    (compiled, :func:`debtsim.engines.sample.cascade_kernels.cascade`); only links
    out of defaulted obligors to creditors not yet in default are looked at.
    Cycles need no special care.
Importance sampling
    With a :class:`Proposal`, a scenario comes from one of a few tilted
    models (factor mean shifted, own-default probabilities exponentially
    twisted by ``theta(z)``) or from the model itself; its weight is the
    likelihood ratio of the model to that mixture.  Links are never tilted,
    so they drop out of the ratio.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import cast

import numpy as np
from numpy.polynomial import Chebyshev
from numpy.typing import NDArray
from scipy.special import logsumexp, ndtr, ndtri

from debtsim._typing import FloatArray, IntArray
from debtsim.engines.sample.own_draws import OwnDefaultDraws, SortedRun
from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "BLOCK",
    "CascadeSampler",
    "ChunkDefaults",
    "Proposal",
    "ScenarioSet",
    "Tilt",
    "default_chunk",
    "exact_log_normaliser",
    "thresholds",
]


#: Scenarios per independent random stream (fixed, so results do not depend on chunking).
BLOCK = 4096
#: Scenarios x obligors of a default chunk handed to an observer.
CHUNK_ELEMENTS = 1 << 19

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_TO_UNIT = 2.0**-53


def _weighted_count(index: IntArray, weights: FloatArray, size: int) -> FloatArray:
    """``out[j] = sum of weights where index == j`` (``np.bincount`` with weights)."""
    return cast(FloatArray, np.bincount(index, weights=weights, minlength=size))


def _liveness_bar(q: FloatArray) -> NDArray[np.uint64]:
    """Integer bar of each link: ``(h >> 11) < bar``  <=>  ``(h >> 11) 2^-53 < q``.

    The uniform of a hash ``h`` is its top 53 bits times ``2^-53``; ``q 2^53``
    is exact in floating point, so the comparison is the same in integers
    with ``bar = ceil(q 2^53)``.
    """
    scaled = np.ceil(np.clip(np.asarray(q, dtype=float), 0.0, 1.0) * 2.0**53)
    return scaled.astype(np.uint64)


def default_chunk(n_obligors: int) -> int:
    """Scenarios per observer chunk for a book of ``n_obligors``: about 2^19 pairs."""
    return max(1, min(BLOCK, CHUNK_ELEMENTS // max(n_obligors, 1)))


def thresholds(model: LinkedFactorModel) -> tuple[FloatArray, FloatArray]:
    """Intercept and slope of ``t_i(z) = a_i - b_i z``, with ``p_i(z) = Phi(t_i(z))``.

    ``a = Phi^-1(PD) / sqrt(1 - R)`` (``+inf`` where PD is 1, ``-inf`` where
    PD is 0) and ``b = sqrt(R / (1 - R))``.
    """
    r = np.asarray(model.asset_correlation, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        c = ndtri(np.clip(np.asarray(model.pd, dtype=float), 0.0, 1.0))
    c = np.where(model.pd >= 1.0, np.inf, np.where(model.pd <= 0.0, -np.inf, c))
    scale = np.sqrt(1.0 - r)
    return c / scale, np.sqrt(r) / scale


def _mix64(x: NDArray[np.uint64]) -> NDArray[np.uint64]:
    """SplitMix64 output function (a bijection of 64-bit words with full avalanche)."""
    x = x ^ (x >> np.uint64(30))
    x *= _MIX1
    x ^= x >> np.uint64(27)
    x *= _MIX2
    x ^= x >> np.uint64(31)
    return x


def _unit(x: NDArray[np.uint64]) -> FloatArray:
    """Uniform in [0, 1) from the top 53 bits of a 64-bit word."""
    return (x >> np.uint64(11)).astype(np.float64) * _TO_UNIT


def exact_log_normaliser(
    a: FloatArray, b: FloatArray, scaled_loss: FloatArray, theta: FloatArray, z: FloatArray
) -> FloatArray:
    """``psi(theta, z) = sum_i log(1 - p_i(z) + p_i(z) exp(theta l_i))`` for each ``z``.

    The cumulant generating function of the own-default loss (in units of
    ``scaled_loss``) given the factor.  Work is ``len(z) x n``; callers pass
    a modest number of points.
    """
    z = np.atleast_1d(np.asarray(z, dtype=float))
    theta = np.broadcast_to(np.asarray(theta, dtype=float), z.shape)
    out = np.empty(z.shape)
    step = max(1, (1 << 20) // max(a.size, 1))
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        for lo in range(0, z.size, step):
            zz, th = z[lo : lo + step], theta[lo : lo + step]
            p = ndtr(a[None, :] - b[None, :] * zz[:, None])
            s = th[:, None] * scaled_loss[None, :]
            terms = np.log1p(p * np.expm1(s))
            big = s > 700.0  # e^s overflows: log(1 - p + p e^s) = logaddexp(log(1-p), log p + s)
            if big.any():
                # stays exact where p underflowed to 0 (term 0) or is 1 (term s)
                terms[big] = np.logaddexp(np.log1p(-p[big]), np.log(p[big]) + s[big])
            out[lo : lo + step] = terms.sum(1)
    return out


@dataclass(frozen=True, eq=False)
class Tilt:
    """One tilted version of the model: shifted factor, twisted own defaults.

    The factor is ``N(shift, 1)``; given ``z`` in ``window``, own defaults
    are twisted to ``p_theta = p e^{theta l} / (1 - p + p e^{theta l})`` with
    ``theta = theta(z)`` (losses in units of the proposal's ``loss_scale``).
    Relative to the model, a scenario with own-default loss ``L_own`` has
    density ratio ``exp(shift z - shift^2/2 + theta(z) L_own - psi(theta(z), z))``.

    Attributes
    ----------
    shift : float
        Mean of the tilted factor (negative: bad states of the economy).
    window : tuple of float
        Factor interval where the twist applies; ``theta = 0`` outside.
    theta : Chebyshev or None
        ``theta(z)`` on ``window``; None means no twist at all.
    psi : Chebyshev or None
        Interpolant of ``psi(theta(z), z)`` on ``window``; None means the
        exact sum per scenario (slow for big books).

    """

    shift: float
    window: tuple[float, float]
    theta: Chebyshev | None
    psi: Chebyshev | None

    def twist(self, z: FloatArray) -> FloatArray:
        """``theta(z)`` in units of ``1 / loss_scale``; 0 outside the window."""
        out = np.zeros(z.shape)
        if self.theta is None:
            return out
        inside = (z >= self.window[0]) & (z <= self.window[1])
        if inside.any():
            out[inside] = self.theta(z[inside])
        return out


@dataclass(frozen=True, eq=False)
class Proposal:
    """Importance-sampling proposal: a defensive mixture of the model and its tilts.

    A scenario comes from tilt *j* with probability ``shares[j]`` and from the
    model itself with the remaining probability ``plain_share``.  Its weight
    is the likelihood ratio of the model to the whole mixture,
    ``1 / (plain_share + sum_j shares[j] r_j)`` with ``r_j`` the density
    ratio of tilt *j* (see :class:`Tilt`); it is at most ``1 / plain_share``.

    Attributes
    ----------
    loss_scale : float
        Loss unit of every ``theta`` (the largest ``EAD * LGD``).
    tilts : tuple of Tilt
    shares : tuple of float
        Share of scenarios drawn from each tilt; their sum is below 1.

    """

    loss_scale: float
    tilts: tuple[Tilt, ...]
    shares: tuple[float, ...]

    def __post_init__(self) -> None:
        if len(self.tilts) != len(self.shares) or not self.tilts:
            raise ValueError("a proposal needs one share per tilt and at least one tilt")
        if min(self.shares) <= 0.0 or sum(self.shares) >= 1.0:
            raise ValueError(f"tilt shares must be positive with sum below 1, got {self.shares}")

    @property
    def plain_share(self) -> float:
        """Share of scenarios drawn from the model itself."""
        return 1.0 - float(sum(self.shares))


@dataclass(frozen=True, eq=False)
class ScenarioSet:
    """Sampled scenarios of one run, in scenario order.

    Attributes
    ----------
    losses : ndarray, shape (N,)
        Portfolio loss of each scenario (final defaults).
    weights : ndarray, shape (N,)
        Likelihood ratio of each scenario (all 1 without importance sampling);
        ``mean(weights * f(losses))`` is an unbiased estimate of ``E[f(L)]``.
    factor : ndarray, shape (N,)
        Factor value of each scenario.
    default_weight : ndarray, shape (n,)
        ``sum_s weights_s * D_{s,i}``: weighted count of final defaults.
    default_weight_sq : ndarray, shape (n,)
        ``sum_s weights_s^2 * D_{s,i}``, for standard errors.
    observed : tuple
        What the sampler's observer returned for each chunk, in scenario order
        (empty without an observer).

    """

    losses: FloatArray
    weights: FloatArray
    factor: FloatArray
    default_weight: FloatArray
    default_weight_sq: FloatArray
    observed: tuple[object, ...] = ()

    @property
    def samples(self) -> int:
        """Number of scenarios."""
        return int(self.losses.shape[0])


@dataclass(frozen=True, eq=False)
class ChunkDefaults:
    """Final defaults of one chunk of scenarios, as sparse (scenario, obligor) pairs.

    Attributes
    ----------
    first : int
        Index of the chunk's first scenario in the run.
    losses, weights : ndarray, shape (rows,)
        Loss and weight of each scenario of the chunk.
    own_rows, own_cols : ndarray of int
        Own defaults: scenario (within the chunk) and obligor.
    contagion_rows, contagion_cols : ndarray of int
        Defaults reached only along live links.

    """

    first: int
    losses: FloatArray
    weights: FloatArray
    own_rows: IntArray
    own_cols: IntArray
    contagion_rows: IntArray
    contagion_cols: IntArray


#: Called on every chunk's defaults; what it returns is kept in scenario order.
Observer = Callable[[ChunkDefaults], object]


@dataclass
class _BlockResult:
    losses: FloatArray
    weights: FloatArray
    factor: FloatArray
    default_weight: FloatArray
    default_weight_sq: FloatArray
    observed: list[object] = field(default_factory=list)


class CascadeSampler:
    """Draws scenarios of one model, optionally from an importance proposal.

    Parameters
    ----------
    model : LinkedFactorModel
    proposal : Proposal or None
        None samples the model itself (plain Monte Carlo).
    chunk : int or None
        Scenarios per :class:`ChunkDefaults` handed to ``observe`` (at most
        :data:`BLOCK`); None picks about 2^19 scenario-obligor pairs.  Does
        not change the result.
    workers : int
        Threads working on blocks in parallel.  Does not change the result.
    observe : callable, optional
        Called with every chunk's :class:`ChunkDefaults` (from worker
        threads); its results are kept in ``ScenarioSet.observed``.

    """

    def __init__(
        self,
        model: LinkedFactorModel,
        proposal: Proposal | None = None,
        *,
        chunk: int | None = None,
        workers: int = 1,
        observe: Observer | None = None,
    ) -> None:
        self._observe = observe
        n = model.n_obligors
        self._n = n
        self._proposal = proposal
        self._chunk = max(1, min(BLOCK, chunk or default_chunk(n)))
        self._workers = max(1, int(workers))
        self._a, self._b = thresholds(model)
        self._loss = np.asarray(model.loss_given_default, dtype=float)
        scale = proposal.loss_scale if proposal is not None else 1.0
        self._scaled_loss = self._loss / scale
        # own defaults: p_i(z) = Phi(a_i - b_i z) = F(alpha k + gamma c) with k = z, c = 1
        finite = np.isfinite(self._a)
        self._members = np.flatnonzero(finite).astype(np.int64)
        self._own = OwnDefaultDraws(
            alpha=np.where(finite, -self._b, 0.0),
            gamma=np.where(finite, self._a, 0.0),
            sloss=self._scaled_loss,
            always=np.flatnonzero(self._a == np.inf),
        )
        self._levels = self._choose_levels()
        # links as CSR by debtor
        m = model.n_links
        self._m = m
        order = np.argsort(model.debtor, kind="stable")
        self._out_creditor = np.asarray(model.creditor, dtype=np.int64)[order]
        self._out_q = np.asarray(model.contagion, dtype=float)[order]
        self._bar = _liveness_bar(self._out_q)
        # a 64-bit key per link (SplitMix64 of its book index), added to a per-scenario key
        self._link_key = _mix64((order.astype(np.uint64) + np.uint64(1)) * _MIX2)
        counts = np.bincount(np.asarray(model.debtor, dtype=np.int64), minlength=n)
        self._indptr = np.concatenate(([0], np.cumsum(counts))).astype(np.int64)

    def _choose_levels(self) -> list[IntArray]:
        """Piece level of each obligor in each mixture component (speed only, not the law).

        Chosen on the component's expected share of a block, at the normal
        quantiles of its factor law, with its twist.
        """
        prop = self._proposal
        parts: list[tuple[float, float, Tilt | None]] = (
            [(1.0, 0.0, None)] if prop is None
            else [(sh, t.shift, t) for t, sh in zip(prop.tilts, prop.shares, strict=True)]
            + [(prop.plain_share, 0.0, None)]
        )
        out = []
        for share, shift, tilt in parts:
            rows = max(1, round(share * BLOCK))
            z = shift + ndtri((np.arange(rows) + 0.5) / rows)
            theta = tilt.twist(z) if tilt is not None else np.zeros(rows)
            out.append(self._own.levels(z, np.ones(rows), theta, self._members))
        return out

    # ------------------------------------------------------------------ public
    def run(
        self,
        samples: int,
        seed: np.random.SeedSequence,
        progress: Callable[[int, int], None] | None = None,
    ) -> ScenarioSet:
        """Draw ``samples`` scenarios from the streams of ``seed``.

        Parameters
        ----------
        samples : int
            Number of scenarios, >= 1.
        seed : SeedSequence
            Root of every random stream of the run.
        progress : callable, optional
            Called as ``progress(done, samples)`` after each block.

        """
        n_blocks = -(-samples // BLOCK)
        link_key = np.random.SeedSequence(
            seed.entropy, spawn_key=(*seed.spawn_key, 1)
        ).generate_state(1, dtype=np.uint64)[0]

        def job(b: int) -> _BlockResult:
            start = b * BLOCK
            rows = min(BLOCK, samples - start)
            block_seed = np.random.SeedSequence(seed.entropy, spawn_key=(*seed.spawn_key, 0, b))
            return self._block(block_seed, start, rows, link_key)

        results: list[_BlockResult] = []
        done = 0
        for res in self._map(job, range(n_blocks)):
            results.append(res)
            done += res.losses.size
            if progress is not None:
                progress(done, samples)
        return ScenarioSet(
            losses=np.concatenate([r.losses for r in results]),
            weights=np.concatenate([r.weights for r in results]),
            factor=np.concatenate([r.factor for r in results]),
            default_weight=np.sum([r.default_weight for r in results], axis=0),
            default_weight_sq=np.sum([r.default_weight_sq for r in results], axis=0),
            observed=tuple(x for r in results for x in r.observed),
        )

    # ----------------------------------------------------------------- helpers
    def _map(self, job: Callable[[int], _BlockResult], items: range) -> Iterator[_BlockResult]:
        if self._workers == 1 or len(items) == 1:
            for b in items:
                yield job(b)
            return
        with ThreadPoolExecutor(max_workers=self._workers) as pool:
            # a bounded window of blocks in flight keeps memory flat
            pending = []
            it = iter(items)
            for b in it:
                pending.append(pool.submit(job, b))
                if len(pending) >= 2 * self._workers:
                    yield pending.pop(0).result()
            for fut in pending:
                yield fut.result()

    def _block(
        self, block_seed: np.random.SeedSequence, start: int, rows: int, link_key: np.uint64
    ) -> _BlockResult:
        factor_seed, own_seed = block_seed.spawn(2)
        factor_rng = np.random.Generator(np.random.PCG64(factor_seed))
        own_rng = np.random.Generator(np.random.PCG64(own_seed))
        prop = self._proposal
        if prop is None:
            z = factor_rng.standard_normal(rows)
            theta_draw = np.zeros(rows)
            comp = np.zeros(rows, dtype=np.int64)
        else:
            k = len(prop.tilts)
            comp = np.searchsorted(np.cumsum(prop.shares), factor_rng.random(rows), side="right")
            shifts = np.array([t.shift for t in prop.tilts] + [0.0])
            z = factor_rng.standard_normal(rows) + shifts[comp]
            theta_all = np.zeros((k + 1, rows))
            log_base = np.empty((k, rows))
            for j, tilt in enumerate(prop.tilts):
                theta_all[j] = tilt.twist(z)
                # log density ratio of tilt j to the model, before the own-default term
                log_base[j] = tilt.shift * z - 0.5 * tilt.shift**2 - self._log_normaliser(
                    z, theta_all[j], tilt
                )
            theta_draw = theta_all[comp, np.arange(rows)]

        # own defaults: one run per mixture component, sorted by the factor
        runs = []
        ones = np.ones(rows)
        for c, level in enumerate(self._levels):
            idx = np.flatnonzero(comp == c)
            idx = idx[np.argsort(z[idx], kind="stable")]
            runs.append(SortedRun(key=z[idx], scale=ones[: idx.size], theta=theta_draw[idx],
                                  scen=idx.astype(np.int64), members=self._members,
                                  level=level))
        own_r, own_c = self._own.draw(own_rng, runs, rows)
        n = self._n
        if prop is not None:
            scaled_own = _weighted_count(own_r, self._scaled_loss[own_c], rows)
            log_ratio = log_base + theta_all[:k] * scaled_own[None, :]
            log_shares = np.log(np.array(prop.shares))[:, None]
            log_mix = np.logaddexp(
                math.log(prop.plain_share), logsumexp(log_shares + log_ratio, axis=0)
            )
            weights = np.exp(-log_mix)
        else:
            weights = np.ones(rows)
        if self._m:
            cas_r, cas_c = self._cascade(own_r, own_c, rows, start, link_key)
        else:
            cas_r = cas_c = np.zeros(0, dtype=np.int64)
        from debtsim.engines.sample.cascade_kernels import tally

        losses = np.zeros(rows)
        dw = np.zeros(n)
        dw2 = np.zeros(n)
        tally(own_r, own_c, self._loss, weights, losses, dw, dw2)
        tally(cas_r, cas_c, self._loss, weights, losses, dw, dw2)
        observed: list[object] = []
        if self._observe is not None:
            observed = self._observed(start, losses, weights, own_r, own_c, cas_r, cas_c)
        return _BlockResult(
            losses=losses, weights=weights, factor=z, default_weight=dw, default_weight_sq=dw2,
            observed=observed,
        )

    def _observed(
        self,
        start: int,
        losses: FloatArray,
        weights: FloatArray,
        own_r: IntArray,
        own_c: IntArray,
        cas_r: IntArray,
        cas_c: IntArray,
    ) -> list[object]:
        """Hand the block's defaults to the observer, chunk by chunk in scenario order."""
        assert self._observe is not None
        rows = losses.size
        own_o = np.argsort(own_r, kind="stable")
        cas_o = np.argsort(cas_r, kind="stable")
        own_r, own_c, cas_r, cas_c = own_r[own_o], own_c[own_o], cas_r[cas_o], cas_c[cas_o]
        edges = np.arange(0, rows + self._chunk, self._chunk).clip(max=rows)
        own_cut = np.searchsorted(own_r, edges)
        cas_cut = np.searchsorted(cas_r, edges)
        out = []
        for b in range(edges.size - 1):
            lo, hi = int(edges[b]), int(edges[b + 1])
            if hi <= lo:
                continue
            o = slice(own_cut[b], own_cut[b + 1])
            c = slice(cas_cut[b], cas_cut[b + 1])
            out.append(self._observe(ChunkDefaults(
                first=start + lo, losses=losses[lo:hi], weights=weights[lo:hi],
                own_rows=own_r[o] - lo, own_cols=own_c[o],
                contagion_rows=cas_r[c] - lo, contagion_cols=cas_c[c],
            )))
        return out

    def _log_normaliser(self, z: FloatArray, theta: FloatArray, tilt: Tilt) -> FloatArray:
        """``psi(theta(z), z)`` of one tilt for each scenario (0 where theta is 0)."""
        out = np.zeros(z.shape)
        active = theta != 0.0
        if not active.any():
            return out
        if tilt.psi is not None:
            out[active] = tilt.psi(z[active])
        else:
            out[active] = exact_log_normaliser(
                self._a, self._b, self._scaled_loss, theta[active], z[active]
            )
        return out

    def _cascade(
        self, own_r: IntArray, own_c: IntArray, rows: int, first: int, link_key: np.uint64
    ) -> tuple[IntArray, IntArray]:
        """(scenario, obligor) pairs defaulted by contagion only, for ``rows`` scenarios.

        ``first`` is the global index of the first scenario (it keys the
        liveness draws).  Work is proportional to the out-links of the
        defaulted obligors; a link is looked at only when its creditor has
        not defaulted yet, and at most once.
        """
        from debtsim.engines.sample.cascade_kernels import cascade

        return cascade(
            np.ascontiguousarray(own_r, dtype=np.int64),
            np.ascontiguousarray(own_c, dtype=np.int64),
            rows, first, link_key, self._indptr, self._out_creditor, self._bar,
            self._link_key,
        )
