r"""Risk contributions on the ``exact`` engine, exact on its factor nodes.

Given the factor ``z``, obligors outside linked groups are independent
Bernoulli losses and each linked group is independent of the rest.  The
contributions need, per node, ``E[D_i f(L) | z]`` for ``f = 1{L <= v}`` and
``f = 1{L = v}`` at each level's VaR ``v``, which in turn needs the law of
the rest of the book ``L - L_i``.

*Single obligors* (one Bernoulli factor ``1 - p + p x^k`` of the
conditional PGF).  Removing the factor from the law of ``L`` by the power
series of ``1 / (1 - p + p x^k)`` gives, for ``p <= 1/2`` and
``theta = p / (1 - p)``::

    E[D 1{L <= v}] = sum_{r >= 1} (-1)^(r+1) theta^r P(L <= v - r k)
    E[D 1{L =  v}] = sum_{r >= 1} (-1)^(r+1) theta^r P(L =  v - r k)

and, for ``p > 1/2`` with ``theta' = (1 - p) / p`` (the series in ``x^-k``),
``E[(1 - D) 1{L > v}] = sum_r (-1)^(r+1) theta'^r P(L > v + r k)`` and the
same for the atom.  Both are finite sums (the law has bounded support), the
terms alternate and shrink like ``theta^r <= 1``, so the sums are stable:
the forward deconvolution is stable for ``p < 1/2`` and the backward one for
``p > 1/2``, which is how the factor is removed here.  Terms stop when
``theta^r`` drops below :data:`SERIES_TOLERANCE` or the shifted point leaves
the support.  Obligors with equal conditional PD and grid loss (the
engine's classes) are computed once.

*Link groups* (a general factor ``Q_g(x) = sum_s P(s | z) x^(k_s)``): the law
of the rest of the book is the product of the other factors: on the grid by
the inverse-PGF series where the group's no-loss state dominates, else by
spectra on the node's window, groups gathered in blocks so that one long
inverse transform serves a block (see :func:`_rest_rows_by_fft`); in
exact-atoms mode by convolving the other items.  Then
``E[D_i f(L)] = sum_s P(s) D_i(s) E[f(k_s + L_rest)]``, summed for all nodes
of a group at once (:class:`_GroupTerms`).

*Own default versus contagion.*  The own-default part ``E[O_i f(L)]`` is
``p_i`` times the same sum over the group law with ``i``'s own default
forced (seed probability 1); outside linked groups the two coincide.  The
group's law and its ``size`` forced laws are one batched call per group.

*VaR on a continuous stretch.*  On the loss grid the law is discrete, so VaR
is an atom of width one grid unit; ``E[L_i | L = v]`` on that atom is a
window (kernel) estimate of the continuous contribution
``E[L_i | L = VaR]`` with bandwidth one unit.  Its sensitivity to the
window is reported as ``var_window_sensitivity``: the largest change of an
obligor's VaR contribution, relative to VaR, when the window is widened to
three grid points (``v - 1 .. v + 1``).

References
----------
L. Andersen, J. Sidenius and S. Basu, "All your hedges in one basket",
Risk (2003).  D. Tasche, "Risk contributions and performance measurement"
(1999).  C. Acerbi and D. Tasche, J. Banking & Finance 26 (2002).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import scipy.fft as sfft

from debtsim._typing import FloatArray, IntArray
from debtsim.contributions import TailMoments
from debtsim.distribution import LossDistribution
from debtsim.engines.exact.engine import (
    _NOISE_FLOOR,
    ExactEngine,
    _all_group_laws,
    _choose_losses,
    _Group,
    _group_state_law,
    _linked_groups,
    _LossPlan,
    _state_bits,
)
from debtsim.engines.exact.loss_grid import (
    bernstein_halfwidth,
    grid_law,
    place_window,
    product_law,
)
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import FactorGrid
from debtsim.model.specification import LinkedFactorModel, conditional_default_probability
from debtsim.risk import value_at_risk

__all__ = [
    "NEGLIGIBLE",
    "SERIES_TOLERANCE",
    "NodeLawStore",
    "bernoulli_functionals",
    "exact_moments",
    "law_span",
]


#: Smallest ``theta^r`` kept in the deconvolution series.
SERIES_TOLERANCE = 1e-18
#: Probability below which a node's law is taken to hold nothing (series terms, tails).
NEGLIGIBLE = 1e-17

#: ``lookup(positions) -> (P(L <= x), P(L = x))`` on one node's law.
Lookup = Callable[[FloatArray], tuple[FloatArray, FloatArray]]


def bernoulli_functionals(
    p: FloatArray,
    k: FloatArray,
    points: Sequence[float] | FloatArray,
    lookup: Lookup,
    span: tuple[float, float],
) -> tuple[FloatArray, FloatArray]:
    """``E[D 1{L <= x}]`` and ``E[D 1{L = x}]`` for independent Bernoulli addends of ``L``.

    Parameters
    ----------
    p : ndarray, shape (c,)
        Conditional default probability of each class.
    k : ndarray, shape (c,)
        Loss of one obligor of the class (``> 0``), in the units of ``points``.
    points : sequence of float
        The points ``x`` (e.g. one per level).
    lookup : callable
        CDF and atom of the node's law of ``L`` at arbitrary points.
    span : (float, float)
        ``P(L < span[0])`` and ``P(L > span[1])`` are at most
        :data:`NEGLIGIBLE`: the series stop there.

    Returns
    -------
    below, atom : ndarray, shape (len(points), c)
        See the module notes for the series.  Where ``P(L >= x)`` is at most
        :data:`NEGLIGIBLE`, ``below = p`` and ``atom = 0``; where ``P(L <= x)``
        is, both are 0 (each is bounded by that probability).
    """
    c = p.size
    m = len(points)
    below = np.zeros((m, c))
    atom = np.zeros((m, c))
    if c == 0 or m == 0:
        return below, atom
    pts = np.asarray(points, dtype=float)
    cdf_x, atom_x = lookup(pts)
    upper = 1.0 - cdf_x + atom_x  # P(L >= x)
    for row in np.flatnonzero(upper <= NEGLIGIBLE).tolist():
        below[row] = p
    bulk = np.flatnonzero((upper > NEGLIGIBLE) & (cdf_x > NEGLIGIBLE))
    if bulk.size == 0:
        return below, atom
    certain = p >= 1.0
    below[np.ix_(bulk, np.flatnonzero(certain))] = cdf_x[bulk, None]
    atom[np.ix_(bulk, np.flatnonzero(certain))] = atom_x[bulk, None]
    for flip in (False, True):
        sel = np.flatnonzero(((p > 0.5) if flip else (p <= 0.5)) & (p > 0.0) & ~certain)
        if sel.size == 0:
            continue
        pp, kk = p[sel], k[sel]
        theta = (1.0 - pp) / pp if flip else pp / (1.0 - pp)
        with np.errstate(divide="ignore"):
            log_theta = np.log(theta)
        with np.errstate(divide="ignore", invalid="ignore"):
            need = np.where(
                theta < 1.0, np.ceil(np.log(SERIES_TOLERANCE) / log_theta), np.inf
            )
        # one set of terms for every point: as far as the farthest point needs
        room = (span[1] - pts[bulk].min()) if flip else (pts[bulk].max() - span[0])
        reach = np.floor(max(room, -1.0) / kk + 1e-9) + 1.0
        terms = np.minimum(need, np.maximum(reach, 0.0)).astype(np.int64)
        total = int(terms.sum())
        if total:
            owner = np.repeat(np.arange(sel.size), terms)
            first = np.cumsum(terms) - terms
            r = np.arange(total) - np.repeat(first, terms) + 1
            coef = np.exp(r * log_theta[owner])
            coef[(r % 2) == 0] *= -1.0
            step = r * kk[owner]
        for j in bulk.tolist():
            s1: FloatArray = np.zeros(sel.size)
            s2: FloatArray = np.zeros(sel.size)
            if total:
                f_x, a_x = lookup(pts[j] + step if flip else pts[j] - step)
                if flip:
                    f_x = 1.0 - f_x
                s1 = np.asarray(np.bincount(owner, weights=coef * f_x, minlength=sel.size),
                                dtype=np.float64)
                s2 = np.asarray(np.bincount(owner, weights=coef * a_x, minlength=sel.size),
                                dtype=np.float64)
            if flip:
                # E[D 1{L <= v}] = p - E[D 1{L > v}] = p - (P(L > v) - E[(1-D) 1{L > v}])
                below[j, sel] = pp - ((1.0 - cdf_x[j]) - s1)
                atom[j, sel] = atom_x[j] - s2
            else:
                below[j, sel] = s1
                atom[j, sel] = s2
    return below, atom


def law_span(cum: FloatArray, positions: FloatArray) -> tuple[float, float]:
    """Positions outside which a law (cumulative ``cum``) holds at most :data:`NEGLIGIBLE`."""
    lo = min(int(np.searchsorted(cum, NEGLIGIBLE, side="right")), cum.size - 1)
    hi = min(int(np.searchsorted(cum, cum[-1] - NEGLIGIBLE, side="left")), cum.size - 1)
    return float(positions[lo]), float(positions[max(hi, lo)])


class _Accumulator:
    """Running per-obligor sums over factor nodes (in grid units where relevant)."""

    def __init__(self, n: int, levels: int) -> None:
        self.below = np.zeros((levels, n))
        self.below_own = np.zeros((levels, n))
        self.atom = np.zeros((levels, n))
        self.atom_own = np.zeros((levels, n))
        self.window = np.zeros((levels, n))
        self.cross = np.zeros(n)
        self.cross_own = np.zeros(n)
        self.final = np.zeros(n)
        self.own = np.zeros(n)
        self.mass = 0.0


class NodeLawStore(list[tuple[int, FloatArray] | None]):
    """Keeps the exact engine's node laws up to a memory budget (then keeps None).

    Set as ``ExactEngine.node_law_sink`` before :meth:`ExactEngine.run`; pass to
    :func:`exact_moments` so that node laws are not computed twice.
    """

    def __init__(self, budget: int = 1 << 26) -> None:
        super().__init__()
        self._left = budget  # float64 elements

    def append(self, item: tuple[int, FloatArray] | None) -> None:  # noqa: D102
        if item is not None and item[1].size <= self._left:
            self._left -= item[1].size
            super().append(item)
        else:
            self._left = 0
            super().append(None)


def exact_moments(
    engine: ExactEngine,
    model: LinkedFactorModel,
    dist: LossDistribution,
    levels: Sequence[float],
    *,
    node_laws: Sequence[tuple[int, FloatArray] | None] | None = None,
) -> TailMoments:
    """Moments for the Euler allocation of a law the exact engine computed.

    Parameters
    ----------
    engine : ExactEngine
        The engine (and settings) that computed ``dist``.
    model : LinkedFactorModel
    dist : LossDistribution
        Its law of ``model``.
    levels : sequence of float
        Confidence levels.
    node_laws : sequence, optional
        The node laws the run kept (:class:`NodeLawStore`); None recomputes them.

    Returns
    -------
    TailMoments
        ``diagnostics`` carry ``var_window_sensitivity`` (grid mode).
    """
    reason = engine.refusal(model)
    if reason is not None:
        raise EngineRefusedError(reason)
    if model.dependence is not None:  # these moments condition on one factor only
        raise EngineRefusedError(
            f"risk contributions are not computed for {model.dependence.describe()} yet"
        )
    levels = tuple(sorted(float(a) for a in levels))
    grid = engine.factor_grid if engine.factor_grid is not None else engine.default_factor_grid(
        model
    )
    groups = _linked_groups(model)
    in_group = np.zeros(model.n_obligors, dtype=bool)
    for g in groups:
        in_group[g.members] = True
    single = np.flatnonzero(~in_group)
    loss = np.asarray(model.loss_given_default, dtype=float)
    plan = _choose_losses(
        loss, model.pd, model.asset_correlation, single, groups,
        engine.grid_points, engine.exact_support_limit,
    )
    var = np.array([value_at_risk(dist, a) for a in levels])
    cdf = dist.cdf
    at_idx = np.searchsorted(dist.losses, var)
    below = cdf[at_idx]
    at = dist.probabilities[at_idx]
    acc = _Accumulator(model.n_obligors, len(levels))
    if plan.mode == "atoms":
        unit = 1.0
        grid_loss = loss
        _atoms_pass(model, grid, single, groups, plan, var, acc, engine.node_batch)
        diagnostics: dict[str, Any] = {"var_window_sensitivity": 0.0}
    else:
        unit = float(dist.settings.get("grid_unit") or plan.unit)
        grid_loss = unit * plan.k.astype(float)
        points = np.round(var / unit).astype(np.int64)
        stored = node_laws if node_laws is not None and len(node_laws) == len(grid) else None
        _grid_pass(model, grid, single, groups, plan, points, acc, engine.node_batch, stored)
        diagnostics = {}
    mass = acc.mass
    tail = grid_loss[None, :] * (acc.final[None, :] - acc.below) / mass
    tail_own = grid_loss[None, :] * (acc.own[None, :] - acc.below_own) / mass
    atom = grid_loss[None, :] * acc.atom / mass
    atom_own = grid_loss[None, :] * acc.atom_own / mass
    if plan.mode != "atoms":
        # window of three grid points around VaR: its mass from the law
        wide = np.array([
            float(dist.probabilities[np.abs(dist.losses - v) <= 1.5 * unit].sum()) for v in var
        ])
        with np.errstate(divide="ignore", invalid="ignore"):
            var_atom = np.where(at[:, None] > 0, atom / at[:, None], 0.0)
            var_wide = np.where(
                wide[:, None] > 0, grid_loss[None, :] * acc.window / mass / wide[:, None], 0.0
            )
        scale = np.where(var > 0, var, 1.0)[:, None]
        diagnostics["var_window_sensitivity"] = float(
            np.max(np.abs(var_atom - var_wide) / scale)
        ) if var_atom.size else 0.0
    final_pd = np.asarray(dist.default_probability, dtype=float)
    own_pd = acc.own / mass
    own_pd[single] = final_pd[single]  # no links: every default is the obligor's own
    diagnostics["series_tolerance"] = SERIES_TOLERANCE
    return TailMoments(
        levels=levels,
        expected_loss=loss * final_pd,
        expected_loss_own=loss * np.minimum(own_pd, final_pd),
        cross=unit * grid_loss * acc.cross / mass,
        cross_own=unit * grid_loss * acc.cross_own / mass,
        grid_expected_loss=grid_loss * acc.final / mass,
        tail=tail,
        tail_own=tail_own,
        atom=atom,
        atom_own=atom_own,
        var=var,
        below=below,
        at=at,
        mean=dist.mean,
        std=dist.std,
        diagnostics=diagnostics,
    )


# ====================================================================== linked groups
#: Largest temporary array (float64 elements) of one batched computation of group states.
_STATE_ELEMENTS = 1 << 22


def _group_states(group: _Group, own: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Compute a group's state law and its laws with each member's own default forced.

    Parameters
    ----------
    group : _Group
        The group.
    own : ndarray, shape (nodes, size)
        Own-default probabilities of its members (``group.members`` order) per node.

    Returns
    -------
    law : ndarray, shape (nodes, 2**size)
        ``P(final = s | z)``, as :func:`_group_state_law`.
    forced : ndarray, shape (nodes, size, 2**size)
        ``forced[:, m] = own_m * (the state law with member m's own default forced)``,
        i.e. ``P(O_m = 1, final = s | z)``.  The ``1 + size`` laws of every node
        are one batched call of :func:`_group_state_law` (in chunks of nodes).
    """
    nodes, size = own.shape
    full = 1 << size
    law = np.empty((nodes, full))
    forced = np.empty((nodes, size, full))
    step = max(1, _STATE_ELEMENTS // ((size + 1) * full))
    diag = np.arange(size)
    for a in range(0, nodes, step):
        o = own[a : a + step]
        stacked = np.repeat(o[:, None, :], size + 1, axis=1)
        stacked[:, diag + 1, diag] = 1.0
        both = _group_state_law(group, stacked.reshape(-1, size)).reshape(o.shape[0], size + 1,
                                                                           full)
        law[a : a + step] = both[:, 0]
        forced[a : a + step] = o[:, :, None] * both[:, 1:]
    return law, forced


class _GroupTerms:
    """One linked group's terms at many nodes, added to the sums in batches.

    Per node the caller gives the weight, the members' own PDs, and the rest of
    the book's CDF (``3 * levels`` rows: below VaR, at VaR, on the three-point
    window) at each distinct group loss; :meth:`flush` computes the group's
    state laws for all kept nodes at once and adds ``E[D_i f(L)]``,
    ``E[O_i f(L)]`` and the cross moments of every member.
    """

    def __init__(self, acc: _Accumulator, group: _Group, positions: FloatArray,
                 state_loss: FloatArray, levels: int, windowed: bool) -> None:
        self.acc = acc
        self.group = group
        self.state_of = np.searchsorted(positions, state_loss)
        self.state_loss = state_loss
        self.levels = levels
        self.windowed = windowed
        size = group.members.size
        self.bits = _state_bits(size).astype(float)
        self.limit = max(1, _STATE_ELEMENTS // ((size + 1) * (1 << size)
                                                + 3 * levels * positions.size))
        self.w: list[float] = []
        self.own: list[FloatArray] = []
        self.rest: list[FloatArray] = []
        self.rest_mean: list[float] = []

    def add(self, w: float, own: FloatArray, rest: FloatArray, rest_mean: float) -> None:
        """Keep one node: weight, members' own PDs, rest CDF rows by distinct loss, rest mean."""
        self.w.append(w)
        self.own.append(own)
        self.rest.append(rest)
        self.rest_mean.append(rest_mean)
        if len(self.w) >= self.limit:
            self.flush()

    def flush(self) -> None:
        """Add the kept nodes' terms to the accumulator."""
        if not self.w:
            return
        acc, members, lev, bits = self.acc, self.group.members, self.levels, self.bits
        w = np.asarray(self.w)
        law, forced = _group_states(self.group, np.stack(self.own))
        rest = np.stack(self.rest)[:, :, self.state_of]  # (nodes, rows, states)
        total = self.state_loss[None, :] + np.asarray(self.rest_mean)[:, None]
        self.w, self.own, self.rest, self.rest_mean = [], [], [], []
        lw = law * w[:, None]
        fw = forced * w[:, None, None]
        acc.final[members] += lw.sum(axis=0) @ bits
        terms = np.einsum("jks,js->ks", rest, lw) @ bits  # (rows, members)
        acc.below[:, members] += terms[:lev]
        acc.atom[:, members] += terms[lev : 2 * lev]
        if self.windowed:
            acc.window[:, members] += terms[2 * lev :]
        acc.cross[members] += np.einsum("js,js->s", lw, total) @ bits
        acc.own[members] += fw.sum(axis=(0, 2))
        own_terms = np.einsum("jks,jms->km", rest, fw)
        acc.below_own[:, members] += own_terms[:lev]
        acc.atom_own[:, members] += own_terms[lev : 2 * lev]
        acc.cross_own[members] += np.einsum("jms,js->m", fw, total)


