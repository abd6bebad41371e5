"""Charts of a run, and the chart helpers every report chart uses.

Matplotlib is used through its object API on the Agg canvas (no pyplot, no
global backend state, nothing to close).  Charts only draw what the run
computed; binning of large supports is for display only.

Layout rules that keep labels readable: marker lines (EL, VaR) stop below a
band at the top of the plot, and the notes that belong in that band (the
height of a cut bar) sit there, so no line crosses a note; a note about
what is not drawn goes under the axis; legends with more than two entries
sit outside the plot, where they cannot hide a line.
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
from debtsim.report.formatting import level_label, short_amount
from debtsim.report.text import WITH_LINKS, WITHOUT_LINKS, WITHOUT_LINKS_SHORT
from debtsim.risk import RiskMeasures

__all__ = [
    "BASE_COLOUR",
    "BINS",
    "MARKER_TOP",
    "MAX_ATOMS_DRAWN",
    "PALETTE",
    "amount_axis",
    "comparison_chart",
    "exceedance",
    "legend_outside",
    "loss_distribution_chart",
    "loss_distribution_figure",
    "new_figure",
    "plain_text",
    "short_label",
    "png_base64",
    "png_bytes",
    "tail_chart",
    "uplift_chart",
]

#: Supports larger than this are drawn binned rather than atom by atom.
MAX_ATOMS_DRAWN = 120
#: Number of bins of a binned loss distribution.
BINS = 80
#: Marker lines end at this fraction of the plot height; notes sit in the band above.
MARKER_TOP = 0.84
#: Height (fraction of the plot) of the tallest bar that is not cut.
TALLEST_BAR = 0.78

MODEL_COLOUR = "#1f4e79"
PLAIN_COLOUR = "#8c96a3"
CONTAGION_COLOUR = "#d9822b"
MARK_COLOUR = "#b03a2e"
NOTE_COLOUR = "#444444"
BASE_COLOUR = "#222222"
#: Colours of series after the base (scenarios, measures).
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
DPI = 110


# ------------------------------------------------------------------- helpers
def plain_text(text: object) -> str:
    """Keep user text literal in matplotlib (``$`` would start mathtext)."""
    return str(text).replace("$", r"\$")


def short_label(text: object, limit: int = 32) -> str:
    """User text for an axis or legend, literal and at most ``limit`` characters.

    Longer text is shortened in the middle, so both the start and the end of an
    id stay readable (``LOAN_SERIES_A_…_000123``); ``$`` is kept literal as in
    :func:`plain_text`.
    """
    raw = str(text)
    if len(raw) > limit:
        keep = limit - 1
        raw = raw[: (keep + 1) // 2] + "…" + raw[len(raw) - keep // 2 :]
    return plain_text(raw)


def new_figure(width: float = 9.0, height: float = 4.0) -> tuple[Figure, Axes]:
    """Return a figure on the Agg canvas with the house axis style."""
    fig = Figure(figsize=(width, height), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, axis="y", color="#e3e6ea", linewidth=0.8)
    ax.set_axisbelow(True)
    return fig, ax


def png_bytes(fig: Figure) -> bytes:
    """Render ``fig`` to PNG."""
    buf = io.BytesIO()
    with warnings.catch_warnings():
        # a name in a script the bundled font lacks is drawn as boxes; say nothing on stderr
        warnings.filterwarnings("ignore", message="Glyph .* missing from font")
        fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    return buf.getvalue()


def png_base64(fig: Figure) -> str:
    """Render ``fig`` to PNG and return it base64-encoded (ASCII)."""
    return base64.b64encode(png_bytes(fig)).decode("ascii")


def amount_axis(ax: Axes, axis: str = "x") -> None:
    """Label an axis of amounts compactly (``1.2M``, ``350k``)."""
    fmt = FuncFormatter(lambda v, _pos: short_amount(v))
    (ax.xaxis if axis == "x" else ax.yaxis).set_major_formatter(fmt)


def legend_outside(ax: Axes) -> None:
    """Place the legend to the right of the plot, where it hides nothing."""
    ax.legend(frameon=False, fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))


def exceedance(dist: LossDistribution) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Step points of ``P(L > l)``: value ``y[j]`` holds on ``[x[j], x[j+1])``."""
    p = dist.probabilities
    above = np.concatenate((np.cumsum(p[::-1])[::-1][1:], [0.0]))  # P(L > losses[j])
    x = np.concatenate(([min(0.0, float(dist.losses[0]))], dist.losses))
    y = np.concatenate(([1.0], above))
    return x, y


