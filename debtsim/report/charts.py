"""Charts of a run as PNG images, base64-encoded for embedding in the page.

Matplotlib is used through its object API on the Agg canvas (no pyplot, no
global backend state, nothing to close).  Charts only draw what the run
computed; binning of large supports is for display only.
"""

from __future__ import annotations

import base64
import io
import warnings
from collections.abc import Sequence

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter
from numpy.typing import NDArray

from debtsim.distribution import LossDistribution
from debtsim.risk import RiskMeasures

__all__ = [
    "MAX_ATOMS_DRAWN",
    "comparison_chart",
    "loss_law_chart",
    "new_figure",
    "plain_text",
    "png_base64",
    "short_amount",
    "tail_chart",
    "uplift_chart",
]

#: Supports larger than this are drawn binned rather than atom by atom.
MAX_ATOMS_DRAWN = 120
#: Number of bins of a binned loss law.
BINS = 80

MODEL_COLOUR = "#1f4e79"
COPULA_COLOUR = "#8c96a3"
CONTAGION_COLOUR = "#d9822b"
MARK_COLOUR = "#b03a2e"
DPI = 110


def short_amount(x: float) -> str:
    """Compact amount for axes and labels: ``1.2M``, ``350k``, ``0.45``."""
    ax = abs(x)
    for bound, suffix in ((1e12, "T"), (1e9, "bn"), (1e6, "M"), (1e3, "k")):
        if ax >= bound:
            return f"{x / bound:.3g}{suffix}"
    if ax == 0:
        return "0"
    return f"{x:.3g}"


def plain_text(text: object) -> str:
    """Keep user text literal in matplotlib (``$`` would start mathtext)."""
    return str(text).replace("$", r"\$")


def new_figure(width: float = 9.0, height: float = 4.0) -> tuple[Figure, Axes]:
    """Return a figure on the Agg canvas with the house axis style."""
    fig = Figure(figsize=(width, height), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, axis="y", color="#e3e6ea", linewidth=0.8)
    ax.set_axisbelow(True)
    return fig, ax


def png_base64(fig: Figure) -> str:
    """Render ``fig`` to PNG and return it base64-encoded (ASCII)."""
    buf = io.BytesIO()
    with warnings.catch_warnings():
        # a name in a script the bundled font lacks is drawn as boxes; say nothing on stderr
        warnings.filterwarnings("ignore", message="Glyph .* missing from font")
        fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _amount_axis(ax: Axes, axis: str = "x") -> None:
    fmt = FuncFormatter(lambda v, _pos: short_amount(v))
    (ax.xaxis if axis == "x" else ax.yaxis).set_major_formatter(fmt)


def _pct(level: float) -> str:
    return f"{100 * level:g}%"


