r"""Exact loss law with sector factors (loadings form) and Student-t dependence.

Model (``shared/DESIGN.md``, "Sector factors", "Dependence family")::

    Y_s = a_s G + sqrt(1 - a_s^2) eta_s,   A_i = sqrt(nu / W) (sqrt(R_i) Y_s(i) + sqrt(1 - R_i) e_i)

with ``sqrt(nu / W) = 1`` for the Gaussian family.  Conditional on the
global factor ``G = g`` (and ``W = w``) the sector factors are independent,
so sectors that no link group joins are independent too.  Sectors joined by
a link group form a *block*; blocks are conditionally independent.  The
engine therefore computes, for every outer node ``(w, g)``:

1. for each block, its conditional loss law given each *inner* node (values
   of the block's sector factors), exactly as the one-factor engine does
   given ``z`` (independent obligors by the log-PGF on a loss grid, link
   groups enumerated), then mixes the inner laws with the inner weights of
   ``(w, g)``: ``P_b(. | w, g) = sum_k W_b[g, k] P_b(. | w, y_k)``;
2. the product (convolution) of the block laws;

and mixes the outer laws with the outer weights.

Inner rules.  A sector with loading 1 has ``Y_s = G``: one inner node per
outer node, weight 1 (every loading 1 reproduces the one-factor model to
rounding).  A sector block of one sector uses by default one *shared*
composite Gauss–Legendre grid of sector-factor values ``y_k`` (dense where
the sector's conditional mean moves fast against its conditional spread, the
big-book rule of the one-factor engine, and with at least one 8-node panel
per three ``sqrt(1 - a^2)`` inside ``|y| <= 5.5`` (a third of that outside),
so the conditional density ``N(a g, 1 - a^2)`` of the sector factor is
integrated accurately: against a 40-node Gauss–Hermite tensor rule the laws
agree to rounding, see the tests), weighted for outer node ``g`` by
``lambda_k phi((y_k - a g) / sqrt(1 - a^2))``, normalised.  The sector laws
are then computed once per ``y_k`` instead of once per ``(g, eta)`` pair.
With ``sector_grid`` given, or for blocks of several sectors, the rule is the
*tensor* rule: inner nodes ``y = a g + sqrt(1 - a^2) x`` for the nodes ``x``
of ``sector_grid`` (Gauss–Hermite by default), per outer node; on the same
nodes it is exactly the brute-force tensor sum over (global, sector) nodes.

Computation (loss grid).  A shared-grid sector without link groups (the
common case of a big book) takes the path of
:mod:`debtsim.engines.exact.sector_mixing`: its loss classes and one
:class:`~debtsim.engines.exact.loss_grid.SeriesKernel` are built once per
run, its law at each ``y_k`` is computed once (per mixing node ``w``) on
the node's own narrow window, and for each global node the sector laws are
mixed with that node's weights and convolved on one Chernoff window.  The
other blocks (link groups, loadings 1, the tensor rule) keep their laws per
global node and join the same per-node convolution.  Both give the same
law to rounding (tests compare them); ``diagnostics`` report the dropped
mixing-weight mass (``sector_weight_cut_mass``) and, as a check of the
sector rule, its error on every class's default probability given the
global factor against the closed form ``Phi((c s - sqrt(R) a g) / sqrt(1 -
R a^2))``, averaged over the global nodes (``sector_rule_pd_error``).

Student-t.  The mixing variable ``W ~ chi^2_nu`` is one more integral,
outermost: a composite Gauss–Legendre rule in ``log W`` (or the nodes given).
Given ``W = w`` the threshold ``t_nu^-1(PD)`` is scaled by ``sqrt(w / nu)``.
Everything but the sector laws at the ``y_k`` (and the per-node
convolutions) is shared by all ``w``: classes, kernels, grids and weights.

References
----------
L. Andersen, J. Sidenius and S. Basu, "All your hedges in one basket", Risk
(2003).  P. Schloegl and D. O'Kane, "A note on the large homogeneous
portfolio approximation with the Student-t copula", Finance and Stochastics
9 (2005).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.polynomial.legendre import leggauss
from numpy.typing import NDArray
from scipy import sparse
from scipy.special import ndtr
from scipy.stats import chi2

from debtsim._typing import FloatArray, IntArray
from debtsim.engines.base import ProgressHook
from debtsim.engines.exact.loss_grid import (
    SERIES_TOLERANCE,
    WINDOW_TAIL,
    AtomConvolution,
    SeriesKernel,
    bernstein_halfwidth,
    grid_law,
    place_window,
    product_law,
)
from debtsim.engines.exact.sector_mixing import (
    WEIGHT_CUT,
    SectorNodeLaws,
    add_global_laws,
    log_mgf_bounds,
    mixture_log_mgf,
    theta_ladder,
)
from debtsim.model.dependence import FactorStructure, default_threshold, sector_conditional_pd
from debtsim.model.factor_grid import FactorGrid, adaptive_grid, gauss_hermite
from debtsim.model.specification import LinkedFactorModel

__all__ = [
    "DEFAULT_SECTOR_NODES",
    "MAX_BLOCK_INNER_NODES",
    "SectorLaw",
    "chi_square_grid",
    "sector_law",
    "sector_refusal",
]


#: Gauss–Hermite nodes per sector factor in the tensor rule (blocks of several sectors).
DEFAULT_SECTOR_NODES = 16
#: Largest number of inner nodes (outer nodes times sector-factor tuples) of one block.
MAX_BLOCK_INNER_NODES = 400_000
#: Largest (sector-node tuples x mixing nodes) of a block of linked sectors.
MAX_TENSOR_TUPLES = 30_000
#: Nodes of the default Student-t mixing rule (``chi_square_grid`` defaults).
DEFAULT_MIXING_NODES = 96
#: Factor range of the default grids; the normal mass outside is ~2e-17.
FACTOR_LIMIT = 8.5
_SHARP_REGION_TAIL = 1e-6
_NOISE_FLOOR = 1e-15
#: Width of one panel of the shared sector grid, in conditional sd ``sqrt(1 - a^2)``.
_KERNEL_PANEL_SD = 3.0
#: Inside ``|y| <= _KERNEL_CORE`` the shared grid keeps the full kernel density.
_KERNEL_CORE = 5.5
#: Floor of the shared sector grid, nodes per unit of ``y`` (times the steepest loading).
_SECTOR_BASE = 4.0
#: Blocks with (lossy obligors x grid points) up to this use the direct recursion.
_DIRECT_LIMIT = 1 << 16
#: Sector blocks without link groups on a shared grid take the mixing path of
#: :mod:`debtsim.engines.exact.sector_mixing` (tests switch it off to compare).
_FAST_SECTORS = True
#: Below this ``sqrt(1 - a^2)`` a sector is read as identical to the global factor.
_SIGMA_ZERO = 1e-12


# ====================================================================== grids
def chi_square_grid(nu: float, *, panels: int = 12, order: int = 8) -> FactorGrid:
    """Quadrature for ``W ~ chi^2_nu``: composite Gauss–Legendre in ``log W``.

    Panel edges sit at the quantiles of ``W`` for equally spaced normal
    scores in ``[-8.2, 8.2]`` (so panels are narrow where ``W`` has its mass
    and the mass beyond the ends is about ``1e-16``); each panel carries an
    ``order``-point Gauss–Legendre rule in ``log W``, weighted by the density
    of ``log W`` and normalised to sum to 1.  With the defaults a smooth
    integrand such as ``Phi(c sqrt(W / nu))`` is integrated to about
    ``1e-11`` relative error.

    Parameters
    ----------
    nu : float
        Degrees of freedom, > 0.
    panels, order : int
        Number of panels and Gauss–Legendre nodes per panel.

    Returns
    -------
    FactorGrid
        ``nodes`` are values of ``W`` (ascending), ``weights`` sum to 1.
    """
    edges = np.log(chi2.ppf(ndtr(np.linspace(-8.2, 8.2, panels + 1)), nu))
    x, w = leggauss(order)
    half = 0.5 * np.diff(edges)
    mid = 0.5 * (edges[1:] + edges[:-1])
    t = (mid[:, None] + half[:, None] * x[None, :]).ravel()
    log_density = chi2.logpdf(np.exp(t), nu) + t  # density of log W
    weights = (half[:, None] * w[None, :]).ravel() * np.exp(log_density - log_density.max())
    weights = weights / weights.sum()
    return FactorGrid(
        nodes=np.exp(t), weights=weights, method=f"chi2-quantile-gauss-legendre-{panels}x{order}"
    )


def _class_sums(
    keys: FloatArray, loss: FloatArray, bins: tuple[float, ...]
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Return unique rows of ``keys`` with summed loss and squared loss.

    With more than 1024 distinct rows, column ``c`` is first rounded to
    multiples of ``1 / bins[c]`` (only node placement uses these classes).
    """
    uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
    if uniq.shape[0] > 1024:
        scale = np.asarray(bins, dtype=float)
        uniq, inverse = np.unique(np.round(keys * scale) / scale, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    return (
        np.asarray(uniq, dtype=float),
        np.asarray(np.bincount(inverse, weights=loss, minlength=uniq.shape[0]), dtype=float),
        np.asarray(np.bincount(inverse, weights=loss**2, minlength=uniq.shape[0]), dtype=float),
    )


def _sharp_density(
    z: FloatArray, base: float, resolution: float, mean_slope: FloatArray, variance: FloatArray
) -> FloatArray:
    """Node density ``base + resolution |d mean| / sd`` inside the sharp region."""
    with np.errstate(divide="ignore", invalid="ignore"):
        sharp = np.where(variance > 0, resolution * np.abs(mean_slope) / np.sqrt(variance), 0.0)
    inside = (ndtr(z) >= _SHARP_REGION_TAIL) & (ndtr(-z) >= _SHARP_REGION_TAIL)
    return np.asarray(base + np.where(inside, sharp, 0.0), dtype=float)


def _representative_scales(structure: FactorStructure) -> FloatArray:
    """``sqrt(w / nu)`` at a few quantiles of ``W`` (1 for the Gaussian family)."""
    if structure.degrees_of_freedom is None:
        return np.ones(1)
    nu = structure.degrees_of_freedom
    return np.sqrt(chi2.ppf([1e-3, 0.5, 0.999], nu) / nu)


def default_global_grid(
    model: LinkedFactorModel, resolution: float = 1.5, order: int = 8
) -> FactorGrid:
    """Tail-dense grid for the global factor ``G`` of a sector model.

    Density ``base + resolution |d E[L|g] / dg| / sd(L|g)``, with ``E[L|g]``
    from the conditional PDs given ``g`` alone (the sector factors integrated
    out: ``Phi((c - sqrt(R) a g) / sqrt(1 - R a^2))``) and ``var(L|g)`` the
    idiosyncratic variance plus ``(1 - a^2) (d E[L_s|y] / dy)^2`` per sector.
    """
    structure = model.dependence
    assert structure is not None
    loss = np.asarray(model.loss_given_default, dtype=float)
    lossy = (loss > 0) & (model.pd < 1.0)
    a_all = _loadings(structure)
    a = a_all[structure.sector_of]
    r = np.asarray(model.asset_correlation, dtype=float)
    loading = np.sqrt(r * a * a / np.maximum(1.0 - r * a * a, 1e-300))
    base = 4.0 * max(1.0, float(loading.max()) if loading.size else 1.0)
    if not lossy.any():
        return adaptive_grid(
            lambda z: np.full(z.shape, base), lower=-FACTOR_LIMIT, upper=FACTOR_LIMIT, order=order
        )
    scales = _representative_scales(structure)
    keys = np.stack(
        [structure.sector_of[lossy].astype(float), np.log(model.pd[lossy]), r[lossy]], axis=1
    )
    uniq, sum_l, sum_l2 = _class_sums(keys, loss[lossy], (1.0, 8.0, 64.0))
    sec = uniq[:, 0].astype(np.int64)
    pd_c = np.exp(uniq[:, 1])
    r_c = uniq[:, 2]
    thr_c = default_threshold(pd_c, structure.degrees_of_freedom)
    a_c = a_all[sec]
    n_sec = int(a_all.size)

    def parts(z: FloatArray, s: float) -> tuple[FloatArray, FloatArray]:
        denom = np.sqrt(1.0 - r_c * a_c * a_c)
        x = (thr_c[None, :] * s - np.sqrt(r_c)[None, :] * a_c[None, :] * z[:, None]) / denom
        p = ndtr(x)
        phi = np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)
        slope = phi * (np.sqrt(r_c) * a_c / denom)[None, :]
        var = (p * ndtr(-x)) @ sum_l2
        # spread of each sector's conditional mean over its own factor
        xy = (thr_c[None, :] * s - np.sqrt(r_c)[None, :] * a_c[None, :] * z[:, None]) / np.sqrt(
            1.0 - r_c
        )
        dy = np.exp(-0.5 * xy * xy) / math.sqrt(2.0 * math.pi) * (np.sqrt(r_c / (1.0 - r_c)))
        per_sector = np.zeros((z.size, n_sec))
        np.add.at(per_sector.T, sec, (dy * sum_l[None, :]).T)
        var = var + (per_sector**2) @ (1.0 - a_all * a_all)
        return slope @ sum_l, var

    def density(z: FloatArray) -> FloatArray:
        out = np.zeros(z.shape)
        for s in scales:
            dmean, var = parts(z, float(s))
            out = np.maximum(out, _sharp_density(z, base, resolution, dmean, var))
        return out

    return adaptive_grid(density, lower=-FACTOR_LIMIT, upper=FACTOR_LIMIT, order=order)