def _marker(ax: Axes, x: float, text: str, colour: str, style: str) -> None:
    """Draw a vertical marker line up to :data:`MARKER_TOP`, labelled beside its top."""
    ax.axvline(x, ymax=MARKER_TOP, color=colour, linestyle=style, linewidth=1.1)
    ax.annotate(text, (x, MARKER_TOP), xycoords=("data", "axes fraction"), xytext=(3, 0),
                textcoords="offset points", color=colour, fontsize=9, rotation=90, va="top")


# ------------------------------------------------------------- loss histogram
#: Tail probability beyond which a binned loss distribution is not drawn (the tail chart is).
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


def _fit_heights(
    ax: Axes, laws: Sequence[tuple[NDArray[np.float64], NDArray[np.float64]]]
) -> None:
    """Set the y-axis so bars stay under the note band; cut a dominant spike and label it.

    Each law is ``(x, p)``.  The axis is cut when a law's largest mass is
    more than four times the second largest mass of every law drawn; the cut
    bar's height is written in the band above the marker lines.
    """
    heights = [np.asarray(p, dtype=float) for _x, p in laws if np.asarray(p).size]
    if not heights:
        return
    tallest = max(float(h.max()) for h in heights)
    seconds = [float(np.sort(h)[-2]) if h.size > 1 else 0.0 for h in heights]
    cut = max(seconds) > 0 and tallest > 4 * max(seconds)
    if not cut:
        ax.set_ylim(0, tallest / TALLEST_BAR if tallest > 0 else 1.0)
        return
    top = max(seconds) / TALLEST_BAR
    ax.set_ylim(0, top)
    spikes: dict[float, list[tuple[str, str]]] = {}
    for name, (x, p) in zip((WITH_LINKS, WITHOUT_LINKS_SHORT), laws, strict=False):
        for xv, pv in zip(x[p > top].tolist(), p[p > top].tolist(), strict=True):
            spikes.setdefault(xv, []).append((name, f"{pv:.1%}"))
    for xv, found in spikes.items():
        values = {v for _n, v in found}
        if len(values) == 1 and len(found) == len(laws):
            text = found[0][1]
        else:
            text = ", ".join(f"{v} {n}" for n, v in found)
        ax.annotate(f"bar cut: P = {text}", (xv, (1 + MARKER_TOP) / 2),
                    xycoords=("data", "axes fraction"), xytext=(6, 0),
                    textcoords="offset points", fontsize=8.5, color=NOTE_COLOUR, va="center")


def loss_distribution_chart(
    dist: LossDistribution,
    measures: RiskMeasures,
    plain: LossDistribution | None,
    currency: str,
) -> str:
    """Draw :func:`loss_distribution_figure` as a base64 PNG."""
    return png_base64(loss_distribution_figure(dist, measures, plain, currency))


