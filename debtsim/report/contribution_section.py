"""The report section on risk contributions: where the tail comes from.

Reads the run's contribution tables (computed in :mod:`debtsim.contributions`);
computes nothing but rankings and shares for display.
"""

from __future__ import annotations

import numpy as np

from debtsim.report import charts
from debtsim.report.formatting import level_label, money, percent
from debtsim.report.page import esc, figure
from debtsim.report.run_view import RunView

__all__ = ["TOP_CONTRIBUTORS", "contribution_section"]


def _amount(x: float, currency: str) -> str:
    """Format an amount with the book's currency, escaped (the currency is user text)."""
    return esc(money(x, currency))


#: Obligors shown in the top-contributors chart and table.
TOP_CONTRIBUTORS = 15


def contribution_section(analysis: RunView) -> str:
    """HTML of the contributions section ('' when the run allocated nothing)."""
    table = analysis.contributions
    sectors = analysis.sector_contributions
    allocation = analysis.allocation
    if table is None or sectors is None or allocation is None or not allocation.levels:
        return ""
    currency = analysis.book.currency
    top = allocation.levels[-1]
    es_col = f"expected_shortfall_{top}"
    ec_col = f"economic_capital_{top}"
    es = table[es_col].to_numpy()
    el = table["expected_loss"].to_numpy()
    es_total = float(es.sum())
    contagion_es = float(table[es_col + "_contagion"].sum())
    share = contagion_es / es_total if es_total else 0.0
    parts = ["<h2 id='contributions'>Where the tail comes from</h2>",
             f"<p>Each obligor's share of the book's risk (Euler allocation: the shares add up "
             f"to the book's figure). Contagion — defaults dragged in along links — carries "
             f"<b>{percent(share)}</b> of the expected shortfall at "
             f"{esc(level_label(top))} ({_amount(contagion_es, currency)} of "
             f"{_amount(es_total, currency)}). Every figure per obligor is in "
             "<code>contributions.csv</code>, by sector in <code>sectors.csv</code>.</p>"]
    order = np.argsort(-es, kind="stable")[:TOP_CONTRIBUTORS]
    labels = [str(table["id"].iloc[i]) for i in order]
    parts.append(figure(
        charts.paired_bars_chart(
            labels, es[order].tolist(), el[order].tolist(),
            (f"ES contribution at {level_label(top)}", "expected loss"),
            f"Largest contributors to expected shortfall at {level_label(top)}",
            contagion=table[es_col + "_contagion"].to_numpy()[order].tolist(),
        ),
        "largest contributors to expected shortfall",
        f"Up to {TOP_CONTRIBUTORS} obligors with the largest expected-shortfall contribution "
        "(grey, orange: the part due to contagion) beside their expected loss (blue). A name "
        "whose bar far exceeds its expected loss is concentrated risk, not just a large loan.",
    ))
    rows = "".join(
        f"<tr><td>{esc(str(table['id'].iloc[i]))}</td><td>{esc(str(table['sector'].iloc[i]))}"
        f"</td><td class='n'>{_amount(float(es[i]), currency)}</td>"
        f"<td class='n'>{percent(float(es[i]) / es_total if es_total else None)}</td>"
        f"<td class='n'>{_amount(float(el[i]), currency)}</td>"
        f"<td class='n'>{_amount(float(table[ec_col].iloc[i]), currency)}</td>"
        f"<td class='n'>{_amount(float(table['irb_capital'].iloc[i]), currency)}</td></tr>"
        for i in order
    )
    parts.append(
        "<table><thead><tr><th>Obligor</th><th>Sector</th>"
        f"<th class='n'>ES {esc(level_label(top))}</th><th class='n'>Share</th>"
        "<th class='n'>Expected loss</th>"
        f"<th class='n'>Capital {esc(level_label(top))}</th>"
        f"<th class='n'>IRB capital</th></tr></thead><tbody>{rows}</tbody></table>"
    )
    labels = [str(s) or "(no sector)" for s in sectors["sector"]]
    parts.append(figure(
        charts.paired_bars_chart(
            labels, sectors[ec_col].tolist(), sectors["irb_capital"].tolist(),
            (f"model capital (VaR − EL) at {level_label(top)}", "Basel II IRB capital"),
            "Capital by sector: the model against the regulatory yardstick",
            contagion=sectors[ec_col + "_contagion"].tolist(),
        ),
        "capital by sector, model against IRB",
        "The model's economic capital shared by sector (in proportion to ES minus EL, "
        "orange: contagion part) beside the Basel II corporate IRB capital with each "
        "obligor's maturity (a yardstick only: the IRB formula knows no links and uses "
        "supervisory correlations).",
    ))
    if allocation.standard_error is not None:
        parts.append("<p class='note'>Sampled run: contributions are estimates; their "
                     "batch-means standard errors are in the run's allocation "
                     "(<code>RunResult.allocation.standard_error</code>). Contributions to "
                     "VaR rest on the few scenarios at the VaR atom and are the noisiest; "
                     "capital is shared by ES contributions for that reason.</p>")
    return "".join(parts)
