r"""Scenario drawing for books with sector factors or Student-t dependence.

A scenario draws independent standard normals ``X`` (dimension ``d``), the
sector factors ``Y = M X`` and, under Student-t, ``W ~ chi^2_nu``:

* loadings form: ``X = (G, eta_1, ..., eta_S)``, ``Y_s = a_s G + sqrt(1-a_s^2) eta_s``;
* matrix form: ``M = B`` with ``B B^T = C`` (eigen-decomposition; ``d`` = rank);
* no sectors: ``Y = X = G``.

Obligor *i* defaults on its own when ``sqrt(R_i) Y_s(i) + sqrt(1-R_i) e_i <
t_i sqrt(W / nu)`` (``t_i`` = ``Phi^-1(PD_i)``, or ``t_nu^-1(PD_i)`` with the
scale; scale 1 when Gaussian), ``e_i ~ N(0, 1)``: given the factors, with
probability ``Phi((t_i sqrt(W / nu) - sqrt(R_i) Y_s(i)) / sqrt(1 - R_i))``,
drawn by exact thinning without a draw per obligor and scenario (see
:class:`SectorSampler`).  Contagion then runs along live links exactly as in
the one-factor sampler (:meth:`CascadeSampler._cascade`, the same
counter-based liveness draws).

Importance sampling (Glasserman & Li 2005, the multi-factor mean shift): for
each confidence level ``a`` a proposal shifts ``X`` to ``N(mu_a, I)`` and,
under Student-t, scales ``W`` by ``c_a <= 1`` (smaller ``W``, heavier
joint tail).  ``(mu_a, w_a)`` is the most likely factor point whose
conditional expected loss reaches the level's quantile of the conditional
expected loss (the large-pool VaR, estimated from factor draws only):
``minimise |x|^2 / 2 - log f_W(w)`` subject to ``E[L | x, w] >= target``.
The scenarios come from a defensive mixture of the model (share
``plain_share``) and the proposals; each weight is the likelihood ratio of
the model to the whole mixture, so every estimate stays unbiased::

    1 / weight = plain_share + sum_a share_a exp(mu_a . x - |mu_a|^2 / 2)
                 * c_a^(-nu/2) exp(-(w / 2) (1 / c_a - 1))

Scenarios are drawn in blocks of :data:`BLOCK` with their own streams
spawned from the run's seed, so results depend on the seed and the scenario
count only.

References
----------
P. Glasserman and J. Li, "Importance sampling for portfolio credit risk",
Management Science 51 (2005).  T. Hesterberg, "Weighted average importance
sampling and defensive mixture distributions", Technometrics 37 (1995).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize
from scipy.special import ndtr
from scipy.stats import chi2

from debtsim._typing import FloatArray, IntArray
from debtsim.engines.sample.own_draws import OwnDefaultDraws, SortedRun
from debtsim.engines.sample.scenario_draws import BLOCK, CascadeSampler, ScenarioSet
from debtsim.model.dependence import FactorStructure, default_threshold
from debtsim.model.specification import LinkedFactorModel

__all__ = ["SectorProposal", "SectorSampler", "SectorTilt", "factor_matrix", "plan_sector_tilts"]


#: Factor draws used to find each level's target loss.
TARGET_DRAWS = 200_000
#: Seed of the pilot block that sets the piece sizes of the own-default draws.
_PILOT_SEED = 20261202


def factor_matrix(structure: FactorStructure) -> FloatArray:
    """``M`` with sector factors ``Y = M X`` for independent standard normals ``X``."""
    if structure.form == "loadings":
        assert structure.loading is not None
        a = np.asarray(structure.loading, dtype=float)
        s = a.size
        m = np.zeros((s, s + 1))
        m[:, 0] = a
        m[np.arange(s), 1 + np.arange(s)] = np.sqrt(np.clip(1.0 - a * a, 0.0, None))
        return m
    if structure.form == "matrix":
        return np.asarray(structure.sector_factor_matrix, dtype=float)
    return np.ones((1, 1))


@dataclass(frozen=True)
class SectorTilt:
    """One importance proposal: factor mean ``shift`` and ``W`` scale ``w_scale``."""

    level: float
    shift: FloatArray
    w_scale: float
    target_loss: float


@dataclass(frozen=True)
class SectorProposal:
    """Defensive mixture: the model with ``plain_share``, each tilt with ``share``."""

    tilts: tuple[SectorTilt, ...]
    plain_share: float

    @property
    def share(self) -> float:
        """Share of each tilt."""
        return (1.0 - self.plain_share) / max(1, len(self.tilts))


class _ConditionalMean:
    """``E[own loss | X = x, W = w]`` by (sector, threshold, R) classes."""

    def __init__(self, model: LinkedFactorModel, m: FloatArray) -> None:
        structure = model.dependence
        assert structure is not None
        loss = np.asarray(model.loss_given_default, dtype=float)
        sector = (
            structure.sector_of
            if structure.sector_names
            else np.zeros(model.n_obligors, dtype=np.int64)
        )
        thr = default_threshold(model.pd, structure.degrees_of_freedom)
        r = np.asarray(model.asset_correlation, dtype=float)
        keys = np.stack([sector.astype(float), thr, r], axis=1)
        uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
        self.sector = uniq[:, 0].astype(np.int64)
        self.thr = uniq[:, 1]
        self.r = uniq[:, 2]
        self.loss = np.bincount(inverse.ravel(), weights=loss, minlength=uniq.shape[0])
        self.m = m
        self.nu = structure.degrees_of_freedom

    def __call__(self, x: FloatArray, w: FloatArray | None) -> FloatArray:
        """Conditional mean own loss, one per row of ``x`` (rows: scenarios)."""
        x = np.atleast_2d(x)
        y = x @ self.m.T  # (rows, S)
        scale = np.ones(x.shape[0]) if self.nu is None or w is None else np.sqrt(w / self.nu)
        finite = np.isfinite(self.thr)
        t = np.where(finite, self.thr, 0.0)
        arg = (t[None, :] * scale[:, None] - np.sqrt(self.r)[None, :] * y[:, self.sector]) / (
            np.sqrt(1.0 - self.r)[None, :]
        )
        p = ndtr(arg)
        p[:, self.thr == np.inf] = 1.0
        p[:, self.thr == -np.inf] = 0.0
        return np.asarray(p @ self.loss, dtype=float)


def plan_sector_tilts(
    model: LinkedFactorModel,
    levels: Sequence[float],
    seed: np.random.SeedSequence,
    *,
    plain_share: float = 0.2,
) -> SectorProposal | None:
    """Choose one mean-shift tilt per confidence level (see the module notes).

    Returns None when no level's target is above the unconditional expected
    loss (nothing to aim at).
    """
    structure = model.dependence
    assert structure is not None
    m = factor_matrix(structure)
    mean = _ConditionalMean(model, m)
    rng = np.random.Generator(np.random.PCG64(seed))
    nu = structure.degrees_of_freedom
    x = rng.standard_normal((TARGET_DRAWS, m.shape[1]))
    w = rng.chisquare(nu, TARGET_DRAWS) if nu is not None else None
    values = np.concatenate(
        [
            mean(x[k : k + 20_000], None if w is None else w[k : k + 20_000])
            for k in range(0, TARGET_DRAWS, 20_000)
        ]
    )
    el = float(values.mean())
    tilts = []
    for level in sorted(set(levels)):
        target = float(np.quantile(values, level))
        if not target > el:
            continue
        shift, w_star = _most_likely_point(mean, m.shape[1], nu, target)
        scale = 1.0 if nu is None else min(1.0, w_star / nu)
        tilts.append(SectorTilt(level, shift, scale, target))
    if not tilts:
        return None
    return SectorProposal(tuple(tilts), plain_share)


def _most_likely_point(
    mean: Callable[[FloatArray, FloatArray | None], FloatArray],
    d: int,
    nu: float | None,
    target: float,
) -> tuple[FloatArray, float]:
    """``argmin |x|^2/2 - log f_W(w)`` subject to ``E[L | x, w] >= target``."""
    # start on the steepest-ascent ray of the conditional mean from the origin
    eps = 1e-4
    w0 = None if nu is None else np.array([nu - 2.0 if nu > 2 else nu])
    base = mean(np.zeros((1, d)), w0)[0]
    grad = np.array([(mean(np.eye(d)[k : k + 1] * eps, w0)[0] - base) / eps for k in range(d)])
    norm = float(np.linalg.norm(grad))
    direction = grad / norm if norm > 0 else np.ones(d) / math.sqrt(d)
    lo, hi = 0.0, 1.0
    while mean((direction * hi)[None, :], w0)[0] < target and hi < 40.0:
        hi *= 2.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if mean((direction * mid)[None, :], w0)[0] < target:
            lo = mid
        else:
            hi = mid
    start = direction * hi
    if nu is None:
        res = minimize(
            lambda v: 0.5 * float(v @ v),
            start,
            jac=lambda v: v,
            constraints=[{"type": "ineq", "fun": lambda v: mean(v[None, :], None)[0] / target - 1}],
            method="SLSQP",
        )
        x = res.x if res.success and mean(res.x[None, :], None)[0] >= 0.99 * target else start
        return np.asarray(x, dtype=float), float("nan")
    log_w0 = math.log(float(w0[0])) if w0 is not None else 0.0

    def objective(v: FloatArray) -> float:
        xx, lw = v[:-1], v[-1]
        return 0.5 * float(xx @ xx) - float(chi2.logpdf(math.exp(lw), nu)) - lw

    res = minimize(
        objective,
        np.concatenate([start, [log_w0]]),
        constraints=[
            {
                "type": "ineq",
                "fun": lambda v: mean(v[None, :-1], np.array([math.exp(v[-1])]))[0] / target - 1,
            }
        ],
        method="SLSQP",
    )
    if res.success:
        return np.asarray(res.x[:-1], dtype=float), float(math.exp(res.x[-1]))
    return start, float(w0[0]) if w0 is not None else float(nu)


class SectorSampler:
    """Draws scenarios of a model with a factor structure, optionally from a proposal.

    Own defaults are drawn sector by sector by exact thinning
    (:mod:`debtsim.engines.sample.own_draws`): given ``(Y, W)``, obligor *i*
    of sector *g* defaults with ``Phi(A_i c - B_i Y_g)``, ``A_i = t_i /
    sqrt(1 - R_i)``, ``B_i = sqrt(R_i / (1 - R_i))``, ``c = sqrt(W / nu)``
    (1 when Gaussian).  Scenarios are sorted per sector by ``Y_g``
    (Gaussian) or by ``k = A_g c - B_g Y_g`` with the sector's mean
    coefficients (Student-t), and each obligor's probability is written
    ``Phi(alpha_i k + gamma_i c)``.
    """

    def __init__(self, model: LinkedFactorModel, proposal: SectorProposal | None = None) -> None:
        structure = model.dependence
        assert structure is not None
        self._model = model
        self._m = factor_matrix(structure)
        self._nu = structure.degrees_of_freedom
        self._sector = (
            structure.sector_of
            if structure.sector_names
            else np.zeros(model.n_obligors, dtype=np.int64)
        )
        r = np.asarray(model.asset_correlation, dtype=float)
        thr = default_threshold(model.pd, self._nu)
        self._loss = np.asarray(model.loss_given_default, dtype=float)
        self._proposal = proposal
        self._links = CascadeSampler(model) if model.n_links else None
        finite = np.isfinite(thr)
        a_coef = np.where(finite, thr, 0.0) / np.sqrt(1.0 - r)
        b_coef = np.sqrt(r / (1.0 - r))
        n_sectors = self._m.shape[0]
        self._groups: list[IntArray] = []
        # key of sector g: y (Gaussian), or k_mean * c - b_mean * y (Student-t)
        self._key_coef = np.zeros((n_sectors, 2))
        alpha = np.zeros(model.n_obligors)
        gamma = np.zeros(model.n_obligors)
        for g in range(n_sectors):
            members = np.flatnonzero((self._sector == g) & finite).astype(np.int64)
            self._groups.append(members)
            if members.size == 0:
                continue
            if self._nu is None:
                self._key_coef[g] = (0.0, 1.0)
                alpha[members] = -b_coef[members]
                gamma[members] = a_coef[members]
                continue
            a_bar = float(a_coef[members].mean())
            b_bar = float(b_coef[members].mean())
            if b_bar > 0.0:
                self._key_coef[g] = (a_bar, -b_bar)
                alpha[members] = b_coef[members] / b_bar
                gamma[members] = a_coef[members] - b_coef[members] * a_bar / b_bar
            else:  # no obligor of the sector loads on it: p = Phi(A c)
                self._key_coef[g] = (1.0, 0.0)
                alpha[members] = a_coef[members]
        self._own = OwnDefaultDraws(
            alpha=alpha, gamma=gamma, sloss=np.zeros(model.n_obligors),
            always=np.flatnonzero(thr == np.inf),
        )
        # piece sizes from a pilot block of the same factor law (speed only, never the law)
        pilot = np.random.Generator(np.random.PCG64(np.random.SeedSequence(_PILOT_SEED)))
        x, w, _ = self._factors(pilot, BLOCK)
        self._levels = []
        for g, members in enumerate(self._groups):
            key, scale = self._key(x, w, g)
            order = np.argsort(key, kind="stable")
            self._levels.append(
                self._own.levels(key[order], scale[order], np.zeros(BLOCK), members)
            )

    def run(
        self,
        samples: int,
        seed: np.random.SeedSequence,
        progress: Callable[[int, int], None] | None = None,
    ) -> ScenarioSet:
        """Draw ``samples`` scenarios from the streams of ``seed``."""
        n = self._model.n_obligors
        link_key = np.random.SeedSequence(
            seed.entropy, spawn_key=(*seed.spawn_key, 1)
        ).generate_state(1, dtype=np.uint64)[0]
        losses, weights, factor = [], [], []
        dw = np.zeros(n)
        dw2 = np.zeros(n)
        done = 0
        for b in range(-(-samples // BLOCK)):
            rows = min(BLOCK, samples - b * BLOCK)
            block_seed = np.random.SeedSequence(seed.entropy, spawn_key=(*seed.spawn_key, 0, b))
            lb, wb, gb = self._block(block_seed, b * BLOCK, rows, link_key, dw, dw2)
            losses.append(lb)
            weights.append(wb)
            factor.append(gb)
            done += rows
            if progress is not None:
                progress(done, samples)
        return ScenarioSet(
            losses=np.concatenate(losses),
            weights=np.concatenate(weights),
            factor=np.concatenate(factor),
            default_weight=dw,
            default_weight_sq=dw2,
        )

    def _factors(
        self, frng: np.random.Generator, rows: int
    ) -> tuple[FloatArray, FloatArray | None, FloatArray]:
        """Factors ``X``, mixing variable ``W`` (None when Gaussian) and weights of a block."""
        d = self._m.shape[1]
        nu = self._nu
        prop = self._proposal
        x = frng.standard_normal((rows, d))
        w = frng.chisquare(nu, rows) if nu is not None else None
        weights = np.ones(rows)
        if prop is not None:
            k = len(prop.tilts)
            comp = np.minimum(
                ((frng.random(rows) - prop.plain_share) // prop.share).astype(np.int64), k - 1
            )  # -1 (or below): the model itself
            for j, tilt in enumerate(prop.tilts):
                pick = comp == j
                x[pick] += tilt.shift[None, :]
                if w is not None:
                    w[pick] *= tilt.w_scale
            log_terms = [np.full(rows, math.log(prop.plain_share))]
            for tilt in prop.tilts:
                term = math.log(prop.share) + x @ tilt.shift - 0.5 * float(tilt.shift @ tilt.shift)
                if w is not None and nu is not None and tilt.w_scale != 1.0:
                    c = tilt.w_scale
                    term = term - 0.5 * nu * math.log(c) - 0.5 * w * (1.0 / c - 1.0)
                log_terms.append(term)
            weights = np.exp(-np.logaddexp.reduce(np.stack(log_terms), axis=0))
        return x, w, weights

    def _key(
        self, x: FloatArray, w: FloatArray | None, g: int
    ) -> tuple[FloatArray, FloatArray]:
        """Sort key and second coordinate ``c`` of sector ``g`` for each scenario."""
        y = x @ self._m[g]
        scale = np.ones(x.shape[0]) if w is None or self._nu is None else np.sqrt(w / self._nu)
        ck, cy = self._key_coef[g]
        key = y if self._nu is None else ck * scale + cy * y
        return np.asarray(key, dtype=float), scale

    def _block(
        self,
        block_seed: np.random.SeedSequence,
        start: int,
        rows: int,
        link_key: np.uint64,
        dw: FloatArray,
        dw2: FloatArray,
    ) -> tuple[FloatArray, FloatArray, FloatArray]:
        from debtsim.engines.sample.cascade_kernels import tally

        factor_seed, own_seed = block_seed.spawn(2)
        frng = np.random.Generator(np.random.PCG64(factor_seed))
        orng = np.random.Generator(np.random.PCG64(own_seed))
        x, w, weights = self._factors(frng, rows)
        runs = []
        zeros = np.zeros(rows)
        for g, members in enumerate(self._groups):
            if members.size == 0:
                continue
            key, scale = self._key(x, w, g)
            order = np.argsort(key, kind="stable")
            runs.append(SortedRun(key=key[order], scale=scale[order], theta=zeros,
                                  scen=order.astype(np.int64), members=members,
                                  level=self._levels[g]))
        own_r, own_c = self._own.draw(orng, runs, rows)
        losses = np.zeros(rows)
        tally(own_r, own_c, self._loss, weights, losses, dw, dw2)
        if self._links is not None:
            cas_r, cas_c = self._links._cascade(own_r, own_c, rows, start, link_key)
            tally(cas_r, cas_c, self._loss, weights, losses, dw, dw2)
        return losses, weights, x[:, 0].copy()