def loss_law_chart(
    dist: LossDistribution,
    measures: RiskMeasures,
    copula: LossDistribution | None,
    currency: str,
) -> str:
    """Probability of each loss (binned for large supports), model and copula.

    Parameters
    ----------
    dist : LossDistribution
        The law with contagion.
    measures : RiskMeasures
        Its measures; EL and VaR are marked.
    copula : LossDistribution or None
        The law without links, drawn for comparison when given.
    currency : str
        Axis label.

    Returns
    -------
    str
        Base64 PNG.

    """
    fig, ax = new_figure()
    large = dist.losses.size > MAX_ATOMS_DRAWN or (
        copula is not None and copula.losses.size > MAX_ATOMS_DRAWN
    )
    laws = [dist] if copula is None else [dist, copula]
    top = _display_top(laws, measures)
    if large and top > 0:
        edges = np.linspace(min(0.0, float(dist.losses[0])), top, BINS + 1)
        mass, _ = np.histogram(dist.losses, bins=edges, weights=dist.probabilities)
        beyond = [float(law.probabilities[law.losses > top].sum()) for law in laws]
        if max(beyond) > 0:
            names = ("with contagion", "copula")
            ax.annotate(f"not drawn: P(loss > {short_amount(top)}) = "
                        + ", ".join(f"{b:.1e} {n}" if len(laws) > 1 else f"{b:.1e}"
                                    for b, n in zip(beyond, names, strict=False)),
                        (0.99, 0.88), xycoords="axes fraction", ha="right", fontsize=8,
                        color="#555555")
        ax.bar(edges[:-1], mass, width=np.diff(edges), align="edge", color=MODEL_COLOUR,
               alpha=0.85, label="with contagion")
        if copula is not None:
            cmass, _ = np.histogram(copula.losses, bins=edges, weights=copula.probabilities)
            ax.stairs(cmass, edges, color=COPULA_COLOUR, linewidth=1.6,
                      label="copula (no links)")
        ax.set_ylabel("probability per bin")
        bin_note = f", bins of {short_amount(float(edges[1] - edges[0]))}"
        centres = edges[:-1] + np.diff(edges) / 2
        drawn = [(centres, mass)] + ([(centres, cmass)] if copula is not None else [])
    else:
        if copula is not None:
            ax.plot(copula.losses, copula.probabilities, "o", mfc="none", mec=COPULA_COLOUR,
                    ms=7, label="copula (no links)")
        ax.vlines(dist.losses, 0, dist.probabilities, color=MODEL_COLOUR, linewidth=2)
        ax.plot(dist.losses, dist.probabilities, "o", color=MODEL_COLOUR, ms=4,
                label="with contagion")
        ax.set_ylabel("probability")
        bin_note = ""
        drawn = [(dist.losses, dist.probabilities)]
        if copula is not None:
            drawn.append((copula.losses, copula.probabilities))
    _clip_spike(ax, drawn)
    ax.axvline(measures.expected_loss, color=MODEL_COLOUR, linestyle=":", linewidth=1.2)
    ax.annotate("EL", (measures.expected_loss, 0.8), xycoords=("data", "axes fraction"),
                xytext=(3, 0), textcoords="offset points", color=MODEL_COLOUR, fontsize=9,
                rotation=90, va="center")
    same_var: dict[float, list[str]] = {}
    for key, var in measures.var.items():
        same_var.setdefault(var, []).append(_pct(float(key)))
    for var, levels in same_var.items():
        ax.axvline(var, color=MARK_COLOUR, linestyle="--", linewidth=1)
        ax.annotate(f"VaR {', '.join(levels)}", (var, 0.5), xycoords=("data", "axes fraction"),
                    xytext=(3, 0), textcoords="offset points", color=MARK_COLOUR, fontsize=9,
                    rotation=90, va="center")
    unit = f" ({plain_text(currency)})" if currency else ""
    ax.set_xlabel(f"portfolio loss{unit}{bin_note}")
    _amount_axis(ax)
    ax.legend(frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=9)
    ax.set_title("Loss distribution", loc="left", fontsize=11)
    return png_base64(fig)


#: Tail probability beyond which a binned loss law is not drawn (the tail chart shows it).
FAR_TAIL = 1e-5


def _display_top(laws: Sequence[LossDistribution], measures: RiskMeasures) -> float:
    """Right end of the loss axis: the ``1 - FAR_TAIL`` quantile, past the largest VaR."""
    ends = []
    for law in laws:
        idx = int(np.searchsorted(law.cdf, 1.0 - FAR_TAIL, side="left"))
        ends.append(float(law.losses[min(idx, law.losses.size - 1)]))
    top = max(ends)
    top = max(top, 1.15 * max(measures.var.values(), default=0.0))
    return min(top, max(float(law.losses[-1]) for law in laws))