def loss_distribution_figure(
    dist: LossDistribution,
    measures: RiskMeasures,
    plain: LossDistribution | None,
    currency: str,
) -> Figure:
    """Probability of each loss (binned for large supports), with and without links.

    Parameters
    ----------
    dist : LossDistribution
        The loss distribution with links (contagion).
    measures : RiskMeasures
        Its measures; EL and VaR are marked.
    plain : LossDistribution or None
        The distribution without links (Gaussian copula), drawn for comparison.
    currency : str
        Axis label.

    Returns
    -------
    Figure

    """
    fig, ax = new_figure()
    large = dist.losses.size > MAX_ATOMS_DRAWN or (
        plain is not None and plain.losses.size > MAX_ATOMS_DRAWN
    )
    laws = [dist] if plain is None else [dist, plain]
    unit = f" ({plain_text(currency)})" if currency else ""
    xlabel = f"portfolio loss{unit}"
    top = _display_top(laws, measures)
    if large and top > 0:
        edges = np.linspace(min(0.0, float(dist.losses[0])), top, BINS + 1)
        mass, _ = np.histogram(dist.losses, bins=edges, weights=dist.probabilities)
        ax.bar(edges[:-1], mass, width=np.diff(edges), align="edge", color=MODEL_COLOUR,
               alpha=0.85, label=WITH_LINKS)
        centres = edges[:-1] + np.diff(edges) / 2
        drawn = [(centres, mass)]
        if plain is not None:
            pmass, _ = np.histogram(plain.losses, bins=edges, weights=plain.probabilities)
            ax.stairs(pmass, edges, color=PLAIN_COLOUR, linewidth=1.6, label=WITHOUT_LINKS)
            drawn.append((centres, pmass))
        ax.set_ylabel("probability per bin")
        xlabel += f", bins of {short_amount(float(edges[1] - edges[0]))}"
        beyond = [float(law.probabilities[law.losses > top].sum()) for law in laws]
        if max(beyond) > 0:
            names = (WITH_LINKS, WITHOUT_LINKS_SHORT)
            xlabel += f"\nnot drawn: P(loss > {short_amount(top)}) = " + ", ".join(
                f"{b:.1e} {n}" if len(laws) > 1 else f"{b:.1e}"
                for b, n in zip(beyond, names, strict=False)
            )
    else:
        if plain is not None:
            ax.plot(plain.losses, plain.probabilities, "o", mfc="none", mec=PLAIN_COLOUR,
                    ms=7, label=WITHOUT_LINKS)
        ax.vlines(dist.losses, 0, dist.probabilities, color=MODEL_COLOUR, linewidth=2)
        ax.plot(dist.losses, dist.probabilities, "o", color=MODEL_COLOUR, ms=4, label=WITH_LINKS)
        ax.set_ylabel("probability")
        drawn = [(dist.losses, dist.probabilities)]
        if plain is not None:
            drawn.append((plain.losses, plain.probabilities))
    _fit_heights(ax, drawn)
    _marker(ax, measures.expected_loss, "EL", MODEL_COLOUR, ":")
    same_var: dict[float, list[str]] = {}
    for key, var in measures.var.items():
        same_var.setdefault(var, []).append(level_label(key))
    for var, levels in same_var.items():
        _marker(ax, var, f"VaR {', '.join(levels)}", MARK_COLOUR, "--")
    ax.set_xlabel(xlabel)
    amount_axis(ax)
    ax.legend(frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=9)
    ax.set_title("Loss distribution", loc="left", fontsize=11)
    return fig


