"""The ``exact`` engine: the loss law by conditioning on the systemic factor.

Given the factor ``Z = z``, own defaults and link liveness are independent,
so obligors in different connected groups of the link graph are independent.
For each factor node the engine computes

* the loss law of the obligors without links, through their probability
  generating function on a loss grid (see :mod:`debtsim.engines.exact.loss_grid`),
* the exact joint law of final defaults of every linked group, by the chain
  rule over its strongly connected parts in debtor-to-creditor order, each
  part's law from :func:`debtsim.model.linked_group_law.group_law`,

multiplies them, and sums the node laws with the factor weights.

Factor nodes.  For a large book the loss given the factor is nearly
deterministic, so a fixed Gauss–Hermite rule makes the mixture a staircase
and its quantiles snap to the nodes.  By default the engine builds a
composite Gauss–Legendre rule (:func:`debtsim.model.factor_grid.adaptive_grid`) whose
node density is proportional to ``|d mean(L | z) / dz| / sd(L | z)``, i.e. a
fixed number of nodes per conditional standard deviation travelled by the
conditional mean, with a floor that integrates the default probabilities to
about ``1e-12``.

Losses.  When every loss ``EAD * LGD`` is an integer multiple of one unit and
the grid is not too long, the grid is exact.  Small books without such a
unit keep their exact loss values (no grid).  Otherwise each loss is moved to
one of its two neighbouring points of a grid of about ``grid_points`` points,
up or down so that the rounding errors of obligors with similar PD and
correlation cancel (error diffusion along the PD order): every loss moves by
less than one unit and the conditional mean loss, at every factor value,
hardly at all.  The unit is finally rescaled (by about ``1e-5``) so that the
expected loss is exact.  ``diagnostics`` reports the unit, the largest
conditional mean shift over the tail nodes and ``discretisation_error``, an
estimate in currency of the error of VaR and ES.

References
----------
L. Andersen, J. Sidenius and S. Basu, "All your hedges in one basket",
Risk (2003).  O. Vasicek, "Loan portfolio value", Risk 15 (2002).

"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.special import ndtr, ndtri

from debtsim._typing import FloatArray, IntArray
from debtsim.distribution import LossDistribution
from debtsim.engines.base import Engine, ProgressHook
from debtsim.engines.exact.loss_grid import (
    SERIES_TOLERANCE,
    WINDOW_TAIL,
    AtomConvolution,
    SeriesKernel,
    bernstein_halfwidth,
    place_window,
    product_law,
)
from debtsim.errors import EngineRefusedError
from debtsim.model.factor_grid import FactorGrid, adaptive_grid
from debtsim.model.linked_group_law import LARGEST_GROUP, group_law
from debtsim.model.specification import LinkedFactorModel, conditional_default_probability

__all__ = ["ExactEngine"]


#: Factor range of the default grid; the normal mass outside is ~2e-17.
FACTOR_LIMIT = 8.5
#: Tail probability beyond which the default grid stops adding nodes for sharpness.
_SHARP_REGION_TAIL = 1e-6
#: Node-law values below this fraction of the node's largest are FFT round-off.
_NOISE_FLOOR = 1e-15
#: Loosest series tolerance of one node (nodes of tiny weight; see _run_grid).
_LOOSEST = 1e-6
#: Books with more loss-bearing obligors than this never keep exact loss values.
_ATOMS_MAX_OBLIGORS = 40
#: Relative tolerance for recognising losses as multiples of a common unit.
_UNIT_TOLERANCE = 1e-9


@dataclass(frozen=True)
class _Part:
    """One strongly connected part of a linked group, in chain order."""

    members: IntArray  # obligor indices
    external: tuple[tuple[int, int, float], ...]  # (debtor bit, member position, q)
    internal: tuple[tuple[int, int, float], ...]  # (debtor pos, creditor pos, q)


@dataclass(frozen=True)
class _Group:
    """A linked group (weakly connected component with links), ready to enumerate."""

    members: IntArray  # obligor indices in bit order
    parts: tuple[_Part, ...]


class ExactEngine(Engine):
    """Semi-analytic loss law, exact given the factor nodes.

    Parameters
    ----------
    factor_grid : FactorGrid, optional
        Use exactly these factor nodes.  By default a tail-dense composite
        Gauss–Legendre grid is built for the book.
    factor_resolution : float
        Nodes per conditional standard deviation travelled by the
        conditional mean loss (default grid only).  Larger is finer.
    factor_order : int
        Gauss–Legendre nodes per panel of the default grid.
    grid_points : int
        Longest loss grid when losses must be rounded to one (books with
        fewer than ``grid_points / 1024`` obligors get about 1024 points per
        obligor).
    max_component_size : int
        Largest linked group enumerated exactly (``2**size`` joint states).
    exact_support_limit : int
        Books without a common loss unit keep exact loss values while the
        number of distinct possible losses stays below this.
    node_batch : int
        Factor nodes processed together (memory versus speed).

    """

    name = "exact"

    def __init__(
        self,
        *,
        factor_grid: FactorGrid | None = None,
        sector_grid: FactorGrid | None = None,
        mixing_grid: FactorGrid | None = None,
        factor_resolution: float = 1.5,
        factor_order: int = 8,
        grid_points: int = 2**17,
        max_component_size: int = 18,
        exact_support_limit: int = 2**20,
        node_batch: int = 64,
    ) -> None:
        if factor_resolution <= 0:
            raise ValueError(f"factor_resolution must be > 0, got {factor_resolution}")
        if grid_points < 16:
            raise ValueError(f"grid_points must be >= 16, got {grid_points}")
        if max_component_size < 1:
            raise ValueError(f"max_component_size must be >= 1, got {max_component_size}")
        if node_batch < 1:
            raise ValueError(f"node_batch must be >= 1, got {node_batch}")
        self.factor_grid = factor_grid
        self.sector_grid = sector_grid
        self.mixing_grid = mixing_grid
        self._grid_cache: tuple[LinkedFactorModel, FactorGrid] | None = None
        self.factor_resolution = float(factor_resolution)
        self.factor_order = int(factor_order)
        self.grid_points = int(grid_points)
        self.max_component_size = int(max_component_size)
        self.exact_support_limit = int(exact_support_limit)
        self.node_batch = int(node_batch)
        #: When a list, grid-mode runs append every node's law ``(window start, law)`` to it
        #: (risk contributions reuse them instead of computing each node twice).
        self.node_law_sink: list[tuple[int, FloatArray] | None] | None = None

    # ------------------------------------------------------------ refusal
    def refusal(self, model: LinkedFactorModel) -> str | None:
        """Refuse books with a linked group too large to enumerate, or too sharp to grid."""
        if model.dependence is not None:
            from debtsim.engines.exact.sector_law import sector_refusal

            reason = sector_refusal(model, _linked_groups(model))
            if reason is not None:
                return reason
        elif self.factor_grid is None:
            try:
                self._grid_for(model)
            except ValueError as exc:
                return f"{exc} (asset correlations very close to 1); use --engine sample"
        if model.n_links == 0:
            return None
        largest = max(model.components, key=len)
        if largest.size > self.max_component_size:
            names = ", ".join(model.ids[i] for i in largest[:3])
            return (
                f"a group of {largest.size} linked obligors ({names}, ...) exceeds the exact "
                f"engine's limit of {self.max_component_size} per connected group "
                f"(2^size joint states); use --engine sample"
            )
        for part in model.strong_components:
            if part.size > LARGEST_GROUP:
                names = ", ".join(model.ids[i] for i in part[:3])
                return (
                    f"a cycle of {part.size} mutually lending obligors ({names}, ...) exceeds "
                    f"the exact engine's limit of {LARGEST_GROUP}; use --engine sample"
                )
        return None

    # ------------------------------------------------------------ factor grid
    def _grid_for(self, model: LinkedFactorModel) -> FactorGrid:
        """Return the default grid of ``model``, built once per model (refusal, then run)."""
        cached = self._grid_cache
        if cached is not None and cached[0] is model:
            return cached[1]
        grid = self.default_factor_grid(model)
        self._grid_cache = (model, grid)
        return grid

    def default_factor_grid(self, model: LinkedFactorModel) -> FactorGrid:
        """Tail-dense composite Gauss–Legendre grid for ``model``.

        Node density (per unit of ``z``) is
        ``base + resolution * |d/dz E[L|z]| / sd(L|z)`` with ``E`` and ``sd``
        of the book read without links; the second term is dropped where
        ``Phi(z)`` or ``1 - Phi(z)`` is below ``1e-6`` (there the mixture is
        integrated by the base rule only: VaR up to the 99.999% level is
        unaffected, further quantiles may snap to nodes).  ``base`` is 4 nodes
        per unit of ``z`` times the steepest factor loading
        ``sqrt(R / (1 - R))`` (at least 1).
        """
        loss = model.loss_given_default
        r = model.asset_correlation
        pd = model.pd
        lossy = (loss > 0) & (pd < 1.0)
        loading = np.sqrt(r / (1.0 - r))
        base = 4.0 * max(1.0, float(loading.max()) if loading.size else 1.0)
        # group obligors by (PD, R) class (binned when there are many) to keep this cheap
        if lossy.any():
            keys = np.stack([pd[lossy], r[lossy]], axis=1)
            uniq, inverse, _ = _unique_rows(keys)
            if uniq.shape[0] > 512:
                pd_bin = np.round(np.log(pd[lossy]) * 8.0) / 8.0
                r_bin = np.round(r[lossy] * 64.0) / 64.0
                keys = np.stack([pd_bin, r_bin], axis=1)
                uniq, inverse, _ = _unique_rows(keys)
                uniq = np.stack([np.exp(uniq[:, 0]), uniq[:, 1]], axis=1)
            inverse = inverse.ravel()
            sum_l = np.bincount(inverse, weights=loss[lossy])
            sum_l2 = np.bincount(inverse, weights=loss[lossy] ** 2)
            threshold = ndtri(uniq[:, 0])
            sr = np.sqrt(uniq[:, 1])
            s1r = np.sqrt(1.0 - uniq[:, 1])
        resolution = self.factor_resolution

        def density(z: FloatArray) -> FloatArray:
            out = np.full(z.shape, base)
            if not lossy.any():
                return out
            x = (threshold[None, :] - sr[None, :] * z[:, None]) / s1r[None, :]
            p = ndtr(x)
            slope = np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi) * (sr / s1r)[None, :]
            dmean = slope @ sum_l
            # 1 - p as ndtr(-x): near p = 1 the difference rounds to 0 while the slope does not
            var = (p * ndtr(-x)) @ sum_l2
            with np.errstate(divide="ignore", invalid="ignore"):
                sharp = np.where(var > 0, resolution * dmean / np.sqrt(var), 0.0)
            inside = (ndtr(z) >= _SHARP_REGION_TAIL) & (ndtr(-z) >= _SHARP_REGION_TAIL)
            return out + np.where(inside, sharp, 0.0)

        return adaptive_grid(
            density, lower=-FACTOR_LIMIT, upper=FACTOR_LIMIT, order=self.factor_order
        )

    # ------------------------------------------------------------ run
    def run(
        self, model: LinkedFactorModel, *, progress: ProgressHook | None = None
    ) -> LossDistribution:
        """Compute the loss law of ``model`` (see the module notes)."""
        reason = self.refusal(model)
        if reason is not None:
            raise EngineRefusedError(reason)
        if model.dependence is not None:
            return self._run_sectors(model, progress)
        grid = self.factor_grid if self.factor_grid is not None else self._grid_for(model)
        groups = _linked_groups(model)
        in_group = np.zeros(model.n_obligors, dtype=bool)
        for g in groups:
            in_group[g.members] = True
        single = np.flatnonzero(~in_group)
        loss = np.asarray(model.loss_given_default, dtype=float)

        plan = _choose_losses(
            loss,
            model.pd,
            model.asset_correlation,
            single,
            groups,
            self.grid_points,
            self.exact_support_limit,
        )
        if plan.mode == "atoms":
            result = _run_atoms(model, grid, single, groups, plan, self.node_batch, progress)
        else:
            result = _run_grid(
                model, grid, single, groups, plan, self.node_batch, progress, self.node_law_sink
            )
        losses, probs, default_probability, diagnostics, unit = result
        settings: dict[str, Any] = {
            "factor_nodes": len(grid),
            "factor_method": grid.method,
            "loss_support": plan.mode,
            "grid_unit": unit,
            "grid_points": plan.top + 1 if plan.mode != "atoms" else None,
            "linked_groups": len(groups),
            "largest_linked_group": max((g.members.size for g in groups), default=1),
        }
        return LossDistribution(
            losses=losses,
            probabilities=probs,
            default_probability=default_probability,
            engine=self.name,
            samples=None,
            seed=None,
            settings=settings,
            diagnostics=diagnostics,
        )

    def _run_sectors(
        self, model: LinkedFactorModel, progress: ProgressHook | None
    ) -> LossDistribution:
        """Sector loadings and/or Student-t: see :mod:`debtsim.engines.exact.sector_law`."""
        from debtsim.engines.exact.sector_law import sector_law

        groups = _linked_groups(model)
        in_group = np.zeros(model.n_obligors, dtype=bool)
        for g in groups:
            in_group[g.members] = True
        plan = _choose_losses(
            np.asarray(model.loss_given_default, dtype=float),
            model.pd,
            model.asset_correlation,
            np.flatnonzero(~in_group),
            groups,
            self.grid_points,
            self.exact_support_limit,
        )
        result = sector_law(
            model,
            groups=groups,
            plan=plan,
            group_state_law=_group_state_law,
            state_bits=_state_bits,
            factor_grid=self.factor_grid,
            sector_grid=self.sector_grid,
            mixing_grid=self.mixing_grid,
            resolution=self.factor_resolution,
            order=self.factor_order,
            progress=progress,
        )
        return LossDistribution(
            losses=result.losses,
            probabilities=result.probabilities,
            default_probability=result.default_probability,
            engine=self.name,
            samples=None,
            seed=None,
            settings=result.settings,
            diagnostics=result.diagnostics,
        )


# ====================================================================== linked groups
def _linked_groups(model: LinkedFactorModel) -> list[_Group]:
    """Linked groups with their chain order of strongly connected parts."""
    if model.n_links == 0:
        return []
    labels = model.component_labels
    parts_of: dict[int, list[IntArray]] = {}
    for part in model.strong_components:
        parts_of.setdefault(int(labels[part[0]]), []).append(part)
    creditor = model.creditor.tolist()
    debtor = model.debtor.tolist()
    contagion = model.contagion.tolist()
    incoming: dict[int, list[tuple[int, float]]] = {}
    for c, d, q in zip(creditor, debtor, contagion, strict=True):
        incoming.setdefault(c, []).append((d, q))
    groups: list[_Group] = []
    for comp in model.components:
        if comp.size < 2:
            continue
        bit_of: dict[int, int] = {}
        parts: list[_Part] = []
        for part in parts_of[int(labels[comp[0]])]:
            pos_of = {int(i): j for j, i in enumerate(part.tolist())}
            external: list[tuple[int, int, float]] = []
            internal: list[tuple[int, int, float]] = []
            for i in part.tolist():
                for d, q in incoming.get(i, []):
                    if d in pos_of:
                        internal.append((pos_of[d], pos_of[i], q))
                    else:
                        external.append((bit_of[d], pos_of[i], q))
            parts.append(_Part(part.copy(), tuple(external), tuple(internal)))
            for i in part.tolist():
                bit_of[i] = len(bit_of)
        members = np.array(sorted(bit_of, key=bit_of.__getitem__), dtype=np.int64)
        groups.append(_Group(members, tuple(parts)))
    return groups


def _group_state_law(group: _Group, own: FloatArray) -> FloatArray:
    """Joint law of a group's final defaults, per node.

    Parameters
    ----------
    group : _Group
        The group, its parts in chain order.
    own : ndarray, shape (nodes, size)
        Own-default probabilities of the group's members (in
        ``group.members`` order) given each node.

    Returns
    -------
    ndarray, shape (nodes, 2**size)
        Bit ``j`` of the state index is member ``group.members[j]``.

    """
    nodes = own.shape[0]
    law = np.ones((nodes, 1))
    done = 0
    for part in group.parts:
        g = part.members.size
        states = np.arange(1 << done)
        survive = np.ones((states.size, g))
        for bit, pos, q in part.external:
            survive[:, pos] *= np.where((states >> bit) & 1, 1.0 - q, 1.0)
        own_part = own[:, done : done + g]
        seed = 1.0 - (1.0 - own_part)[:, None, :] * survive[None, :, :]
        if g == 1 and not part.internal:
            part_law = np.concatenate([1.0 - seed, seed], axis=2)
        else:
            part_law = group_law(seed, list(part.internal))
        law = (law[:, :, None] * part_law).transpose(0, 2, 1).reshape(nodes, -1)
        done += g
    return law


def _state_bits(size: int) -> NDArray[np.bool_]:
    """Boolean matrix (2**size, size): member j defaulted in state s."""
    states = np.arange(1 << size)
    return ((states[:, None] >> np.arange(size)[None, :]) & 1).astype(bool)


# ====================================================================== loss representation
@dataclass
class _LossPlan:
    mode: str  # "exact-grid", "grid" or "atoms"
    unit: float  # grid unit before any rescaling (0 for atoms)
    k: IntArray  # grid loss of every obligor (atoms: unused)
    top: int  # largest grid point
    atoms: AtomConvolution | None = None


def _common_unit(values: FloatArray, max_points: int) -> float | None:
    """Largest unit of which every value is an integer multiple (within 1e-9), if any."""
    values = values[values > 0]
    if values.size == 0:
        return 1.0
    total = float(values.sum())
    candidates: list[float] = []
    vmin = float(values.min())
    for d in range(1, 65):
        candidates.append(vmin / d)
    for decimals in range(0, 7):
        scaled = values * 10.0**decimals
        if scaled.max() > 2**52:
            break
        rounded = np.round(scaled)
        if np.all(np.abs(scaled - rounded) <= _UNIT_TOLERANCE * np.maximum(scaled, 1.0)):
            g = int(np.gcd.reduce(rounded.astype(np.int64)))
            if g > 0:
                candidates.append(g / 10.0**decimals)
            break
    best: float | None = None
    for u in candidates:
        if u <= 0 or total / u > max_points:
            continue
        ratio = values / u
        if np.all(np.abs(ratio - np.round(ratio)) <= _UNIT_TOLERANCE * np.maximum(ratio, 1.0)):
            if best is None or u > best:
                best = u
    return best


def _choose_losses(
    loss: FloatArray,
    pd: FloatArray,
    correlation: FloatArray,
    single: IntArray,
    groups: Sequence[_Group],
    grid_points: int,
    support_limit: int,
) -> _LossPlan:
    """Pick exact grid, exact atoms or rounded grid for the book's losses."""
    unit = _common_unit(loss, grid_points)
    if unit is not None:
        k = np.round(loss / unit).astype(np.int64)
        return _LossPlan("exact-grid", unit, k, int(k.sum()))
    # exact loss values while the support stays small
    atoms = AtomConvolution(scale=float(loss.sum()))
    feasible = int(np.count_nonzero(loss > 0)) <= _ATOMS_MAX_OBLIGORS
    for i in single.tolist() if feasible else ():
        if loss[i] > 0:
            atoms.add(np.array([0.0, loss[i]]))
            if atoms.size > support_limit:
                feasible = False
                break
    if feasible:
        for g in groups:
            atoms.add(_state_bits(g.members.size) @ loss[g.members])
            if atoms.size > support_limit:
                feasible = False
                break
    if feasible:
        return _LossPlan("atoms", 0.0, np.zeros(loss.size, dtype=np.int64), 0, atoms)
    # about 1024 grid points per loss-bearing obligor, at most grid_points
    points = min(grid_points, max(8192, 1024 * int(np.count_nonzero(loss > 0))))
    unit = float(loss.sum()) / points
    k = _diffused_round(loss / unit, pd, correlation)
    return _LossPlan("grid", unit, k, int(k.sum()))


