"""Pages and charts that compare runs: the stress report and sweep charts.

Charts are drawn with matplotlib's object API on the Agg canvas and embedded
in self-contained HTML as base64 PNG; sweep charts are also saved as PNG
files.  This module draws and writes; the numbers come computed in the
:class:`~debtsim.studies.stress.StressResult` or :class:`~debtsim.studies.sweep.SweepResult`.
"""

from __future__ import annotations

import base64
import html
import io
import math
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter

from debtsim.distribution import LossDistribution
from debtsim.report.charts import new_figure, plain_text
from debtsim.report.summary import CAUTION
from debtsim.risk import level_key

if TYPE_CHECKING:
    from debtsim.studies.stress import StressResult
    from debtsim.studies.sweep import GridAxis, SweepResult

__all__ = [
    "loss_laws_chart",
    "measures_by_scenario_chart",
    "movers_chart",
    "sweep_charts",
    "write_stress_report",
    "write_sweep_report",
]

DPI = 110
PALETTE = (
    "#1f4e79",
    "#d9822b",
    "#3b8b5a",
    "#b03a2e",
    "#7b5ea7",
    "#8c6d31",
    "#2a9d8f",
    "#c2185b",
    "#5d6d7e",
    "#e9c46a",
)
BASE_COLOUR = "#222222"


# --------------------------------------------------------------------- helpers
def _short(x: float) -> str:
    """Compact amount: ``1.2M``, ``350k``, ``0.45``."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    ax = abs(x)
    for bound, suffix in ((1e12, "T"), (1e9, "bn"), (1e6, "M"), (1e3, "k")):
        if ax >= bound:
            return f"{x / bound:.3g}{suffix}"
    return "0" if ax == 0 else f"{x:.3g}"


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        # a name in a script the bundled font lacks is drawn as boxes; say nothing on stderr
        warnings.filterwarnings("ignore", message="Glyph .* missing from font")
        fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    return buf.getvalue()


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _amounts(ax: Axes, axis: str = "y") -> None:
    fmt = FuncFormatter(lambda v, _pos: _short(v))
    (ax.yaxis if axis == "y" else ax.xaxis).set_major_formatter(fmt)


def _pct(level: str | float) -> str:
    return f"{100 * float(level):g}%"


def _label(column: str) -> str:
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
            return f"{name} {_pct(column[len(prefix) :])}"
    return column


def _money(x: Any) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    return f"{float(x):,.0f}" if abs(float(x)) >= 100 else f"{float(x):,.4g}"


def _prob(x: float) -> str:
    return f"{100 * float(x):.3g}%"


STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;max-width:1100px;margin:2em auto;
padding:0 1em;color:#1d2733;line-height:1.45}
h1{font-size:1.5em;margin-bottom:.2em}h2{font-size:1.15em;margin-top:2em;
border-bottom:1px solid #d5dae0;padding-bottom:.2em}
table{border-collapse:collapse;font-size:.88em;margin:.6em 0}
th,td{padding:.3em .6em;border-bottom:1px solid #e3e6ea;text-align:right}
th{background:#f3f5f7}td.t,th.t{text-align:left}
tr.base td{font-weight:600}.up{color:#b03a2e}.down{color:#2e7d4f}
.meta{color:#555;font-size:.9em}.caution{background:#fff8e5;border-left:4px solid #e0a800;
padding:.6em 1em;font-size:.9em}img{max-width:100%}.failed{color:#b03a2e}
"""


def _page(title: str, body: str) -> str:
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{html.escape(title)}</title><style>{STYLE}</style></head><body>\n"
        f'{body}\n<p class="caution">{html.escape(CAUTION)}</p>\n</body></html>\n'
    )


def _change(value: float, base: float) -> str:
    if not base or math.isnan(value) or math.isnan(base):
        return ""
    rel = value / base - 1.0
    cls = "up" if rel > 0 else "down" if rel < 0 else ""
    return f' <span class="{cls}">({rel:+.0%})</span>' if abs(rel) >= 0.005 else ""


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
    measures = ["expected_loss"]
    for a in levels:
        measures += [f"var_{level_key(a)}", f"expected_shortfall_{level_key(a)}"]
    names = list(table["scenario"])
    n = len(names)
    fig, ax = new_figure(10.0, 4.2)
    x = np.arange(len(measures))
    width = 0.8 / max(n, 1)
    for j, name in enumerate(names):
        values = table.loc[table["scenario"] == name, measures].to_numpy(dtype=float).ravel()
        colour = BASE_COLOUR if j == 0 else PALETTE[(j - 1) % len(PALETTE)]
        ax.bar(
            x - 0.4 + width * (j + 0.5), values, width * 0.92, color=colour,
            label=plain_text(name),
        )
    ax.set_xticks(x, [_label(m) for m in measures])
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    _amounts(ax)
    ax.legend(frameon=False, fontsize=8, ncol=min(n, 4), loc="upper left")
    ax.margins(y=0.15)
    ax.set_title("Risk measures by scenario", loc="left", fontsize=11)
    return _png(fig)