def default_sector_grid(
    model: LinkedFactorModel,
    members: IntArray,
    loading: float,
    resolution: float = 1.5,
    order: int = 8,
) -> FactorGrid:
    """Shared grid of sector-factor values ``y`` for one sector's obligors.

    Density ``resolution |d E[L_s|y] / dy| / sd(L_s|y)`` (the big-book rule
    on the sector's own conditional law) on top of the larger of ``base``
    (as in the one-factor grid) and ``order / (3 sqrt(1 - a^2))``: one
    ``order``-node panel per three conditional standard deviations of the
    sector factor given ``G`` (a third of that beyond ``|y| = 5.5``).
    """
    structure = model.dependence
    assert structure is not None
    loss = np.asarray(model.loss_given_default, dtype=float)[members]
    pd = model.pd[members]
    r = np.asarray(model.asset_correlation, dtype=float)[members]
    lossy = (loss > 0) & (pd < 1.0)
    sigma = math.sqrt(max(1.0 - loading * loading, 0.0))
    floor = order / (_KERNEL_PANEL_SD * max(sigma, 1e-3))
    loading_max = float(np.sqrt(r / (1.0 - r)).max()) if r.size else 0.0
    base = _SECTOR_BASE * max(1.0, loading_max)

    def kernel_floor(y: FloatArray) -> FloatArray:
        return np.where(np.abs(y) <= _KERNEL_CORE, floor, floor / 3.0)

    if not lossy.any():
        return adaptive_grid(
            lambda z: np.full(z.shape, base),
            lower=-FACTOR_LIMIT,
            upper=FACTOR_LIMIT,
            order=order,
            max_nodes=200_000,
        )
    keys = np.stack([np.log(pd[lossy]), r[lossy]], axis=1)
    uniq, sum_l, sum_l2 = _class_sums(keys, loss[lossy], (8.0, 64.0))
    thr = default_threshold(np.exp(uniq[:, 0]), structure.degrees_of_freedom)
    r_c = uniq[:, 1]
    scales = _representative_scales(structure)

    def density(y: FloatArray) -> FloatArray:
        out = np.zeros(y.shape)
        for s in scales:
            x = (thr[None, :] * s - np.sqrt(r_c)[None, :] * y[:, None]) / np.sqrt(1.0 - r_c)
            p = ndtr(x)
            slope = np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi) * np.sqrt(r_c / (1.0 - r_c))
            dmean = slope @ sum_l
            var = (p * ndtr(-x)) @ sum_l2
            out = np.maximum(out, _sharp_density(y, base, resolution, dmean, var))
        # the sharp term on top of the larger of the two floors
        return out - base + np.maximum(base, kernel_floor(y))

    return adaptive_grid(
        density, lower=-FACTOR_LIMIT, upper=FACTOR_LIMIT, order=order, max_nodes=200_000
    )


