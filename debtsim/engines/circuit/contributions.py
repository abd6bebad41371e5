r"""Risk contributions on the ``circuit`` engine, from the statevector's default patterns.

The exact (shot-free) circuit run holds the probability of every pattern of
final defaults; each moment of an Euler allocation is a sum over patterns,
e.g. ``E[L_i 1{L > v}] = l_i sum_T P(T) 1{i in T} 1{L(T) > v}``, computed as
the bit marginals of the pattern law reweighted by ``1{L > v}``.

The obligor register holds final defaults only, not whether a default was
the obligor's own, so the own-default part is computed classically on the
circuit's own factor nodes (the exact engine's allocation on those nodes,
which equals the circuit's law to rounding); the contagion part is the
circuit's total minus that own part.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from debtsim._typing import FloatArray
from debtsim.contributions import TailMoments
from debtsim.distribution import LossDistribution
from debtsim.engines.circuit.builder import factor_grid_for
from debtsim.engines.circuit.engine import CircuitEngine, _pattern_losses
from debtsim.engines.exact.contributions import exact_moments
from debtsim.engines.exact.engine import ExactEngine
from debtsim.model.specification import LinkedFactorModel

__all__ = ["circuit_moments"]



def _marginals(values: FloatArray, n: int) -> FloatArray:
    """``sum_T values(T) 1{bit i of T}`` for each ``i`` (little-endian patterns)."""
    return np.array([values.reshape(-1, 2, 2**i)[:, 1, :].sum() for i in range(n)])


def circuit_moments(
    engine: CircuitEngine,
    model: LinkedFactorModel,
    dist: LossDistribution,
    levels: Sequence[float],
) -> TailMoments:
    """Moments of the Euler allocation of an exact circuit run.

    Parameters
    ----------
    engine : CircuitEngine
        The engine that produced ``dist`` without shots (its pattern law is reused).
    model : LinkedFactorModel
    dist : LossDistribution
    levels : sequence of float

    Returns
    -------
    TailMoments
    """
    probs = engine.last_pattern_law
    if probs is None or engine.shots is not None:
        raise ValueError("circuit contributions need an exact (shot-free) run of the engine")
    grid = factor_grid_for(model, engine.factor_grid)
    own = exact_moments(ExactEngine(factor_grid=grid), model, dist, levels)
    n = model.n_obligors
    each = np.asarray(model.loss_given_default, dtype=float)
    losses = _pattern_losses(each)
    probs = probs / probs.sum()
    tol = 0.5e-9 * max(float(losses.max()), 1.0)  # the law merges losses to 9 places
    el = each * _marginals(probs, n)
    cross = each * _marginals(probs * losses, n)
    tail = np.empty((len(own.levels), n))
    atom = np.empty((len(own.levels), n))
    for j, v in enumerate(own.var):
        tail[j] = each * _marginals(np.where(losses > v + tol, probs, 0.0), n)
        atom[j] = each * _marginals(np.where(np.abs(losses - v) <= tol, probs, 0.0), n)
    return replace(
        own,
        expected_loss=el,
        grid_expected_loss=el,
        cross=cross,
        tail=tail,
        atom=atom,
        diagnostics={"own_part": "exact engine on the circuit's factor nodes"},
    )
