"""Risk measures of a loss law: expected loss, VaR, expected shortfall."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from debtsim.distribution import LossDistribution

__all__ = [
    "RiskMeasures",
    "economic_capital",
    "expected_loss",
    "expected_shortfall",
    "level_key",
    "loss_std",
    "measures",
    "value_at_risk",
]

#: Slack on cumulative probabilities, so float noise of an exact law does not move a quantile.
CDF_TOLERANCE = 1e-12


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence level must be between 0 and 1, got {level}")
    return level


def level_key(level: float) -> str:
    """Key of a confidence level in outputs: ``str(float)``, e.g. ``"0.999"``."""
    return str(float(level))


def expected_loss(dist: LossDistribution) -> float:
    """``E[L]``."""
    return dist.mean


def loss_std(dist: LossDistribution) -> float:
    """Return the standard deviation of ``L``."""
    return dist.std


def value_at_risk(dist: LossDistribution, level: float) -> float:
    """Lower quantile ``inf{l : P(L <= l) >= level}``.

    Parameters
    ----------
    dist : LossDistribution
    level : float
        Confidence level in (0, 1).
    """
    level = _check_level(level)
    idx = int(np.searchsorted(dist.cdf, level - CDF_TOLERANCE, side="left"))
    return float(dist.losses[min(idx, dist.losses.size - 1)])


def expected_shortfall(dist: LossDistribution, level: float) -> float:
    """Return the expected shortfall, splitting the atom at VaR.

    ``ES_a = (E[L 1{L > VaR_a}] + VaR_a (P(L <= VaR_a) - a)) / (1 - a)``.

    References
    ----------
    C. Acerbi and D. Tasche, "On the coherence of expected shortfall",
    Journal of Banking & Finance 26 (2002).
    """
    level = _check_level(level)
    var = value_at_risk(dist, level)
    above = dist.losses > var
    tail = float(np.dot(dist.losses[above], dist.probabilities[above]))
    at_or_below = 1.0 - float(dist.probabilities[above].sum())
    return (tail + var * (at_or_below - level)) / (1.0 - level)


def economic_capital(dist: LossDistribution, level: float) -> float:
    """``VaR_a - EL`` (common practice: economic capital at 99.9%)."""
    return value_at_risk(dist, level) - expected_loss(dist)


@dataclass(frozen=True)
class RiskMeasures:
    """The measures a run reports, keyed by ``level_key``.

    Attributes
    ----------
    expected_loss, loss_std : float
    var, expected_shortfall, economic_capital : dict of str to float
    """

    expected_loss: float
    loss_std: float
    var: dict[str, float]
    expected_shortfall: dict[str, float]
    economic_capital: dict[str, float]

    def to_dict(self) -> dict[str, object]:
        """Return the ``measures`` object of ``summary.json``."""
        return {
            "expected_loss": self.expected_loss,
            "loss_std": self.loss_std,
            "var": dict(self.var),
            "expected_shortfall": dict(self.expected_shortfall),
            "economic_capital": dict(self.economic_capital),
        }


def measures(dist: LossDistribution, levels: Iterable[float]) -> RiskMeasures:
    """Compute EL, loss std, and VaR, ES and economic capital at each level."""
    levels = [_check_level(a) for a in levels]
    el = expected_loss(dist)
    var = {level_key(a): value_at_risk(dist, a) for a in levels}
    es = {level_key(a): expected_shortfall(dist, a) for a in levels}
    return RiskMeasures(
        expected_loss=el,
        loss_std=loss_std(dist),
        var=var,
        expected_shortfall=es,
        economic_capital={k: v - el for k, v in var.items()},
    )