def _loadings(structure: FactorStructure) -> FloatArray:
    """Return the loading of each sector (a single loading 1 for the one-factor form)."""
    if structure.loading is not None:
        return np.asarray(structure.loading, dtype=float)
    return np.ones(1)


# ====================================================================== blocks
@dataclass
class _Block:
    """Sectors joined by link groups, with their obligors."""

    sectors: tuple[int, ...]
    members: IntArray  # obligor indices, ascending
    single: IntArray  # members outside link groups
    groups: list[Any]  # exact-engine _Group records


def _blocks(model: LinkedFactorModel, groups: Sequence[Any]) -> list[_Block]:
    """Union the sectors touched by each link group; one block per union."""
    structure = model.dependence
    assert structure is not None
    n_sec = _loadings(structure).size
    sector_of = (
        structure.sector_of
        if structure.sector_names
        else np.zeros(model.n_obligors, dtype=np.int64)
    )
    parent = list(range(n_sec))

    def find(x: int) -> int:
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for g in groups:
        secs = np.unique(sector_of[g.members]).tolist()
        for s in secs[1:]:
            parent[find(int(s))] = find(int(secs[0]))
    roots: dict[int, list[int]] = {}
    for s in range(n_sec):
        roots.setdefault(find(s), []).append(s)
    in_group = np.zeros(model.n_obligors, dtype=bool)
    for g in groups:
        in_group[g.members] = True
    blocks = []
    for secs in roots.values():
        members = np.flatnonzero(np.isin(sector_of, secs))
        if members.size == 0:
            continue
        mine = [g for g in groups if int(sector_of[g.members[0]]) in secs]
        blocks.append(_Block(tuple(secs), members, members[~in_group[members]], mine))
    return blocks