def _exceedance(dist: LossDistribution) -> tuple[np.ndarray, np.ndarray]:
    """Step points of ``P(L > l)``: value ``y[j]`` holds on ``[x[j], x[j+1])``."""
    p = dist.probabilities
    above = np.concatenate((np.cumsum(p[::-1])[::-1][1:], [0.0]))
    x = np.concatenate(([min(0.0, float(dist.losses[0]))], dist.losses))
    y = np.concatenate(([1.0], above))
    return x, y


def loss_laws_chart(
    names: Sequence[str], laws: Sequence[LossDistribution], levels: Sequence[float], currency: str
) -> bytes:
    """Loss laws overlaid as exceedance curves ``P(L > l)`` on a log scale.

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
        x, y = _exceedance(law)
        keep = y > 0
        xs = np.concatenate((x[keep], [float(law.losses[-1])]))
        ys = np.concatenate((y[keep], [y[keep][-1]]))
        colour = BASE_COLOUR if j == 0 else PALETTE[(j - 1) % len(PALETTE)]
        ax.step(
            xs, ys, where="post", color=colour, linewidth=2.2 if j == 0 else 1.6,
            label=plain_text(name),
        )
        visible = xs[ys >= floor]
        right = max(right, float(visible[-1]) if visible.size else float(xs[-1]))
    ax.set_yscale("log")
    ax.set_ylim(floor, 1.5)
    if right > 0:
        ax.set_xlim(left=min(0.0, ax.get_xlim()[0]), right=right * 1.04)
    for a in levels:
        ax.axhline(1 - float(a), color="#bbbbbb", linewidth=0.8)
        ax.annotate(
            _pct(a),
            (1.0, 1 - float(a)),
            xycoords=("axes fraction", "data"),
            xytext=(2, 2),
            textcoords="offset points",
            fontsize=8,
            color="#777777",
        )
    ax.set_xlabel(f"loss level l ({plain_text(currency)})" if currency else "loss level l")
    ax.set_ylabel("P(loss > l)")
    _amounts(ax, "x")
    ax.legend(frameon=False, fontsize=8, loc="lower left")
    ax.set_title("Loss laws: probability that the loss exceeds l", loc="left", fontsize=11)
    return _png(fig)


def movers_chart(table: pd.DataFrame, names: Sequence[str], top: int) -> bytes:
    """Dot plot of final default probabilities of the obligors that moved most.

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
    bytes
        PNG.

    """
    rows = table.head(top)
    n = len(rows)
    fig, ax = new_figure(10.0, max(2.4, 0.32 * n + 1.2))
    ax.grid(False, axis="y")
    ax.grid(True, axis="x", color="#e3e6ea", linewidth=0.8)
    y = np.arange(n)[::-1]
    labels = [
        f"{i} {nm}".strip() if nm else str(i)
        for i, nm in zip(rows["id"], rows["name"], strict=True)
    ]
    lo = rows[list(names)].min(axis=1).to_numpy(dtype=float)
    hi = rows[list(names)].max(axis=1).to_numpy(dtype=float)
    ax.hlines(y, lo, hi, color="#cfd5db", linewidth=2)
    for j, name in enumerate(names[1:]):
        ax.plot(
            rows[name].to_numpy(dtype=float),
            y,
            "o",
            color=PALETTE[j % len(PALETTE)],
            ms=5,
            label=plain_text(name),
            zorder=3,
        )
    ax.plot(
        rows[names[0]].to_numpy(dtype=float),
        y,
        "o",
        mfc="none",
        mec=BASE_COLOUR,
        mew=1.6,
        ms=9,
        label=plain_text(names[0]),
        zorder=4,
    )
    ax.set_yticks(y, [plain_text(t[:40]) for t in labels], fontsize=8)
    ax.xaxis.set_major_formatter(PercentFormatter(1.0, decimals=None))
    ax.set_xlabel("final default probability (contagion included)")
    ax.set_xlim(left=0)
    ax.legend(frameon=False, fontsize=8, loc="lower right")
    ax.set_title("Obligors whose default probability moved most", loc="left", fontsize=11)
    return _png(fig)


# --------------------------------------------------------------- stress report
def write_stress_report(path: Path, result: StressResult) -> None:
    """Write the stress comparison page.

    Parameters
    ----------
    path : Path
        The ``report.html`` to write.
    result : StressResult
        The runs to compare.

    """
    from debtsim.studies.stress import MOVERS_SHOWN

    book = result.book
    o = result.options
    levels = o.levels
    cur = book.currency
    table = result.table
    names = list(table["scenario"])
    esc = html.escape
    parts = [
        f"<h1>Stress scenarios: {esc(book.name)}</h1>",
        f'<p class="meta">{len(book.obligors)} obligors, {len(book.links)} links, '
        f"currency {esc(cur or '-')}; engine option {esc(o.engine)}, seed {o.seed}"
        + (f", samples {o.samples}" if o.samples else "")
        + f"; {len(names) - 1} scenarios run {esc(result.execution)} in "
        f"{result.seconds:.1f} s. Every scenario runs with the same engine options as the "
        "base.</p>",
        "<h2>Scenarios</h2><table><tr><th class=t>scenario</th><th class=t>changes</th>"
        "<th class=t>engine</th><th class=t>full report</th></tr>",
    ]
    for s, folder, a in zip(result.scenarios, result.folders, result.runs, strict=True):
        parts.append(
            f"<tr><td class=t>{esc(s.name)}</td><td class=t>{esc(s.describe())}</td>"
            f"<td class=t>{esc(a.engine)}</td>"
            f'<td class=t><a href="{esc(folder)}/report.html">{esc(folder)}/</a></td></tr>'
        )
    parts.append("</table>")

    cols = [c for c in table.columns if c != "scenario"]
    parts.append(
        f"<h2>Risk measures ({esc(cur or 'amounts')})</h2>"
        "<p class=meta>In brackets: change against the base. EC is economic capital, "
        "VaR minus EL.</p><table><tr><th class=t>scenario</th>"
        + "".join(f"<th>{esc(_label(c))}</th>" for c in cols)
        + "</tr>"
    )
    base_row = table.iloc[0]
    for i, row in table.iterrows():
        cells = "".join(
            f"<td>{_money(row[c])}{'' if i == 0 else _change(float(row[c]), float(base_row[c]))}"
            "</td>"
            for c in cols
        )
        cls = ' class="base"' if i == 0 else ""
        parts.append(f"<tr{cls}><td class=t>{esc(str(row['scenario']))}</td>{cells}</tr>")
    parts.append("</table>")
    parts.append(_img(measures_by_scenario_chart(table, levels, cur), "measures by scenario"))
    parts.append("<h2>Loss laws</h2>")
    parts.append(
        _img(
            loss_laws_chart(names, [a.loss_distribution for a in result.runs], levels, cur),
            "loss laws overlaid",
        )
    )
    dp = result.default_probabilities
    shown = dp.head(MOVERS_SHOWN)
    parts.append(
        "<h2>Default probabilities that moved most</h2><p class=meta>Final default probability "
        "(own default or dragged in along links), base and each scenario; obligors ranked by the "
        "largest change from the base. All obligors are in "
        "<code>default_probabilities.csv</code>.</p>"
    )
    if len(names) > 1:
        parts.append(_img(movers_chart(dp, names, MOVERS_SHOWN), "default probabilities moved"))
    parts.append(
        "<table><tr><th class=t>obligor</th><th class=t>sector</th><th>book PD</th>"
        + "".join(f"<th>{esc(n)}</th>" for n in names)
        + "<th>largest change</th></tr>"
    )
    for _, row in shown.iterrows():
        label = f"{row['id']} {row['name']}".strip()
        parts.append(
            f"<tr><td class=t>{esc(label)}</td><td class=t>{esc(str(row['sector']))}</td>"
            f"<td>{_prob(row['pd'])}</td>"
            + "".join(f"<td>{_prob(row[n])}</td>" for n in names)
            + f"<td>{float(row['largest_change']) * 100:+.3g} pts</td></tr>"
        )
    parts.append("</table>")
    path.write_text(_page(f"Stress scenarios: {book.name}", "\n".join(parts)), encoding="utf-8")


# ---------------------------------------------------------------- sweep charts
def _headline(levels: Sequence[float]) -> list[str]:
    """Measures drawn for a sweep: EL, then VaR and ES at each level."""
    out = ["expected_loss"]
    for a in levels:
        out += [f"var_{level_key(a)}", f"expected_shortfall_{level_key(a)}"]
    return out


def _line_chart(
    frame: pd.DataFrame, axis: str, measures: Sequence[str], currency: str, title: str
) -> bytes:
    fig, ax = new_figure(8.0, 4.2)
    frame = frame.sort_values(axis)
    levels = sorted({m.rsplit("_", 1)[-1] for m in measures if m != "expected_loss"})
    for m in measures:
        if m == "expected_loss":
            colour, style = BASE_COLOUR, "o-"
        else:
            colour = PALETTE[levels.index(m.rsplit("_", 1)[-1]) % len(PALETTE)]
            style = "o--" if m.startswith("expected_shortfall_") else "o-"
        ax.plot(frame[axis], frame[m], style, color=colour, ms=4, linewidth=1.6, label=_label(m))
    ax.set_xlabel(axis)
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    _amounts(ax)
    ax.legend(frameon=False, fontsize=8)
    ax.set_title(plain_text(title), loc="left", fontsize=11)
    return _png(fig)


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
            text = _short(v) if math.isfinite(v) else "failed"
            ax.text(
                c,
                r,
                text,
                ha="center",
                va="center",
                fontsize=7,
                color="white" if math.isfinite(v) and v > mid else "#222222",
            )
    bar = fig.colorbar(image, ax=ax)
    bar.set_label(f"{_label(measure)} ({plain_text(currency)})" if currency else _label(measure))
    bar.formatter = FuncFormatter(lambda v, _pos: _short(v))
    bar.update_ticks()
    ax.set_title(plain_text(title), loc="left", fontsize=11)
    return _png(fig)


def _nearest_neutral(axis: GridAxis) -> float:
    from debtsim.studies.scenarios import NEUTRAL

    target = NEUTRAL[axis.name]
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
    measures = _headline(levels)
    top = level_key(max(levels)) if levels else None
    charts: dict[str, bytes] = {}
    if len(axes) == 1:
        a = axes[0].name
        charts[f"measures_vs_{a}"] = _line_chart(
            table, a, measures, currency, f"Risk measures against {a}"
        )
    elif len(axes) == 2:
        x, y = axes[0], axes[1]
        for m in ["expected_loss"] + ([f"var_{top}", f"expected_shortfall_{top}"] if top else []):
            charts[f"heatmap_{m}"] = _heat_map(
                table, x, y, m, currency, f"{_label(m)} over {x.name} and {y.name}"
            )
    else:
        held = {a.name: _nearest_neutral(a) for a in axes}
        for a in axes:
            mask = np.ones(len(table), dtype=bool)
            for other in axes:
                if other.name != a.name:
                    mask &= np.isclose(table[other.name].to_numpy(dtype=float), held[other.name])
            others = ", ".join(f"{k} {v:g}" for k, v in held.items() if k != a.name)
            charts[f"measures_vs_{a.name}"] = _line_chart(
                table[mask],
                a.name,
                measures,
                currency,
                f"Risk measures against {a.name} ({others})",
            )
    return charts


def write_sweep_report(path: Path, result: SweepResult, charts: Mapping[str, bytes]) -> None:
    """Write the sweep page: settings, charts and the table.

    Parameters
    ----------
    path : Path
        The ``report.html`` to write.
    result : SweepResult
        The sweep.
    charts : mapping of str to bytes
        From :func:`sweep_charts`.

    """
    book = result.book
    o = result.options
    esc = html.escape
    table = result.table
    grid = "; ".join(f"{a.name} = {', '.join(f'{v:g}' for v in a.values)}" for a in result.axes)
    parts = [
        f"<h1>Sensitivity sweep: {esc(book.name)}</h1>",
        f'<p class="meta">{len(book.obligors)} obligors, {len(book.links)} links; grid '
        f"{esc(grid)} ({len(table)} points, {result.failed} failed); engine option "
        f"{esc(o.engine)}, base seed {o.seed} (each point its own seed from it)"
        + (f", samples {o.samples}" if o.samples else "")
        + f"; {result.computed} points computed {esc(result.execution)}, {result.reused} reused "
        f"from earlier work, {result.seconds:.1f} s.</p>",
    ]
    for name, png in charts.items():
        parts.append(_img(png, name))
    cols = list(table.columns)
    parts.append(
        "<h2>All points</h2><p class=meta>Also in <code>sweep.csv</code> and "
        "<code>sweep.parquet</code>.</p><table><tr>"
        + "".join(f"<th>{esc(_label(c))}</th>" for c in cols)
        + "</tr>"
    )
    axis_names = {a.name for a in result.axes}
    for _, row in table.iterrows():
        cells = []
        for c in cols:
            v = row[c]
            if c in axis_names:
                cells.append(f"<td>{float(v):g}</td>")
            elif c == "status":
                cls = ' class="failed"' if v != "ok" else ""
                cells.append(f"<td{cls}>{esc(str(v))}</td>")
            elif c == "error":
                cells.append(f"<td class=t>{esc(str(v))}</td>")
            else:
                cells.append(f"<td>{_money(v)}</td>")
        parts.append("<tr>" + "".join(cells) + "</tr>")
    parts.append("</table>")
    path.write_text(_page(f"Sweep: {book.name}", "\n".join(parts)), encoding="utf-8")
