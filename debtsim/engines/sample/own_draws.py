"""Own defaults of a block of scenarios, drawn by exact thinning (no uniform per obligor).

Given its factors, obligor *i* defaults in scenario *s* with a probability
``p_s = F(alpha_i k_s + gamma_i c_s, theta_s l_i)``, ``F(x, t) =
expit(logit Phi(x) + t)``: in the one-factor model ``k = z``, ``c = 1``,
``alpha = -sqrt(R / (1 - R))``, ``gamma = Phi^-1(PD) / sqrt(1 - R)``;
``theta`` is the exponential twist of importance sampling (0 without).
The scenarios of a block are cut into *runs* (one per mixture component,
or one per sector), each sorted by its key; the compiled kernel
(:func:`debtsim.engines.sample.thinning_kernels.thin_defaults`) then draws the
defaults of each obligor on pieces of ``2^L`` sorted scenarios by geometric
skips at the piece's largest probability, thinned to the exact ``p_s``.
The piece level of each obligor is chosen once per sampler from a
representative sorted sample (it changes the speed, never the law).

Uniforms come from the block's numpy ``Generator`` in buffers of
:data:`REFILL`; which uniform goes where is a fixed function of the block's
factors, so the same seed gives the same defaults bit for bit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from debtsim._typing import FloatArray, IntArray

__all__ = ["PIECE_COST", "REFILL", "OwnDefaultDraws", "SortedRun"]

#: Uniforms drawn at once (a piece needs at most ``2 * 2^LEVEL_MAX + 1``).
REFILL = 1 << 17
#: Work of one piece relative to one candidate, for the choice of piece sizes.
PIECE_COST = 2.0


@dataclass(frozen=True, eq=False)
class SortedRun:
    """Scenarios of one run, sorted by ``key``, and the obligors drawn on them.

    Attributes
    ----------
    key, scale, theta : ndarray, shape (rows,)
        Sort key (ascending), second coordinate and twist of each scenario.
    scen : ndarray of int, shape (rows,)
        Index of each scenario in its block.
    members, level : ndarray of int
        Obligors drawn on this run and the piece level of each.

    """

    key: FloatArray
    scale: FloatArray
    theta: FloatArray
    scen: IntArray
    members: IntArray
    level: IntArray


class OwnDefaultDraws:
    """Draws own defaults with ``p = F(alpha k + gamma c, theta l)`` (see the module notes).

    Parameters
    ----------
    alpha, gamma : ndarray, shape (n,)
        Coefficients of each obligor (finite where drawn).
    sloss : ndarray, shape (n,)
        Loss in the twist's units (>= 0); only used where ``theta != 0``.
    always : ndarray of int
        Obligors that default in every scenario (PD 1).

    """

    def __init__(
        self, alpha: FloatArray, gamma: FloatArray, sloss: FloatArray, always: IntArray
    ) -> None:
        self.alpha = np.ascontiguousarray(alpha, dtype=np.float64)
        self.gamma = np.ascontiguousarray(gamma, dtype=np.float64)
        self.sloss = np.ascontiguousarray(sloss, dtype=np.float64)
        self.always = np.asarray(always, dtype=np.int64)
        # output size of the last block: a first guess for the next (speed only; shared
        # by threads without a lock, as any value gives the same draws)
        self._hint = 0

    def levels(
        self, key: FloatArray, scale: FloatArray, theta: FloatArray, members: IntArray
    ) -> IntArray:
        """Cheapest piece level of each member on a representative sorted run."""
        from debtsim.engines.sample.thinning_kernels import LEVEL_MAX, LEVEL_MIN, piece_costs

        members = np.asarray(members, dtype=np.int64)
        if members.size == 0 or key.size == 0:
            return np.full(members.size, LEVEL_MIN, dtype=np.int64)
        cost = piece_costs(
            np.ascontiguousarray(key, dtype=np.float64),
            np.ascontiguousarray(scale, dtype=np.float64),
            np.ascontiguousarray(theta, dtype=np.float64),
            self.alpha, self.gamma, self.sloss, members, PIECE_COST,
        )[:, LEVEL_MIN : LEVEL_MAX + 1]
        return (LEVEL_MIN + np.argmin(cost, axis=1)).astype(np.int64)

    def draw(
        self, rng: np.random.Generator, runs: list[SortedRun], rows: int
    ) -> tuple[IntArray, IntArray]:
        """Own defaults of a block of ``rows`` scenarios: (scenario, obligor) pairs.

        The runs are drawn in order from one stream of uniforms of ``rng``.
        """
        from debtsim.engines.sample.thinning_kernels import range_tables, thin_defaults

        cap = max(4096, 4 * rows, self._hint + self._hint // 4)
        out_r = np.empty(cap, dtype=np.int64)
        out_c = np.empty(cap, dtype=np.int64)
        n_out = 0
        u = rng.random(REFILL)
        ptr = 0
        for run in runs:
            if run.members.size == 0 or run.key.size == 0:
                continue
            c_lo, c_hi, off = range_tables(run.scale)
            t_lo, t_hi, _ = range_tables(run.theta)
            tables = (c_lo, c_hi, t_lo, t_hi, off)
            start = (0, 0)
            while True:
                mi, j, n_out, ptr, status = thin_defaults(
                    run.key, run.scale, run.theta, run.scen, run.members, run.level,
                    self.alpha, self.gamma, self.sloss, tables, u, ptr, start,
                    out_r, out_c, n_out,
                )
                if status == 0:
                    break
                start = (mi, j)
                if status == 1:
                    u = rng.random(REFILL)
                    ptr = 0
                else:
                    cap *= 2
                    out_r = np.concatenate([out_r[:n_out], np.empty(cap - n_out, np.int64)])
                    out_c = np.concatenate([out_c[:n_out], np.empty(cap - n_out, np.int64)])
        self._hint = n_out
        own_r, own_c = out_r[:n_out], out_c[:n_out]
        if self.always.size:
            own_r = np.concatenate([own_r, np.repeat(np.arange(rows, dtype=np.int64),
                                                     self.always.size)])
            own_c = np.concatenate([own_c, np.tile(self.always, rows)])
        return own_r, own_c
