"""Brute-force enumeration of the DESIGN.md model: the independent reference.

For each factor node, every pattern of own defaults (2^n) and every pattern
of live links (2^m) is enumerated and final defaults found by plain graph
search.  Written without any debtsim engine code; only for tiny books.
"""

from __future__ import annotations

import itertools

import numpy as np
from scipy.stats import norm


def enumerate_law(
    ead, lgd, pd, rho, links, nodes, weights
) -> tuple[dict[float, float], np.ndarray]:
    """Loss law and final default probabilities by full enumeration.

    Parameters
    ----------
    ead, lgd, pd, rho : sequences of float, one per obligor
    links : sequence of (creditor, debtor, q) with obligor indices
    nodes, weights : factor nodes and probability weights (weights sum to 1)

    Returns
    -------
    law : dict loss -> probability (losses rounded to 1e-9)
    default_probability : ndarray (n,)
    """
    n = len(ead)
    loss_each = np.asarray(ead, float) * np.asarray(lgd, float)
    law: dict[float, float] = {}
    dp = np.zeros(n)
    for z, w in zip(nodes, weights, strict=True):
        p = [
            1.0 if pd[i] >= 1 else
            float(norm.cdf((norm.ppf(pd[i]) - np.sqrt(rho[i]) * z) / np.sqrt(1 - rho[i])))
            for i in range(n)
        ]
        for own in itertools.product((0, 1), repeat=n):
            p_own = w
            for i in range(n):
                p_own *= p[i] if own[i] else 1 - p[i]
            if p_own == 0.0:
                continue
            for live in itertools.product((0, 1), repeat=len(links)):
                prob = p_own
                for (_c, _d, q), on in zip(links, live, strict=True):
                    prob *= q if on else 1 - q
                if prob == 0.0:
                    continue
                final = [bool(x) for x in own]
                stack = [i for i in range(n) if own[i]]
                while stack:
                    d_ = stack.pop()
                    for (c, d, _q), on in zip(links, live, strict=True):
                        if on and d == d_ and not final[c]:
                            final[c] = True
                            stack.append(c)
                loss = round(float(sum(loss_each[i] for i in range(n) if final[i])), 9)
                law[loss] = law.get(loss, 0.0) + prob
                dp += prob * np.array(final, dtype=float)
    return law, dp
