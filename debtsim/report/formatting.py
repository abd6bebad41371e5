"""How numbers are written for a reader: amounts, probabilities, changes, levels.

One set of formatters for every page, chart and the command line.  Changes
are written two ways that must not be confused:

* a difference of two probabilities is in **percentage points**, ``+0.95 pp``
  (:func:`signed_pp`);
* a relative change of an amount is in **percent**, ``+27.4%``
  (:func:`relative_change`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = [
    "NOISE",
    "level_label",
    "money",
    "number",
    "percent",
    "relative_change",
    "short_amount",
    "signed_money",
    "signed_pp",
]

#: Probability differences at or below this are float noise of an exact law, written as 0.
NOISE = 1e-12

DASH = "–"


def _missing(x: float | None) -> bool:
    return x is None or not math.isfinite(float(x))


def money(x: float | None, currency: str | None = None) -> str:
    """Write an amount: whole units from 1,000 up, cents below, 3 digits below 1.

    Parameters
    ----------
    x : float or None
        The amount; None or a non-finite value gives a dash.
    currency : str, optional
        Appended after a space (``127,236 EUR``) when given.

    Returns
    -------
    str

    """
    if x is None or _missing(x):
        return DASH
    v = float(x)
    ax = abs(v)
    if ax >= 1000:
        text = f"{v:,.0f}"
    elif ax >= 1 or ax == 0:
        text = f"{v:,.2f}"
    else:
        text = f"{v:.3g}"
    return f"{text} {currency}" if currency else text


def signed_money(x: float | None, currency: str | None = None) -> str:
    """Write an amount with its sign, ``+27,403`` or ``-1,250`` (``0.00`` unsigned)."""
    if x is None or _missing(x):
        return DASH
    text = money(x, currency)
    return text if float(x) <= 0 else "+" + text


def short_amount(x: float | None) -> str:
    """Compact amount for chart axes and labels: ``1.2M``, ``350k``, ``0.45``."""
    if x is None or _missing(x):
        return DASH
    v = float(x)
    ax = abs(v)
    for bound, suffix in ((1e12, "T"), (1e9, "bn"), (1e6, "M"), (1e3, "k")):
        if ax >= bound:
            return f"{v / bound:.3g}{suffix}"
    if ax == 0:
        return "0"
    return f"{v:.3g}"


def percent(p: float | None) -> str:
    """Write a probability (or a share) as a percentage: ``1.20%``, ``0.025%``, ``100%``."""
    if p is None or _missing(p):
        return DASH
    v = float(p)
    if v == 0:
        return "0%"
    if abs(v - 1) <= NOISE:
        return "100%"
    if abs(v) >= 0.001:
        return f"{100 * v:.2f}%"
    return f"{100 * v:.2g}%"


def signed_pp(d: float | None) -> str:
    """Write a difference of two probabilities in percentage points: ``+0.95 pp``.

    Differences at or below :data:`NOISE` in size are written ``0 pp``.
    """
    if d is None or _missing(d):
        return DASH
    v = float(d)
    if abs(v) <= NOISE:
        return "0 pp"
    points = 100 * v
    text = f"{points:.2f}" if abs(points) >= 0.1 else f"{points:.2g}"
    return f"{'+' if v > 0 else ''}{text} pp"


def relative_change(value: float | None, base: float | None) -> str:
    """Write ``value / base - 1`` in percent, ``+27.4%``; a dash when the base is not positive."""
    if value is None or base is None or _missing(value) or _missing(base):
        return DASH
    if float(base) <= 0:
        return DASH
    points = round(100 * (float(value) / float(base) - 1.0), 1)
    return "0.0%" if points == 0 else f"{points:+.1f}%"


def level_label(level: float | str) -> str:
    """Write a confidence level as a percentage: ``0.999`` -> ``99.9%``."""
    return f"{100 * float(level):g}%"


def number(x: Any) -> str:
    """Write a setting or diagnostic value: thousands separated, 4-6 significant digits."""
    if isinstance(x, (bool, np.bool_)):
        return "yes" if bool(x) else "no"
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}"
    if isinstance(x, (float, np.floating)):
        f = float(x)
        if not math.isfinite(f):
            return str(f)
        if f != 0 and (abs(f) >= 1e6 or abs(f) < 1e-3):
            return f"{f:.4g}"
        return f"{f:,.6g}"
    if x is None:
        return DASH
    return str(x)
