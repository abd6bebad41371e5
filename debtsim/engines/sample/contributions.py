r"""Risk contributions on the ``sample`` engine: weighted scenario averages.

Every moment an Euler allocation needs is an expectation of the scenario's
default indicators times a function of its loss, e.g.
``E[L_i 1{L > v}] ~ sum_s w_s l_i D_{s,i} 1{L_s > v} / sum_s w_s`` with the
importance weights ``w_s`` of the run (self-normalised, like the law).  The
scenarios are drawn twice from the same seed: the first pass gives the law
and the VaR of every batch, the second (:class:`~debtsim.engines.sample.
scenario_draws.CascadeSampler` with an observer) adds up the moments.

Standard errors by batch means: the run's scenarios are cut into
:data:`~debtsim.engines.sample.engine.BATCHES` consecutive batches, each
batch is allocated on its own (its own VaR), and the standard error of a
contribution is the standard deviation of the batch contributions over
``sqrt(batches)``.  A default that a live link caused is told apart from an
own default scenario by scenario, so the contagion part comes from the same
draws.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from debtsim._typing import FloatArray
from debtsim.contributions import Allocation, TailMoments, allocate
from debtsim.distribution import LossDistribution
from debtsim.engines.base import ProgressHook
from debtsim.engines.sample.engine import BATCHES, SampleEngine
from debtsim.engines.sample.scenario_draws import CascadeSampler, ChunkDefaults
from debtsim.model.specification import LinkedFactorModel
from debtsim.risk import value_at_risk, weighted_sample_measures

__all__ = ["sample_contributions"]



class _Sums:
    """Weighted sums per batch (rows ``0..K-1``) and for the whole run (row ``K``)."""

    def __init__(self, batches: int, levels: int, n: int) -> None:
        shape = (batches + 1, n)
        self.final = np.zeros(shape)
        self.own = np.zeros(shape)
        self.cross = np.zeros(shape)
        self.cross_own = np.zeros(shape)
        self.tail = np.zeros((batches + 1, levels, n))
        self.tail_own = np.zeros((batches + 1, levels, n))
        self.atom = np.zeros((batches + 1, levels, n))
        self.atom_own = np.zeros((batches + 1, levels, n))


def sample_contributions(
    engine: SampleEngine,
    model: LinkedFactorModel,
    levels: Sequence[float],
    *,
    progress: ProgressHook | None = None,
) -> tuple[LossDistribution, Allocation]:
    """Run the sampler and allocate its risk to the obligors.

    Parameters
    ----------
    engine : SampleEngine
    model : LinkedFactorModel
    levels : sequence of float
    progress : callable, optional
        Reports the first pass (the law).

    Returns
    -------
    law : LossDistribution
        The same law :meth:`SampleEngine.run` returns.
    allocation : Allocation
        With ``standard_error`` (batch means) set.
    """
    levels = tuple(sorted(float(a) for a in levels))
    plan = engine.plan(model)
    root, seed_value = engine._seed_sequence()
    sampler = CascadeSampler(model, None if plan is None else plan.proposal,
                             chunk=engine.chunk, workers=engine.workers)
    scen = sampler.run(engine.samples, root, progress)
    law = engine._law(model, scen, plan, seed_value)

    n_s = scen.samples
    k = min(BATCHES, n_s)
    edges = (np.arange(k + 1) * n_s) // k
    # VaR of each batch (rows 0..k-1) and of the whole run (row k)
    thresholds = np.empty((k + 1, len(levels)))
    for b in range(k):
        sl = slice(edges[b], edges[b + 1])
        if scen.weights[sl].sum() > 0:
            thresholds[b] = weighted_sample_measures(scen.losses[sl], scen.weights[sl], levels)[0]
        else:
            thresholds[b] = np.inf
    thresholds[k] = [value_at_risk(law, a) for a in levels]
    scale = float(np.max(scen.losses)) if n_s else 0.0
    tol = 0.5e-9 * max(scale, 1.0)  # the law merges losses equal to 9 relative places
    n = model.n_obligors
    loss_each = np.asarray(model.loss_given_default, dtype=float)
    sums = _Sums(k, len(levels), n)

    def observe(chunk: ChunkDefaults) -> None:
        rows = chunk.first + np.arange(chunk.losses.size)
        batch = np.searchsorted(edges, rows, side="right") - 1
        for pr, pc, own in ((chunk.own_rows, chunk.own_cols, True),
                            (chunk.contagion_rows, chunk.contagion_cols, False)):
            if pr.size == 0:
                continue
            w = chunk.weights[pr]
            x = chunk.losses[pr]
            for row_of in (batch[pr], np.full(pr.size, k)):
                flat = row_of * n + pc
                size = (k + 1) * n
                targets = ((sums.final, sums.cross),) + (((sums.own, sums.cross_own),)
                                                           if own else ())
                for count, cross in targets:
                    count += np.bincount(flat, weights=w, minlength=size).reshape(k + 1, n)
                    cross += np.bincount(flat, weights=w * x, minlength=size).reshape(k + 1, n)
                v = thresholds[row_of]  # (pairs, levels)
                for j in range(len(levels)):
                    above = x > v[:, j] + tol
                    on = np.abs(x - v[:, j]) <= tol
                    for mask, tgt, tgt_own in ((above, sums.tail, sums.tail_own),
                                               (on, sums.atom, sums.atom_own)):
                        if not mask.any():
                            continue
                        add = np.bincount(flat[mask], weights=w[mask],
                                          minlength=size).reshape(k + 1, n)
                        tgt[:, j, :] += add
                        if own:
                            tgt_own[:, j, :] += add

    # one worker: sums in a fixed order, so the same seed gives the same figures
    observer = CascadeSampler(model, None if plan is None else plan.proposal,
                              chunk=engine.chunk, workers=1, observe=observe)
    observer.run(engine.samples, root)

    def moments(b: int) -> TailMoments | None:
        sl = slice(0, n_s) if b == k else slice(edges[b], edges[b + 1])
        w = scen.weights[sl]
        x = scen.losses[sl]
        total = float(w.sum())
        if total <= 0:
            return None
        mean = float(w @ x) / total
        std = math.sqrt(max(float(w @ (x - mean) ** 2) / total, 0.0))
        v = thresholds[b]
        below = np.array([float(w[x <= vj + tol].sum()) / total for vj in v])
        at = np.array([float(w[np.abs(x - vj) <= tol].sum()) / total for vj in v])
        el = loss_each * sums.final[b] / total
        return TailMoments(
            levels=levels,
            expected_loss=el,
            expected_loss_own=loss_each * sums.own[b] / total,
            cross=loss_each * sums.cross[b] / total,
            cross_own=loss_each * sums.cross_own[b] / total,
            grid_expected_loss=el,
            tail=loss_each * sums.tail[b] / total,
            tail_own=loss_each * sums.tail_own[b] / total,
            atom=loss_each * sums.atom[b] / total,
            atom_own=loss_each * sums.atom_own[b] / total,
            var=v.copy(),
            below=below,
            at=at,
            mean=mean,
            std=std,
        )

    whole = moments(k)
    assert whole is not None
    allocation = allocate(whole)
    per_batch = [allocate(m) for b in range(k) if (m := moments(b)) is not None]
    if len(per_batch) >= 2:
        root_m = math.sqrt(len(per_batch))

        def se(name: str) -> FloatArray:
            stack = np.array([getattr(a, name) for a in per_batch])
            out: FloatArray = np.std(stack, axis=0, ddof=1) / root_m
            return out

        fields = ("expected_loss", "loss_std", "var", "expected_shortfall", "economic_capital")
        errors = {f: se(f) for f in fields}
        errors.update({f + "_contagion": se(f + "_contagion") for f in fields})
        standard_error: Allocation | None = Allocation(
            levels=levels,
            expected_loss=errors["expected_loss"],
            loss_std=errors["loss_std"],
            var=errors["var"],
            expected_shortfall=errors["expected_shortfall"],
            economic_capital=errors["economic_capital"],
            expected_loss_contagion=errors["expected_loss_contagion"],
            loss_std_contagion=errors["loss_std_contagion"],
            var_contagion=errors["var_contagion"],
            expected_shortfall_contagion=errors["expected_shortfall_contagion"],
            economic_capital_contagion=errors["economic_capital_contagion"],
        )
    else:
        standard_error = None
    allocation = replace(
        allocation, standard_error=standard_error,
        diagnostics={"batches": len(per_batch), "method": "importance-weighted scenarios"},
    )
    return law, allocation
