"""The self-contained HTML page of a run: inline CSS, charts as embedded PNG.

The page shows what the run computed; it computes nothing itself beyond
ordering rows for display.  All text from the book is escaped.  Its order:
the caution and any model warning, one line on numerical accuracy, the
headline figures, the run, the measures with and without links, the charts,
contagion, the book, how to read the page, and an appendix holding the
engine's settings and error estimates under plain labels.
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from debtsim.distribution import LossDistribution
from debtsim.link_effects import contagion_effect, obligor_contagion, rank_links
from debtsim.output_files import generator
from debtsim.report import charts
from debtsim.report.contribution_section import contribution_section
from debtsim.report.formatting import (
    NOISE,
    level_label,
    money,
    number,
    percent,
    relative_change,
    signed_money,
    signed_pp,
)
from debtsim.report.page import esc, figure, render_page
from debtsim.report.run_view import RunView
from debtsim.report.text import PD_WITH_CONTAGION, WITHOUT_LINKS, WITHOUT_LINKS_HEADING
from debtsim.risk import level_key

__all__ = [
    "BOOK_ROWS",
    "DETAIL_LABELS",
    "LINK_ROWS",
    "UPLIFT_BARS",
    "accuracy_line",
    "render_html",
]

#: Obligors listed in the page (the largest exposures when the book is bigger).
BOOK_ROWS = 50
#: Links listed in the page.
LINK_ROWS = 25
#: Obligors drawn in the uplift chart.
UPLIFT_BARS = 25
#: Files of a run folder, named in the footer.
RUN_FILES = (
    "summary.json",
    "loss_distribution.csv",
    "obligors.csv",
    "contributions.csv",
    "sectors.csv",
    "report.html",
)

#: Plain labels of engine settings and diagnostics (keys as in ``summary.json``).
DETAIL_LABELS: Mapping[str, str] = {
    # settings
    "factor_nodes": "Factor grid points",
    "factor_method": "Factor grid method",
    "factor_grid": "Factor grid method",
    "loss_support": "Loss amounts held as",
    "grid_unit": "Loss grid step (amount)",
    "grid_points": "Loss grid points",
    "linked_groups": "Linked groups",
    "largest_linked_group": "Largest linked group (obligors)",
    "qubits": "Qubits",
    "shots": "Measurement shots",
    "importance": "Importance sampling used",
    "factor_shift": "Shift of the factor by the importance sampler",
    "block": "Scenarios per block",
    "chunk": "Obligors per chunk",
    "plain_share": "Share of scenarios drawn without importance sampling",
    "tilts": "Importance-sampling tilts by level",
    # diagnostics
    "discretisation_error": "Possible error of VaR and ES from the loss grid (amount)",
    "discretisation_error_relative": "Possible error of VaR and ES from the loss grid (relative)",
    "conditional_mean_shift": "Largest shift of the conditional mean loss by the grid (relative)",
    "grid_exact": "Loss grid holds every loss amount exactly",
    "grid_unit_rescale": "Rescaling of the loss grid step",
    "max_loss_rounding": "Largest rounding of an obligor's loss (amount)",
    "loss_rounding_bound": "Bound on the rounding of a loss (amount)",
    "window_tail_bound": "Probability left outside the conditional windows (bound)",
    "widest_window": "Widest conditional window (grid points)",
    "series_truncation": "Truncation error of the conditional series",
    "series_tolerance": "Tolerance of the conditional series",
    "factor_truncation_mass": "Probability of the factor outside the grid's range",
    "probability_mass_error": "Probability mass lost by the statevector",
    "factor_node_pd_error": "Largest relative PD error of the factor nodes",
    "expected_loss_standard_error": "Standard error of EL",
    "var_standard_error": "Standard error of VaR",
    "expected_shortfall_standard_error": "Standard error of ES",
    "tail_probability": "Probability of a loss beyond VaR",
    "tail_probability_standard_error": "Standard error of the probability beyond VaR",
    "effective_sample_size": "Effective sample size",
    "batches": "Batches for the standard errors",
    "log_weight_interpolation_error": "Interpolation error of the importance weights (log)",
    "max_weight": "Largest importance weight",
}

#: Diagnostics with one value per obligor: written to ``obligors.csv``, not listed.
PER_OBLIGOR = ("default_probability_standard_error",)


# ---------------------------------------------------------- standard errors
_SE_ALIASES = {
    "expected_loss": ("expected_loss",),
    "loss_std": ("loss_std",),
    "var": ("var", "value_at_risk"),
    "expected_shortfall": ("expected_shortfall", "es"),
    "economic_capital": ("economic_capital",),
}


def _standard_error(
    diag: Mapping[str, Any], measure: str, key: float | str | None
) -> float | None:
    """Look up a standard error an engine reported, if any (``<measure>_standard_error``).

    Per-level errors may be keyed by the level as a float or as ``str(float)``.
    """
    for name in _SE_ALIASES[measure]:
        value = diag.get(f"{name}_standard_error")
        if value is None:
            continue
        if isinstance(value, Mapping):
            if key is None:
                return None
            value = value.get(key, value.get(level_key(float(key))))
        try:
            f = float(value)
        except (TypeError, ValueError):
            return None
        return f if math.isfinite(f) else None
    return None


def _with_se(value: float, se: float | None) -> str:
    if se is None:
        return money(value)
    return f'{money(value)} <span class="se">± {money(se)}</span>'


# ------------------------------------------------------------ accuracy line
def accuracy_line(dist: LossDistribution, currency: str = "") -> str:
    """One sentence on how accurate the figures are, for the top of the page.

    Parameters
    ----------
    dist : LossDistribution
        The loss distribution with links.
    currency : str
        Written after amounts.

    Returns
    -------
    str
        Plain text.

    """
    diag = dist.diagnostics
    settings = dist.settings
    nodes = settings.get("factor_nodes")
    if dist.samples is not None:
        text = (f"Sampled from {dist.samples:,} scenarios (seed {dist.seed}): figures carry "
                "sampling error, shown after ± as one standard error where the engine "
                "reports it")
        ess = diag.get("effective_sample_size")
        if isinstance(ess, (int, float)) and math.isfinite(ess):
            text += f"; effective sample size {float(ess):,.0f}"
        return text + "."
    if "factor_node_pd_error" in diag:
        err = float(diag["factor_node_pd_error"])
        return (f"Exact for the circuit's {nodes} factor nodes, no sampling; the nodes "
                f"reproduce every obligor's PD to within {percent(err)} (relative).")
    where = f"on a factor grid of {nodes} points" if nodes else "on the engine's factor grid"
    if diag.get("grid_exact", True) and not diag.get("discretisation_error"):
        return f"Exact {where}, no sampling; every loss amount is kept exactly."
    unit = settings.get("grid_unit")
    error = float(diag.get("discretisation_error", 0.0))
    rel = float(diag.get("discretisation_error_relative", 0.0))
    step = f"steps of {money(unit, currency)}" if unit else "a grid"
    return (f"Exact {where}, no sampling; losses are counted in {step}, which may move VaR "
            f"and ES by up to about {money(error, currency)} ({percent(rel)}).")


# ---------------------------------------------------------------- sections
def _law_text(dist: LossDistribution) -> str:
    if dist.samples is None:
        text = "no sampling"
        if dist.seed is not None:
            text += f", seed {dist.seed}"
    else:
        text = f"{dist.samples:,} sampled scenarios, seed {dist.seed}"
    return f"{text}; {dist.losses.size:,} distinct loss amounts"


def _facts(analysis: RunView, created: _dt.datetime) -> str:
    book = analysis.book
    dist = analysis.loss_distribution
    cd = analysis.copula_distribution
    rows: list[tuple[str, str]] = [
        ("Book", esc(book.name) + (f' <span class="note">({esc(book.source)})</span>'
                                   if book.source else "")),
        ("Obligors", f"{len(book.obligors):,}, total exposure "
                     f"{esc(money(book.total_exposure, book.currency))}"),
        ("Links", f"{len(book.links):,}" if book.links else "none"),
        ("Engine", f"<b>{esc(analysis.engine)}</b> — {esc(analysis.engine_reason)}"),
        ("Loss distribution", f"{esc(dist.engine)} engine, {esc(_law_text(dist))}"),
    ]
    if cd is not None:
        rows.append(("Without links", f"{esc(cd.engine)} engine, {esc(_law_text(cd))}"))
    else:
        rows.append(("Without links", "not computed"))
    rows.append(("Confidence levels", ", ".join(level_label(k) for k in analysis.measures.var)))
    rows.append(("Engine details", 'settings and error estimates in the '
                 '<a href="#appendix">appendix</a>'))
    rows.append(("Generated", f"{created:%Y-%m-%d %H:%M} UTC by {esc(generator())}"))
    body = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in rows)
    return f'<h2>Run</h2><dl class="facts">{body}</dl>'


def _kpis(analysis: RunView) -> str:
    m = analysis.measures
    cm = analysis.copula_measures
    cur = analysis.book.currency
    effect = contagion_effect(m, cm)
    top = max(m.var, key=float) if m.var else None
    el_diff = effect["expected_loss_from_contagion"]
    diag = analysis.loss_distribution.diagnostics
    cards: list[tuple[str, float, float | None, float | None, float | None]] = [
        ("Expected loss", m.expected_loss,
         float(el_diff) if isinstance(el_diff, (int, float)) else None,
         cm.expected_loss if cm else None, _standard_error(diag, "expected_loss", None)),
    ]
    if top is not None:
        for label, name, values, plain in (
            (f"VaR {level_label(top)}", "var", m.var, cm.var if cm else None),
            (f"Expected shortfall {level_label(top)}", "expected_shortfall",
             m.expected_shortfall, cm.expected_shortfall if cm else None),
            (f"Economic capital {level_label(top)}", "economic_capital", m.economic_capital,
             cm.economic_capital if cm else None),
        ):
            diffs = effect[f"{name}_from_contagion"]
            found = diffs.get(top) if isinstance(diffs, Mapping) else None
            diff = float(found) if isinstance(found, (int, float)) else None
            cards.append((label, values[top], diff, plain.get(top) if plain else None,
                          _standard_error(diag, name, top)))
    html = []
    for label, value, diff, plain_value, se in cards:
        d = ""
        if diff is not None:
            rel = relative_change(value, plain_value)
            d = (f'<div class="d">{esc(signed_money(float(diff), cur))} from contagion'
                 + (f" ({rel})" if rel != "–" else "") + "</div>")
        unit = f'<span class="cur">{esc(cur)}</span>' if cur else ""
        error = (f'<div class="se">± {esc(money(se, cur))} (one standard error)</div>'
                 if se is not None else "")
        html.append(f'<div class="kpi"><div class="l">{esc(label)}</div>'
                    f'<div class="v">{money(value)}{unit}</div>{error}{d}</div>')
    return f'<div class="kpis">{"".join(html)}</div>'


def _measures_table(analysis: RunView) -> str:
    m = analysis.measures
    cm = analysis.copula_measures
    diag = analysis.loss_distribution.diagnostics
    cdiag = analysis.copula_distribution.diagnostics if analysis.copula_distribution else {}
    cur = analysis.book.currency

    rows: list[tuple[str, str, float | None, float, float | None]] = [
        ("Expected loss (EL)", "expected_loss", None, m.expected_loss,
         cm.expected_loss if cm else None),
        ("Loss standard deviation", "loss_std", None, m.loss_std, cm.loss_std if cm else None),
    ]
    for key in m.var:
        rows += [
            (f"VaR {level_label(key)}", "var", key, m.var[key],
             cm.var.get(key) if cm else None),
            (f"Expected shortfall {level_label(key)}", "expected_shortfall", key,
             m.expected_shortfall[key], cm.expected_shortfall.get(key) if cm else None),
            (f"Economic capital {level_label(key)} (VaR − EL)", "economic_capital", key,
             m.economic_capital[key], cm.economic_capital.get(key) if cm else None),
        ]

    head = '<th>Measure</th><th class="n">With links</th>'
    if cm is not None:
        head += (f'<th class="n">{esc(WITHOUT_LINKS_HEADING)}</th>'
                 '<th class="n">From contagion</th><th class="n">Relative change (%)</th>')

    def row(label: str, measure: str, key: float | None, v: float, c: float | None) -> str:
        se = _standard_error(diag, measure, key)
        cells = f'<td>{esc(label)}</td><td class="n m">{_with_se(v, se)}</td>'
        if cm is not None:
            if c is None:
                cells += '<td class="n">–</td>' * 3
            else:
                cells += (
                    f'<td class="n c">{_with_se(c, _standard_error(cdiag, measure, key))}</td>'
                    f'<td class="n up">{signed_money(v - c)}</td>'
                    f'<td class="n up">{relative_change(v, c)}</td>'
                )
        return f"<tr>{cells}</tr>"

    body = [row(*r) for r in rows]
    note = f'<p class="note">Amounts in {esc(cur)}.' if cur else '<p class="note">'
    if cm is None:
        note += f" The comparison {esc(WITHOUT_LINKS)} was not computed for this run."
    else:
        note += (" “From contagion” is the measure with links minus the same measure for the "
                 f"book read {esc(WITHOUT_LINKS)}; the relative change is that difference over "
                 "the measure without links, in percent.")
    if any(k.endswith("_standard_error") and k not in PER_OBLIGOR for k in diag):
        note += " Figures after ± are sampling standard errors reported by the engine."
    note += "</p>"
    return (f'<h2>Risk measures</h2><div class="scroll"><table><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>{note}')


def _charts(analysis: RunView) -> str:
    dist = analysis.loss_distribution
    cd = analysis.copula_distribution
    m = analysis.measures
    cur = analysis.book.currency
    binned = dist.losses.size > charts.MAX_ATOMS_DRAWN or (
        cd is not None and cd.losses.size > charts.MAX_ATOMS_DRAWN
    )
    caption = (
        "Probability of each possible portfolio loss"
        + (f" summed over {charts.BINS} equal-width bins" if binned else "")
        + ". Dotted line: expected loss; dashed lines: VaR at each level."
        + (f" Grey: the same book {esc(WITHOUT_LINKS)}." if cd is not None else "")
        + " A bar far taller than the rest (usually no loss at all) is cut, its height "
        "written beside it."
    )
    parts = [
        "<h2>Loss distribution</h2>",
        figure(charts.loss_distribution_chart(dist, m, cd, cur), "loss distribution", caption),
        figure(
            charts.tail_chart(dist, m, cd, cur), "tail of the loss distribution",
            "Probability that the loss exceeds each level, on a log scale. VaR at level a is "
            "where the curve first drops to 1 − a or below (grey horizontal lines).",
        ),
        figure(
            charts.comparison_chart(m, analysis.copula_measures, cur), "risk measures compared",
            "Expected loss, VaR and expected shortfall"
            + (f" with links (blue) and, in grey, {esc(WITHOUT_LINKS)}." if cd is not None
               else "."),
        ),
    ]
    return "".join(parts)


def _obligor_label(analysis: RunView, index: int) -> str:
    o = analysis.book.obligors[index]
    name = o.name if len(o.name) <= 28 else o.name[:27] + "…"
    return f"{o.id} · {name}" if name else o.id


def _contagion_section(analysis: RunView) -> str:
    book = analysis.book
    dist = analysis.loss_distribution
    if not book.links:
        return ("<h2>Contagion</h2><p>This book has <b>no links</b>: no obligor holds a claim on "
                "another, so the model reduces to the one-factor Gaussian copula and every "
                f"{esc(PD_WITH_CONTAGION)} equals the obligor's own PD.</p>")
    oc = obligor_contagion(book, dist.default_probability)
    order = np.argsort(-oc.contagion_uplift, kind="stable")[:UPLIFT_BARS]
    order = order[oc.contagion_uplift[order] > NOISE]
    parts = ["<h2>Contagion</h2>"]
    if order.size:
        parts.append(figure(
            charts.uplift_chart(
                [_obligor_label(analysis, int(i)) for i in order],
                oc.own_default_probability[order].tolist(),
                oc.contagion_uplift[order].tolist(),
            ),
            "default probability added by contagion",
            f"Obligors with the largest contagion uplift (up to {UPLIFT_BARS}): grey is the "
            "obligor's own PD, orange the probability added by defaults reaching it along "
            f"links ({esc(PD_WITH_CONTAGION)} minus own PD).",
        ))
    else:
        parts.append("<p>No obligor's default probability is raised by contagion in this run.</p>")

    ranked = rank_links(book, dist.default_probability, top=LINK_ROWS)
    names = {o.id: o.name for o in book.obligors}
    has_amount = any(lk.amount is not None for lk in book.links)
    head = ("<th>Creditor</th><th>Debtor</th><th class='n'>Contagion q</th>"
            + ("<th class='n'>Claim amount</th>" if has_amount else "")
            + f"<th class='n'>Debtor {esc(PD_WITH_CONTAGION)}</th>"
              "<th class='n'>Creditor own PD</th>"
              "<th class='n'>Creditor EAD×LGD</th><th class='n'>Transmitted loss</th>")
    rows = []
    for t in ranked:
        def who(i: str) -> str:
            n = names.get(i, "")
            return esc(i) + (f' <span class="note">{esc(n)}</span>' if n else "")

        cells = (f"<td>{who(t.creditor)}</td><td>{who(t.debtor)}</td>"
                 f"<td class='n'>{number(t.contagion)}</td>")
        if has_amount:
            cells += f"<td class='n'>{money(t.amount)}</td>"
        cells += (f"<td class='n'>{percent(t.debtor_default_probability)}</td>"
                  f"<td class='n'>{percent(1 - t.creditor_survival)}</td>"
                  f"<td class='n'>{money(t.creditor_loss_given_default)}</td>"
                  f"<td class='n m'>{money(t.transmitted_loss)}</td>")
        rows.append(f"<tr>{cells}</tr>")
    shown = (f"the {len(ranked)} highest of {len(book.links):,} links"
             if len(book.links) > len(ranked) else f"all {len(book.links):,} links")
    parts.append(
        f"<h3>Most contagious links</h3><p class='note'>Ranked by a first-order indicator, "
        f"{shown}: <i>transmitted loss</i> = q × debtor's {esc(PD_WITH_CONTAGION)} × "
        "(1 − creditor's own PD) × creditor's EAD × LGD, the expected extra loss at the "
        "creditor if this link alone carried the debtor's default. It ignores longer paths "
        "and the dependence through the common factor, so it ranks links; it does not add up "
        "to the loss from contagion (see “From contagion” above). Amounts in "
        f"{esc(analysis.book.currency or 'the book currency')}.</p>"
        f"<div class='scroll'><table><thead><tr>{head}</tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table></div>"
    )
    return "".join(parts)


def _book_table(analysis: RunView) -> str:
    book = analysis.book
    oc = obligor_contagion(book, analysis.loss_distribution.default_probability)
    n = len(book.obligors)
    if n > BOOK_ROWS:
        ead = np.array([o.ead for o in book.obligors])
        idx: Sequence[int] = np.argsort(-ead, kind="stable")[:BOOK_ROWS].tolist()
        note = (f"The {BOOK_ROWS} largest exposures of {n:,} obligors, largest first; "
                "<code>obligors.csv</code> lists every obligor.")
    else:
        idx = range(n)
        note = "Every obligor, in book order; also in <code>obligors.csv</code>."
    links = bool(book.links)
    head = ("<th>Id</th><th>Name</th><th>Sector</th><th class='n'>EAD</th><th class='n'>PD</th>"
            "<th class='n'>LGD</th><th class='n'>R</th>"
            + (f"<th class='n'>{esc(PD_WITH_CONTAGION)}</th><th class='n'>Uplift (pp)</th>"
               if links else "")
            + "<th class='n'>Expected loss</th>")
    rows = []
    for i in idx:
        o = book.obligors[i]
        cells = (f"<td>{esc(o.id)}</td><td>{esc(o.name)}</td><td>{esc(o.sector)}</td>"
                 f"<td class='n'>{money(o.ead)}</td><td class='n'>{percent(o.pd)}</td>"
                 f"<td class='n'>{percent(o.lgd)}</td>"
                 f"<td class='n'>{number(o.asset_correlation)}</td>")
        if links:
            cells += (f"<td class='n'>{percent(float(oc.default_probability[i]))}</td>"
                      f"<td class='n up'>{signed_pp(float(oc.contagion_uplift[i]))}</td>")
        cells += f"<td class='n'>{money(float(oc.expected_loss[i]))}</td>"
        rows.append(f"<tr>{cells}</tr>")
    cur = book.currency or "the book currency"
    return (f"<h2>The book</h2><p class='note'>{note} EAD and expected loss in {esc(cur)}. R is "
            "the asset correlation (loading on the systemic factor)."
            + (f" {esc(PD_WITH_CONTAGION)} counts defaults reaching the obligor along links; "
               "the uplift is it minus the own PD, in percentage points (pp)." if links else "")
            + "</p>"
            f"<div class='scroll'><table><thead><tr>{head}</tr></thead>"
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _dependence_note(analysis: RunView) -> str:
    """Return a paragraph on sector factors / Student-t dependence when the book has them."""
    structure = analysis.model.dependence
    if structure is None:
        return ""
    return (
        f"<p><b>Dependence: {esc(structure.describe())}.</b> Instead of the one-factor Gaussian "
        "model below, assets move with sector factors (two obligors of different sectors are "
        "correlated through the loadings or the sector correlation matrix) and/or with one common "
        "Student-t scale that keeps every PD and makes joint tails heavier. The comparison "
        "without links keeps the same sectors and family, so its difference is still what the "
        "links add.</p>"
    )


def _how_to_read() -> str:
    return f"""<h2>How to read this report</h2>
