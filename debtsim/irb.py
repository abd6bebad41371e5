"""Basel II IRB capital for corporate exposures: a regulatory yardstick.

The IRB formula is the one-factor Gaussian model evaluated at the 99.9%
factor quantile, with a supervisory correlation and a maturity adjustment.
debtsim reports it beside its own figures for orientation only: capital
must follow the user's supervisor's rules and licensed practice.

References
----------
Basel Committee on Banking Supervision, "International Convergence of
Capital Measurement and Capital Standards: A Revised Framework",
June 2006, paragraph 272.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtri

from debtsim.model.specification import conditional_default_probability

__all__ = [
    "irb_capital",
    "irb_capital_amounts",
    "irb_correlation",
    "irb_maturity_adjustment",
    "irb_risk_weight",
]


def irb_correlation(pd: ArrayLike) -> NDArray[np.float64]:
    """Supervisory corporate correlation ``R = 0.12 w + 0.24 (1 - w)``.

    With ``w = (1 - e^{-50 PD}) / (1 - e^{-50})``.
    """
    pd = np.asarray(pd, dtype=float)
    w = (1.0 - np.exp(-50.0 * pd)) / (1.0 - np.exp(-50.0))
    return 0.12 * w + 0.24 * (1.0 - w)


def irb_maturity_adjustment(pd: ArrayLike, maturity: ArrayLike = 2.5) -> NDArray[np.float64]:
    """``(1 + (M - 2.5) b) / (1 - 1.5 b)`` with ``b = (0.11852 - 0.05478 ln PD)^2``."""
    pd = np.asarray(pd, dtype=float)
    b = (0.11852 - 0.05478 * np.log(pd)) ** 2
    return (1.0 + (np.asarray(maturity, dtype=float) - 2.5) * b) / (1.0 - 1.5 * b)


def irb_capital(
    pd: ArrayLike,
    lgd: ArrayLike,
    *,
    maturity: ArrayLike = 2.5,
    correlation: ArrayLike | None = None,
) -> NDArray[np.float64]:
    """Capital requirement ``K`` per unit of EAD under the corporate IRB formula.

    Parameters
    ----------
    pd, lgd : array_like
        Probability of default (0 < PD < 1) and loss given default.
    maturity : float or array_like
        Effective maturity in years (broadcast against ``pd``).
    correlation : array_like, optional
        Asset correlation; the supervisory corporate formula when omitted.

    Returns
    -------
    ndarray
        ``K = LGD [Phi((Phi^-1(PD) + sqrt(R) Phi^-1(0.999)) / sqrt(1-R)) - PD] x MA``.
    """
    pd = np.asarray(pd, dtype=float)
    lgd = np.asarray(lgd, dtype=float)
    r = irb_correlation(pd) if correlation is None else np.asarray(correlation, dtype=float)
    z_stress = np.array([-ndtri(0.999)])  # the factor's 0.1% quantile
    stressed = np.array(
        [
            conditional_default_probability(np.atleast_1d(p), np.atleast_1d(rr), z_stress)[0, 0]
            for p, rr in zip(np.ravel(pd), np.ravel(np.broadcast_to(r, pd.shape)), strict=True)
        ]
    ).reshape(pd.shape)
    return lgd * (stressed - pd) * irb_maturity_adjustment(pd, maturity)


def irb_risk_weight(pd: ArrayLike, lgd: ArrayLike, *, maturity: float = 2.5) -> NDArray[np.float64]:
    """Risk weight ``12.5 K`` (a fraction: 0.9232 means 92.32%)."""
    return 12.5 * irb_capital(pd, lgd, maturity=maturity)


def irb_capital_amounts(
    pd: ArrayLike, lgd: ArrayLike, ead: ArrayLike, maturity: ArrayLike = 2.5
) -> NDArray[np.float64]:
    """IRB capital in currency per obligor: ``K x EAD`` with each obligor's maturity.

    Parameters
    ----------
    pd, lgd, ead, maturity : array_like, shape (n,)
        Maturity in years (1 to 5, Basel II para. 320).

    Returns
    -------
    ndarray, shape (n,)
        0 where PD is 1 (a stressed certain default: its loss is expected, not capital).
    """
    pd = np.asarray(pd, dtype=float)
    out = np.zeros(pd.shape)
    live = pd < 1.0
    if live.any():
        m = np.broadcast_to(np.asarray(maturity, dtype=float), pd.shape)[live]
        out[live] = irb_capital(pd[live], np.asarray(lgd, dtype=float)[live], maturity=m)
    return out * np.asarray(ead, dtype=float)