def _clip_spike(
    ax: Axes, laws: Sequence[tuple[NDArray[np.float64], NDArray[np.float64]]]
) -> None:
    """Cut the y-axis above a dominant spike (usually no loss) and label its height.

    Each law is ``(x, p)``; the axis is cut when a law's largest mass is more
    than four times the second largest mass of every law drawn.
    """
    ax.set_ylim(bottom=0)
    firsts, seconds = [], []
    for _x, p in laws:
        if p.size < 2:
            return
        top2 = np.sort(np.asarray(p, dtype=float))[-2:]
        seconds.append(float(top2[0]))
        firsts.append(float(top2[1]))
    if not laws or max(seconds) <= 0 or max(firsts) <= 4 * max(seconds):
        return
    top = 1.35 * max(seconds)
    ax.set_ylim(0, top)
    spikes: dict[float, list[tuple[str, str]]] = {}
    for name, (x, p) in zip(("with contagion", "copula"), laws, strict=False):
        for xv, pv in zip(x[p > top].tolist(), p[p > top].tolist(), strict=True):
            spikes.setdefault(xv, []).append((name, f"{pv:.1%}"))
    for xv, found in spikes.items():
        values = {v for _n, v in found}
        if len(values) == 1 and len(found) == len(laws):
            text = found[0][1]
        else:
            text = ", ".join(f"{n} {v}" for n, v in found)
        ax.annotate(f"P = {text}, axis cut", (xv, top), xytext=(5, -10),
                    textcoords="offset points", fontsize=9, color="#333333")


