"""Compiled kernels (numba) of the own-default draws: exact thinning over sorted scenarios.

Only :mod:`debtsim.engines.sample.own_draws` imports this module, and only
inside the functions that draw (numba's import is not paid by the CLI's
``--help`` or ``check``).  Every random number comes in from outside: the
uniforms are drawn by a numpy ``Generator`` and passed in.

Own defaults (exact thinning of a Bernoulli sequence)
    Within one run of scenarios sorted by a key ``k``, obligor *i* defaults
    in scenario *s* with probability ``p_s = F(alpha_i k_s + gamma_i c_s,
    theta_s l_i)`` where ``F(x, t) = expit(logit Phi(x) + t)`` (``t = 0``:
    the one-factor or sector model; ``t > 0``: the exponential twist of
    importance sampling).  The run is cut into aligned pieces of ``2^L``
    scenarios (``L`` chosen per obligor).  On a piece, ``p_s <= p_env``, the
    bound at the corner of the piece's ranges of ``k``, ``c`` and ``theta``
    (``F`` increases in both arguments).  Candidates are the successes of
    Bernoulli(``p_env``) trials on the piece, found by geometric skips
    drawn by inversion, ``floor(log U / log(1 - p_env))`` (the inversion
    method for the geometric law, Devroye 1986, *Non-Uniform Random Variate
    Generation*); a candidate is kept
    with probability ``p_s / p_env`` (thinning, Lewis & Shedler 1979,
    "Simulation of nonhomogeneous Poisson processes by thinning", in its
    Bernoulli form).  Each pair ``(s, i)`` is then a default with
    probability ``p_env * p_s / p_env = p_s``, independently of every other
    pair: exactly the model's law, at a cost proportional to the number of
    candidates plus the number of pieces.  A lower bound ``p_low`` on the
    piece (the opposite corner) accepts most candidates without computing
    ``p_s`` (the "squeeze" of Marsaglia 1977, "The squeeze method for
    generating gamma variates").  Where the envelope is large
    (:data:`_DENSE`), every scenario of the piece is a candidate (one uniform
    each, no skip): the same law with fewer operations.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from debtsim._typing import FloatArray, IntArray

__all__ = [
    "LEVEL_MAX",
    "LEVEL_MIN",
    "piece_costs",
    "range_tables",
    "thin_defaults",
]

#: Pieces of ``2^L`` scenarios, ``LEVEL_MIN <= L <= LEVEL_MAX``.
LEVEL_MIN = 3
LEVEL_MAX = 12

_SQRT1_2 = 1.0 / math.sqrt(2.0)
#: The envelope is raised by this relative margin so rounding never puts it below ``p_s``.
_ENVELOPE_MARGIN = 1e-12
#: Pieces whose envelope reaches this draw one uniform per scenario instead of skips.
_DENSE = 0.25


@numba.njit(cache=True, nogil=True)
def _phi(x: float) -> float:  # pragma: no cover - compiled
    """Return the standard normal CDF at ``x``."""
    return 0.5 * math.erfc(-x * _SQRT1_2)


@numba.njit(cache=True, nogil=True)
def _twisted(p: float, s: float) -> float:  # pragma: no cover - compiled
    """``p e^s / (1 - p + p e^s)``, stable for any ``s`` and ``p`` in [0, 1]."""
    if s == 0.0 or p <= 0.0 or p >= 1.0:
        return p
    x = math.log(p) - math.log1p(-p) + s
    if x >= 0.0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


@numba.njit(cache=True, nogil=True)
def _range_tables(
    values: FloatArray,
) -> tuple[FloatArray, FloatArray, IntArray]:  # pragma: no cover - compiled
    """Min and max of ``values`` on every aligned piece of every level, and level offsets."""
    rows = values.size
    offsets = np.zeros(LEVEL_MAX + 2, dtype=np.int64)
    for lv in range(LEVEL_MAX + 1):
        offsets[lv + 1] = offsets[lv] + ((rows + (1 << lv) - 1) >> lv)
    lo = np.empty(offsets[LEVEL_MAX + 1])
    hi = np.empty(offsets[LEVEL_MAX + 1])
    for j in range(rows):
        lo[j] = values[j]
        hi[j] = values[j]
    for lv in range(1, LEVEL_MAX + 1):
        prev = offsets[lv - 1]
        cur = offsets[lv]
        n_prev = offsets[lv] - prev
        for j in range(offsets[lv + 1] - cur):
            a = 2 * j
            b = a + 1
            if b < n_prev:
                lo[cur + j] = min(lo[prev + a], lo[prev + b])
                hi[cur + j] = max(hi[prev + a], hi[prev + b])
            else:
                lo[cur + j] = lo[prev + a]
                hi[cur + j] = hi[prev + a]
    return lo, hi, offsets


def range_tables(values: FloatArray) -> tuple[FloatArray, FloatArray, IntArray]:
    """Minimum and maximum of ``values`` on each aligned piece of ``2^L`` entries.

    Parameters
    ----------
    values : ndarray, shape (rows,)

    Returns
    -------
    low, high : ndarray
        Piece ``j`` of level ``L`` is at ``offsets[L] + j``.
    offsets : ndarray of int, shape (LEVEL_MAX + 2,)

    """
    lo, hi, off = _range_tables(np.ascontiguousarray(values, dtype=np.float64))
    return lo, hi, off


@numba.njit(cache=True, nogil=True)
def _envelope(
    al: float, ga: float, sl: float, kl: float, kh: float, cl: float, ch: float, t: float
) -> float:  # pragma: no cover - compiled
    """Upper bound of ``F(al k + ga c, t sl)`` on the box ``[kl, kh] x [cl, ch]``."""
    arg = al * (kh if al >= 0.0 else kl) + ga * (ch if ga >= 0.0 else cl)
    return _twisted(_phi(arg), t * sl)


@numba.njit(cache=True, nogil=True)
def _thin(
    key: FloatArray,
    scale: FloatArray,
    theta: FloatArray,
    scen: IntArray,
    members: IntArray,
    level: IntArray,
    alpha: FloatArray,
    gamma: FloatArray,
    sloss: FloatArray,
    c_lo: FloatArray,
    c_hi: FloatArray,
    t_lo: FloatArray,
    t_hi: FloatArray,
    offsets: IntArray,
    u: FloatArray,
    ptr: int,
    start_member: int,
    start_piece: int,
    out_r: IntArray,
    out_c: IntArray,
    n_out: int,
) -> tuple[int, int, int, int, int]:  # pragma: no cover - compiled
    rows = key.size
    n_u = u.size
    cap = out_r.size
    for mi in range(start_member, members.size):
        i = members[mi]
        lv = level[mi]
        g = 1 << lv
        off = offsets[lv]
        n_piece = (rows + g - 1) >> lv
        al = alpha[i]
        ga = gamma[i]
        sl = sloss[i]
        j0 = start_piece if mi == start_member else 0
        for j in range(j0, n_piece):
            lo = j << lv
            hi = min(rows, lo + g)
            width = hi - lo
            if ptr + 1 + 2 * width > n_u:
                return mi, j, n_out, ptr, 1
            if n_out + width > cap:
                return mi, j, n_out, ptr, 2
            kl = key[lo]
            kh = key[hi - 1]
            cl = c_lo[off + j]
            ch = c_hi[off + j]
            p_env = _envelope(al, ga, sl, kl, kh, cl, ch, t_hi[off + j])
            if p_env <= 0.0:
                continue
            p_env = min(1.0, p_env * (1.0 + _ENVELOPE_MARGIN))
            arg = al * (kl if al >= 0.0 else kh) + ga * (cl if ga >= 0.0 else ch)
            if p_env >= _DENSE:
                # likely defaults: one uniform per scenario beats skips (same law)
                p_low = _twisted(_phi(arg), t_lo[off + j] * sl)
                for pos in range(lo, hi):
                    w = u[ptr]
                    ptr += 1
                    if w >= p_env:
                        continue
                    if w < p_low:
                        keep = True
                    else:
                        p = _twisted(_phi(al * key[pos] + ga * scale[pos]), theta[pos] * sl)
                        keep = w < p
                    if keep:
                        out_r[n_out] = scen[pos]
                        out_c[n_out] = i
                        n_out += 1
                continue
            log_q = math.log1p(-p_env)
            p_low = -1.0
            pos = lo - 1
            while True:
                v = 1.0 - u[ptr]  # in (0, 1]
                ptr += 1
                if p_env < 1.0:
                    f = math.log(v) / log_q
                    if f >= hi - pos - 1:
                        break
                    pos += int(f) + 1
                else:
                    pos += 1
                    if pos >= hi:
                        break
                w = u[ptr] * p_env
                ptr += 1
                if p_low < 0.0:
                    # lowest p on the piece: the opposite corner and the smallest twist
                    p_low = _twisted(_phi(arg), t_lo[off + j] * sl)
                if w < p_low:
                    keep = True
                else:
                    p = _twisted(_phi(al * key[pos] + ga * scale[pos]), theta[pos] * sl)
                    keep = w < p
                if keep:
                    out_r[n_out] = scen[pos]
                    out_c[n_out] = i
                    n_out += 1
    return members.size, 0, n_out, ptr, 0


def thin_defaults(
    key: FloatArray,
    scale: FloatArray,
    theta: FloatArray,
    scen: IntArray,
    members: IntArray,
    level: IntArray,
    alpha: FloatArray,
    gamma: FloatArray,
    sloss: FloatArray,
    tables: tuple[FloatArray, FloatArray, FloatArray, FloatArray, IntArray],
    u: FloatArray,
    ptr: int,
    start: tuple[int, int],
    out_r: IntArray,
    out_c: IntArray,
    n_out: int,
) -> tuple[int, int, int, int, int]:
    """Own defaults of one sorted run of scenarios, until the uniforms or the output run out.

    Parameters
    ----------
    key, scale, theta : ndarray, shape (rows,)
        Sort key (ascending), second coordinate and twist of each scenario of the run.
    scen : ndarray of int, shape (rows,)
        Index of each scenario in its block (what is written out).
    members, level : ndarray of int
        Obligors drawn here and the piece level of each.
    alpha, gamma, sloss : ndarray, shape (n,)
        ``p_s = F(alpha k_s + gamma c_s, theta_s sloss)`` for each obligor.
    tables : tuple
        ``(c_low, c_high, theta_low, theta_high, offsets)`` from :func:`range_tables`.
    u : ndarray
        Uniforms in [0, 1) from a numpy Generator, used in order from ``ptr``.
    ptr : int
        First unused uniform.
    start : (int, int)
        Member and piece to resume at (``(0, 0)`` at first).
    out_r, out_c : ndarray of int
        Output (scenario, obligor) pairs, filled from ``n_out``.

    Returns
    -------
    member, piece, n_out, ptr, status
        Where to resume, pairs written so far, first unused uniform, and why
        it stopped: 0 finished, 1 too few uniforms left, 2 output full.  A
        piece is begun only when both can hold its worst case.

    """
    c_lo, c_hi, t_lo, t_hi, offsets = tables
    res: tuple[int, int, int, int, int] = _thin(
        key, scale, theta, scen, members, level, alpha, gamma, sloss,
        c_lo, c_hi, t_lo, t_hi, offsets, u, ptr, start[0], start[1], out_r, out_c, n_out,
    )
    return res


@numba.njit(cache=True, nogil=True)
def _piece_costs(
    key: FloatArray,
    scale: FloatArray,
    theta: FloatArray,
    alpha: FloatArray,
    gamma: FloatArray,
    sloss: FloatArray,
    members: IntArray,
    piece_cost: float,
) -> FloatArray:  # pragma: no cover - compiled
    c_lo, c_hi, off = _range_tables(scale)
    t_lo, t_hi, _ = _range_tables(theta)
    rows = key.size
    out = np.zeros((members.size, LEVEL_MAX + 1))
    for mi in range(members.size):
        i = members[mi]
        for lv in range(LEVEL_MIN, LEVEL_MAX + 1):
            g = 1 << lv
            n_piece = (rows + g - 1) >> lv
            total = 0.0
            for j in range(n_piece):
                lo = j << lv
                hi = min(rows, lo + g)
                p = _envelope(alpha[i], gamma[i], sloss[i], key[lo], key[hi - 1],
                              c_lo[off[lv] + j], c_hi[off[lv] + j], t_hi[off[lv] + j])
                total += piece_cost + (hi - lo) * p
            out[mi, lv] = total
    return out


def piece_costs(
    key: FloatArray,
    scale: FloatArray,
    theta: FloatArray,
    alpha: FloatArray,
    gamma: FloatArray,
    sloss: FloatArray,
    members: IntArray,
    piece_cost: float,
) -> FloatArray:
    """Return the expected work of :func:`thin_defaults` per member and level.

    Work is ``piece_cost`` per piece plus one per candidate (the expected
    number of candidates is the envelope times the piece's width), on a
    representative sorted run.  Returns
    shape ``(len(members), LEVEL_MAX + 1)``; levels below ``LEVEL_MIN`` are 0.
    """
    out: FloatArray = _piece_costs(key, scale, theta, alpha, gamma, sloss, members, piece_cost)
    return out