def sector_refusal(model: LinkedFactorModel, groups: Sequence[Any]) -> str | None:
    """Why the exact engine cannot run this dependence structure, or None.

    Refused: the matrix form (no error-controlled semi-analytic method here),
    and link groups joining so many sectors that the tensor rule over their
    factors (``DEFAULT_SECTOR_NODES ** sectors`` per global node, times the
    Student-t mixing nodes) exceeds :data:`MAX_TENSOR_TUPLES`.
    """
    structure = model.dependence
    if structure is None:
        return None
    if structure.form == "matrix":
        return (
            "the exact engine computes sector factors given as loadings (model.sectors) only; "
            "a general sector correlation matrix (model.sector_correlation) needs "
            "--engine sample"
        )
    loadings = _loadings(structure)
    mixing = DEFAULT_MIXING_NODES if structure.student_t else 1
    for block in _blocks(model, groups):
        moving = sum(1 for s in block.sectors if 1.0 - loadings[s] ** 2 > _SIGMA_ZERO**2)
        if moving < 2:
            continue
        tuples = DEFAULT_SECTOR_NODES**moving * mixing
        if tuples > MAX_TENSOR_TUPLES:
            names = ", ".join(structure.sector_names[s] for s in block.sectors[:4])
            return (
                f"link groups join {len(block.sectors)} sectors ({names}); the exact engine "
                f"would condition on their factors jointly on {tuples:,} node tuples per "
                f"global node, more than its limit of {MAX_TENSOR_TUPLES:,}; use --engine sample"
            )
    return None


# ====================================================================== inner rules
@dataclass
class _InnerRule:
    """Inner nodes of one block for one value of the mixing scale.

    ``y`` holds the sector-factor values (inner nodes x block sectors);
    ``weights`` maps outer (global) nodes to inner nodes, rows summing to 1.
    """

    y: FloatArray
    weights: sparse.csr_matrix | FloatArray
    kind: str


def _inner_rule(
    block: _Block,
    loadings: FloatArray,
    global_nodes: FloatArray,
    sector_grid: FactorGrid | None,
    shared: dict[int, FactorGrid],
) -> _InnerRule:
    n_g = global_nodes.size
    a = loadings[list(block.sectors)]
    sigma = np.sqrt(np.clip(1.0 - a * a, 0.0, None))
    if np.all(sigma <= _SIGMA_ZERO):
        y = np.repeat(global_nodes[:, None], len(block.sectors), axis=1)
        return _InnerRule(y, sparse.identity(n_g, format="csr"), "global")
    if len(block.sectors) == 1 and sector_grid is None and block.sectors[0] in shared:
        grid = shared[block.sectors[0]]
        lam = grid.weights * np.exp(0.5 * grid.nodes**2)  # Lebesgue weights (up to a constant)
        s = float(sigma[0])
        u = (grid.nodes[None, :] - float(a[0]) * global_nodes[:, None]) / s
        dense = lam[None, :] * np.exp(-0.5 * u * u)
        rows = dense.sum(axis=1)
        empty = rows <= 0
        if empty.any():  # beyond the grid: the nearest node takes the mass
            near = np.argmin(np.abs(u[empty]), axis=1)
            dense[empty] = 0.0
            dense[np.flatnonzero(empty), near] = 1.0
            rows = dense.sum(axis=1)
        dense /= rows[:, None]
        dense[dense < 1e-300] = 0.0
        return _InnerRule(grid.nodes[:, None].copy(), dense, "shared")
    eta = sector_grid if sector_grid is not None else gauss_hermite(DEFAULT_SECTOR_NODES)
    d = len(block.sectors)
    per: list[tuple[FloatArray, FloatArray]] = []
    for k in range(d):
        if sigma[k] <= _SIGMA_ZERO:
            per.append((np.zeros(1), np.ones(1)))
        else:
            per.append((eta.nodes, eta.weights))
    mesh = np.meshgrid(*[p[0] for p in per], indexing="ij")
    wmesh = np.meshgrid(*[p[1] for p in per], indexing="ij")
    x = np.stack([m.ravel() for m in mesh], axis=1)  # (tuples, d)
    u = np.prod(np.stack([m.ravel() for m in wmesh], axis=1), axis=1)
    t = x.shape[0]
    y = a[None, None, :] * global_nodes[:, None, None] + sigma[None, None, :] * x[None, :, :]
    y = y.reshape(n_g * t, d)
    rows = np.repeat(np.arange(n_g), t)
    cols = np.arange(n_g * t)
    weights = sparse.csr_matrix((np.tile(u, n_g), (rows, cols)), shape=(n_g, n_g * t))
    return _InnerRule(y, weights, "tensor")


