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


def enumerate_states(ead, lgd, pd, rho, links, nodes, weights):
    """Every joint state of the model with its probability.

    Same enumeration as :func:`enumerate_law`, kept state by state.

    Returns
    -------
    prob : ndarray (S,)
    own : ndarray (S, n) of 0/1, own defaults
    final : ndarray (S, n) of 0/1, final defaults
    """
    n = len(ead)
    probs, owns, finals = [], [], []
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
                probs.append(prob)
                owns.append(own)
                finals.append(final)
    return np.array(probs), np.array(owns, dtype=float), np.array(finals, dtype=float)


def reference_contributions(ead, lgd, prob, own, final, levels):
    """Euler contributions straight from their definitions over enumerated states.

    Definitions (DESIGN.md "Risk contributions"; Tasche 1999; Acerbi & Tasche 2002):
    EL_i = E[L_i]; std_i = Cov(L_i, L) / sd(L); VaR_i = E[L_i | L = v];
    ES_i = (E[L_i 1{L > v}] + E[L_i | L = v] (P(L <= v) - a)) / (1 - a);
    EC_i = (v - EL) (ES_i - EL_i) / (ES - EL).  The own-default part uses
    L_i O_i in place of L_i; the contagion part is the rest.

    Returns
    -------
    dict name -> ndarray (n,) for "el", "std", and per level a:
    ("var", a), ("es", a), ("ec", a); the same keys prefixed "own_".
    Also "book": dict with var, es per level, el, std.
    """
    each = np.asarray(ead, float) * np.asarray(lgd, float)
    prob = prob / prob.sum()
    loss_i = final * each[None, :]
    own_i = own * each[None, :]
    total = loss_i.sum(axis=1)
    # group states by loss (rounded like enumerate_law)
    key = np.round(total, 9)
    values = np.unique(key)
    p_val = np.array([prob[key == v].sum() for v in values])
    cdf = np.cumsum(p_val)
    el = prob @ total
    sd = float(np.sqrt(prob @ (total - el) ** 2))
    out = {}
    book = {"el": el, "std": sd}
    for name, part in (("", loss_i), ("own_", own_i)):
        eli = prob @ part
        out[name + "el"] = eli
        out[name + "std"] = (prob @ (part * total[:, None]) - eli * el) / sd
    for a in levels:
        j = int(np.searchsorted(cdf, a - 1e-12, side="left"))
        v = values[j]
        below = cdf[j]
        at = p_val[j]
        es_book = (float(prob[key > v] @ total[key > v]) + v * (below - a)) / (1 - a)
        book[("var", a)] = v
        book[("es", a)] = es_book
        for name, part in (("", loss_i), ("own_", own_i)):
            var_i = prob[key == v] @ part[key == v] / at
            es_i = (prob[key > v] @ part[key > v] + var_i * (below - a)) / (1 - a)
            out[(name + "var", a)] = var_i
            out[(name + "es", a)] = es_i
        for name in ("", "own_"):
            out[(name + "ec", a)] = (v - el) * (out[(name + "es", a)] - out[name + "el"]) / (
                es_book - el
            )
    out["book"] = book
    return out


def enumerate_sector_law(
    ead,
    lgd,
    pd,
    rho,
    sector,
    loadings,
    links,
    global_nodes,
    global_weights,
    sector_nodes,
    sector_weights,
    dof=None,
    mixing_nodes=(1.0,),
    mixing_weights=(1.0,),
) -> tuple[dict[float, float], np.ndarray]:
    """Brute-force law of the sector model on a tensor (mixing, global, sector) grid.

    Every combination of a mixing node ``w`` (Student-t only), a global node
    ``g`` and one idiosyncratic node ``x_s`` per sector is a scenario of
    weight ``v_w * v_g * prod_s u_s``; sector factor ``y_s = a_s g +
    sqrt(1 - a_s^2) x_s``; own-default probability
    ``Phi((c_i sqrt(w / nu) - sqrt(R_i) y_s) / sqrt(1 - R_i))`` with
    ``c_i = t_nu^-1(PD_i)`` (``Phi^-1(PD_i)`` and scale 1 when Gaussian); then
    :func:`enumerate_law`'s own-default and live-link enumeration on one node.
    Written without debtsim code; only for tiny books.
    """
    from scipy.stats import t as student_t

    n = len(ead)
    n_sec = len(loadings)
    if dof is None:
        threshold = [float(norm.ppf(p)) for p in pd]
    else:
        threshold = [float(student_t.ppf(p, dof)) for p in pd]
    law: dict[float, float] = {}
    dp = np.zeros(n)
    for w, vw in zip(mixing_nodes, mixing_weights, strict=True):
        scale = 1.0 if dof is None else float(np.sqrt(w / dof))
        for g, vg in zip(global_nodes, global_weights, strict=True):
            for combo in itertools.product(range(len(sector_nodes)), repeat=n_sec):
                y = [
                    loadings[s] * g + np.sqrt(1.0 - loadings[s] ** 2) * sector_nodes[combo[s]]
                    for s in range(n_sec)
                ]
                weight = vw * vg * float(np.prod([sector_weights[k] for k in combo]))
                p = [
                    float(
                        norm.cdf(
                            (threshold[i] * scale - np.sqrt(rho[i]) * y[sector[i]])
                            / np.sqrt(1.0 - rho[i])
                        )
                    )
                    for i in range(n)
                ]
                node_law, node_dp = _enumerate_given_pd(ead, lgd, p, links)
                for loss, prob in node_law.items():
                    law[loss] = law.get(loss, 0.0) + weight * prob
                dp += weight * node_dp
    return law, dp


def _enumerate_given_pd(ead, lgd, p, links) -> tuple[dict[float, float], np.ndarray]:
    """Own-default and live-link enumeration given each obligor's own-default probability."""
    n = len(ead)
    loss_each = np.asarray(ead, float) * np.asarray(lgd, float)
    law: dict[float, float] = {}
    dp = np.zeros(n)
    for own in itertools.product((0, 1), repeat=n):
        p_own = 1.0
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
