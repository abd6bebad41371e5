"""Charts that compare runs: stress scenarios side by side, and sweeps over a grid.

Drawn with the helpers of :mod:`debtsim.report.charts` (one house style);
each function returns PNG bytes.  The numbers come computed in the tables of
:mod:`debtsim.studies.stress` and :mod:`debtsim.studies.sweep`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator, PercentFormatter

from debtsim.distribution import LossDistribution
from debtsim.report.charts import (
    BASE_COLOUR,
    DPI,
    PALETTE,
    amount_axis,
    exceedance,
    legend_outside,
    new_figure,
    plain_text,
    png_bytes,
    short_label,
)
from debtsim.report.formatting import level_label, short_amount
from debtsim.report.text import PD_WITH_CONTAGION
from debtsim.risk import level_key

if TYPE_CHECKING:
    from debtsim.studies.sweep import GridAxis

__all__ = [
    "LOG_SCALE_RATIO",
    "headline_measures",
    "loss_distributions_chart",
    "measure_label",
    "measures_by_scenario_chart",
    "line_figure",
    "movers_chart",
    "movers_figure",
    "sweep_charts",
]

#: The dot plot of default probabilities switches to a log scale past this max/min ratio.
LOG_SCALE_RATIO = 20.0


def measure_label(column: str) -> str:
    """Reader's name of a measure column: ``var_0.999`` -> ``VaR 99.9%``."""
    if column == "expected_loss":
        return "EL"
    if column == "loss_std":
        return "loss std"
    for prefix, name in (
        ("var_", "VaR"),
        ("expected_shortfall_", "ES"),
        ("economic_capital_", "EC"),
    ):
        if column.startswith(prefix):
            return f"{name} {level_label(column[len(prefix) :])}"
    return column


def headline_measures(levels: Sequence[float]) -> list[str]:
    """Measure columns drawn for a study: EL, then VaR and ES at each level."""
    out = ["expected_loss"]
    for a in levels:
        out += [f"var_{level_key(a)}", f"expected_shortfall_{level_key(a)}"]
    return out


def _series_colour(j: int) -> str:
    return BASE_COLOUR if j == 0 else PALETTE[(j - 1) % len(PALETTE)]


# --------------------------------------------------------------- stress charts
def measures_by_scenario_chart(
    table: pd.DataFrame, levels: Sequence[float], currency: str
) -> bytes:
    """Draw grouped bars: EL, VaR and ES at each level, one bar per scenario.

    Parameters
    ----------
    table : pandas.DataFrame
        ``scenarios.csv`` rows, base first.
    levels : sequence of float
        Confidence levels.
    currency : str
        Axis label.

    Returns
    -------
    bytes
        PNG.

    """
    measures = headline_measures(levels)
    names = list(table["scenario"])
    n = len(names)
    fig, ax = new_figure(10.0, 4.2)
    x = np.arange(len(measures))
    width = 0.8 / max(n, 1)
    for j, name in enumerate(names):
        values = table.loc[table["scenario"] == name, measures].to_numpy(dtype=float).ravel()
        ax.bar(x - 0.4 + width * (j + 0.5), values, width * 0.92, color=_series_colour(j),
               label=short_label(name, 40))
    ax.set_xticks(x, [measure_label(m) for m in measures])
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    amount_axis(ax, "y")
    legend_outside(ax)
    ax.margins(y=0.08)
    ax.set_title("Risk measures by scenario", loc="left", fontsize=11)
    return png_bytes(fig)


def loss_distributions_chart(
    names: Sequence[str], laws: Sequence[LossDistribution], levels: Sequence[float], currency: str
) -> bytes:
    """Loss distributions overlaid as exceedance curves ``P(L > l)`` on a log scale.

    Parameters
    ----------
    names : sequence of str
        Scenario names, base first.
    laws : sequence of LossDistribution
        One per name.
    levels : sequence of float
        Confidence levels, drawn as horizontal guides at ``1 - a``.
    currency : str
        Axis label.

    Returns
    -------
    bytes
        PNG.

    """
    fig, ax = new_figure(10.0, 4.6)
    # the tail beyond 1/100 of the smallest tail probability asked for is not drawn
    floor = min((1.0 - float(a) for a in levels), default=1e-3) / 100
    right = 0.0
    for j, (name, law) in enumerate(zip(names, laws, strict=True)):
        x, y = exceedance(law)
        keep = y > 0
        # P(L > l) is 0 from the largest loss on: the curve drops off the bottom of the
        # axis there instead of ending in a flat step that reads as a tail going on
        xs = np.concatenate((x[keep], [float(law.losses[-1])] * 2))
        ys = np.concatenate((y[keep], [y[keep][-1], floor / 10]))
        ax.step(xs, ys, where="post", color=_series_colour(j), linewidth=2.2 if j == 0 else 1.6,
                label=short_label(name, 40))
        visible = xs[ys >= floor]
        right = max(right, float(visible[-1]) if visible.size else float(xs[-1]))
    ax.set_yscale("log")
    ax.set_ylim(floor, 1.5)
    if right > 0:
        ax.set_xlim(left=min(0.0, ax.get_xlim()[0]), right=right * 1.04)
    for a in levels:
        ax.axhline(1 - float(a), color="#bbbbbb", linewidth=0.8)
        ax.annotate(level_label(a), (0.0, 1 - float(a)), xycoords=("axes fraction", "data"),
                    xytext=(2, 2), textcoords="offset points", fontsize=8, color="#777777")
    ax.set_xlabel(f"loss level l ({plain_text(currency)})" if currency else "loss level l")
    ax.set_ylabel("P(loss > l)")
    amount_axis(ax, "x")
    legend_outside(ax)
    ax.set_title("Loss distributions: probability that the loss exceeds l", loc="left",
                 fontsize=11)
    return png_bytes(fig)