# ====================================================================== result
@dataclass
class SectorLaw:
    """What :func:`sector_law` returns to the engine."""

    losses: FloatArray
    probabilities: FloatArray
    default_probability: FloatArray
    settings: dict[str, Any]
    diagnostics: dict[str, Any]


def sector_law(
    model: LinkedFactorModel,
    *,
    groups: Sequence[Any],
    plan: Any,
    group_state_law: Any,
    state_bits: Any,
    factor_grid: FactorGrid | None = None,
    sector_grid: FactorGrid | None = None,
    mixing_grid: FactorGrid | None = None,
    resolution: float = 1.5,
    order: int = 8,
    progress: ProgressHook | None = None,
) -> SectorLaw:
    """Loss law of a model with sector loadings and/or Student-t dependence.

    Parameters
    ----------
    model : LinkedFactorModel
        With ``model.dependence`` in the loadings or one-factor form.
    groups : sequence
        The exact engine's link groups (chain order of strong parts).
    plan : object
        The exact engine's loss plan (``mode``, ``unit``, ``k``, ``top``, ``atoms``).
    group_state_law, state_bits : callable
        The exact engine's group enumeration and state-bit helpers.
    factor_grid : FactorGrid, optional
        Nodes of the global factor (default: tail-dense grid).
    sector_grid : FactorGrid, optional
        Nodes ``x`` of each idiosyncratic sector factor ``eta_s`` (tensor rule).
    mixing_grid : FactorGrid, optional
        Nodes of ``W ~ chi^2_nu`` (Student-t only).
    resolution, order : float, int
        Big-book node density rule (see the module notes).
    progress : callable, optional
        ``progress(done, total)`` per mixing node.

    Returns
    -------
    SectorLaw
    """
    structure = model.dependence
    assert structure is not None and structure.form != "matrix"
    loadings = _loadings(structure)
    g_grid = (
        factor_grid if factor_grid is not None else default_global_grid(model, resolution, order)
    )
    nu = structure.degrees_of_freedom
    if nu is None:
        w_nodes, w_weights, w_method = np.array([float("nan")]), np.ones(1), "none"
    else:
        wg = mixing_grid if mixing_grid is not None else chi_square_grid(nu)
        w_nodes, w_weights, w_method = wg.nodes, wg.weights, wg.method
    blocks = _blocks(model, groups)
    shared: dict[int, FactorGrid] = {}
    if sector_grid is None:
        for b in blocks:
            if len(b.sectors) == 1:
                s = b.sectors[0]
                if 1.0 - loadings[s] ** 2 > _SIGMA_ZERO**2:
                    shared[s] = default_sector_grid(
                        model, b.members, float(loadings[s]), resolution, order
                    )
    rules = [_inner_rule(b, loadings, g_grid.nodes, sector_grid, shared) for b in blocks]
    for b, rule in zip(blocks, rules, strict=True):
        if rule.y.shape[0] > MAX_BLOCK_INNER_NODES:
            from debtsim.errors import EngineRefusedError

            raise EngineRefusedError(
                f"a link group joins {len(b.sectors)} sectors; conditioning on their factors "
                f"jointly needs {rule.y.shape[0]:,} nodes, more than the exact engine's "
                f"{MAX_BLOCK_INNER_NODES:,}; use --engine sample"
            )
    sector_of = (
        structure.sector_of
        if structure.sector_names
        else np.zeros(model.n_obligors, dtype=np.int64)
    )
    threshold = default_threshold(model.pd, nu)
    r = np.asarray(model.asset_correlation, dtype=float)
    loss = np.asarray(model.loss_given_default, dtype=float)
    default_probability = np.zeros(model.n_obligors)
    atoms_mode = plan.mode == "atoms"
    total_support: AtomConvolution | None = None
    block_atoms: list[tuple[AtomConvolution, list[bool]]] = []
    if atoms_mode:
        total_support = AtomConvolution(scale=float(loss.sum()))
        for b in blocks:
            conv, lossy_mask = _block_atoms(b, loss, state_bits)
            block_atoms.append((conv, lossy_mask))
            total_support.add(conv.support)
        mixture = np.zeros(total_support.size)
    else:
        mixture = np.zeros(plan.top + 1)
    truncation = 0.0
    widest = 0
    cut_mass = 0.0
    # blocks of one sector on a shared grid without link groups: one kernel per run
    fast: dict[int, _FastSector] = {}
    if not atoms_mode:
        for b_index, (b, rule) in enumerate(zip(blocks, rules, strict=True)):
            if rule.kind == "shared" and not b.groups and _FAST_SECTORS:
                fast[b_index] = _FastSector.build(b, rule, threshold, r, plan.k)
                cut_mass = max(cut_mass, fast[b_index].cut_mass)
    if fast:
        positive = theta_ladder(max(int(f.k.max(initial=1)) for f in fast.values()), int(plan.top))
        thetas = np.concatenate([-positive[::-1], positive])
    widest_total = 0
    pd_error = 0.0
    for m, (w_value, w_weight) in enumerate(zip(w_nodes, w_weights, strict=True)):
        scale = 1.0 if nu is None else math.sqrt(float(w_value) / nu)
        block_laws: list[FloatArray] = []
        node_laws: dict[int, SectorNodeLaws] = {}
        for b_index, (b, rule) in enumerate(zip(blocks, rules, strict=True)):
            inner_w = np.asarray(g_grid.weights @ rule.weights).ravel()  # inner node weights
            if b_index in fast:
                fs = fast[b_index]
                cls_p = sector_conditional_pd(fs.threshold, fs.r, rule.y[:, 0], scale)
                default_probability[b.members] += w_weight * (inner_w @ cls_p)[fs.of_member]
                # the sector rule on each class's PD given g against the closed form,
                # averaged over g (what the mixed law inherits)
                a_s = float(loadings[b.sectors[0]])
                closed = ndtr(
                    (
                        fs.threshold[None, :] * scale
                        - np.sqrt(fs.r * a_s * a_s)[None, :] * g_grid.nodes[:, None]
                    )
                    / np.sqrt(1.0 - fs.r * a_s * a_s)[None, :]
                )
                gap = np.max(np.abs(fs.weights @ cls_p - closed), axis=1)
                pd_error = max(pd_error, float(g_grid.weights @ gap))
                node_mgf = np.zeros((cls_p.shape[0], thetas.size))
                node_mgf[fs.needed] = log_mgf_bounds(cls_p[fs.needed], fs.k, fs.count, thetas)
                node_laws[b_index] = SectorNodeLaws.compute(
                    fs.kernel, cls_p, fs.needed, fs.top, node_mgf, thetas
                )
                fs.log_mgf = mixture_log_mgf(fs.weights, node_mgf)
                truncation = max(truncation, node_laws[b_index].truncation)
                widest = max(widest, node_laws[b_index].widest)
                block_laws.append(np.zeros((0, 0)))
                continue
            pos_of = {int(sct): j for j, sct in enumerate(b.sectors)}
            cols = np.array([pos_of[int(sector_of[i])] for i in b.members.tolist()], dtype=np.int64)
            laws, marg, stats = _block_inner_laws(
                b,
                rule,
                cols,
                threshold,
                r,
                scale,
                plan,
                block_atoms[b_index] if atoms_mode else None,
                group_state_law,
                state_bits,
            )
            truncation = max(truncation, stats[0])
            widest = max(widest, int(stats[1]))
            default_probability[b.members] += w_weight * (inner_w @ marg)
            block_laws.append(np.asarray(rule.weights @ laws))  # (global nodes, support)
        if atoms_mode:
            assert total_support is not None
            probs = total_support.apply(block_laws)
            mixture += w_weight * (g_grid.weights @ probs)
        else:
            widest_total = max(
                widest_total,
                add_global_laws(
                    mixture,
                    [
                        (node_laws[i], fast[i].weights, fast[i].log_mgf)  # type: ignore[misc]
                        for i in range(len(blocks))
                        if i in fast
                    ],
                    [bl for i, bl in enumerate(block_laws) if i not in fast],
                    w_weight * g_grid.weights,
                    thetas if fast else np.zeros(0),
                ),
            )
        if progress is not None:
            progress(m + 1, w_nodes.size)

    np.clip(mixture, 0.0, None, out=mixture)
    mixture /= mixture.sum()
    if atoms_mode:
        assert total_support is not None
        order_ix = np.argsort(total_support.support, kind="stable")
        losses = total_support.support[order_ix]
        probs_out = mixture[order_ix]
        keep = probs_out > 0
        losses, probs_out = losses[keep], probs_out[keep]
        unit = 0.0
    else:
        idx = np.flatnonzero(mixture > 0)
        probs_out = mixture[idx]
        target = float(np.sum(default_probability * loss))
        if plan.mode == "exact-grid":
            unit = plan.unit
        else:
            grid_mean = float(np.sum(idx * probs_out))
            unit = target / grid_mean if grid_mean > 0 else plan.unit
        losses = unit * idx.astype(float)
    kinds = sorted({rule.kind for rule in rules})
    settings: dict[str, Any] = {
        "factor_nodes": len(g_grid),
        "factor_method": g_grid.method,
        "dependence": structure.describe(),
        "sector_method": _method_text(structure, kinds),
        "sector_blocks": len(blocks),
        "sector_inner_nodes": int(sum(rule.y.shape[0] for rule in rules)),
        "sector_grid": sector_grid.method
        if sector_grid is not None
        else ("adaptive per sector" if shared else None),
        "mixing_nodes": int(w_nodes.size) if nu is not None else None,
        "mixing_method": w_method if nu is not None else None,
        "loss_support": plan.mode,
        "grid_unit": unit,
        "grid_points": plan.top + 1 if not atoms_mode else None,
        "link_groups": len(groups),
        "largest_link_group": max((g.members.size for g in groups), default=1),
    }
    exact = plan.mode != "grid"
    diagnostics: dict[str, Any] = {
        "method": settings["sector_method"],
        "discretisation_error": 0.0 if exact else float(unit),
        "loss_rounding_bound": 0.0 if exact else float(unit),
        "grid_exact": exact,
        "series_truncation": float(truncation),
        "series_tolerance": SERIES_TOLERANCE,
        "window_tail_bound": 2.0 * WINDOW_TAIL,
        "widest_window": widest,
        "factor_truncation_mass": float(2.0 * ndtr(-FACTOR_LIMIT))
        if g_grid.method.startswith("adaptive")
        else 0.0,
        "sector_weight_cut_mass": float(cut_mass),
        "widest_global_window": int(widest_total),
        "sector_rule_pd_error": float(pd_error),
    }
    return SectorLaw(losses, probs_out, default_probability, settings, diagnostics)


