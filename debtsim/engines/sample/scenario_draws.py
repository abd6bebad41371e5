"""Scenario drawing for the ``sample`` engine: factor, own defaults, live links, cascade.

One scenario is a factor value ``z``, the own defaults given ``z`` and the
final defaults they reach along live links.  Scenarios are drawn in fixed
*blocks* of :data:`BLOCK` scenarios; each block has its own PCG64 streams
spawned from the run's :class:`numpy.random.SeedSequence`, so the result
depends on the seed and the scenario count only, never on how the work is
split into chunks or threads.

Own defaults
    Obligor *i* defaults on its own when ``exp(-E_i) <= p_i(z)`` with
    ``E_i ~ Exp(1)`` (so ``exp(-E_i) ~ U(0, 1)``).  A cheap dense filter
    keeps only the pairs with ``E_i >= t_i^2/2 + min(kappa |t_i|, cap) -
    theta l_i`` (``t_i = min(t_i(z), 0)``, ``t_i(z) = (Phi^-1(PD_i) - sqrt(R_i)
    z) / sqrt(1 - R_i)``): a lower bound of ``-log p_i`` from the Chernoff and
    Mills-ratio bounds, so no default is lost; the exact test runs on the
    few candidates left (about 1.1 to 2 per default).
Links
    Whether link *k* is live in scenario *s* is decided by a counter-based
    draw: the SplitMix64 output function applied to the sum of a
    per-scenario key (the ``s``-th output of a SplitMix64 stream keyed from
    the seed) and a per-link key.  It is looked at only for links whose
    debtor defaulted and whose creditor has not, at most once per scenario,
    and it is the same whatever the chunking.
Cascade
    Breadth-first over all scenarios of a chunk at once: the newly defaulted
    (scenario, debtor) pairs expand to their out-links, live links mark their
    creditors, until no new default appears.  Cycles need no special care.
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
from typing import Any

import numpy as np
from numpy.polynomial import Chebyshev
from numpy.typing import NDArray
from scipy.special import expit, logit, logsumexp, ndtr, ndtri

from debtsim._typing import FloatArray, IntArray, SignedArray
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
#: Scenarios x obligors of a default chunk (the cascade keeps 5 bytes per pair; cache-sized).
CHUNK_ELEMENTS = 1 << 19
#: Scenarios x obligors of the own-default draws held at once (24 bytes each, cache-sized).
PIECE_ELEMENTS = 1 << 18

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_TO_UNIT = 2.0**-53
#: Dense filter ``-log Phi(-x) >= x^2/2 + min(kappa x, cap)`` for ``x >= 0``: the left side
#: minus ``x^2/2`` increases in ``x`` (Mills ratio), so a check on a fine grid of ``[0, 12]``
#: proves it (see the tests); the margin is about 0.02 at the tightest point.
_KAPPA = 0.79
_CAP = 1.9


def default_chunk(n_obligors: int) -> int:
    """Scenarios per chunk for a book of ``n_obligors``: about 2^19 scenario-obligor pairs."""
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
        Scenarios whose cascade runs at once (at most :data:`BLOCK`); None
        picks about 2^19 scenario-obligor pairs.  Does not change the result.
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
        self._piece = max(1, min(self._chunk, PIECE_ELEMENTS // max(n, 1)))
        self._workers = max(1, int(workers))
        self._a, self._b = thresholds(model)
        # the dense filter works with t / sqrt(2): q = min(t, 0)^2 / 2
        self._a2 = self._a / math.sqrt(2.0)
        self._b2 = self._b / math.sqrt(2.0)
        self._loss = np.asarray(model.loss_given_default, dtype=float)
        scale = proposal.loss_scale if proposal is not None else 1.0
        self._scaled_loss = self._loss / scale
        # links as CSR by debtor
        m = model.n_links
        self._m = m
        order = np.argsort(model.debtor, kind="stable")
        self._out_creditor = np.asarray(model.creditor, dtype=np.int64)[order]
        self._out_q = np.asarray(model.contagion, dtype=float)[order]
        # a 64-bit key per link (SplitMix64 of its book index), added to a per-scenario key
        self._link_key = _mix64((order.astype(np.uint64) + np.uint64(1)) * _MIX2)
        counts = np.bincount(np.asarray(model.debtor, dtype=np.int64), minlength=n)
        self._outdeg = counts.astype(np.int64)
        self._indptr = np.concatenate(([0], np.cumsum(counts))).astype(np.int64)

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
            log_shares = np.log(np.array(prop.shares))[:, None]
            log_plain = math.log(prop.plain_share)

        n = self._n
        chunk, piece = self._chunk, self._piece
        e_buf = np.empty((piece, n))
        work = np.empty((2, piece, n))
        losses = np.empty(rows)
        weights = np.ones(rows)
        dw = np.zeros(n)
        dw2 = np.zeros(n)
        observed: list[object] = []
        for lo in range(0, rows, chunk):
            hi = min(rows, lo + chunk)
            r = hi - lo
            pairs_r, pairs_c = [], []
            for plo in range(lo, hi, piece):
                phi = min(hi, plo + piece)
                e = e_buf[: phi - plo]
                own_rng.standard_exponential(out=e)
                pr, pc = self._own_defaults(
                    e, work[:, : phi - plo], z[plo:phi], theta_draw[plo:phi]
                )
                pairs_r.append(pr + (plo - lo))
                pairs_c.append(pc)
            own_r, own_c = np.concatenate(pairs_r), np.concatenate(pairs_c)
            own_loss = np.bincount(own_r, weights=self._loss[own_c], minlength=r)
            if prop is not None:
                scaled_own = np.bincount(own_r, weights=self._scaled_loss[own_c], minlength=r)
                log_ratio = log_base[:, lo:hi] + theta_all[:k, lo:hi] * scaled_own[None, :]
                log_mix = np.logaddexp(log_plain, logsumexp(log_shares + log_ratio, axis=0))
                w = np.exp(-log_mix)
                weights[lo:hi] = w
            else:
                w = weights[lo:hi]
            if self._m:
                cas_r, cas_c = self._cascade(own_r, own_c, r, start + lo, link_key)
                extra = np.bincount(cas_r, weights=self._loss[cas_c], minlength=r)
                losses[lo:hi] = own_loss + extra
                dw += np.bincount(cas_c, weights=w[cas_r], minlength=n)
                dw2 += np.bincount(cas_c, weights=w[cas_r] ** 2, minlength=n)
            else:
                losses[lo:hi] = own_loss
                cas_r = cas_c = np.zeros(0, dtype=np.int64)
            if self._observe is not None:
                observed.append(self._observe(ChunkDefaults(
                    first=start + lo, losses=losses[lo:hi], weights=w, own_rows=own_r,
                    own_cols=own_c, contagion_rows=cas_r, contagion_cols=cas_c,
                )))
            dw += np.bincount(own_c, weights=w[own_r], minlength=n)
            dw2 += np.bincount(own_c, weights=w[own_r] ** 2, minlength=n)
        return _BlockResult(
            losses=losses, weights=weights, factor=z, default_weight=dw, default_weight_sq=dw2,
            observed=observed,
        )

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

    def _own_defaults(
        self, e: FloatArray, work: FloatArray, z: FloatArray, theta: FloatArray
    ) -> tuple[IntArray, IntArray]:
        """(scenario, obligor) pairs of own defaults in one chunk.

        ``e`` holds the Exp(1) draws, ``work`` is scratch of shape ``(2,) +
        e.shape`` and ``theta`` the twist of each scenario (0 if untwisted).
        """
        s, q = work[0], work[1]
        # s = min(t, 0) / sqrt(2);  q = s^2 + min(-kappa sqrt(2) s, cap)  <=  -log p
        np.multiply(z[:, None], self._b2[None, :], out=s)
        np.subtract(self._a2[None, :], s, out=s)
        np.minimum(s, 0.0, out=s)
        np.multiply(s, s, out=q)
        s *= -_KAPPA * math.sqrt(2.0)
        np.minimum(s, _CAP, out=s)
        q += s
        if np.any(theta > 0.0):
            # p_theta <= p exp(theta l): lower the bar by theta l where theta > 0
            np.multiply.outer(np.maximum(theta, 0.0), self._scaled_loss, out=s)
            q -= s
        rows, cols = np.nonzero(e >= q)
        if rows.size == 0:
            return rows.astype(np.int64), cols.astype(np.int64)
        # exact test on the candidates: exp(-E) <= p_theta
        t = self._a[cols] - self._b[cols] * z[rows]
        p = ndtr(t)
        st = theta[rows] * self._scaled_loss[cols]
        tw = st != 0.0
        if tw.any():
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
                # p_theta = p e^s / (1 - p + p e^s), stable for any s and p in [0, 1]
                p[tw] = expit(logit(p[tw]) + st[tw])
        hit = np.exp(-e[rows, cols]) <= p
        return rows[hit].astype(np.int64), cols[hit].astype(np.int64)

    def _cascade(
        self, own_r: IntArray, own_c: IntArray, rows: int, first: int, link_key: np.uint64
    ) -> tuple[IntArray, IntArray]:
        """(scenario, obligor) pairs defaulted by contagion only, in one chunk.

        ``first`` is the global index of the chunk's first scenario (it keys
        the liveness draws).  Work is proportional to the out-links of the
        defaulted obligors; a link is drawn only when its creditor has not
        defaulted yet, and at most once.
        """
        n = self._n
        cells = rows * n
        itype: type[np.signedinteger[Any]] = (
            np.int32 if cells < 2**31 and self._m < 2**31 else np.int64
        )
        defaulted = np.zeros(cells, dtype=bool)
        stamp = np.empty(cells, dtype=itype)
        own: SignedArray = (own_r * n + own_c).astype(itype)
        defaulted[own] = True
        outdeg: SignedArray = self._outdeg.astype(itype)
        indptr: SignedArray = self._indptr.astype(itype)
        creditor: SignedArray = self._out_creditor.astype(itype)
        frontier = own[outdeg[own_c] > 0]
        found: list[IntArray] = []
        # per-scenario and per-link 64-bit keys; liveness = hash(row key + link key)
        row_key = _mix64(
            (np.arange(first, first + rows, dtype=np.uint64) + np.uint64(1)) * _GOLDEN + link_key
        )
        while frontier.size:
            fr, fc = np.divmod(frontier, n)
            counts = outdeg[fc]
            ends = np.cumsum(counts, dtype=itype)
            total = int(ends[-1])
            pos = np.repeat(indptr[fc] - ends + counts, counts)
            pos += np.arange(total, dtype=itype)
            base = np.repeat(fr * n, counts)
            idx = base + creditor[pos]
            fresh = np.flatnonzero(~defaulted[idx])
            idx, pos = idx[fresh], pos[fresh]
            key = row_key[base[fresh] // n] + self._link_key[pos]
            idx = idx[_unit(_mix64(key)) < self._out_q[pos]]
            if idx.size == 0:
                break
            order = np.arange(idx.size, dtype=itype)
            stamp[idx] = order
            idx = idx[stamp[idx] == order]
            defaulted[idx] = True
            found.append(idx)
            frontier = idx[outdeg[idx % n] > 0]
        if not found:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty
        r, c = np.divmod(np.concatenate(found).astype(np.int64), n)
        return r, c