<p><b>The model.</b> Every obligor's assets move with one systemic factor, shared by the whole
book, and with a factor of their own; an obligor defaults on its own when its assets fall below
the level its PD implies, and the asset correlation R says how much of the movement is shared
(one-factor Gaussian model). On top of that, a <i>link</i> says the creditor holds a claim on
the debtor: when the debtor defaults, the link passes the default on to the creditor with
probability q, and defaults travel further along links, any number of steps. The loss is the sum
of EAD × LGD over every obligor that finally defaults.</p>
<p><b>Without links (Gaussian copula).</b> The same book with its links removed: the one-factor
Gaussian copula. The linked model is built on that same Gaussian copula; the difference between
the two columns is what the links add.</p>
<p><b>Value at risk</b> (VaR) at level a is the smallest loss l with P(loss ≤ l) ≥ a: with
probability a the year's loss does not exceed it. <b>Expected shortfall</b> (ES) at level a is
the average loss in the worst 1 − a of outcomes, with the probability at the VaR split so that
exactly 1 − a is averaged (Acerbi &amp; Tasche, 2002); ES is at least VaR.
<b>Economic capital</b> here is VaR − EL.</p>
<p><b>Changes.</b> A change of a probability is written in percentage points (pp): 1.20% to
2.15% is +0.95 pp. A change of an amount is written in percent of the amount it starts from.</p>
<p><b>Precision.</b> The “Numerical accuracy” line at the top says how exact the figures are;
the engine's settings and error estimates are in the <a href="#appendix">appendix</a>. Sampled
figures carry sampling error, shown as ± one standard error where the engine reports it.</p>
<p class="note">{esc(PD_WITH_CONTAGION)}: the probability that the obligor defaults on its own
or is dragged in along links.</p>"""


# ---------------------------------------------------------------- appendix
def _detail_value(value: Any) -> str:
    if isinstance(value, Mapping):
        parts = []
        for k, v in value.items():
            try:
                name = level_label(float(k)) if 0 < float(k) < 1 else str(k)
            except (TypeError, ValueError):
                name = str(k).replace("_", " ")
            parts.append(f"{esc(name)}: {_detail_value(v)}")
        return "; ".join(parts) if parts else "–"
    if isinstance(value, (list, tuple, np.ndarray)):
        if len(value) > 8:
            return f"{len(value)} values"
        return ", ".join(esc(number(v)) for v in value)
    return esc(number(value))


def _detail_table(title: str, laws: Sequence[tuple[str, Mapping[str, Any]]]) -> str:
    """One table of settings or diagnostics: a row per item, a column per law."""
    keys: list[str] = []
    for _name, mapping in laws:
        keys += [k for k in mapping if k not in keys]
    if not keys:
        return ""
    head = "".join(f"<th>{esc(name)}</th>" for name, _m in laws)
    rows = []
    for key in keys:
        cells = []
        for _name, mapping in laws:
            if key not in mapping:
                cells.append("<td>–</td>")
            elif key in PER_OBLIGOR:
                cells.append("<td>one per obligor, in <code>obligors.csv</code></td>")
            else:
                cells.append(f"<td>{_detail_value(mapping[key])}</td>")
        label = DETAIL_LABELS.get(key, key.replace("_", " ").capitalize())
        rows.append(f"<tr><td>{esc(label)}</td>{''.join(cells)}"
                    f'<td class="note"><code>{esc(key)}</code></td></tr>')
    return (f"<h3>{esc(title)}</h3><div class='scroll'><table><thead><tr><th>Item</th>{head}"
            f"<th>Name in <code>summary.json</code></th></tr></thead>"
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _appendix(analysis: RunView) -> str:
    cur = analysis.book.currency
    laws = [("With links", analysis.loss_distribution)]
    if analysis.copula_distribution is not None:
        laws.append((WITHOUT_LINKS_HEADING, analysis.copula_distribution))
    accuracy = "".join(
        f"<li><b>{esc(name)}</b> ({esc(d.engine)} engine): {esc(accuracy_line(d, cur))}</li>"
        for name, d in laws
    )
    return (
        '<section class="appendix" id="appendix"><h2>Appendix: engine details</h2>'
        '<p class="note">How the engine computed the loss distribution, for a reviewer. '
        "Amounts are in the book currency; the same values are in <code>summary.json</code> "
        f"(<code>engine_settings</code>, <code>diagnostics</code>).</p><ul>{accuracy}</ul>"
        + _detail_table("Settings", [(n, dict(d.settings)) for n, d in laws])
        + _detail_table("Error estimates", [(n, dict(d.diagnostics)) for n, d in laws])
        + "</section>"
    )


def render_html(analysis: RunView, created: _dt.datetime | None = None) -> str:
    """Render the report page of a run.

    Parameters
    ----------
    analysis : RunView
        The finished run.
    created : datetime, optional
        Time stamp printed on the page; now (UTC) when omitted.

    Returns
    -------
    str
        A complete HTML document with inline CSS and images, no external
        resources.

    """
    created = created or _dt.datetime.now(_dt.UTC)
    book = analysis.book
    title = f"{book.name} — credit loss report" + (f" ({book.currency})" if book.currency else "")
    sub = (f"{len(book.obligors):,} obligors, {len(book.links):,} links · engine "
           f"{analysis.engine} · {created:%Y-%m-%d}")
    accuracy = accuracy_line(analysis.loss_distribution, book.currency)
    body = (
        f'<p class="accuracy"><b>Numerical accuracy.</b> {esc(accuracy)} '
        '<a href="#appendix">Engine details</a></p>'
        f"{_kpis(analysis)}"
        f"{_facts(analysis, created)}"
        f"{_measures_table(analysis)}"
        f"{_charts(analysis)}"
        f"{_contagion_section(analysis)}"
        f"{contribution_section(analysis)}"
        f"{_book_table(analysis)}"
        f"{_dependence_note(analysis)}{_how_to_read()}"
        f"{_appendix(analysis)}"
    )
    return render_page(title, sub, body, warnings=analysis.notes, files=RUN_FILES)