def _method_text(structure: FactorStructure, kinds: list[str]) -> str:
    words = {
        "global": "sector factor equal to the global factor",
        "shared": "per-sector factor integral on a shared adaptive grid",
        "tensor": "tensor (global x sector) node sum",
    }
    text = "conditional on the global factor: " + ", ".join(words[k] for k in kinds)
    if structure.student_t:
        text += "; Student-t mixing variable integrated outermost"
    return text


@dataclass
class _FastSector:
    """A one-sector block without link groups on its shared grid, prepared once per run."""

    kernel: SeriesKernel
    threshold: FloatArray  # per class
    r: FloatArray  # per class
    k: IntArray  # per class
    count: FloatArray  # per class
    of_member: IntArray  # class of each block member
    weights: FloatArray  # (global nodes, sector nodes), below WEIGHT_CUT dropped
    needed: NDArray[np.bool_]  # sector nodes some global node uses
    top: int
    cut_mass: float  # largest dropped weight of one global node
    log_mgf: FloatArray | None = None  # (global nodes, thetas) bounds, per mixing node

    @classmethod
    def build(
        cls, block: _Block, rule: _InnerRule, threshold: FloatArray, r: FloatArray, k: IntArray
    ) -> _FastSector:
        members = block.members
        keys = np.stack([threshold[members], r[members], k[members].astype(float)], axis=1)
        uniq, inverse, counts = np.unique(keys, axis=0, return_inverse=True, return_counts=True)
        kernel = SeriesKernel(uniq[:, 2].astype(np.int64), counts.astype(float))
        dense = np.asarray(rule.weights, dtype=float)
        kept = np.where(dense >= WEIGHT_CUT, dense, 0.0)
        cut = float(np.max(dense.sum(axis=1) - kept.sum(axis=1)))
        return cls(
            kernel,
            uniq[:, 0],
            uniq[:, 1],
            uniq[:, 2].astype(np.int64),
            counts.astype(float),
            inverse.ravel().astype(np.int64),
            kept,
            np.asarray((kept > 0).any(axis=0)),
            int(k[members].sum()),
            max(cut, 0.0),
        )