# ====================================================================== atoms mode
def _atoms_pass(
    model: LinkedFactorModel,
    grid: FactorGrid,
    single: IntArray,
    groups: Sequence[_Group],
    plan: _LossPlan,
    var: FloatArray,
    acc: _Accumulator,
    batch: int,
) -> None:
    """Exact loss values: per-node laws on the shared support (see the engine)."""
    assert plan.atoms is not None
    atoms = plan.atoms
    loss = model.loss_given_default
    lossy_single = single[loss[single] > 0]
    order = np.argsort(atoms.support, kind="stable")
    support = atoms.support[order]
    tol = 0.5 * atoms._quantum
    size = support.size
    step = max(1, min(batch, (1 << 22) // max(size, 1)))

    def lookup_of(law: FloatArray) -> Lookup:
        cum = np.cumsum(law)

        def lookup(x: FloatArray) -> tuple[FloatArray, FloatArray]:
            i = np.searchsorted(support, x + tol, side="right") - 1
            f = np.where(i >= 0, cum[np.maximum(i, 0)], 0.0)
            j = np.minimum(np.searchsorted(support, x - tol, side="left"), size - 1)
            a = np.where(np.abs(support[j] - x) <= tol, law[j], 0.0)
            return f, a

        return lookup

    state_losses = [_state_bits(g.members.size).astype(float) @ loss[g.members] for g in groups]
    distinct = [np.unique(sl) for sl in state_losses]
    terms = [_GroupTerms(acc, g, d, sl, var.size, windowed=False)
             for g, d, sl in zip(groups, distinct, state_losses, strict=True)]
    for start in range(0, len(grid), step):
        z = grid.nodes[start : start + step]
        ws = grid.weights[start : start + step]
        own = model.conditional_pd(z)
        item_laws: list[FloatArray] = [
            np.stack([1.0 - own[:, i], own[:, i]], axis=1) for i in lossy_single.tolist()
        ]
        glaws = [_group_state_law(g, own[:, g.members]) for g in groups]
        item_laws += glaws
        probs = atoms.apply(item_laws)[:, order] if item_laws else np.ones((z.size, 1))
        rest_probs = []
        for gi in range(len(groups)):
            laws = list(item_laws)
            delta = np.zeros_like(glaws[gi])
            delta[:, 0] = 1.0
            laws[len(lossy_single) + gi] = delta
            rest_probs.append(atoms.apply(laws)[:, order])
        means = probs @ support
        for j in range(z.size):
            w = float(ws[j])
            law = probs[j]
            acc.mass += w * float(law.sum())
            lookup = lookup_of(law)
            span = law_span(np.cumsum(law), support)
            p = own[j]
            acc.own[single] += w * p[single]
            acc.final[single] += w * p[single]
            ps = p[lossy_single]
            below, atom = bernoulli_functionals(ps, loss[lossy_single], var, lookup, span)
            acc.below[:, lossy_single] += w * below
            acc.below_own[:, lossy_single] += w * below
            acc.atom[:, lossy_single] += w * atom
            acc.atom_own[:, lossy_single] += w * atom
            cross = ps * (loss[lossy_single] + means[j] - ps * loss[lossy_single])
            acc.cross[lossy_single] += w * cross
            acc.cross_own[lossy_single] += w * cross
            for gi, g in enumerate(groups):
                rest_lookup = lookup_of(rest_probs[gi][j])
                rows = np.zeros((3 * var.size, distinct[gi].size))
                for li, v in enumerate(var):
                    rows[li], rows[var.size + li] = rest_lookup(v - distinct[gi])
                rest_mean = float(means[j] - glaws[gi][j] @ state_losses[gi])
                terms[gi].add(w, own[j, g.members], rows, rest_mean)
    for t in terms:
        t.flush()


# ====================================================================== grid mode
def _grid_pass(
    model: LinkedFactorModel,
    grid: FactorGrid,
    single: IntArray,
    groups: Sequence[_Group],
    plan: _LossPlan,
    points: IntArray,
    acc: _Accumulator,
    batch: int,
    stored: Sequence[tuple[int, FloatArray] | None] | None = None,
) -> None:
    """Loss grid: the engine's node laws on their windows, then the series per class."""
    k_all = plan.k
    top = plan.top
    pr_keys = np.stack([model.pd, model.asset_correlation], axis=1)
    pr_unique, pr_of = np.unique(pr_keys, axis=0, return_inverse=True)
    pr_of = pr_of.ravel()
    lossy_single = single[k_all[single] > 0]
    loss_keys = np.stack([pr_of[lossy_single], k_all[lossy_single]], axis=1)
    cls, cls_of, cls_count = np.unique(loss_keys, axis=0, return_inverse=True, return_counts=True)
    cls_of = cls_of.ravel()
    cls_pr = cls[:, 0]
    cls_k = cls[:, 1].astype(np.int64)
    cls_count = cls_count.astype(float)
    cls_kc = cls_k * cls_count
    cls_k2c = cls_k.astype(float) ** 2 * cls_count
    scratch = np.zeros(model.n_obligors)
    glaws = _all_group_laws(groups, model, pr_unique, pr_of, k_all, grid, scratch)
    lev = points.size
    terms = []
    for g, pos_u in zip(groups, glaws.positions, strict=True):
        state_pos = _state_bits(g.members.size).astype(np.int64) @ k_all[g.members]
        terms.append(_GroupTerms(acc, g, pos_u.astype(float), state_pos.astype(float), lev,
                                 windowed=True))
    group_mean = [merged @ pos_u.astype(float) for pos_u, merged in zip(
        glaws.positions, glaws.merged, strict=True)]
    nodes, weights = grid.nodes, grid.weights
    wide_points = np.concatenate([points - 2, points + 1])  # window v-1..v+1 from two CDFs
    n_cls = cls_k.size
    c_final = np.zeros(n_cls)
    c_cross = np.zeros(n_cls)
    c_below = np.zeros((lev, n_cls))
    c_atom = np.zeros((lev, n_cls))
    c_window = np.zeros((lev, n_cls))
    for start in range(0, len(grid), batch):
        z = nodes[start : start + batch]
        ws = weights[start : start + batch]
        p_pr = conditional_default_probability(pr_unique[:, 0], pr_unique[:, 1], z)
        own_all = model.conditional_pd(z) if groups else None
        product: tuple[int, FloatArray] | None = None  # the groups' product, when needed
        for j in range(z.size):
            w = float(ws[j])
            at = start + j
            p = p_pr[j, cls_pr]
            mean = float(np.sum(p * cls_kc))
            var = float(np.sum(p * (1.0 - p) * cls_k2c))
            moving = (p > 0) & (p < 1)
            bound = float(cls_k[moving].max()) if moving.any() else 0.0
            lowest = int(np.sum(cls_kc[p >= 1]))
            highest = int(np.sum(cls_kc[p > 0]))
            if groups:
                mean += float(glaws.mean[at])
                var += float(glaws.var[at])
                lowest += int(glaws.low[at])
                highest += int(glaws.high[at])
                bound = max(bound, glaws.bound)
            half = bernstein_halfwidth(var, bound)
            window = place_window(mean, half, lowest, highest, top)
            width = window.width
            kept = stored[at] if stored is not None else None
            if kept is not None and kept[0] == window.start and kept[1].size == width:
                law = kept[1]
            else:
                extra = None
                if groups:  # the engine's product of the group laws (only for unkept laws)
                    if product is None:
                        dense = []
                        for pos_u, merged in zip(glaws.positions, glaws.merged, strict=True):
                            block = np.zeros((z.size, int(pos_u[-1] - pos_u[0]) + 1))
                            block[:, pos_u - pos_u[0]] = merged[start : start + batch]
                            dense.append((int(pos_u[0]), block))
                        product = product_law(dense)
                    extra = (product[0], product[1][j])
                law, _ = grid_law(cls_k, p, window, count=cls_count.astype(float), extra=extra)
                law[: max(lowest - window.start, 0)] = 0.0
                law[max(highest + 1 - window.start, 0) :] = 0.0
                law[law < _NOISE_FLOOR * law.max()] = 0.0
            acc.mass += w * float(law.sum())
            cum = np.cumsum(law)
            span = law_span(cum, np.arange(width, dtype=float))

            def lookup(x: FloatArray, cum: FloatArray = cum, law: FloatArray = law,
                       width: int = width) -> tuple[FloatArray, FloatArray]:
                xi = np.asarray(x, dtype=np.int64)
                inside = (xi >= 0) & (xi < width)
                xc = np.clip(xi, 0, width - 1)
                f = np.where(inside, cum[xc], np.where(xi >= width, 1.0, 0.0))
                a = np.where(inside, law[xc], 0.0)
                return f, a

            rel = (points - window.start).astype(float)
            # single obligors, one class at a time
            pc = p
            both, both_atom = bernoulli_functionals(
                pc, cls_k.astype(float),
                np.concatenate([rel, (wide_points - window.start).astype(float)]), lookup, span,
            )
            below, atom = both[:lev], both_atom[:lev]
            wide_b = both[lev:]
            # sums per class; spread to the obligors once at the end
            c_final += w * pc
            c_below += w * below
            c_atom += w * atom
            c_window += w * (wide_b[lev:] - wide_b[:lev])
            c_cross += w * (pc * (cls_k + mean - pc * cls_k))
            if not groups:
                continue
            assert own_all is not None
            wide_rel = (wide_points - window.start).astype(float)
            all_rel = np.concatenate([rel, wide_rel])
            f_all, a_all = lookup(all_rel)
            upper = 1.0 - f_all + a_all
            if not np.any((upper > NEGLIGIBLE) & (f_all > NEGLIGIBLE)):
                # VaR far from this node's law: 1{L <= v} is 1 (or 0) for every state
                side = (upper <= NEGLIGIBLE).astype(float)
                col = np.concatenate([side[:lev], np.zeros(lev),
                                      side[2 * lev :] - side[lev : 2 * lev]])
                for gi, g in enumerate(groups):
                    rows = np.repeat(col[:, None], glaws.positions[gi].size, axis=1)
                    terms[gi].add(w, own_all[j, g.members], rows, mean - group_mean[gi][at])
                continue
            laws_at = [(pos_u, merged[at]) for pos_u, merged in zip(
                glaws.positions, glaws.merged, strict=True)]
            # the series only where every group converges fast; else spectra for all groups
            # (their cost is shared, the series' is not)
            series_first = all(pos_u[0] == 0 and prob[0] > _SERIES_MIN_BASE
                               for pos_u, prob in laws_at)
            rows_of: dict[int, FloatArray] = {}
            for gi, (pos_u, prob) in enumerate(laws_at):
                series = _rest_by_series(prob, pos_u, lookup, all_rel, span, width) \
                    if series_first else None
                if series is not None:
                    f_u, a_u = series
                    rows_of[gi] = np.concatenate([f_u[:lev], a_u[:lev],
                                                  f_u[2 * lev :] - f_u[lev : 2 * lev]])
            wanted = [gi for gi in range(len(groups)) if gi not in rows_of]
            if wanted:
                rows_of.update(_rest_rows_by_fft(
                    grid_law(cls_k, p, window, count=cls_count.astype(float))[0],
                    laws_at, wanted, rel, wide_rel, width,
                ))
            for gi, g in enumerate(groups):
                terms[gi].add(w, own_all[j, g.members], rows_of[gi], mean - group_mean[gi][at])
    for t in terms:
        t.flush()
    o, co = lossy_single, cls_of
    for vector in (acc.final, acc.own):
        vector[o] += c_final[co]
    for vector in (acc.cross, acc.cross_own):
        vector[o] += c_cross[co]
    for matrix in (acc.below, acc.below_own):
        matrix[:, o] += c_below[:, co]
    for matrix in (acc.atom, acc.atom_own):
        matrix[:, o] += c_atom[:, co]
    acc.window[:, o] += c_window[:, co]


#: The series is used when the group's no-loss probability exceeds this (``theta <= 1/3``).
_SERIES_MIN_BASE = 0.75


def _rest_by_series(
    prob: FloatArray,
    positions: IntArray,
    lookup: Lookup,
    points: FloatArray,
    span: tuple[float, float],
    width: int,
) -> tuple[FloatArray, FloatArray] | None:
    """CDF and atoms of ``L - K_g`` at ``x - k`` for each point ``x`` and group loss ``k``.

    The group's factor of the conditional PGF is ``Q(x) = sum_k P(K_g = k) x^k``
    with ``q0 = P(K_g = 0) > 1/2``; its inverse is the power series
    ``(1 / q0) sum_r (-H)^r``, ``H = (Q - q0) / q0``, whose coefficients ``c_m``
    have absolute sum at most ``1 / (2 q0 - 1)``.  Then ``P(L - K_g <= y) =
    sum_m c_m P(L <= y - m)``: the group's factor removed from the law of ``L``
    (the group analogue of the Bernoulli series).  Orders stop when the mass
    ``theta^r`` of the next order is below :data:`SERIES_TOLERANCE`.

    The series is abandoned (None) once its look-ups would exceed half the
    node window ``width``: beyond that the FFT route is cheaper.

    Returns
    -------
    (cdf, atom) of shape (len(points), len(positions)), or None when ``q0`` is
    too small or the series too long (the caller uses the FFT instead).
    """
    if positions.size == 0 or positions[0] != 0:
        return None
    q0 = float(prob[0])
    if q0 <= _SERIES_MIN_BASE:
        return None
    h_pos = positions[1:]
    h_coef = -prob[1:] / q0
    theta = float(np.sum(np.abs(h_coef)))
    reach = float(np.max(points)) - span[0]  # c_m beyond this meets P(L <= y - m) = 0
    keep_pos = [np.zeros(1, dtype=np.int64)]
    keep_coef = [np.array([1.0 / q0])]
    term_pos, term_coef = keep_pos[0], keep_coef[0]
    mass = 1.0 / q0
    total = 1
    while h_pos.size and mass * theta > SERIES_TOLERANCE:
        cand_pos = (term_pos[:, None] + h_pos[None, :]).ravel()
        cand_coef = (term_coef[:, None] * h_coef[None, :]).ravel()
        inside = cand_pos <= reach
        if not inside.any():
            break
        uniq, inverse = np.unique(cand_pos[inside], return_inverse=True)
        term_pos = uniq
        term_coef = np.bincount(inverse.ravel(), weights=cand_coef[inside])
        mass = float(np.sum(np.abs(term_coef)))
        total += term_pos.size
        if total * positions.size * points.size > width // 2:
            return None
        keep_pos.append(term_pos)
        keep_coef.append(term_coef)
    all_pos = np.concatenate(keep_pos)
    all_coef = np.concatenate(keep_coef)
    # x - k - m for every point, group loss k and coefficient m
    shifts = positions[:, None] + all_pos[None, :]  # (U, M)
    cdf = np.empty((points.size, positions.size))
    atom = np.empty((points.size, positions.size))
    for i, x in enumerate(points.tolist()):
        f, a = lookup((x - shifts).ravel().astype(float))
        cdf[i] = f.reshape(shifts.shape) @ all_coef
        atom[i] = a.reshape(shifts.shape) @ all_coef
    return cdf, atom


def _rest_rows(rest: FloatArray, positions: IntArray, rel: FloatArray, wide_rel: FloatArray,
               width: int) -> FloatArray:
    """Rest-of-book rows (below, at, window; see :class:`_GroupTerms`) from its cyclic law."""
    c2 = np.concatenate(([0.0], np.cumsum(np.concatenate((rest, rest)))))
    b = np.mod(-positions, width)

    def cdf(v_rel: float) -> FloatArray:
        if v_rel < 0:
            return np.zeros(b.size)
        if v_rel >= width:
            return np.ones(b.size) * c2[width]
        vi = int(v_rel)
        return np.asarray(c2[b + vi + 1] - c2[b], dtype=np.float64)

    lev = rel.size
    below = np.stack([cdf(float(v)) for v in rel])
    atom = np.stack([
        rest[np.mod(int(v) - positions, width)] if 0 <= v < width else np.zeros(positions.size)
        for v in rel
    ])
    wide = np.stack([cdf(float(v)) for v in wide_rel])
    return np.concatenate([below, atom, wide[lev:] - wide[:lev]])


def _blocks(reach: Sequence[int], cap: int) -> list[list[int]]:
    """Consecutive groups whose loss ranges add up to at most ``cap`` (a wider group alone)."""
    blocks: list[list[int]] = [[]]
    span = 0
    for gi, r in enumerate(reach):
        if blocks[-1] and span + r > cap:
            blocks.append([])
            span = 0
        blocks[-1].append(gi)
        span += r
    return blocks


def _rest_rows_by_fft(
    singles: FloatArray,
    groups: Sequence[tuple[IntArray, FloatArray]],
    wanted: Sequence[int],
    rel: FloatArray,
    wide_rel: FloatArray,
    width: int,
) -> dict[int, FloatArray]:
    """Rest-of-book rows (see :class:`_GroupTerms`) of the ``wanted`` groups, by spectra.

    On the node's window (cyclic, ``N = width`` points) the law of the book
    without group ``g`` is ``S * prod_{h != g} G_h`` (``S`` the single
    obligors' law, ``G_h`` the group laws, ``*`` cyclic convolution).  The
    groups are gathered into blocks ``B`` of consecutive groups whose loss
    ranges add up to a few thousand grid units (see below); with ``P_B`` the
    product of a block's laws and ``P_{B,-g}`` the same without ``g``::

        rest_g = L_B * P_{B,-g},   L_B = S * prod_{B' != B} P_{B'},

    so one long inverse transform per block (not per group) gives ``L_B``.  A
    row of ``g`` at group loss ``u`` is ``E[f(u + rest_g)] = sum_d P_{B,-g}(d)
    F(u + d)`` with ``F(t) = E[f(t + L_B)]`` (cyclic CDF from ``-t`` to
    ``x - t``, or the atom at ``x - t``): a correlation over ``t <= D_B``, the
    block's loss range, done by short transforms of length ``>= D_B + 1`` (no
    wrap-around).  Block size balances the long transforms (two per block)
    against the short ones (about ``3 levels + 1`` per wanted group):
    ``D_B ~ sqrt(2 D N / (wanted (3 levels + 1)))`` with ``D`` the summed
    ranges.  Up to rounding this is the same cyclic law as the product of all
    other spectra.
    """
    lev = rel.size
    reach = [int(pos[-1]) for pos, _ in groups]
    rows_n = 3 * lev
    cap = int(np.sqrt(2.0 * sum(reach) * width / (len(wanted) * (rows_n + 1))))
    blocks = _blocks(reach, max(cap, max(reach), 1))
    want = set(wanted)
    # short spectra of each block: its product and the leave-one-out products of wanted groups
    block_laws = []
    leave_one_out: list[tuple[int, FloatArray]] = []  # (length, spectra) per block
    for blk in blocks:
        d_b = sum(reach[gi] for gi in blk)
        m = sfft.next_fast_len(d_b + 1, real=True)
        dense = np.zeros((len(blk), m))
        for r, gi in enumerate(blk):
            pos, prob = groups[gi]
            dense[r, pos] = prob
        spec = sfft.rfft(dense, axis=1)
        ones = np.ones((1, spec.shape[1]), dtype=spec.dtype)
        prefix = np.cumprod(np.concatenate([ones, spec[:-1]]), axis=0)
        suffix = np.cumprod(np.concatenate([ones, spec[:0:-1]]), axis=0)[::-1]
        block_laws.append(sfft.irfft(prefix[-1] * spec[-1], m)[: d_b + 1])
        leave_one_out.append((m, prefix * suffix))
    # long spectra: singles and each block, then each block's complement
    placed = np.zeros((len(blocks), width))
    for b, law in enumerate(block_laws):
        if law.size <= width:
            placed[b, : law.size] = law
        else:
            placed[b] = np.bincount(np.mod(np.arange(law.size), width), weights=law,
                                    minlength=width)
    long = sfft.rfft(placed, axis=1)
    outside = np.empty_like(long)
    acc = sfft.rfft(singles)
    for b in range(len(blocks)):
        outside[b] = acc
        acc = acc * long[b]
    acc = np.ones_like(acc)
    for b in range(len(blocks) - 1, -1, -1):
        outside[b] *= acc
        acc = acc * long[b]
    needed = [b for b, blk in enumerate(blocks) if want.intersection(blk)]
    rests = sfft.irfft(outside[needed], width, axis=1)
    out: dict[int, FloatArray] = {}
    for rest, b in zip(rests, needed, strict=True):
        blk = blocks[b]
        m, loo = leave_one_out[b]
        t = np.arange(block_laws[b].size)
        f = np.zeros((rows_n, m))
        f[:, : t.size] = _rest_rows(rest, t, rel, wide_rel, width)
        f_spec = sfft.rfft(f, axis=1)
        mine = [r for r, gi in enumerate(blk) if gi in want]
        corr = sfft.irfft(f_spec[None, :, :] * np.conj(loo[mine])[:, None, :], m, axis=2)
        for c, r in zip(corr, mine, strict=True):
            out[blk[r]] = c[:, groups[blk[r]][0]]
    return out
