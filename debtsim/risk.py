"""Risk measures of a loss law: expected loss, VaR, expected shortfall."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from debtsim._typing import FloatArray
from debtsim.distribution import LossDistribution
from debtsim.options import validate_level

__all__ = [
    "RiskMeasures",
    "economic_capital",
    "expected_loss",
    "expected_shortfall",
    "level_key",
    "loss_std",
    "measure_columns",
    "measures",
    "value_at_risk",
    "weighted_sample_measures",
]

#: Slack on cumulative probabilities, so float noise of an exact law does not move a quantile.
CDF_TOLERANCE = 1e-12


def _check_level(level: float) -> float:
    return validate_level(level, name="confidence level")


def level_key(level: float) -> str:
    """Key of a confidence level in outputs: ``str(float)``, e.g. ``"0.999"``."""
    return str(float(level))


def expected_loss(dist: LossDistribution) -> float:
    """``E[L]``."""
    return dist.mean


def loss_std(dist: LossDistribution) -> float:
    """Return the standard deviation of ``L``."""
    return dist.std


def _tail_at(
    losses: FloatArray, probabilities: FloatArray, cdf: FloatArray, level: float
) -> tuple[float, float]:
    """VaR and ES at ``level`` of a law given by ascending losses and their probabilities.

    The one implementation behind :func:`value_at_risk`,
    :func:`expected_shortfall` and :func:`weighted_sample_measures`; losses may
    repeat (a sorted sample).
    """
    idx = min(int(np.searchsorted(cdf, level - CDF_TOLERANCE, side="left")), losses.size - 1)
    var = float(losses[idx])
    above = losses > var
    tail = float(np.dot(losses[above], probabilities[above]))
    at_or_below = 1.0 - float(probabilities[above].sum())
    return var, (tail + var * (at_or_below - level)) / (1.0 - level)


def value_at_risk(dist: LossDistribution, level: float) -> float:
    """Lower quantile ``inf{l : P(L <= l) >= level}``.

    Parameters
    ----------
    dist : LossDistribution
    level : float
        Confidence level in (0, 1).
    """
    level = _check_level(level)
    return _tail_at(dist.losses, dist.probabilities, dist.cdf, level)[0]


def expected_shortfall(dist: LossDistribution, level: float) -> float:
    """Return the expected shortfall, splitting the atom at VaR.

    ``ES_a = (E[L 1{L > VaR_a}] + VaR_a (P(L <= VaR_a) - a)) / (1 - a)``.

    References
    ----------
    C. Acerbi and D. Tasche, "On the coherence of expected shortfall",
    Journal of Banking & Finance 26 (2002).
    """
    level = _check_level(level)
    return _tail_at(dist.losses, dist.probabilities, dist.cdf, level)[1]


def weighted_sample_measures(
    losses: FloatArray, weights: FloatArray, levels: Sequence[float]
) -> tuple[FloatArray, FloatArray]:
    """VaR and ES (Acerbi–Tasche) of a weighted sample's self-normalised empirical law.

    Parameters
    ----------
    losses, weights : ndarray, shape (k,)
        Sampled losses and their (importance) weights; positive total weight.
    levels : sequence of float
        Confidence levels in (0, 1).

    Returns
    -------
    var, es : ndarray, shape (len(levels),)

    Notes
    -----
    The same quantile and atom split as :func:`value_at_risk` and
    :func:`expected_shortfall`, applied to the sample sorted by loss.
    """
    order = np.argsort(losses, kind="stable")
    x = np.asarray(losses)[order]
    w = np.asarray(weights)[order] / np.sum(weights)
    cdf = np.cumsum(w)
    var = np.empty(len(levels))
    es = np.empty(len(levels))
    for j, level in enumerate(levels):
        var[j], es[j] = _tail_at(x, w, cdf, _check_level(level))
    return var, es


def economic_capital(dist: LossDistribution, level: float) -> float:
    """``VaR_a - EL`` (common practice: economic capital at 99.9%)."""
    return value_at_risk(dist, level) - expected_loss(dist)


def _frozen_levels(values: Mapping[float, float]) -> Mapping[float, float]:
    return MappingProxyType({float(k): float(v) for k, v in values.items()})


@dataclass(frozen=True)
class RiskMeasures:
    """The measures a run reports; per-level figures keyed by the level as a float.

    Attributes
    ----------
    expected_loss, loss_std : float
    var, expected_shortfall, economic_capital : mapping of float to float
        Read-only, e.g. ``measures.var[0.999]``.
    """

    expected_loss: float
    loss_std: float
    var: Mapping[float, float]
    expected_shortfall: Mapping[float, float]
    economic_capital: Mapping[float, float]

    def __post_init__(self) -> None:
        for name in ("var", "expected_shortfall", "economic_capital"):
            object.__setattr__(self, name, _frozen_levels(getattr(self, name)))

    @property
    def levels(self) -> tuple[float, ...]:
        """Confidence levels measured, ascending."""
        return tuple(sorted(self.var))

    def to_dict(self) -> dict[str, object]:
        """Return the ``measures`` object of ``summary.json`` (levels keyed ``str(float)``)."""
        return {
            "expected_loss": self.expected_loss,
            "loss_std": self.loss_std,
            "var": {level_key(a): v for a, v in self.var.items()},
            "expected_shortfall": {level_key(a): v for a, v in self.expected_shortfall.items()},
            "economic_capital": {level_key(a): v for a, v in self.economic_capital.items()},
        }

    def as_row(self) -> dict[str, float]:
        """Return the measure columns of a table row, named as :func:`measure_columns`."""
        row = {"expected_loss": float(self.expected_loss), "loss_std": float(self.loss_std)}
        for a in self.levels:
            key = level_key(a)
            row[f"var_{key}"] = float(self.var[a])
            row[f"expected_shortfall_{key}"] = float(self.expected_shortfall[a])
            row[f"economic_capital_{key}"] = float(self.economic_capital[a])
        return row


def measure_columns(levels: Sequence[float]) -> list[str]:
    """Measure columns of ``scenarios.csv`` and ``sweep.csv``.

    ``expected_loss``, ``loss_std``, then for each level (as in
    ``summary.json``, e.g. ``0.999``) ``var_<level>``,
    ``expected_shortfall_<level>`` and ``economic_capital_<level>``.
    """
    cols = ["expected_loss", "loss_std"]
    for a in levels:
        key = level_key(a)
        cols += [f"var_{key}", f"expected_shortfall_{key}", f"economic_capital_{key}"]
    return cols


def measures(dist: LossDistribution, levels: Iterable[float]) -> RiskMeasures:
    """Compute EL, loss std, and VaR, ES and economic capital at each level."""
    checked = [_check_level(a) for a in levels]
    el = expected_loss(dist)
    var = {a: value_at_risk(dist, a) for a in checked}
    es = {a: expected_shortfall(dist, a) for a in checked}
    return RiskMeasures(
        expected_loss=el,
        loss_std=loss_std(dist),
        var=var,
        expected_shortfall=es,
        economic_capital={a: v - el for a, v in var.items()},
    )