def _block_atoms(
    block: _Block, loss: FloatArray, state_bits: Any
) -> tuple[AtomConvolution, list[bool]]:
    """Exact loss support of a block; which of its single obligors carry a loss."""
    conv = AtomConvolution(scale=float(loss[block.members].sum()) or 1.0)
    lossy = [bool(loss[i] > 0) for i in block.single.tolist()]
    for i, keep in zip(block.single.tolist(), lossy, strict=True):
        if keep:
            conv.add(np.array([0.0, loss[i]]))
    for g in block.groups:
        conv.add(state_bits(g.members.size) @ loss[g.members])
    return conv, lossy


@dataclass
class _Classes:
    """Single obligors of a block grouped by (sector column, threshold, R, grid loss)."""

    col: IntArray
    threshold: FloatArray
    r: FloatArray
    k: IntArray
    count: FloatArray
    of_single: IntArray  # class of each single obligor


def _classes(
    block: _Block, cols_single: IntArray, threshold: FloatArray, r: FloatArray, k: IntArray
) -> _Classes:
    single = block.single
    keys = np.stack(
        [cols_single.astype(float), threshold[single], r[single], k[single].astype(float)], axis=1
    )
    if keys.shape[0] == 0:
        z = np.zeros(0)
        return _Classes(z.astype(np.int64), z, z, z.astype(np.int64), z, z.astype(np.int64))
    uniq, inverse, counts = np.unique(keys, axis=0, return_inverse=True, return_counts=True)
    return _Classes(
        uniq[:, 0].astype(np.int64),
        uniq[:, 1],
        uniq[:, 2],
        uniq[:, 3].astype(np.int64),
        counts.astype(float),
        inverse.ravel().astype(np.int64),
    )


