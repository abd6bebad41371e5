"""The result every engine returns: a discrete law of portfolio loss."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from debtsim._typing import FloatArray

__all__ = ["LossDistribution"]



def _frozen(a: NDArray[Any]) -> FloatArray:
    a = np.asarray(a, dtype=float).copy()
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class LossDistribution:
    """A discrete law of portfolio loss and what produced it.

    Attributes
    ----------
    losses : ndarray, shape (k,)
        Distinct loss values, strictly ascending.
    probabilities : ndarray, shape (k,)
        Probability of each loss value; non-negative, sums to 1.
    default_probability : ndarray, shape (n,)
        Final (contagion included) default probability of each obligor, in
        book order.
    engine : str
        Name of the engine that computed the law.
    samples : int or None
        Number of scenarios drawn; None for exact engines.
    seed : int or None
        Seed used; None for deterministic engines.
    settings : mapping
        Engine settings worth reporting (node count, grid unit, shots...).
    diagnostics : mapping
        Error estimates, e.g. ``expected_loss_standard_error``,
        ``var_standard_error`` per level, ``discretisation_error``.
    """

    losses: FloatArray
    probabilities: FloatArray
    default_probability: FloatArray
    engine: str
    samples: int | None = None
    seed: int | None = None
    settings: Mapping[str, Any] = field(default_factory=dict)
    diagnostics: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        losses = np.asarray(self.losses, dtype=float)
        probs = np.asarray(self.probabilities, dtype=float)
        if losses.shape != probs.shape or losses.ndim != 1:
            raise ValueError(
                f"losses and probabilities must be 1-d of equal length, got {losses.shape} "
                f"and {probs.shape}"
            )
        if losses.size and np.any(np.diff(losses) <= 0):
            raise ValueError("losses must be strictly ascending")
        object.__setattr__(self, "losses", _frozen(losses))
        object.__setattr__(self, "probabilities", _frozen(probs))
        # a probability: float noise above 1 or below 0 is clipped
        dp = np.clip(np.asarray(self.default_probability, dtype=float), 0.0, 1.0)
        object.__setattr__(self, "default_probability", _frozen(dp))
        object.__setattr__(self, "settings", MappingProxyType(dict(self.settings)))
        object.__setattr__(self, "diagnostics", MappingProxyType(dict(self.diagnostics)))

    @classmethod
    def from_atoms(
        cls,
        losses: NDArray[Any],
        probabilities: NDArray[Any],
        *,
        decimals: int = 9,
        **kwargs: Any,
    ) -> LossDistribution:
        """Build a law from possibly repeated, unsorted loss atoms.

        Atoms whose losses agree after rounding to ``decimals`` places
        (relative to the largest loss) are merged; probabilities are
        renormalised to sum exactly to one.

        Parameters
        ----------
        losses, probabilities : array_like, shape (k,)
            Atoms of the law; probabilities non-negative with positive sum.
        decimals : int
            Relative rounding used to merge atoms that differ by float noise.
        **kwargs
            Passed to the constructor (engine, default_probability, ...).
        """
        losses = np.asarray(losses, dtype=float).ravel()
        probs = np.asarray(probabilities, dtype=float).ravel()
        scale = max(float(np.max(np.abs(losses))) if losses.size else 0.0, 1.0)
        key = np.round(losses / scale, decimals)
        # within each merged group the representative loss is that of its most likely atom,
        # a real sum of exposures rather than an average carrying float noise
        order = np.lexsort((-probs, key))
        key_sorted = key[order]
        first = np.concatenate(([True], key_sorted[1:] != key_sorted[:-1]))
        groups = np.cumsum(first) - 1
        merged_p = np.bincount(groups, weights=probs[order])
        rep = losses[order][first]
        keep = merged_p > 0
        rep, merged_p = rep[keep], merged_p[keep]
        if rep.size == 0:
            raise ValueError("a loss law needs positive total probability")
        # representatives of distinct keys are ascending but may tie after rounding
        distinct = np.concatenate(([True], np.diff(rep) > 0))
        if not distinct.all():
            merged_p = np.bincount(np.cumsum(distinct) - 1, weights=merged_p)
            rep = rep[distinct]
        return cls(losses=rep, probabilities=merged_p / merged_p.sum(), **kwargs)

    @classmethod
    def from_samples(
        cls,
        losses: NDArray[Any],
        weights: NDArray[Any] | None = None,
        **kwargs: Any,
    ) -> LossDistribution:
        """Build the empirical (optionally likelihood-weighted) law of sampled losses."""
        losses = np.asarray(losses, dtype=float).ravel()
        w = np.ones_like(losses) if weights is None else np.asarray(weights, dtype=float).ravel()
        return cls.from_atoms(losses, w, **kwargs)

    # ----------------------------------------------------------- derived values
    @property
    def cdf(self) -> FloatArray:
        """``P(L <= losses[j])`` for each support point."""
        c = np.cumsum(self.probabilities)
        c[-1] = 1.0
        return c

    @property
    def mean(self) -> float:
        """Expected loss of the law."""
        return float(np.dot(self.losses, self.probabilities))

    @property
    def std(self) -> float:
        """Standard deviation of the law."""
        m = self.mean
        return float(np.sqrt(max(np.dot((self.losses - m) ** 2, self.probabilities), 0.0)))

    def to_frame(self) -> pd.DataFrame:
        """Return the distribution as a DataFrame with columns ``loss, probability``.

        Ascending losses, as in ``loss_distribution.csv`` (atoms of probability
        exactly 0 are kept here).
        """
        return pd.DataFrame(
            {"loss": np.array(self.losses), "probability": np.array(self.probabilities)}
        )