def movers_chart(table: pd.DataFrame, names: Sequence[str], top: int) -> bytes:
    """Draw :func:`movers_figure` as PNG."""
    return png_bytes(movers_figure(table, names, top))


def movers_figure(table: pd.DataFrame, names: Sequence[str], top: int) -> Figure:
    """Dot plot of the PDs with contagion of the obligors that moved most.

    The axis is logarithmic when the probabilities drawn span more than
    :data:`LOG_SCALE_RATIO` (e.g. a scenario's certain default at 100%
    beside PDs near 1%), so no obligor is squeezed into a corner.

    Parameters
    ----------
    table : pandas.DataFrame
        :func:`debtsim.studies.stress.default_probability_table` (sorted, largest change first).
    names : sequence of str
        Scenario names, base first (columns of ``table``).
    top : int
        Obligors drawn.

    Returns
    -------
    Figure

    """
    rows = table.head(top)
    n = len(rows)
    fig, ax = new_figure(10.0, max(2.4, 0.32 * n + 1.2))
    ax.grid(False, axis="y")
    ax.grid(True, axis="x", which="both", color="#e3e6ea", linewidth=0.8)
    y = np.arange(n)[::-1]
    labels = [
        f"{i} {nm}".strip() if nm else str(i)
        for i, nm in zip(rows["id"], rows["name"], strict=True)
    ]
    values = rows[list(names)].to_numpy(dtype=float)
    lo = values.min(axis=1)
    hi = values.max(axis=1)
    positive = values[values > 0]
    log = positive.size > 0 and float(positive.max()) / float(positive.min()) > LOG_SCALE_RATIO
    ax.hlines(y, lo, hi, color="#cfd5db", linewidth=2)
    for j, name in enumerate(names[1:]):
        ax.plot(rows[name].to_numpy(dtype=float), y, "o", color=PALETTE[j % len(PALETTE)], ms=5,
                label=short_label(name, 40), zorder=3)
    ax.plot(rows[names[0]].to_numpy(dtype=float), y, "o", mfc="none", mec=BASE_COLOUR, mew=1.6,
            ms=9, label=short_label(names[0], 40), zorder=4)
    ax.set_yticks(y, [short_label(t, 40) for t in labels], fontsize=8)
    if log:
        ax.set_xscale("log")
        low = float(positive.min()) / 1.5
        ax.set_xlim(low, 1.5)
        ticks = [m * 10.0**e for e in range(-6, 1) for m in (1, 2, 5)]
        ax.xaxis.set_major_locator(FixedLocator([t for t in ticks if low <= t <= 1.0]))
        ax.xaxis.set_minor_locator(NullLocator())
        ax.set_xlabel(f"{PD_WITH_CONTAGION} (log scale)")
    else:
        ax.set_xlim(left=0)
        ax.set_xlabel(PD_WITH_CONTAGION)
    if log:
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{100 * v:.3g}%"))
    else:
        ax.xaxis.set_major_formatter(PercentFormatter(1.0, decimals=None))
    legend_outside(ax)
    ax.set_title("Obligors whose default probability moved most", loc="left", fontsize=11)
    return fig


# ---------------------------------------------------------------- sweep charts
def _line_chart(
    frame: pd.DataFrame, axis: str, measures: Sequence[str], currency: str, title: str
) -> bytes:
    return png_bytes(line_figure(frame, axis, measures, currency, title))


def line_figure(
    frame: pd.DataFrame, axis: str, measures: Sequence[str], currency: str, title: str
) -> Figure:
    """Measures against one swept parameter, legend beside the plot."""
    fig, ax = new_figure(8.0, 4.2)
    frame = frame.sort_values(axis)
    levels = sorted({m.rsplit("_", 1)[-1] for m in measures if m != "expected_loss"})
    for m in measures:
        if m == "expected_loss":
            colour, style = BASE_COLOUR, "o-"
        else:
            colour = PALETTE[levels.index(m.rsplit("_", 1)[-1]) % len(PALETTE)]
            style = "o--" if m.startswith("expected_shortfall_") else "o-"
        ax.plot(frame[axis], frame[m], style, color=colour, ms=4, linewidth=1.6,
                label=measure_label(m))
    ax.set_xlabel(axis)
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    amount_axis(ax, "y")
    legend_outside(ax)
    ax.set_title(plain_text(title), loc="left", fontsize=11)
    return fig