def _exceedance(dist: LossDistribution) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Step points of ``P(L > l)``: value ``y[j]`` holds on ``[x[j], x[j+1])``."""
    p = dist.probabilities
    above = np.concatenate((np.cumsum(p[::-1])[::-1][1:], [0.0]))  # P(L > losses[j])
    x = np.concatenate(([min(0.0, float(dist.losses[0]))], dist.losses))
    y = np.concatenate(([1.0], above))
    return x, y


def tail_chart(
    dist: LossDistribution,
    measures: RiskMeasures,
    copula: LossDistribution | None,
    currency: str,
) -> str:
    """``P(L > l)`` against ``l`` on a log scale, model and copula, VaR levels marked.

    Returns
    -------
    str
        Base64 PNG.

    """
    fig, ax = new_figure()
    deepest = min((1.0 - float(k) for k in measures.var), default=1e-3)
    floor = deepest / 20
    curves = []
    for law, colour, label, width in (
        (copula, COPULA_COLOUR, "copula (no links)", 1.6),
        (dist, MODEL_COLOUR, "with contagion", 2.0),
    ):
        if law is None:
            continue
        x, y = _exceedance(law)
        keep = y > 0
        if law.losses.size < 2:
            continue
        xs, ys = x[keep], y[keep]
        # extend the last positive step to the last atom, where P(L > l) drops to 0
        xs = np.concatenate((xs, [float(law.losses[-1])]))
        ys = np.concatenate((ys, [ys[-1]]))
        ax.step(xs, ys, where="post", color=colour, linewidth=width, label=label)
        floor = min(floor, float(ys.min()) / 2)
        curves.append((xs, ys))
    drawn = bool(curves)
    # show at most three decades below the deepest level, and no loss axis past that depth
    floor = max(floor, deepest * 1e-3, 1e-12)
    ax.set_yscale("log")
    ax.set_ylim(floor, 1.5)
    if drawn:
        right = max(max(measures.var.values(), default=0.0) * 1.1,
                    *(float(xs[min(int(np.argmax(ys < floor)) if (ys < floor).any()
                                   else xs.size - 1, xs.size - 1)]) for xs, ys in curves))
        left = min(float(xs[0]) for xs, _ in curves)
        if right > left:
            ax.set_xlim(left - 0.02 * (right - left), right + 0.02 * (right - left))
    for key, var in measures.var.items():
        a = float(key)
        ax.axhline(1 - a, color="#bbbbbb", linewidth=0.8)
        ax.axvline(var, color=MARK_COLOUR, linestyle="--", linewidth=1)
        ax.annotate(f"VaR {_pct(a)}", (var, 1 - a), xytext=(4, 4), textcoords="offset points",
                    color=MARK_COLOUR, fontsize=9)
    if not drawn:
        ax.text(0.5, 0.5, "no loss above the smallest outcome", transform=ax.transAxes,
                ha="center", color="#555555")
    ax.set_xlabel(f"loss level l ({plain_text(currency)})" if currency else "loss level l")
    ax.set_ylabel("P(loss > l)")
    _amount_axis(ax)
    if drawn:
        ax.legend(frameon=False, loc="upper right")
    ax.set_title("Tail: probability that the loss exceeds l", loc="left", fontsize=11)
    return png_base64(fig)


def comparison_chart(
    measures: RiskMeasures, copula: RiskMeasures | None, currency: str
) -> str:
    """Draw grouped bars of EL, VaR and ES at each level: model against copula.

    Returns
    -------
    str
        Base64 PNG.

    """
    names = ["EL"]
    model_vals = [measures.expected_loss]
    copula_vals = [copula.expected_loss if copula else np.nan]
    for key in measures.var:
        names += [f"VaR {_pct(float(key))}", f"ES {_pct(float(key))}"]
        model_vals += [measures.var[key], measures.expected_shortfall[key]]
        copula_vals += [
            copula.var.get(key, np.nan) if copula else np.nan,
            copula.expected_shortfall.get(key, np.nan) if copula else np.nan,
        ]
    fig, ax = new_figure(9.0, 3.8)
    x = np.arange(len(names))
    width = 0.38 if copula is not None else 0.6
    if copula is not None:
        bars_c = ax.bar(x - width / 2, copula_vals, width, color=COPULA_COLOUR,
                        label="copula (no links)")
        bars_m = ax.bar(x + width / 2, model_vals, width, color=MODEL_COLOUR,
                        label="with contagion")
        ax.bar_label(bars_c, labels=[short_amount(v) for v in copula_vals], fontsize=8,
                     padding=2, color="#555555")
    else:
        bars_m = ax.bar(x, model_vals, width, color=MODEL_COLOUR, label="with contagion")
    ax.bar_label(bars_m, labels=[short_amount(v) for v in model_vals], fontsize=8, padding=2)
    ax.set_xticks(x, names)
    ax.set_ylim(bottom=min(0.0, *model_vals, *(v for v in copula_vals if np.isfinite(v))))
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    _amount_axis(ax, "y")
    ax.margins(y=0.12)
    ax.legend(frameon=False, loc="upper left")
    title = "Contagion against the copula" if copula is not None else "Risk measures"
    ax.set_title(title, loc="left", fontsize=11)
    return png_base64(fig)


def uplift_chart(
    labels: Sequence[str],
    own: Sequence[float],
    uplift: Sequence[float],
) -> str:
    """Horizontal bars: own PD plus contagion uplift for the given obligors.

    Parameters
    ----------
    labels : sequence of str
        One label per obligor, drawn top to bottom.
    own, uplift : sequence of float
        Own default probability and final-minus-own uplift.

    Returns
    -------
    str
        Base64 PNG.

    """
    n = len(labels)
    fig, ax = new_figure(9.0, max(2.2, 0.28 * n + 1.0))
    ax.grid(False, axis="y")
    ax.grid(True, axis="x", color="#e3e6ea", linewidth=0.8)
    y = np.arange(n)[::-1]
    own_a = np.asarray(own, dtype=float)
    up_a = np.asarray(uplift, dtype=float)
    ax.barh(y, own_a, color=COPULA_COLOUR, height=0.7, label="own PD")
    ax.barh(y, up_a, left=own_a, color=CONTAGION_COLOUR, height=0.7,
            label="added by contagion")
    ax.set_yticks(y, [plain_text(t) for t in labels], fontsize=8)
    ax.xaxis.set_major_formatter(PercentFormatter(1.0, decimals=None))
    ax.set_xlabel("final default probability")
    ax.set_xlim(left=0)
    ax.legend(frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=9)
    ax.set_title("Default probability added by contagion", loc="left", fontsize=11)
    return png_base64(fig)
