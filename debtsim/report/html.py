"""The self-contained HTML page of a run: inline CSS, charts as embedded PNG.

The page shows what the run computed; it computes nothing itself beyond
ordering rows for display.  All text from the book is escaped.
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Iterable, Mapping, Sequence
from html import escape
from typing import Any

import numpy as np

from debtsim.distribution import LossDistribution
from debtsim.link_effects import contagion_effect, obligor_contagion, rank_links
from debtsim.output_files import generator
from debtsim.report import charts
from debtsim.report.run_view import RunView
from debtsim.report.summary import CAUTION

__all__ = ["BOOK_ROWS", "LINK_ROWS", "UPLIFT_BARS", "render_html"]

#: Obligors listed in the page (the largest exposures when the book is bigger).
BOOK_ROWS = 50
#: Links listed in the page.
LINK_ROWS = 25
#: Obligors drawn in the uplift chart.
UPLIFT_BARS = 25
#: Uplifts at or below this are float noise of an exact law, not contagion.
UPLIFT_NOISE = 1e-12

_CSS = """
:root { --ink:#1d2733; --muted:#5b6675; --line:#dde2e8; --model:#1f4e79; --copula:#8c96a3;
        --warm:#d9822b; --bg:#f6f7f9; }
* { box-sizing: border-box; }
body { margin:0; background:var(--bg); color:var(--ink);
       font:15px/1.5 -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width:1040px; margin:0 auto; padding:28px 32px 48px; background:#fff;
       box-shadow:0 0 0 1px var(--line); }
header h1 { margin:0 0 4px; font-size:26px; line-height:1.25; }
header .sub { color:var(--muted); margin:0 0 18px; }
h2 { font-size:19px; margin:34px 0 10px; padding-bottom:4px; border-bottom:2px solid var(--line); }
p { margin:8px 0; }
.caution { border-left:4px solid var(--warm); background:#fdf5ec; padding:10px 14px; margin:14px 0;
           font-size:14px; }
.facts { display:grid; grid-template-columns: 200px 1fr; gap:4px 16px; margin:0; }
.facts dt { color:var(--muted); }
.facts dd { margin:0; }
.kpis { display:grid; grid-template-columns:repeat(auto-fit, minmax(180px, 1fr)); gap:12px;
        margin:16px 0 4px; }
.kpi { border:1px solid var(--line); border-radius:6px; padding:10px 12px; }
.kpi .v { font-size:21px; font-weight:600; font-variant-numeric:tabular-nums; }
.kpi .l { color:var(--muted); font-size:13px; }
.kpi .d { font-size:13px; color:var(--warm); }
table { border-collapse:collapse; width:100%; margin:8px 0; font-size:14px; }
th, td { padding:5px 8px; border-bottom:1px solid var(--line); text-align:left;
         vertical-align:top; }
th { background:#eef1f5; font-weight:600; }
td.n, th.n { text-align:right; font-variant-numeric:tabular-nums; white-space:nowrap; }
tbody tr:nth-child(even) { background:#fafbfc; }
.m { color:var(--model); font-weight:600; }
.c { color:var(--muted); }
.up { color:#a35200; }
.se { color:var(--muted); font-size:12px; }
figure { margin:18px 0; }
figure img { max-width:100%; height:auto; display:block; }
figcaption { color:var(--muted); font-size:13px; margin-top:4px; }
.note { color:var(--muted); font-size:13px; }
.scroll { overflow-x:auto; }
footer { margin-top:40px; color:var(--muted); font-size:12px; border-top:1px solid var(--line);
         padding-top:10px; }
code { font-size:13px; background:#f1f3f6; padding:1px 4px; border-radius:3px; }
"""


# ------------------------------------------------------------------ formatting
def _money(x: float | None) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    ax = abs(x)
    if ax >= 1000:
        return f"{x:,.0f}"
    if ax >= 1 or ax == 0:
        return f"{x:,.2f}"
    return f"{x:.3g}"


def _signed_money(x: float | None) -> str:
    if x is None:
        return "–"
    text = _money(x)
    return text if x < 0 or text.startswith("0") and x == 0 else "+" + text


def _prob(p: float | None) -> str:
    if p is None or not math.isfinite(p):
        return "–"
    if p == 0:
        return "0%"
    if abs(p) >= 0.001:
        return f"{100 * p:.2f}%"
    return f"{100 * p:.2g}%"


def _signed_prob(p: float) -> str:
    if abs(p) <= UPLIFT_NOISE:
        return "0%"
    text = _prob(p)
    return text if p <= 0 else "+" + text


def _num(x: Any) -> str:
    if isinstance(x, (bool, np.bool_)):
        return str(bool(x))
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}"
    if isinstance(x, (float, np.floating)):
        f = float(x)
        if not math.isfinite(f):
            return str(f)
        if f != 0 and (abs(f) >= 1e6 or abs(f) < 1e-3):
            return f"{f:.4g}"
        return f"{f:,.6g}"
    return str(x)


def _level(key: str) -> str:
    return f"{100 * float(key):g}%"


def _e(text: Any) -> str:
    return escape(str(text), quote=True)


def _flatten(prefix: str, value: Any) -> Iterable[tuple[str, Any]]:
    if isinstance(value, Mapping):
        for k, v in value.items():
            yield from _flatten(f"{prefix}.{k}" if prefix else str(k), v)
    elif isinstance(value, (list, tuple, np.ndarray)) and len(value) > 8:
        yield prefix, f"{len(value)} values"
    elif isinstance(value, (list, tuple, np.ndarray)):
        yield prefix, ", ".join(_num(v) for v in value)
    else:
        yield prefix, value


def _kv_text(mapping: Mapping[str, Any]) -> str:
    parts = [f"{_e(k)} = {_e(_num(v))}" for k, v in _flatten("", mapping)]
    return "; ".join(parts) if parts else "–"


# ---------------------------------------------------------- standard errors
_SE_ALIASES = {
    "expected_loss": ("expected_loss",),
    "loss_std": ("loss_std",),
    "var": ("var", "value_at_risk"),
    "expected_shortfall": ("expected_shortfall", "es"),
    "economic_capital": ("economic_capital",),
}


def _standard_error(diag: Mapping[str, Any], measure: str, key: str | None) -> float | None:
    """Look up a standard error an engine reported, if any (``<measure>_standard_error``)."""
    for name in _SE_ALIASES[measure]:
        value = diag.get(f"{name}_standard_error")
        if value is None:
            continue
        if isinstance(value, Mapping):
            value = value.get(key) if key is not None else None
        try:
            f = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            return None
        return f if math.isfinite(f) else None
    return None


def _with_se(value: float, se: float | None) -> str:
    if se is None:
        return _money(value)
    return f'{_money(value)} <span class="se">± {_money(se)}</span>'


# ---------------------------------------------------------------- sections
def _law_text(dist: LossDistribution) -> str:
    if dist.samples is None:
        text = "exact (no sampling)"
        if dist.seed is not None:
            text += f", seed {dist.seed}"
    else:
        text = f"{dist.samples:,} sampled scenarios, seed {dist.seed}"
    return f"{text}; {dist.losses.size:,} distinct loss values"


def _facts(analysis: RunView, created: _dt.datetime) -> str:
    book = analysis.book
    dist = analysis.loss_distribution
    cd = analysis.copula_distribution
    rows: list[tuple[str, str]] = [
        ("Book", _e(book.name) + (f' <span class="note">({_e(book.source)})</span>'
                                  if book.source else "")),
        ("Obligors", f"{len(book.obligors):,}, total exposure {_e(book.currency)} "
                     f"{_money(book.total_exposure)}"),
        ("Links", f"{len(book.links):,}" if book.links else "none"),
        ("Engine", f"<b>{_e(analysis.engine)}</b> — {_e(analysis.engine_reason)}"),
        ("Loss law", _e(_law_text(dist))),
        ("Engine settings", _kv_text(dist.settings)),
    ]
    if dist.diagnostics:
        rows.append(("Error estimates", _kv_text(dist.diagnostics)))
    if cd is not None:
        rows.append(("Copula law", f"{_e(cd.engine)}: {_e(_law_text(cd))}"))
    else:
        rows.append(("Copula law", "not computed"))
    rows.append(("Confidence levels", ", ".join(_level(k) for k in analysis.measures.var)))
    rows.append(("Generated", f"{created:%Y-%m-%d %H:%M} UTC by {_e(generator())}"))
    for note in analysis.notes:
        rows.append(("Note", _e(note)))
    body = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in rows)
    return f'<h2>Run</h2><dl class="facts">{body}</dl>'


def _kpis(analysis: RunView) -> str:
    m = analysis.measures
    cm = analysis.copula_measures
    effect = contagion_effect(m, cm)
    top = max(m.var, key=float) if m.var else None
    cards = [("Expected loss", m.expected_loss, effect["expected_loss_from_contagion"])]
    if top is not None:
        var_from = effect["var_from_contagion"]
        es_from = effect["expected_shortfall_from_contagion"]
        ec_from = effect["economic_capital_from_contagion"]
        assert isinstance(var_from, dict) and isinstance(es_from, dict)
        assert isinstance(ec_from, dict)
        cards += [
            (f"VaR {_level(top)}", m.var[top], var_from[top]),
            (f"Expected shortfall {_level(top)}", m.expected_shortfall[top], es_from[top]),
            (f"Economic capital {_level(top)}", m.economic_capital[top], ec_from[top]),
        ]
    html = []
    for label, value, diff in cards:
        d = ""
        if diff is not None:
            d = f'<div class="d">{_signed_money(float(diff))} from contagion</div>'
        html.append(f'<div class="kpi"><div class="l">{_e(label)}</div>'
                    f'<div class="v">{_money(value)}</div>{d}</div>')
    return f'<div class="kpis">{"".join(html)}</div>'


def _measures_table(analysis: RunView) -> str:
    m = analysis.measures
    cm = analysis.copula_measures
    diag = analysis.loss_distribution.diagnostics
    cdiag = analysis.copula_distribution.diagnostics if analysis.copula_distribution else {}
    cur = _e(analysis.book.currency)

    rows: list[tuple[str, str, float, float | None]] = [
        ("Expected loss (EL)", "expected_loss", m.expected_loss,
         cm.expected_loss if cm else None),
        ("Loss standard deviation", "loss_std", m.loss_std, cm.loss_std if cm else None),
    ]
    keyed: list[tuple[str, str, str, dict[str, float], dict[str, float] | None]] = []
    for key in m.var:
        keyed += [
            (f"VaR {_level(key)}", "var", key, m.var, cm.var if cm else None),
            (f"Expected shortfall {_level(key)}", "expected_shortfall", key,
             m.expected_shortfall, cm.expected_shortfall if cm else None),
            (f"Economic capital {_level(key)} (VaR − EL)", "economic_capital", key,
             m.economic_capital, cm.economic_capital if cm else None),
        ]

    head = '<th>Measure</th><th class="n">With contagion</th>'
    if cm is not None:
        head += ('<th class="n">Copula (no links)</th><th class="n">From contagion</th>'
                 '<th class="n">Change</th>')

    def row(label: str, measure: str, key: str | None, v: float, c: float | None) -> str:
        se = _standard_error(diag, measure, key)
        cells = f'<td>{_e(label)}</td><td class="n m">{_with_se(v, se)}</td>'
        if cm is not None:
            if c is None:
                cells += '<td class="n">–</td>' * 3
            else:
                change = f"{100 * (v / c - 1):+.1f}%" if c > 0 else "–"
                cells += (
                    f'<td class="n c">{_with_se(c, _standard_error(cdiag, measure, key))}</td>'
                    f'<td class="n up">{_signed_money(v - c)}</td>'
                    f'<td class="n up">{change}</td>'
                )
        return f"<tr>{cells}</tr>"

    body = [row(label, name, None, v, c) for label, name, v, c in rows]
    body += [
        row(label, name, key, vals[key], other.get(key) if other is not None else None)
        for label, name, key, vals, other in keyed
    ]
    note = (f'<p class="note">Amounts in {cur}.' if cur else '<p class="note">')
    if cm is None:
        note += " The copula comparison was not computed for this run."
    else:
        note += (" “From contagion” is the measure with contagion minus the same measure "
                 "for the book read without links.")
    if any(_standard_error(diag, n, None) is not None for n in _SE_ALIASES) or any(
        isinstance(v, Mapping) for k, v in diag.items() if k.endswith("_standard_error")
    ):
        note += " Figures after ± are sampling standard errors reported by the engine."
    note += "</p>"
    return (f'<h2>Risk measures</h2><div class="scroll"><table><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>{note}')


def _figure_html(b64: str, alt: str, caption: str) -> str:
    return (f'<figure><img alt="{_e(alt)}" src="data:image/png;base64,{b64}">'
            f"<figcaption>{caption}</figcaption></figure>")


def _charts(analysis: RunView) -> str:
    dist = analysis.loss_distribution
    cd = analysis.copula_distribution
    m = analysis.measures
    cur = analysis.book.currency
    binned = dist.losses.size > charts.MAX_ATOMS_DRAWN or (
        cd is not None and cd.losses.size > charts.MAX_ATOMS_DRAWN
    )
    law_caption = (
        "Probability of each possible portfolio loss"
        + (f" summed over {charts.BINS} equal-width bins" if binned else "")
        + ". Dotted line: expected loss; dashed lines: VaR at each level."
        + (" Grey: the same book without links." if cd is not None else "")
    )
    parts = [
        "<h2>Loss distribution</h2>",
        _figure_html(charts.loss_law_chart(dist, m, cd, cur), "loss distribution", law_caption),
        _figure_html(
            charts.tail_chart(dist, m, cd, cur), "tail of the loss distribution",
            "Probability that the loss exceeds each level, on a log scale. VaR at level a is "
            "where the curve first drops to 1 − a or below (grey horizontal lines).",
        ),
        _figure_html(
            charts.comparison_chart(m, analysis.copula_measures, cur), "risk measures compared",
            "Expected loss, VaR and expected shortfall"
            + (" with contagion (blue) and for the one-factor Gaussian copula, i.e. the same "
               "book without links (grey)." if cd is not None else "."),
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
                "final default probability equals the obligor's own PD.</p>")
    oc = obligor_contagion(book, dist.default_probability)
    order = np.argsort(-oc.contagion_uplift, kind="stable")[:UPLIFT_BARS]
    order = order[oc.contagion_uplift[order] > UPLIFT_NOISE]
    parts = ["<h2>Contagion</h2>"]
    if order.size:
        parts.append(_figure_html(
            charts.uplift_chart(
                [_obligor_label(analysis, int(i)) for i in order],
                oc.own_default_probability[order].tolist(),
                oc.contagion_uplift[order].tolist(),
            ),
            "default probability added by contagion",
            f"Obligors with the largest contagion uplift (up to {UPLIFT_BARS}): grey is the "
            "obligor's own PD, orange the probability added by defaults reaching it along "
            "links (final minus own default probability).",
        ))
    else:
        parts.append("<p>No obligor's default probability is raised by contagion in this run.</p>")

    ranked = rank_links(book, dist.default_probability, top=LINK_ROWS)
    names = {o.id: o.name for o in book.obligors}
    has_amount = any(lk.amount is not None for lk in book.links)
    head = ("<th>Creditor</th><th>Debtor</th><th class='n'>Contagion q</th>"
            + ("<th class='n'>Claim amount</th>" if has_amount else "")
            + "<th class='n'>Debtor final PD</th><th class='n'>Creditor own PD</th>"
              "<th class='n'>Creditor EAD×LGD</th><th class='n'>Transmitted loss</th>")
    rows = []
    for t in ranked:
        def who(i: str) -> str:
            n = names.get(i, "")
            return _e(i) + (f' <span class="note">{_e(n)}</span>' if n else "")

        cells = (f"<td>{who(t.creditor)}</td><td>{who(t.debtor)}</td>"
                 f"<td class='n'>{_num(t.contagion)}</td>")
        if has_amount:
            cells += f"<td class='n'>{_money(t.amount)}</td>"
        cells += (f"<td class='n'>{_prob(t.debtor_default_probability)}</td>"
                  f"<td class='n'>{_prob(1 - t.creditor_survival)}</td>"
                  f"<td class='n'>{_money(t.creditor_loss_given_default)}</td>"
                  f"<td class='n m'>{_money(t.transmitted_loss)}</td>")
        rows.append(f"<tr>{cells}</tr>")
    shown = (f"the {len(ranked)} highest of {len(book.links):,} links"
             if len(book.links) > len(ranked) else f"all {len(book.links):,} links")
    parts.append(
        f"<h3>Most contagious links</h3><p class='note'>Ranked by a first-order indicator, "
        f"{shown}: <i>transmitted loss</i> = q × debtor's final PD × (1 − creditor's own PD) × "
        "creditor's EAD × LGD, the expected extra loss at the creditor if this link alone "
        "carried the debtor's default. It ignores longer paths and the dependence through the "
        "common factor, so it ranks links; it does not add up to the loss from contagion "
        "(see “From contagion” above).</p>"
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
            + ("<th class='n'>Final PD</th><th class='n'>Uplift</th>" if links else "")
            + "<th class='n'>Expected loss</th>")
    rows = []
    for i in idx:
        o = book.obligors[i]
        cells = (f"<td>{_e(o.id)}</td><td>{_e(o.name)}</td><td>{_e(o.sector)}</td>"
                 f"<td class='n'>{_money(o.ead)}</td><td class='n'>{_prob(o.pd)}</td>"
                 f"<td class='n'>{_prob(o.lgd)}</td><td class='n'>{_num(o.asset_correlation)}</td>")
        if links:
            cells += (f"<td class='n'>{_prob(float(oc.default_probability[i]))}</td>"
                      f"<td class='n up'>{_signed_prob(float(oc.contagion_uplift[i]))}</td>")
        cells += f"<td class='n'>{_money(float(oc.expected_loss[i]))}</td>"
        rows.append(f"<tr>{cells}</tr>")
    return (f"<h2>The book</h2><p class='note'>{note} R is the asset correlation (loading on "
            "the systemic factor)."
            + (" Final PD includes contagion." if links else "") + "</p>"
            f"<div class='scroll'><table><thead><tr>{head}</tr></thead>"
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _how_to_read() -> str:
    return """<h2>How to read this report</h2>
<p><b>The model.</b> Every obligor's assets move with one systemic factor, shared by the whole
book, and with a factor of their own; an obligor defaults on its own when its assets fall below
the level its PD implies, and the asset correlation R says how much of the movement is shared
(one-factor Gaussian model). On top of that, a <i>link</i> says the creditor holds a claim on
the debtor: when the debtor defaults, the link passes the default on to the creditor with
probability q, and defaults travel further along links, any number of steps. The loss is the sum
of EAD × LGD over every obligor that finally defaults.</p>
<p><b>The copula.</b> The same book with its links removed (the one-factor Gaussian copula). The
difference between the two columns is what contagion adds.</p>
<p><b>Value at risk</b> (VaR) at level a is the smallest loss l with P(loss ≤ l) ≥ a: with
probability a the year's loss does not exceed it. <b>Expected shortfall</b> (ES) at level a is
the average loss in the worst 1 − a of outcomes, with the probability at the VaR split so that
exactly 1 − a is averaged (Acerbi &amp; Tasche, 2002); ES is at least VaR.
<b>Economic capital</b> here is VaR − EL.</p>
<p><b>Precision.</b> Exact laws are exact for the factor discretisation shown under “Engine
settings”; sampled laws carry sampling error, shown as ± one standard error where the engine
reports it.</p>"""


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
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_e(title)}</title>
<style>{_CSS}</style>
</head>
<body><main>
<header><h1>{_e(title)}</h1><p class="sub">{_e(sub)}</p></header>
<div class="caution"><b>Caution.</b> {_e(CAUTION)}</div>
{_facts(analysis, created)}
{_kpis(analysis)}
{_measures_table(analysis)}
{_charts(analysis)}
{_contagion_section(analysis)}
{_book_table(analysis)}
{_how_to_read()}
<footer>Written by {_e(generator())}. Files in this folder: <code>summary.json</code>,
<code>loss_distribution.csv</code>, <code>obligors.csv</code>, <code>report.html</code>.</footer>
</main></body>
</html>
"""