def _heat_map(
    frame: pd.DataFrame, x: GridAxis, y: GridAxis, measure: str, currency: str, title: str
) -> bytes:
    grid = np.full((len(y.values), len(x.values)), np.nan)
    xi = {v: i for i, v in enumerate(x.values)}
    yi = {v: i for i, v in enumerate(y.values)}
    for _, row in frame.iterrows():
        grid[yi[float(row[y.name])], xi[float(row[x.name])]] = float(row[measure])
    xs, ys = np.argsort(x.values), np.argsort(y.values)
    grid = grid[np.ix_(ys, xs)]
    xv, yv = np.asarray(x.values)[xs], np.asarray(y.values)[ys]
    fig = Figure(figsize=(max(5.0, 0.7 * len(xv) + 3.0), max(3.5, 0.45 * len(yv) + 2.0)), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    masked = np.ma.masked_invalid(grid)
    image = ax.imshow(masked, origin="lower", aspect="auto", cmap="YlOrRd")
    ax.set_facecolor("#d5dae0")
    ax.set_xticks(np.arange(len(xv)), [f"{v:g}" for v in xv], fontsize=8)
    ax.set_yticks(np.arange(len(yv)), [f"{v:g}" for v in yv], fontsize=8)
    ax.set_xlabel(x.name)
    ax.set_ylabel(y.name)
    if grid.size <= 150:
        finite = grid[np.isfinite(grid)]
        mid = (finite.min() + finite.max()) / 2 if finite.size else 0.0
        for (r, c), v in np.ndenumerate(grid):
            text = short_amount(v) if math.isfinite(v) else "failed"
            ax.text(c, r, text, ha="center", va="center", fontsize=7,
                    color="white" if math.isfinite(v) and v > mid else "#222222")
    bar = fig.colorbar(image, ax=ax)
    label = measure_label(measure)
    bar.set_label(f"{label} ({plain_text(currency)})" if currency else label)
    bar.formatter = FuncFormatter(lambda v, _pos: short_amount(v))
    bar.update_ticks()
    ax.set_title(plain_text(title), loc="left", fontsize=11)
    return png_bytes(fig)


def _nearest_neutral(axis: GridAxis, neutral: Mapping[str, float]) -> float:
    target = neutral[axis.name]
    return min(axis.values, key=lambda v: (abs(v - target), v))


def sweep_charts(
    table: pd.DataFrame, axes: Sequence[GridAxis], levels: Sequence[float], currency: str
) -> dict[str, bytes]:
    """Charts of a sweep, by file stem.

    One parameter: the measures (EL, VaR and ES at each level) against it.
    Two parameters: a heat map of each of EL and the VaR and ES at the
    highest level over the grid.  More: the measures against each parameter
    with the others held at the grid value nearest their neutral value
    (scale 1, shift 0).  Failed points are left out (gaps, grey cells).

    Parameters
    ----------
    table : pandas.DataFrame
        The sweep table.
    axes : sequence of GridAxis
        The swept parameters.
    levels : sequence of float
        Confidence levels.
    currency : str
        Axis label.

    Returns
    -------
    dict of str to bytes
        PNG per chart, e.g. ``measures_vs_pd_scale`` or ``heatmap_var_0.999``.

    """
    from debtsim.studies.scenarios import NEUTRAL  # a table of constants, no report import

    measures = headline_measures(levels)
    top = level_key(max(levels)) if levels else None
    charts: dict[str, bytes] = {}
    if len(axes) == 1:
        only = axes[0].name
        charts[f"measures_vs_{only}"] = _line_chart(
            table, only, measures, currency, f"Risk measures against {only}"
        )
    elif len(axes) == 2:
        x, y = axes[0], axes[1]
        for m in ["expected_loss"] + ([f"var_{top}", f"expected_shortfall_{top}"] if top else []):
            charts[f"heatmap_{m}"] = _heat_map(
                table, x, y, m, currency, f"{measure_label(m)} over {x.name} and {y.name}"
            )
    else:
        held = {a.name: _nearest_neutral(a, NEUTRAL) for a in axes}
        for axis in axes:
            mask = np.ones(len(table), dtype=bool)
            for other in axes:
                if other.name != axis.name:
                    mask &= np.isclose(table[other.name].to_numpy(dtype=float), held[other.name])
            others = ", ".join(f"{k} {v:g}" for k, v in held.items() if k != axis.name)
            charts[f"measures_vs_{axis.name}"] = _line_chart(
                table[mask], axis.name, measures, currency,
                f"Risk measures against {axis.name} ({others})",
            )
    return charts