def _block_inner_laws(
    block: _Block,
    rule: _InnerRule,
    cols: IntArray,
    threshold: FloatArray,
    r: FloatArray,
    scale: float,
    plan: Any,
    atoms: tuple[AtomConvolution, list[bool]] | None,
    group_state_law: Any,
    state_bits: Any,
) -> tuple[FloatArray, FloatArray, tuple[float, int]]:
    """Loss law and default marginals of one block at each inner node.

    Returns ``laws`` (inner nodes, block support or block grid), ``marg``
    (inner nodes, block members: final default probabilities) and (series
    truncation, widest window).
    """
    members = block.members
    n_inner = rule.y.shape[0]
    position = {int(i): j for j, i in enumerate(members.tolist())}
    single_pos = np.array([position[i] for i in block.single.tolist()], dtype=np.int64)
    marg = np.empty((n_inner, members.size))
    k_all = plan.k if atoms is None else np.zeros(r.size, dtype=np.int64)
    cls = _classes(block, cols[single_pos], threshold, r, k_all)
    # conditional own-default probability of each class at each inner node
    cls_p = np.empty((n_inner, cls.col.size))
    for c in np.unique(cls.col).tolist():
        sel = np.flatnonzero(cls.col == c)
        cls_p[:, sel] = sector_conditional_pd(cls.threshold[sel], cls.r[sel], rule.y[:, c], scale)
    marg[:, single_pos] = cls_p[:, cls.of_single]
    group_laws: list[FloatArray] = []
    for g in block.groups:
        gpos = np.array([position[i] for i in g.members.tolist()], dtype=np.int64)
        own = np.empty((n_inner, gpos.size))
        for j, i in enumerate(g.members.tolist()):
            own[:, j] = sector_conditional_pd(
                threshold[i : i + 1], r[i : i + 1], rule.y[:, cols[position[i]]], scale
            )[:, 0]
        law = group_state_law(g, own)
        group_laws.append(law)
        marg[:, gpos] = law @ state_bits(g.members.size).astype(float)
    if atoms is not None:
        conv, lossy = atoms
        # AtomConvolution items in the order they were added: lossy singles, then groups
        items = [
            np.stack([1.0 - marg[:, j], marg[:, j]], axis=1)
            for j, keep in zip(single_pos.tolist(), lossy, strict=True)
            if keep
        ]
        items.extend(group_laws)
        laws = conv.apply(items) if items else np.ones((n_inner, 1))
        return laws, marg, (0.0, 0)
    laws, stats = _grid_laws(block, cls, cls_p, group_laws, plan, state_bits)
    return laws, marg, stats


def _grid_laws(
    block: _Block,
    cls: _Classes,
    cls_p: FloatArray,
    group_laws: list[FloatArray],
    plan: Any,
    state_bits: Any,
) -> tuple[FloatArray, tuple[float, int]]:
    """Block laws on the grid ``0 .. top_b`` at each inner node."""
    k_all = plan.k
    top_b = int(k_all[block.members].sum())
    n_inner = cls_p.shape[0]
    lossy = cls.k > 0
    ks = cls.k[lossy]
    counts = cls.count[lossy]
    p_all = cls_p[:, lossy]
    kc = ks * counts
    k2c = ks.astype(float) ** 2 * counts
    # group loss laws on the grid, per inner node
    extras: list[tuple[int, FloatArray]] = []
    for g, law in zip(block.groups, group_laws, strict=True):
        pos = state_bits(g.members.size).astype(np.int64) @ k_all[g.members]
        lo = int(pos.min())
        dense = np.zeros((n_inner, int(pos.max()) - lo + 1))
        np.add.at(dense.T, pos - lo, law.T)
        extras.append((lo, dense))
    g_off, g_law = product_law(extras) if extras else (0, np.ones((n_inner, 1)))
    g_support = g_off + np.arange(g_law.shape[1])
    if float(counts.sum()) * (top_b + 1) <= _DIRECT_LIMIT:
        # small block: the exact recursion (Andersen, Sidenius & Basu 2003), all nodes at once
        out = np.zeros((n_inner, top_b + 1))
        out[:, g_off : g_off + g_law.shape[1]] = g_law
        for j, (k, n) in enumerate(zip(ks.tolist(), counts.tolist(), strict=True)):
            p = p_all[:, j : j + 1]
            for _ in range(int(n)):
                shifted = np.zeros_like(out)
                shifted[:, k:] = out[:, : out.shape[1] - k]
                out = out * (1.0 - p) + shifted * p
        return out, (0.0, 0)
    laws = np.zeros((n_inner, top_b + 1))
    truncation = 0.0
    widest = 0
    for j in range(n_inner):
        p = p_all[j]
        mean = float(p @ kc)
        var = float((p * (1.0 - p)) @ k2c)
        moving = (p > 0) & (p < 1)
        bound = float(ks[moving].max()) if moving.any() else 0.0
        lowest = int(np.sum(kc[p >= 1]))
        highest = int(np.sum(kc[p > 0]))
        extra = None
        if extras:
            row = g_law[j]
            live = np.flatnonzero(row > 0)
            gm = float(row @ g_support)
            mean += gm
            var += float(row @ (g_support.astype(float) ** 2)) - gm * gm
            lowest += int(g_support[live[0]]) if live.size else 0
            highest += int(g_support[live[-1]]) if live.size else 0
            bound = max(bound, float(g_support[-1] - g_support[0]))
            extra = (g_off, row)
        half = bernstein_halfwidth(var, bound)
        window = place_window(mean, half, lowest, highest, top_b)
        widest = max(widest, window.width)
        law, trunc = grid_law(ks, p, window, count=counts, extra=extra)
        truncation = max(truncation, trunc)
        law[: max(lowest - window.start, 0)] = 0.0
        law[max(highest + 1 - window.start, 0) :] = 0.0
        np.clip(law, 0.0, None, out=law)
        law[law < _NOISE_FLOOR * law.max()] = 0.0
        laws[j, window.start : window.start + window.width] = law
    return laws, (truncation, widest)
