"""The ``sample`` engine: Monte Carlo of the cascade model, importance sampling in the tail.

Each scenario draws the factor, the own defaults given the factor, and the
final defaults reached along live links (see
:mod:`debtsim.engines.sample.scenario_draws`).  The loss law is the (weighted)
empirical law of the scenario losses.

Importance sampling (on by default when the highest confidence level is at
least 0.99) follows Glasserman & Li (2005), one tilt per confidence level,
inside a defensive mixture:

1. **Target loss** ``x``: the level's quantile of the own-default loss
   under the conditional normal approximation (given ``z``, loss normal
   with the exact conditional mean and variance), integrated over the
   factor.  For a large fine-grained book this is Vasicek's
   ``E[L | z = Phi^-1(1 - a)]``; unlike that rule it stays sensible for
   small or weakly correlated books.  ``x`` is kept between half the
   smallest and 90% of the largest possible own loss.  Contagion is left
   out of the target: it only adds loss, so the tilted scenarios still
   reach the tail of the final loss.
2. **Twist** ``theta(z) >= 0`` solving ``psi'(theta, z) = x``, where
   ``psi(theta, z) = sum_i log(1 - p_i(z) + p_i(z) e^{theta l_i})`` is the
   conditional cumulant generating function of the own-default loss;
   ``theta = 0`` where the conditional mean already reaches ``x``.  It is
   smoothed into a Chebyshev polynomial on a window ``[max(z*, mu - 5),
   mu + 5]`` (``z*``: where the conditional mean equals ``x``) and 0
   outside; any ``theta(z)`` leaves the estimator unbiased.
3. **Factor shift** ``mu``: Glasserman & Li's choice, the maximiser of
   ``psi(theta(z), z) - theta(z) x - z^2 / 2`` (the exponent of their
   bound on the zero-variance factor density), searched on ``[z*, 0]``.
4. **Mixture**: a share :data:`DEFAULT_PLAIN_SHARE` of the scenarios comes
   from the model itself and the rest, split evenly, from the tilts
   (Hesterberg's defensive mixture; the weight is the balance-heuristic
   likelihood ratio of the model to the whole mixture).  Weights are then
   at most ``1 / plain_share``, so the body of the law (EL, the
   self-normalised law built from the weights) stays within a small factor
   of plain Monte Carlo, while the tails get most of the scenarios.  Pure
   Glasserman–Li weights ``exp(-mu z + mu^2/2)`` have variance
   ``e^{mu^2} - 1`` (about 8,000 at ``mu = -3``) and would make the body of
   the law useless.  One tilt per level keeps each level well sampled: a
   tilt aimed at 0.999 alone twists the 0.99 region past its quantile.

Links are sampled unchanged, so they cancel from the likelihood ratio.
``psi(theta(z), z)`` is needed for every scenario's weight; it is a smooth
function of ``z`` and is evaluated through a Chebyshev interpolant whose
error against the exact sum is checked and reported
(``log_weight_interpolation_error``); if the check fails the exact sum is
used per scenario.

Error estimates: the expected loss by the delta method of the
self-normalised estimator; VaR and ES by batch means over
:data:`BATCHES` consecutive batches of the same run; ``P(L > VaR)`` by the
delta method.

References
----------
P. Glasserman and J. Li, "Importance sampling for portfolio credit risk",
Management Science 51 (2005).
T. Hesterberg, "Weighted average importance sampling and defensive mixture
distributions", Technometrics 37 (1995).

"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.polynomial import Chebyshev
from scipy.special import ndtr

from debtsim._typing import FloatArray
from debtsim.distribution import LossDistribution
from debtsim.engines.base import Engine, ProgressHook
from debtsim.engines.sample.scenario_draws import (
    BLOCK,
    CascadeSampler,
    Proposal,
    ScenarioSet,
    Tilt,
    default_chunk,
    exact_log_normaliser,
    thresholds,
)
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import level_key, value_at_risk, weighted_sample_measures

__all__ = [
    "BATCHES",
    "DEFAULT_PLAIN_SHARE",
    "ImportancePlan",
    "SampleEngine",
    "TiltPlan",
    "plan_importance",
    "plan_tilt",
]


#: Share of scenarios drawn from the model itself when importance sampling is on.
DEFAULT_PLAIN_SHARE = 0.4
#: Batches of the batch-means error estimates of VaR and ES.
BATCHES = 32
#: Half-width of the factor window where the twist applies, around the shift.
WINDOW = 5.0
#: Largest acceptable error of the interpolated log-weight term.
LOG_WEIGHT_TOLERANCE = 1e-9
#: Largest twist (per largest ``EAD * LGD``): ``e^1024`` already exceeds any double odds
#: ratio, and a larger one only costs precision in the log-weights.
MAX_TWIST = 1024.0
#: Factor grid for the target loss and the shift search.
_GRID = np.linspace(-8.0, 8.0, 161)


# --------------------------------------------------------------------- planning
@dataclass(frozen=True, eq=False)
class TiltPlan:
    """The tilt aimed at one confidence level and how it was chosen.

    Attributes
    ----------
    tilt : Tilt
        Factor shift, twist and log-normaliser interpolant.
    level : float
        Confidence level aimed at.
    target_loss : float
        Own-default loss ``x`` the twist aims at (currency units).
    crossing : float
        ``z*``, where the conditional expected own loss equals ``x``
        (``-inf`` when it never does).
    interpolation_error : float
        Largest error of the interpolated ``psi(theta(z), z)`` found at check
        points; 0 when there is no twist or the exact sum is used.

    """

    tilt: Tilt
    level: float
    target_loss: float
    crossing: float
    interpolation_error: float


@dataclass(frozen=True, eq=False)
class ImportancePlan:
    """The importance-sampling proposal of a run: one tilt per level, plus the model.

    Attributes
    ----------
    proposal : Proposal
        What the sampler draws from.
    tilts : tuple of TiltPlan
        How each tilt was chosen, in the order of ``proposal.tilts``.

    """

    proposal: Proposal
    tilts: tuple[TiltPlan, ...]


def _solve_twist(p: FloatArray, scaled_loss: FloatArray, target: float) -> FloatArray:
    """Twist ``theta >= 0`` with ``sum_i l_i p_theta_i = target``, one per row of ``p``.

    Safeguarded Newton on the increasing function ``psi'(theta)``; rows whose
    mean already reaches ``target`` get 0.
    """
    g = p.shape[0]
    with np.errstate(divide="ignore"):
        logit = np.log(p) - np.log1p(-p)

    def mean_var(theta: FloatArray) -> tuple[FloatArray, FloatArray]:
        with np.errstate(over="ignore"):
            pt = 1.0 / (1.0 + np.exp(-(logit + theta[:, None] * scaled_loss[None, :])))
        return pt @ scaled_loss, (pt * (1.0 - pt)) @ scaled_loss**2

    mean0, _ = mean_var(np.zeros(g))
    need = mean0 < target
    theta = np.zeros(g)
    if not need.any():
        return theta
    lo = np.zeros(g)
    hi = np.ones(g)
    short = need
    while hi.max() < MAX_TWIST:
        m_hi, _ = mean_var(hi)
        short = need & (m_hi < target)
        if not short.any():
            break
        lo = np.where(short, hi, lo)
        hi = np.where(short, 2.0 * hi, hi)
    else:
        m_hi, _ = mean_var(hi)
        short = need & (m_hi < target)
    # rows out of reach (p underflowed to 0) keep the largest twist, not an astronomic one
    capped = short
    theta = np.where(need, 0.5 * (lo + hi), 0.0)
    for _ in range(100):
        m, v = mean_var(theta)
        gap = m - target
        lo = np.where(gap < 0, theta, lo)
        hi = np.where(gap > 0, theta, hi)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            step = theta - gap / v  # a non-finite step falls back to bisection below
        bad = ~np.isfinite(step) | (step <= lo) | (step >= hi)
        new = np.where(bad, 0.5 * (lo + hi), step)
        new = np.where(need, new, 0.0)
        if np.all(np.abs(new - theta) <= 1e-13 * np.maximum(1.0, np.abs(theta))):
            theta = new
            break
        theta = new
    return np.where(capped, hi, theta)


def _conditional_pd(a: FloatArray, b: FloatArray, z: FloatArray) -> FloatArray:
    """``p_i(z)``, shape (len(z), n)."""
    return ndtr(a[None, :] - b[None, :] * np.asarray(z, dtype=float)[:, None])


def _loss_scale(model: LinkedFactorModel) -> float:
    loss = np.asarray(model.loss_given_default, dtype=float)
    return float(loss.max()) if loss.size else 0.0


def plan_tilt(model: LinkedFactorModel, level: float) -> TiltPlan | None:
    """Choose the Glasserman–Li tilt aimed at one confidence level.

    Parameters
    ----------
    model : LinkedFactorModel
        The book's model.
    level : float
        Confidence level in (0, 1).

    Returns
    -------
    TiltPlan or None
        None when tilting cannot help: no obligor can lose anything, or the
        conditional expected loss reaches the target at every factor value.

    Notes
    -----
    See the module docstring for the choices of target, twist and shift.
    Losses are in units of the largest ``EAD * LGD``.

    """
    a, b = thresholds(model)
    scale = _loss_scale(model)
    if scale <= 0.0:
        return None
    sl = np.asarray(model.loss_given_default, dtype=float) / scale
    can = (np.asarray(model.pd) > 0.0) & (sl > 0.0)
    if not can.any():
        return None
    max_own = float(sl[can].sum())
    min_pos = float(sl[can].min())

    # 1. target: quantile of the conditional-normal approximation of own loss
    p = _conditional_pd(a, b, _GRID)
    mean = p @ sl
    sd = np.sqrt(np.maximum((p * (1.0 - p)) @ sl**2, 0.0))
    wg = np.exp(-0.5 * _GRID**2)
    wg /= wg.sum()

    def tail(x: float) -> float:
        with np.errstate(divide="ignore", invalid="ignore"):
            u = np.where(sd > 0, (mean - x) / sd, np.where(mean > x, np.inf, -np.inf))
        return float(wg @ ndtr(u))

    lo_x, hi_x = 0.0, max_own
    for _ in range(80):
        mid = 0.5 * (lo_x + hi_x)
        if tail(mid) > 1.0 - level:
            lo_x = mid
        else:
            hi_x = mid
    target = min(max(hi_x, 0.5 * min_pos), 0.9 * max_own)

    # 2. crossing z*: conditional mean (decreasing in z) equals the target
    if mean[-1] >= target:
        return None
    if mean[0] < target:
        crossing = -math.inf
    else:
        k = int(np.flatnonzero(mean >= target)[-1])
        zl, zh = float(_GRID[k]), float(_GRID[k + 1])
        for _ in range(4):  # bracket shrinks 32-fold per pass
            zz = np.linspace(zl, zh, 33)
            above = np.flatnonzero(_conditional_pd(a, b, zz) @ sl >= target)
            i = int(above[-1]) if above.size else 0
            zl, zh = float(zz[i]), float(zz[min(i + 1, 32)])
        crossing = zl

    # 3. shift: maximise psi(theta(z), z) - theta(z) x - z^2/2 on [z*, 0]
    if crossing >= 0.0:
        shift = 0.0
    else:
        zs = np.linspace(max(crossing, float(_GRID[0])), 0.0, 81)
        th = _solve_twist(_conditional_pd(a, b, zs), sl, target)
        psi = exact_log_normaliser(a, b, sl, th, zs)
        shift = float(zs[int(np.argmax(psi - th * target - 0.5 * zs**2))])

    # 4. twist on the window, as a polynomial; psi(theta(z), z) interpolated and checked
    lo_w, hi_w = max(crossing, shift - WINDOW), shift + WINDOW
    theta_poly: Chebyshev | None = None
    psi_poly: Chebyshev | None = None
    error = 0.0
    if lo_w < hi_w:
        domain = [lo_w, hi_w]

        def twist_at(z: FloatArray) -> FloatArray:
            return _solve_twist(_conditional_pd(a, b, z), sl, target)

        theta_poly = Chebyshev.interpolate(twist_at, 24, domain=domain)
        tp = theta_poly

        def psi_at(z: FloatArray) -> FloatArray:
            return exact_log_normaliser(a, b, sl, tp(z), z)

        check = np.linspace(lo_w, hi_w, 103)[1:-1]
        exact = psi_at(check)
        for degree in (64, 128, 256, 512):
            candidate = Chebyshev.interpolate(psi_at, degree, domain=domain)
            err = float(np.max(np.abs(candidate(check) - exact)))
            if err <= LOG_WEIGHT_TOLERANCE:
                psi_poly, error = candidate, err
                break
    tilt = Tilt(shift=shift, window=(float(lo_w), float(hi_w)), theta=theta_poly, psi=psi_poly)
    return TiltPlan(
        tilt=tilt,
        level=float(level),
        target_loss=target * scale,
        crossing=float(crossing),
        interpolation_error=error,
    )


def plan_importance(
    model: LinkedFactorModel, levels: Sequence[float], *, plain_share: float | None = None
) -> ImportancePlan | None:
    """Choose the importance-sampling proposal of a run: a tilt per level.

    Parameters
    ----------
    model : LinkedFactorModel
        The book's model.
    levels : sequence of float
        Confidence levels of the run, each in (0, 1).
    plain_share : float or None
        Share of scenarios drawn from the model itself, in (0, 1); None means
        :data:`DEFAULT_PLAIN_SHARE`.  The rest is split evenly among the tilts.

    Returns
    -------
    ImportancePlan or None
        None when no level gets a useful tilt (see :func:`plan_tilt`).

    """
    plain = DEFAULT_PLAIN_SHARE if plain_share is None else float(plain_share)
    if not 0.0 < plain < 1.0:
        raise ValueError(f"plain_share must be between 0 and 1, got {plain}")
    plans = [p for a in sorted(set(float(x) for x in levels)) if (p := plan_tilt(model, a))]
    if not plans:
        return None
    share = (1.0 - plain) / len(plans)
    proposal = Proposal(
        loss_scale=_loss_scale(model),
        tilts=tuple(p.tilt for p in plans),
        shares=tuple(share for _ in plans),
    )
    return ImportancePlan(proposal=proposal, tilts=tuple(plans))


# ------------------------------------------------------------------- estimates
def _batch_standard_errors(
    scen: ScenarioSet, levels: Sequence[float], batches: int
) -> tuple[FloatArray, FloatArray]:
    """Batch-means standard errors of VaR and ES at each level."""
    n = scen.samples
    k = min(batches, n)
    if k < 2:
        nan = np.full(len(levels), math.nan)
        return nan, nan.copy()
    edges = (np.arange(k + 1) * n) // k
    vs, es = [], []
    for i in range(k):
        sl = slice(edges[i], edges[i + 1])
        w = scen.weights[sl]
        if w.sum() <= 0:
            continue
        v, e = weighted_sample_measures(scen.losses[sl], w, levels)
        vs.append(v)
        es.append(e)
    if len(vs) < 2:
        nan = np.full(len(levels), math.nan)
        return nan, nan.copy()
    m = len(vs)
    return (
        np.std(np.array(vs), axis=0, ddof=1) / math.sqrt(m),
        np.std(np.array(es), axis=0, ddof=1) / math.sqrt(m),
    )


def _by_level(levels: Sequence[float], values: FloatArray) -> dict[str, float | None]:
    """``{level_key: value}``, None where no estimate exists (too few batches)."""
    return {
        level_key(a): (float(v) if math.isfinite(v) else None)
        for a, v in zip(levels, values, strict=True)
    }


# ----------------------------------------------------------------------- engine
class SampleEngine(Engine):
    """Monte Carlo sampler of the cascade model with tail importance sampling.

    Parameters
    ----------
    samples : int
        Number of scenarios, >= 1.
    seed : int or numpy.random.Generator
        Seed of every random draw.  An int gives the same law on every run
        whatever ``chunk`` and ``workers``; a Generator supplies fresh
        entropy on each run.
    levels : tuple of float
        Confidence levels reported; importance sampling aims a tilt at each.
    importance : bool or None
        Importance sampling on or off; None turns it on when the highest
        level is at least 0.99.
    chunk : int or None
        Scenarios per chunk handed to an observer (the contributions pass;
        no effect on the result); None picks about 2^19 scenario-obligor pairs.
    workers : int or None
        Threads drawing blocks in parallel (no effect on the result); None
        uses up to two.

    Raises
    ------
    TypeError
        When ``seed`` is neither an int nor a Generator.
    ValueError
        When a setting is out of range.

    """

    name = "sample"

    def __init__(
        self,
        *,
        samples: int,
        seed: int | np.random.Generator,
        levels: tuple[float, ...] = (0.99, 0.999),
        importance: bool | None = None,
        chunk: int | None = None,
        workers: int | None = None,
    ) -> None:
        if isinstance(samples, bool) or not isinstance(samples, int | np.integer) or samples < 1:
            raise ValueError(f"samples must be an integer >= 1, got {samples!r}")
        if isinstance(seed, bool) or not isinstance(seed, int | np.integer | np.random.Generator):
            raise TypeError(f"seed must be an int or a numpy Generator, got {type(seed).__name__}")
        if not isinstance(seed, np.random.Generator) and seed < 0:
            raise ValueError(f"seed must be >= 0, got {seed}")
        levels = tuple(float(a) for a in levels)
        if not levels:
            raise ValueError("levels must name at least one confidence level")
        for a in levels:
            if not 0.0 < a < 1.0:
                raise ValueError(f"confidence level must be between 0 and 1, got {a}")
        if chunk is not None and (not isinstance(chunk, int | np.integer) or chunk < 1):
            raise ValueError(f"chunk must be an integer >= 1 or None, got {chunk!r}")
        if workers is not None and (not isinstance(workers, int | np.integer) or workers < 1):
            raise ValueError(f"workers must be an integer >= 1 or None, got {workers!r}")
        self.samples = int(samples)
        self.seed = seed
        self.levels = levels
        self.importance = importance
        self.chunk = None if chunk is None else int(chunk)
        self.workers = workers if workers is not None else max(1, min(2, os.cpu_count() or 1))

    # --------------------------------------------------------------- internals
    def _seed_sequence(self) -> tuple[np.random.SeedSequence, int | None]:
        if isinstance(self.seed, np.random.Generator):
            entropy = [int(v) for v in self.seed.integers(0, 2**63, size=4, dtype=np.int64)]
            return np.random.SeedSequence(entropy), None
        return np.random.SeedSequence(int(self.seed)), int(self.seed)

    def _uses_importance(self) -> bool:
        if self.importance is None:
            return max(self.levels) >= 0.99
        return bool(self.importance)

    def plan(self, model: LinkedFactorModel) -> ImportancePlan | None:
        """Return the importance-sampling plan for ``model`` (None: plain sampling)."""
        if not self._uses_importance():
            return None
        return plan_importance(model, self.levels)

    def simulate(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> tuple[ScenarioSet, ImportancePlan | None]:
        """Draw the scenarios of a run: losses, weights, factors, weighted defaults.

        ``mean(weights * f(losses))`` is an unbiased estimate of ``E[f(L)]``
        for any ``f``; :meth:`run` builds the law from the same draws.
        """
        scen, plan, _ = self._draw(model, progress)
        return scen, plan

    def _draw(
        self, model: LinkedFactorModel, progress: ProgressHook | None
    ) -> tuple[ScenarioSet, ImportancePlan | None, int | None]:
        plan = self.plan(model)
        root, seed_value = self._seed_sequence()
        sampler = CascadeSampler(
            model,
            None if plan is None else plan.proposal,
            chunk=self.chunk,
            workers=self.workers,
        )
        return sampler.run(self.samples, root, progress), plan, seed_value

    # ------------------------------------------------------------------ public
    def run(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Sample the loss law of ``model``.

        Parameters
        ----------
        model : LinkedFactorModel
            The book's model.
        progress : callable, optional
            Called as ``progress(scenarios_done, samples)`` after each block of
            :data:`~debtsim.engines.sample.scenario_draws.BLOCK` scenarios.

        Returns
        -------
        LossDistribution
            The weighted empirical law, with ``settings`` (``importance``,
            ``factor_shift`` of the highest level's tilt, ``plain_share``,
            ``tilts``: share, shift, target loss, window per level) and
            ``diagnostics`` (``expected_loss_standard_error``;
            ``var_standard_error``, ``expected_shortfall_standard_error``,
            ``tail_probability`` = ``P(L > VaR)`` and its standard error, each
            keyed by level; ``default_probability_standard_error`` per
            obligor; ``effective_sample_size``; ``batches``).

        """
        if model.dependence is not None:
            return self._run_sectors(model, progress)
        scen, plan, seed_value = self._draw(model, progress)
        return self._law(model, scen, plan, seed_value)

    def _run_sectors(
        self, model: LinkedFactorModel, progress: ProgressHook | None
    ) -> LossDistribution:
        """Sector factors / Student-t: see :mod:`debtsim.engines.sample.sector_draws`."""
        from debtsim.engines.sample.sector_draws import SectorSampler, plan_sector_tilts

        root, seed_value = self._seed_sequence()
        proposal = None
        if self._uses_importance():
            plan_seed = np.random.SeedSequence(root.entropy, spawn_key=(*root.spawn_key, 2))
            proposal = plan_sector_tilts(model, self.levels, plan_seed)
        scen = SectorSampler(model, proposal).run(self.samples, root, progress)
        law = self._law(model, scen, None, seed_value)
        assert model.dependence is not None
        settings = dict(law.settings)
        settings.pop("factor_shift", None)
        settings["importance"] = proposal is not None
        settings["dependence"] = model.dependence.describe()
        settings["sector_method"] = (
            "Monte Carlo of independent factors X, sector factors Y = M X"
            + (", W ~ chi^2_nu" if model.dependence.student_t else "")
            + ("; mean-shift importance sampling (Glasserman & Li 2005) in a defensive mixture"
               if proposal is not None else "")
        )
        if proposal is not None:
            settings["plain_share"] = proposal.plain_share
            settings["tilts"] = {
                level_key(t.level): {
                    "share": proposal.share,
                    "factor_shift": [float(v) for v in t.shift],
                    "mixing_scale": t.w_scale,
                    "target_loss": t.target_loss,
                }
                for t in proposal.tilts
            }
        diagnostics = dict(law.diagnostics)
        diagnostics["method"] = settings["sector_method"]
        if proposal is not None:
            diagnostics["max_weight"] = float(scen.weights.max())
        return dataclasses.replace(law, settings=settings, diagnostics=diagnostics)

    def _law(
        self,
        model: LinkedFactorModel,
        scen: ScenarioSet,
        plan: ImportancePlan | None,
        seed_value: int | None,
    ) -> LossDistribution:
        w, losses = scen.weights, scen.losses
        total = float(w.sum())
        nw = w / total
        el = float(nw @ losses)
        el_se: float | None = float(np.sqrt(np.sum(nw**2 * (losses - el) ** 2)))
        if scen.samples < 2 or float(np.ptp(losses)) == 0.0:
            el_se = None  # every scenario lost the same: the spread, hence the error, is unknown
        dp = np.clip(scen.default_weight / total, 0.0, 1.0)
        # delta method of the ratio estimator; D^2 = D
        sum_sq = float(np.sum(w**2))
        dp_se = np.sqrt(
            np.maximum((1.0 - 2.0 * dp) * scen.default_weight_sq + dp**2 * sum_sq, 0.0)
        ) / total
        # an obligor no link can reach defaults only on its own: its PD is known exactly
        dp = model.settle_default_probability(dp)
        dp_se[~model.reachable_by_links] = 0.0
        settings: dict[str, Any] = {
            "importance": plan is not None,
            "factor_shift": 0.0 if plan is None else plan.tilts[-1].tilt.shift,
            "block": BLOCK,
            "chunk": self.chunk or default_chunk(model.n_obligors),
        }
        if plan is not None:
            settings["plain_share"] = plan.proposal.plain_share
            settings["tilts"] = {
                level_key(t.level): {
                    "share": share,
                    "factor_shift": t.tilt.shift,
                    "target_loss": t.target_loss,
                    "twist_window": list(t.tilt.window),
                    "log_normaliser": "exact" if t.tilt.psi is None else "interpolated",
                }
                for t, share in zip(plan.tilts, plan.proposal.shares, strict=True)
            }
        law = LossDistribution.from_samples(
            losses,
            w,
            engine=self.name,
            samples=scen.samples,
            seed=seed_value,
            default_probability=dp,
            settings=settings,
        )
        var_se, es_se = _batch_standard_errors(scen, self.levels, BATCHES)
        tail_p: dict[str, float] = {}
        tail_se: dict[str, float] = {}
        for a in self.levels:
            v = value_at_risk(law, a)
            ind = (losses > v).astype(float)
            pr = float(nw @ ind)
            tail_p[level_key(a)] = pr
            tail_se[level_key(a)] = float(np.sqrt(np.sum(nw**2 * (ind - pr) ** 2)))
        diagnostics: dict[str, Any] = {
            "expected_loss_standard_error": el_se,
            "var_standard_error": _by_level(self.levels, var_se),
            "expected_shortfall_standard_error": _by_level(self.levels, es_se),
            "tail_probability": tail_p,
            "tail_probability_standard_error": tail_se,
            "default_probability_standard_error": dp_se.tolist(),
            "effective_sample_size": total**2 / sum_sq,
            "batches": min(BATCHES, scen.samples),
        }
        if plan is not None:
            diagnostics["log_weight_interpolation_error"] = max(
                t.interpolation_error for t in plan.tilts
            )
            diagnostics["max_weight"] = float(w.max())
        return dataclasses.replace(law, diagnostics=diagnostics)
