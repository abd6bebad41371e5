"""The pages that compare runs: the stress report and the sweep report.

Both use the run page's frame and stylesheet (:mod:`debtsim.report.page`):
the caution at the top, model warnings as warning boxes, then the page's
sections.  This module lays out pages; the numbers come computed in the
:class:`~debtsim.studies.stress.StressResult` or
:class:`~debtsim.studies.sweep.SweepResult`, and the charts from
:mod:`debtsim.report.study_charts`.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from debtsim.report.formatting import level_label, money, percent, relative_change, signed_pp
from debtsim.report.page import esc, figure, render_page
from debtsim.report.study_charts import (
    loss_distributions_chart,
    measure_label,
    measures_by_scenario_chart,
    movers_chart,
    sweep_charts,
)
from debtsim.report.text import PD_WITH_CONTAGION

if TYPE_CHECKING:
    from debtsim.studies.stress import StressResult
    from debtsim.studies.sweep import SweepResult

__all__ = ["render_stress_page", "render_sweep_page", "sweep_charts", "write_stress_report",
           "write_sweep_report"]

#: Obligors drawn and listed under "Default probabilities that moved most".
MOVERS_SHOWN = 15


def _b64(png: bytes) -> str:
    return base64.b64encode(png).decode("ascii")


def _amount(x: Any) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    return money(float(x))


def _change_cell(value: float, base: float) -> str:
    """Return a relative change against the base, in %, coloured by direction."""
    if math.isnan(value) or math.isnan(base) or base <= 0:
        return ""
    rel = value / base - 1.0
    if abs(rel) < 0.0005:
        return ""
    cls = "up" if rel > 0 else "down"
    return f'<span class="chg {cls}">{relative_change(value, base)}</span>'


# --------------------------------------------------------------- stress page
def render_stress_page(result: StressResult) -> str:
    """Build the stress comparison page.

    Parameters
    ----------
    result : StressResult
        The runs to compare, base first.

    Returns
    -------
    str
        A self-contained HTML page.

    """
    book = result.book
    o = result.options
    levels = o.levels
    cur = book.currency
    table = result.table
    names = list(table["scenario"])
    runs = list(result.runs)
    shown = min(MOVERS_SHOWN, len(result.default_probabilities))
    subtitle = (
        f"{len(book.obligors):,} obligors, {len(book.links):,} links · base and "
        f"{len(names) - 1} stress scenarios · amounts in {cur or 'the book currency'}"
    )
    warnings = [
        f"Scenario “{name}” failed and is left out of this comparison: {why}"
        for name, why in result.failures
    ]
    for name, run in zip(names, runs, strict=True):
        warnings += [f"Scenario “{name}”: {note}" for note in run.notes]

    parts = [
        '<h2>Run</h2><dl class="facts">',
        f"<dt>Book</dt><dd>{esc(book.name)}"
        + (f' <span class="note">({esc(book.source)})</span>' if book.source else "")
        + "</dd>",
        f"<dt>Engine option</dt><dd>{esc(o.engine)}, seed {o.seed}"
        + (f", {o.samples:,} samples" if o.samples else "")
        + "; every scenario runs with the same options as the base</dd>",
        f"<dt>Computed</dt><dd>{len(names)} runs {esc(result.execution)} in "
        f"{result.seconds:.1f} s</dd></dl>",
        '<h2>Scenarios</h2><div class="scroll"><table><thead><tr><th>Scenario</th>'
        "<th>Changes</th><th>Engine</th><th>Full report</th></tr></thead><tbody>",
    ]
    for s, folder, run in zip(result.scenarios, result.folders, runs, strict=True):
        parts.append(
            f"<tr><td>{esc(s.name)}</td><td>{esc(s.describe())}</td><td>{esc(run.engine)}</td>"
            f'<td><a href="{esc(folder)}/report.html">{esc(folder)}/</a></td></tr>'
        )
    parts.append("</tbody></table></div>")

    cols = [c for c in table.columns if c != "scenario"]
    parts.append(
        f"<h2>Risk measures</h2><p class='note'>Amounts in {esc(cur or 'the book currency')}. "
        "Under each scenario's figure: its relative change against the base, in %. "
        "EC is economic capital, VaR − EL.</p>"
        '<div class="scroll"><table><thead><tr><th>Scenario</th>'
        + "".join(f'<th class="n">{esc(measure_label(c))}</th>' for c in cols)
        + "</tr></thead><tbody>"
    )
    base_row = table.iloc[0]
    for i, (_, row) in enumerate(table.iterrows()):
        cells = "".join(
            f'<td class="n">{_amount(row[c])}'
            + ("" if i == 0 else _change_cell(float(row[c]), float(base_row[c])))
            + "</td>"
            for c in cols
        )
        cls = ' class="base"' if i == 0 else ""
        parts.append(f"<tr{cls}><td>{esc(str(row['scenario']))}</td>{cells}</tr>")
    parts.append("</tbody></table></div>")
    parts.append(figure(_b64(measures_by_scenario_chart(table, levels, cur)),
                        "risk measures by scenario",
                        "EL, VaR and ES at each level, one bar per scenario (base in black)."))
    parts.append("<h2>Loss distributions</h2>")
    parts.append(figure(
        _b64(loss_distributions_chart(names, [r.loss_distribution for r in runs], levels, cur)),
        "loss distributions overlaid",
        "Probability that the loss exceeds each level, on a log scale, for the base and each "
        "scenario. Grey horizontal lines: the tail probabilities 1 − a of the confidence levels.",
    ))
    dp = result.default_probabilities
    top = dp.head(shown)
    parts.append(
        f"<h2>Default probabilities that moved most</h2><p class='note'>{PD_WITH_CONTAGION} "
        "(own default, or dragged in along links) for the base and each scenario; obligors "
        "ranked by the largest change from the base, in percentage points (pp). Every obligor "
        "is in <code>default_probabilities.csv</code>.</p>"
    )
    if len(names) > 1 and shown:
        parts.append(figure(
            _b64(movers_chart(dp, names, shown)), "default probabilities moved",
            "Open circle: the base; dots: each scenario; the grey bar spans the range.",
        ))
    parts.append(
        '<div class="scroll"><table><thead><tr><th>Obligor</th><th>Sector</th>'
        '<th class="n">Book PD</th>'
        + "".join(f'<th class="n">{esc(n)}</th>' for n in names)
        + '<th class="n">Largest change</th></tr></thead><tbody>'
    )
    for _, row in top.iterrows():
        label = f"{row['id']} {row['name']}".strip()
        parts.append(
            f"<tr><td>{esc(label)}</td><td>{esc(str(row['sector']))}</td>"
            f'<td class="n">{percent(float(row["pd"]))}</td>'
            + "".join(f'<td class="n">{percent(float(row[n]))}</td>' for n in names)
            + f'<td class="n up">{signed_pp(float(row["largest_change"]))}</td></tr>'
        )
    parts.append("</tbody></table></div>")
    movers = result.contribution_movers
    if movers is not None and len(movers):
        level = result.options.levels[-1]
        parts.append(
            f"<h2>Risk contributions that moved most</h2><p class='note'>Each obligor's "
            f"contribution to expected shortfall at {esc(level_label(level))} (its Euler share "
            "of the book's ES) in the base and in the scenario; up to "
            f"{int(movers.groupby('scenario').size().max())} obligors per scenario, largest "
            "change first. Each "
            "sub-folder holds the run's <code>contributions.csv</code>; all movers are in "
            "<code>contribution_movers.csv</code>.</p>"
            '<div class="scroll"><table><thead><tr><th>Scenario</th><th>Obligor</th>'
            '<th>Sector</th><th class="n">Base</th><th class="n">Scenario</th>'
            '<th class="n">Change</th><th class="n">of which contagion</th></tr></thead><tbody>'
        )
        for _, row in movers.iterrows():
            parts.append(
                f"<tr><td>{esc(str(row['scenario']))}</td><td>{esc(str(row['id']))}</td>"
                f"<td>{esc(str(row['sector']))}</td>"
                f'<td class="n">{_amount(row["base"])}</td>'
                f'<td class="n">{_amount(row["stressed"])}</td>'
                f'<td class="n">{_amount(row["change"])}</td>'
                f'<td class="n">{_amount(row["contagion_change"])}</td></tr>'
            )
        parts.append("</tbody></table></div>")
    files = ("report.html", "scenarios.csv", "default_probabilities.csv",
             *(("contribution_movers.csv",) if movers is not None else ()),
             *(f"{f}/" for f in result.folders))
    return render_page(f"Stress scenarios: {book.name}", subtitle, "\n".join(parts),
                       warnings=warnings, files=files)


def write_stress_report(path: Path, result: StressResult) -> None:
    """Write the stress comparison page to ``path`` (see :func:`render_stress_page`)."""
    path.write_text(render_stress_page(result), encoding="utf-8")


# ---------------------------------------------------------------- sweep page
def render_sweep_page(result: SweepResult, charts: Mapping[str, bytes]) -> str:
    """Build the sweep page: settings, charts and every grid point.

    Parameters
    ----------
    result : SweepResult
        The sweep.
    charts : mapping of str to bytes
        From :func:`debtsim.report.study_charts.sweep_charts`, by file stem.

    Returns
    -------
    str
        A self-contained HTML page.

    """
    book = result.book
    o = result.options
    table = result.table
    cur = book.currency
    grid = "; ".join(f"{a.name} = {', '.join(f'{v:g}' for v in a.values)}" for a in result.axes)
    subtitle = (
        f"{len(book.obligors):,} obligors, {len(book.links):,} links · {len(table)} grid points"
        f" · amounts in {cur or 'the book currency'}"
    )
    parts = [
        '<h2>Run</h2><dl class="facts">',
        f"<dt>Book</dt><dd>{esc(book.name)}"
        + (f' <span class="note">({esc(book.source)})</span>' if book.source else "")
        + "</dd>",
        f"<dt>Grid</dt><dd>{esc(grid)} ({len(table)} points, {result.failed} failed)</dd>",
        f"<dt>Engine option</dt><dd>{esc(o.engine)}, base seed {o.seed} (each point its own "
        "seed derived from it)" + (f", {o.samples:,} samples" if o.samples else "") + "</dd>",
        f"<dt>Computed</dt><dd>{result.computed} points {esc(result.execution)}, "
        f"{result.reused} reused from earlier work, {result.seconds:.1f} s</dd></dl>",
        "<h2>Charts</h2>",
    ]
    for name, png in charts.items():
        parts.append(figure(_b64(png), name, f"Also saved as <code>charts/{esc(name)}.png</code>."))
    cols = list(table.columns)
    parts.append(
        "<h2>All points</h2><p class='note'>Amounts in "
        f"{esc(cur or 'the book currency')}. Also in <code>sweep.csv</code> and "
        "<code>sweep.parquet</code>.</p>"
        '<div class="scroll"><table><thead><tr>'
        + "".join(
            f'<th{"" if c in ("status", "error") else " class=n"}>{esc(measure_label(c))}</th>'
            for c in cols
        )
        + "</tr></thead><tbody>"
    )
    axis_names = {a.name for a in result.axes}
    for _, row in table.iterrows():
        cells = []
        for c in cols:
            v = row[c]
            if c in axis_names:
                cells.append(f'<td class="n">{float(v):g}</td>')
            elif c == "status":
                cls = ' class="failed"' if v != "ok" else ""
                cells.append(f"<td{cls}>{esc(str(v))}</td>")
            elif c == "error":
                cells.append(f"<td>{esc('' if v is None else str(v))}</td>")
            else:
                cells.append(f'<td class="n">{_amount(v)}</td>')
        parts.append("<tr>" + "".join(cells) + "</tr>")
    parts.append("</tbody></table></div>")
    files = ("report.html", "sweep.csv", "sweep.parquet", "charts/")
    return render_page(f"Sensitivity sweep: {book.name}", subtitle, "\n".join(parts),
                       warnings=tuple(result.notes), files=files)


def write_sweep_report(path: Path, result: SweepResult, charts: Mapping[str, bytes]) -> None:
    """Write the sweep page to ``path`` (see :func:`render_sweep_page`)."""
    path.write_text(render_sweep_page(result, charts), encoding="utf-8")