# ------------------------------------------------------------------ tail chart
def tail_chart(
    dist: LossDistribution,
    measures: RiskMeasures,
    plain: LossDistribution | None,
    currency: str,
) -> str:
    """``P(L > l)`` against ``l`` on a log scale, with and without links, VaR marked.

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
        (plain, PLAIN_COLOUR, WITHOUT_LINKS, 1.6),
        (dist, MODEL_COLOUR, WITH_LINKS, 2.0),
    ):
        if law is None or law.losses.size < 2:
            continue
        x, y = exceedance(law)
        keep = y > 0
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
        ax.annotate(f"VaR {level_label(a)}", (var, 1 - a), xytext=(4, 4),
                    textcoords="offset points", color=MARK_COLOUR, fontsize=9)
    if not drawn:
        ax.text(0.5, 0.5, "no loss above the smallest outcome", transform=ax.transAxes,
                ha="center", color="#555555")
    ax.set_xlabel(f"loss level l ({plain_text(currency)})" if currency else "loss level l")
    ax.set_ylabel("P(loss > l)")
    amount_axis(ax)
    if drawn:
        ax.legend(frameon=False, loc="upper right", fontsize=9)
    ax.set_title("Tail: probability that the loss exceeds l", loc="left", fontsize=11)
    return png_base64(fig)


# ------------------------------------------------------------ measures compared
def comparison_chart(
    measures: RiskMeasures, plain: RiskMeasures | None, currency: str
) -> str:
    """Draw grouped bars of EL, VaR and ES at each level, with and without links.

    Returns
    -------
    str
        Base64 PNG.

    """
    names = ["EL"]
    model_vals = [measures.expected_loss]
    plain_vals = [plain.expected_loss if plain else np.nan]
    for key in measures.var:
        names += [f"VaR {level_label(key)}", f"ES {level_label(key)}"]
        model_vals += [measures.var[key], measures.expected_shortfall[key]]
        plain_vals += [
            plain.var.get(key, np.nan) if plain else np.nan,
            plain.expected_shortfall.get(key, np.nan) if plain else np.nan,
        ]
    fig, ax = new_figure(9.0, 3.8)
    x = np.arange(len(names))
    width = 0.38 if plain is not None else 0.6
    if plain is not None:
        bars_p = ax.bar(x - width / 2, plain_vals, width, color=PLAIN_COLOUR,
                        label=WITHOUT_LINKS)
        bars_m = ax.bar(x + width / 2, model_vals, width, color=MODEL_COLOUR, label=WITH_LINKS)
        ax.bar_label(bars_p, labels=[short_amount(v) for v in plain_vals], fontsize=8,
                     padding=2, color="#555555")
    else:
        bars_m = ax.bar(x, model_vals, width, color=MODEL_COLOUR, label=WITH_LINKS)
    ax.bar_label(bars_m, labels=[short_amount(v) for v in model_vals], fontsize=8, padding=2)
    ax.set_xticks(x, names)
    ax.set_ylim(bottom=min(0.0, *model_vals, *(v for v in plain_vals if np.isfinite(v))))
    ax.set_ylabel(plain_text(currency) if currency else "amount")
    amount_axis(ax, "y")
    ax.margins(y=0.12)
    ax.legend(frameon=False, loc="upper left", fontsize=9)
    title = ("Risk measures with links against without links" if plain is not None
             else "Risk measures")
    ax.set_title(title, loc="left", fontsize=11)
    return png_base64(fig)


# ------------------------------------------------------------------- uplift
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
        Own default probability and the PD with contagion minus it.

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
    ax.barh(y, own_a, color=PLAIN_COLOUR, height=0.7, label="own PD")
    ax.barh(y, up_a, left=own_a, color=CONTAGION_COLOUR, height=0.7,
            label="added by contagion")
    ax.set_yticks(y, [short_label(t) for t in labels], fontsize=8)
    ax.xaxis.set_major_formatter(PercentFormatter(1.0, decimals=None))
    ax.set_xlabel("PD with contagion")
    ax.set_xlim(left=0)
    ax.legend(frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=9)
    ax.set_title("Default probability added by contagion", loc="left", fontsize=11)
    return png_base64(fig)


def paired_bars_chart(
    labels: Sequence[str],
    first: Sequence[float],
    second: Sequence[float],
    names: tuple[str, str],
    title: str,
    *,
    contagion: Sequence[float] | None = None,
) -> str:
    """Horizontal bar pairs, one pair per label (e.g. model capital beside IRB capital).

    Parameters
    ----------
    labels : sequence of str
        Drawn top to bottom.
    first, second : sequence of float
        The two values of each label (currency).
    names : (str, str)
        Legend names of the two bars.
    title : str
    contagion : sequence of float, optional
        Part of ``first`` carried by contagion, drawn over it in the contagion colour.

    Returns
    -------
    str
        Base64 PNG.
    """
    n = len(labels)
    fig, ax = new_figure(9.0, max(2.2, 0.42 * n + 1.0))
    ax.grid(False, axis="y")
    ax.grid(True, axis="x", color="#e3e6ea", linewidth=0.8)
    y = np.arange(n)[::-1].astype(float)
    a = np.asarray(first, dtype=float)
    b = np.asarray(second, dtype=float)
    ax.barh(y + 0.2, a, color=PLAIN_COLOUR, height=0.38, label=names[0])
    if contagion is not None:
        ax.barh(y + 0.2, np.asarray(contagion, dtype=float), color=CONTAGION_COLOUR,
                height=0.38, label="of which contagion")
    ax.barh(y - 0.2, b, color="#4c72b0", height=0.38, label=names[1])
    ax.set_yticks(y, [short_label(t) for t in labels], fontsize=8)
    amount_axis(ax, "x")
    ax.axvline(0.0, color="#555555", linewidth=0.8)
    ax.legend(frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=3, fontsize=9)
    ax.set_title(title, loc="left", fontsize=11, pad=24)  # above the legend
    return png_base64(fig)