def _diffused_round(x: FloatArray, pd: FloatArray, correlation: FloatArray) -> IntArray:
    """Round ``x`` to integers, each up or down, keeping running sums balanced.

    Obligors are ordered by asset correlation band and PD, along which the
    conditional default probability moves nearly monotonically; each is
    rounded so that the cumulative sum of rounded values is
    the rounded cumulative sum of ``x``.  Every value moves by less than 1,
    and the conditional mean shift ``sum_i p_i(z) (k_i - x_i)`` is at most
    half the total variation of ``p_i(z)`` along the order, for every ``z``:
    the rounding errors of similar obligors cancel instead of adding up.
    """
    band = np.round(correlation * 50.0).astype(np.int64)  # correlation bands of 0.02
    # within a band PD ascending, then descending in the next band (a snake order)
    direction = np.where(band % 2 == 0, 1.0, -1.0)
    order = np.lexsort((direction * np.log(pd), band))
    cumulative = np.round(np.cumsum(x[order]))
    k = np.empty(x.size, dtype=np.int64)
    k[order] = np.diff(np.concatenate(([0.0], cumulative))).astype(np.int64)
    return k


# ====================================================================== atoms mode
def _run_atoms(
    model: LinkedFactorModel,
    grid: FactorGrid,
    single: IntArray,
    groups: Sequence[_Group],
    plan: _LossPlan,
    batch: int,
    progress: ProgressHook | None,
) -> tuple[FloatArray, FloatArray, FloatArray, dict[str, Any], float]:
    """Exact support: per-node laws of every item, convolved on the shared support."""
    assert plan.atoms is not None
    loss = model.loss_given_default
    lossy_single = single[loss[single] > 0]
    support_size = plan.atoms.size
    total = np.zeros(support_size)
    default_probability = np.zeros(model.n_obligors)
    nodes, weights = grid.nodes, grid.weights
    step = max(1, min(batch, (1 << 22) // max(support_size, 1)))
    # groups above 14 members: one call for all nodes (their cut matrices are built per call)
    big = {
        gi: _group_state_law(g, model.conditional_pd(nodes)[:, g.members])
        for gi, g in enumerate(groups)
        if g.members.size > 14
    }
    for start in range(0, len(grid), step):
        z = nodes[start : start + step]
        w = weights[start : start + step]
        own = model.conditional_pd(z)
        default_probability[single] += w @ own[:, single]
        item_laws: list[FloatArray] = [
            np.stack([1.0 - own[:, i], own[:, i]], axis=1) for i in lossy_single.tolist()
        ]
        for gi, g in enumerate(groups):
            if gi in big:
                law = big[gi][start : start + step]
            else:
                law = _group_state_law(g, own[:, g.members])
            item_laws.append(law)
            default_probability[g.members] += w @ (law @ _state_bits(g.members.size))
        probs = plan.atoms.apply(item_laws) if item_laws else np.ones((z.size, 1))
        total += w @ probs
        if progress is not None:
            progress(min(start + step, len(grid)), len(grid))
    order = np.argsort(plan.atoms.support, kind="stable")
    losses = plan.atoms.support[order]
    probs = np.clip(total[order], 0.0, None)
    probs = probs / probs.sum()
    keep = probs > 0
    diagnostics: dict[str, Any] = {
        "discretisation_error": 0.0,
        "discretisation_error_relative": 0.0,
        "conditional_mean_shift": 0.0,
        "loss_rounding_bound": 0.0,
        "grid_exact": True,
        "factor_truncation_mass": float(2.0 * ndtr(-FACTOR_LIMIT))
        if grid.method.startswith("adaptive")
        else 0.0,
    }
    return losses[keep], probs[keep], default_probability, diagnostics, 0.0


# ====================================================================== grid mode
def _run_grid(
    model: LinkedFactorModel,
    grid: FactorGrid,
    single: IntArray,
    groups: Sequence[_Group],
    plan: _LossPlan,
    batch: int,
    progress: ProgressHook | None,
    sink: list[tuple[int, FloatArray] | None] | None = None,
) -> tuple[FloatArray, FloatArray, FloatArray, dict[str, Any], float]:
    """Loss grid: per-node law on a window by the log-PGF series, mixed over nodes."""
    loss = model.loss_given_default
    k_all = plan.k
    top = plan.top
    # (PD, R) classes share a conditional PD; loss classes add the grid loss
    pr_keys = np.stack([model.pd, model.asset_correlation], axis=1)
    pr_unique, pr_of, _ = _unique_rows(pr_keys)
    lossy_single = single[k_all[single] > 0]
    loss_keys = np.stack([pr_of[lossy_single], k_all[lossy_single]], axis=1)
    cls, cls_of, cls_count = _unique_rows(loss_keys)
    cls_pr = cls[:, 0]
    cls_k = cls[:, 1].astype(np.int64)
    cls_count = cls_count.astype(float)
    kernel = SeriesKernel(cls_k, np.asarray(cls_count, dtype=np.float64))
    # all-different books: one class per (PD, R) pair, in pair order, no gather needed
    identity = cls_pr.size == pr_unique.shape[0] and bool(
        np.array_equal(cls_pr, np.arange(cls_pr.size))
    )
    # expected-loss bookkeeping uses the true losses of every single obligor
    pr_loss = np.bincount(pr_of[single], weights=loss[single], minlength=pr_unique.shape[0])
    nodes, weights = grid.nodes, grid.weights
    default_probability = np.zeros(model.n_obligors)
    glaws = _all_group_laws(groups, model, pr_unique, pr_of, k_all, grid, default_probability)
    mixture = np.zeros(top + 1)
    pr_probability = np.zeros(pr_unique.shape[0])
    n_nodes = len(grid)
    exp_k = np.zeros(n_nodes)  # E[K | z] in grid units
    exp_l = np.zeros(n_nodes)  # E[L | z] in currency
    truncation = 0.0
    widest = 0
    pr_law = _ConditionalPD(pr_unique[:, 0], pr_unique[:, 1])
    # keep the (nodes x classes) probability block near 2^21 numbers (16 MB)
    batch = max(1, min(batch, (1 << 21) // max(pr_unique.shape[0], 1)))
    for start in range(0, n_nodes, batch):
        z = nodes[start : start + batch]
        w = weights[start : start + batch]
        p_pr = pr_law(z)
        pr_probability += w @ p_pr
        if groups:
            dense = []
            for pos, merged in zip(glaws.positions, glaws.merged, strict=True):
                block = np.zeros((z.size, int(pos[-1] - pos[0]) + 1))
                block[:, pos - pos[0]] = merged[start : start + batch]
                dense.append((int(pos[0]), block))
            group_offset, group_law_batch = product_law(dense)
        for j in range(z.size):
            state = kernel.node(p_pr[j] if identity else p_pr[j, cls_pr])
            mean, var, bound = state.mean, state.var, state.bound
            lowest, highest = state.lowest, state.highest
            el = float(p_pr[j] @ pr_loss)
            if groups:
                at = start + j
                mean += float(glaws.mean[at])
                var += float(glaws.var[at])
                lowest += int(glaws.low[at])
                highest += int(glaws.high[at])
                bound = max(bound, glaws.bound)
                el += float(glaws.expected_loss[at])
            exp_k[start + j] = mean
            exp_l[start + j] = el
            half = bernstein_halfwidth(var, bound)
            window = place_window(mean, half, lowest, highest, top)
            widest = max(widest, window.width)
            extra = (group_offset, group_law_batch[j]) if groups else None
            # a node of weight w may carry error tol / (N w): the mixture's stays <= tol
            node_tol = min(
                max(kernel.tolerance / (n_nodes * max(w[j], 1e-300)), kernel.tolerance), _LOOSEST
            )
            law, trunc = kernel.law(state, window, extra, node_tol)
            truncation += w[j] * trunc
            # FFT round-off: nothing outside the possible range, nothing below the noise floor
            law[: max(lowest - window.start, 0)] = 0.0
            law[max(highest + 1 - window.start, 0) :] = 0.0
            law[law < _NOISE_FLOOR * law.max()] = 0.0
            mixture[window.start : window.start + window.width] += w[j] * law
            if sink is not None:
                sink.append((window.start, law))
        if progress is not None:
            progress(min(start + batch, n_nodes), n_nodes)
    default_probability[single] = pr_probability[pr_of[single]]
    np.clip(mixture, 0.0, None, out=mixture)
    mixture /= mixture.sum()
    idx = np.flatnonzero(mixture > 0)
    probs = mixture[idx]
    target = float(np.sum(default_probability * loss))
    if plan.mode == "exact-grid":
        unit = plan.unit
    else:
        grid_mean = float(np.sum(idx * probs))
        unit = target / grid_mean if grid_mean > 0 else plan.unit
    losses = unit * idx.astype(float)
    diagnostics = _grid_diagnostics(
        model, plan, unit, exp_k, exp_l, nodes, truncation, widest, grid
    )
    return losses, probs, default_probability, diagnostics, unit


def _unique_rows(rows: NDArray[Any]) -> tuple[NDArray[Any], IntArray, IntArray]:
    """``np.unique(rows, axis=0, return_inverse=True, return_counts=True)`` for two columns.

    The same rows in the same (lexicographic) order, by one ``lexsort`` of
    the columns instead of a sort of structured records (ten times faster for
    a million rows).
    """
    order = np.lexsort((rows[:, 1], rows[:, 0]))
    ordered = rows[order]
    start = np.empty(order.size, dtype=bool)
    start[:1] = True
    np.any(ordered[1:] != ordered[:-1], axis=1, out=start[1:])
    first = np.flatnonzero(start)
    inverse = np.empty(order.size, dtype=np.int64)
    inverse[order] = np.cumsum(start) - 1
    counts = np.diff(np.append(first, order.size)).astype(np.int64)
    return ordered[first], inverse, counts


class _ConditionalPD:
    """``conditional_default_probability`` with its per-class constants computed once.

    A million-obligor book evaluates the conditional PDs a few nodes at a
    time; recomputing ``Phi^-1(PD)`` on every call would cost as much as the
    call itself.  Same formula, same special cases (PD 1 gives 1), computed
    in place (one array of the batch's size, no temporaries).
    """

    def __init__(self, pd: FloatArray, correlation: FloatArray) -> None:
        with np.errstate(over="ignore", invalid="ignore"):
            self._threshold = ndtri(np.clip(pd, 0.0, 1.0))
        self._sr = np.sqrt(correlation)
        self._s1r = np.sqrt(1.0 - correlation)
        self._sure = np.flatnonzero(pd >= 1.0)
        self._never = np.flatnonzero(pd <= 0.0)

    def __call__(self, z: FloatArray) -> FloatArray:
        p: FloatArray = np.multiply(self._sr[None, :], -np.asarray(z, dtype=float)[:, None])
        p += self._threshold[None, :]
        p /= self._s1r[None, :]
        ndtr(p, out=p)
        p[:, self._sure] = 1.0
        p[:, self._never] = 0.0
        return p


@dataclass
class _GroupLaws:
    """Loss laws of the linked groups at every factor node (grid units)."""

    positions: list[IntArray]  # distinct grid losses of each group
    merged: list[FloatArray]  # (nodes, len(positions)) probabilities
    mean: FloatArray  # summed over groups, per node
    var: FloatArray
    low: IntArray
    high: IntArray
    expected_loss: FloatArray  # in currency
    bound: float  # widest loss range of one group


def _all_group_laws(
    groups: Sequence[_Group],
    model: LinkedFactorModel,
    pr_unique: FloatArray,
    pr_of: IntArray,
    k_all: IntArray,
    grid: FactorGrid,
    default_probability: FloatArray,
) -> _GroupLaws:
    """Enumerate every linked group at every node; add its members' final PDs."""
    n_nodes = len(grid)
    out = _GroupLaws(
        positions=[],
        merged=[],
        mean=np.zeros(n_nodes),
        var=np.zeros(n_nodes),
        low=np.zeros(n_nodes, dtype=np.int64),
        high=np.zeros(n_nodes, dtype=np.int64),
        expected_loss=np.zeros(n_nodes),
        bound=0.0,
    )
    loss = model.loss_given_default
    for g in groups:
        size = g.members.size
        bits = _state_bits(size)
        pos = bits.astype(np.int64) @ k_all[g.members]
        uniq, inverse = np.unique(pos, return_inverse=True)
        order = np.argsort(inverse, kind="stable")
        starts = np.flatnonzero(np.r_[True, np.diff(inverse[order]) != 0])
        merged = np.zeros((n_nodes, uniq.size))
        # big groups take many nodes per call: their cut matrices are built once per call
        chunk = max(1, (1 << 22) >> size) if size <= 14 else max(1, (1 << 24) >> size)
        for a in range(0, n_nodes, chunk):
            z = grid.nodes[a : a + chunk]
            own = conditional_default_probability(
                pr_unique[pr_of[g.members], 0], pr_unique[pr_of[g.members], 1], z
            )
            law = _group_state_law(g, own)
            marg = np.einsum("js,sm->jm", law, bits.astype(float))
            w = grid.weights[a : a + chunk]
            default_probability[g.members] += np.einsum("j,jm->m", w, marg)
            out.expected_loss[a : a + chunk] += np.einsum("jm,m->j", marg, loss[g.members])
            merged[a : a + chunk] = np.add.reduceat(law[:, order], starts, axis=1)
        fpos = uniq.astype(float)
        gm = np.einsum("ja,a->j", merged, fpos)
        out.mean += gm
        out.var += np.einsum("ja,a->j", merged, fpos * fpos) - gm * gm
        live = merged > 0
        out.low += uniq[np.argmax(live, axis=1)]
        out.high += uniq[uniq.size - 1 - np.argmax(live[:, ::-1], axis=1)]
        out.bound = max(out.bound, float(uniq[-1] - uniq[0]))
        out.positions.append(uniq.astype(np.int64))
        out.merged.append(merged)
    return out


def _grid_diagnostics(
    model: LinkedFactorModel,
    plan: _LossPlan,
    unit: float,
    exp_k: FloatArray,
    exp_l: FloatArray,
    nodes: FloatArray,
    truncation: float,
    widest: int,
    grid: FactorGrid,
) -> dict[str, Any]:
    """How far the grid law can be from the law of the true losses.

    Every loss moves by less than one grid unit.  Given the factor, the
    conditional mean moves by ``|u E[K|z] - E[L|z]|``; for a large book VaR
    and ES move with it, and a quantile of the grid law is a grid point, so
    ``discretisation_error`` is one unit plus the largest mean shift over
    the tail nodes (``Phi(z)`` in ``[1e-6, 0.05]``): an estimate of the
    error of VaR and ES in currency, 0 when the grid is exact.
    """
    loss = model.loss_given_default
    lossy = loss > 0
    shift = unit * plan.k[lossy] - loss[lossy]
    exact = plan.mode == "exact-grid"
    phi = ndtr(nodes)
    tail = (phi <= 0.05) & (phi >= _SHARP_REGION_TAIL) & (exp_l > 0)
    if not tail.any():
        tail = exp_l > 0
    moved = np.abs(unit * exp_k[tail] - exp_l[tail])
    if exact or moved.size == 0:
        error = relative = mean_shift = 0.0
    else:
        error = float(unit + moved.max())
        relative = float(np.max((unit + moved) / exp_l[tail]))
        mean_shift = float(np.max(moved / exp_l[tail]))
    return {
        "discretisation_error": error,
        "discretisation_error_relative": relative,
        "conditional_mean_shift": mean_shift,
        "grid_exact": exact,
        "grid_unit_rescale": 0.0 if exact else unit / plan.unit - 1.0,
        "max_loss_rounding": float(np.max(np.abs(shift))) if lossy.any() else 0.0,
        "loss_rounding_bound": 0.0 if exact else unit,
        "window_tail_bound": 2.0 * WINDOW_TAIL,
        "widest_window": int(widest),
        "series_truncation": float(truncation),
        "series_tolerance": SERIES_TOLERANCE,
        "factor_truncation_mass": float(2.0 * ndtr(-FACTOR_LIMIT))
        if grid.method.startswith("adaptive")
        else 0.0,
    }
