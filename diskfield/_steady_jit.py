"""Compiled (numba) form of :func:`diskfield.steady.body_spin_with_limits`.

The same rule as the array code in :mod:`diskfield.steady`, node for node (breakpoints, panels
skipped, sub-panels, reads); only the order of floating-point additions differs, so the two
agree to ~1e-12 (tested). The array code builds dozens of temporary (rows x panels x nodes)
arrays per call; here one pass per (walker, body) row builds its table and a second pass reads
it, which makes the limits part several times faster (``benchmarks/bench_likelihood.py``).

``log_ndtr`` is written out (numba has no ``scipy.special``): ln of ``erfc`` from the C
library for x > -20, the asymptotic series of ln Phi below (Abramowitz & Stegun 1964, 26.2.12;
the same split as ``scipy.special.log_ndtr``), ``log1p`` of the upper tail above 6.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

_SQRT_HALF = math.sqrt(0.5)
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


@njit(cache=True)
def log_ndtr(x):
    """ln Phi(x) for a float x (Phi the standard normal CDF), accurate in both tails."""
    if x > 8.3:  # ln Phi = -Phi(-x) to 1e-33, and |Phi(-8.3)| < 5.2e-17: 0 to double precision
        return 0.0
    if x > 6.0:
        return math.log1p(-0.5 * math.erfc(x * _SQRT_HALF))
    if x > -20.0:
        return math.log(0.5 * math.erfc(-x * _SQRT_HALF))
    # Phi(x) = phi(x)/(-x) (1 - 1/x^2 + 3/x^4 - 15/x^6 + ...) (A&S 26.2.12); 1/x^2 < 0.0025
    r = 1.0 / (x * x)
    series = 1.0 - r * (1.0 - r * (3.0 - r * (15.0 - r * (105.0 - r * 945.0))))
    return -0.5 * x * x - math.log(-x) - _LN_SQRT_2PI + math.log(series)


@njit(cache=True)
def _logaddexp(a, b):
    if a == b:
        return a + math.log(2.0) if a != -np.inf else a
    if a > b:
        return a + math.log1p(math.exp(b - a))
    return b + math.log1p(math.exp(a - b))


@njit(cache=True)
def _log_h(y, zl, vl, lim, hd, zbar, v, ln_k, tail):
    """ln h(Y) of one row (see ``steady._log_h``); with ``tail`` the EMG replaces the
    detections' Gaussian (ln F below the table, ``y`` is then phi)."""
    out = 0.0
    if hd:
        if tail:
            out = ln_k - (y - zbar) + 0.5 * v + log_ndtr((y - zbar - v) / math.sqrt(v))
        else:
            out = ln_k - 0.5 * (zbar - y) ** 2 / v - 0.5 * math.log(v) - _LN_SQRT_2PI
    for j in range(zl.shape[0]):
        if lim[j]:
            out += log_ndtr((zl[j] - y) / math.sqrt(vl[j]))
    return out


@njit(cache=True)
def _horner(c, x):
    n = c.shape[0]
    acc = c[n - 1] * x + c[n - 2]
    for j in range(n - 3, -1, -1):
        acc = acc * x + c[j]
    return acc


@njit(cache=True)
def _log_partial(qv, t, h, spread, amat, x3, w3, x6, w6, x8, w8, sub_range, negligible,
                 scratch):
    """ln int_0^t h exp(q~(s)) ds for one panel (see ``steady._log_partial``).

    ``scratch`` (4, max(n, 32)) is work space (no allocation per read)."""
    n = qv.shape[0]
    c, hi, part = scratch[0, :n], scratch[1], scratch[2]
    for k in range(n):
        c[k] = 0.0
        for j in range(n):
            c[k] += amat[k, j] * qv[j]
    need = spread * t
    if need <= 6.0:
        xs, ws = (x3, w3) if need <= 1.5 else (x6, w6)
        shift = c[0]
        s = 0.0
        for j in range(xs.shape[0]):
            s += math.exp(_horner(c, t * xs[j]) - shift) * ws[j]
        return (math.log(s) + shift) + math.log(t * h)
    n_sub = min(int(math.ceil(need / sub_range)), 32)
    frac = 1.0 / n_sub
    best = -np.inf
    for k in range(n_sub):
        s0 = k * frac
        hi[k] = max(_horner(c, t * s0), _horner(c, t * (s0 + frac)))
        best = max(best, hi[k])
    top = -np.inf
    vals = scratch[3]
    for k in range(n_sub):
        part[k] = -np.inf
        if hi[k] < best - negligible:
            continue
        s0 = k * frac
        m = -np.inf
        for j in range(x8.shape[0]):
            vals[j] = _horner(c, t * (s0 + frac * x8[j])) + math.log(w8[j])
            m = max(m, vals[j])
        acc = 0.0
        for j in range(x8.shape[0]):
            acc += math.exp(vals[j] - m)
        part[k] = math.log(acc) + m + math.log(frac)
        top = max(top, part[k])
    tot = 0.0
    for k in range(n_sub):
        if part[k] > -np.inf:
            tot += math.exp(part[k] - top)
    return top + math.log(tot) + math.log(t * h)


@njit(cache=True)
def _row_breaks(zl, vl, lim, hd, zbar, v, grades, inactive):
    """Sorted Y breakpoints of one row and the range start (see ``steady._y_breaks``)."""
    n_l = zl.shape[0]
    sv = math.sqrt(v) if hd else 1.0
    peak = zbar + (v if hd else 0.0)
    lo_lim, hi_lim, lowest = np.inf, -np.inf, np.inf
    for j in range(n_l):
        if lim[j]:
            sd = math.sqrt(vl[j])
            lo_lim = min(lo_lim, zl[j] - 20.0 * sd)
            hi_lim = max(hi_lim, zl[j] + 20.0 * sd)
            lowest = min(lowest, zl[j] - inactive * sd)
    y_a = min(peak - 20.0 * sv if hd else np.inf, lo_lim)
    y_a = max(y_a, lowest)
    y_b = max(peak + 20.0 * sv if hd else -np.inf, hi_lim)
    ng = grades.shape[0]
    pts = np.empty(ng * (n_l + 1) + 2)
    for i in range(ng):
        pts[i] = peak + sv * grades[i] if hd else y_a
    for j in range(n_l):
        sd = math.sqrt(vl[j]) if lim[j] else 0.0
        for i in range(ng):
            pts[ng * (j + 1) + i] = zl[j] + sd * grades[i] if lim[j] else y_a
    pts[-2] = y_a
    pts[-1] = y_b
    for i in range(pts.shape[0]):
        pts[i] = min(max(pts[i], y_a), y_b)
    return np.sort(pts), y_a


@njit(cache=True)
def body_spin_with_limits(phi, row, zl, vl, lim, hd, zbar, v, ln_k, xn, wn, amat, x3, w3,
                          x6, w6, x8, w8, grades, consts):
    """ln F(phi) at flat reads ``phi`` (N,) of rows ``row`` (N,); per-row data (R, ...).

    ``consts`` = (inactive, skip_above_peak, sub_range, negligible, diluted, gentle): the
    numerical conventions of :mod:`diskfield.steady`.
    """
    inactive, skip_peak, sub_range, negligible, diluted, gentle = (
        consts[0], consts[1], consts[2], consts[3], consts[4], consts[5])
    n_rows = zbar.shape[0]
    n = xn.shape[0]
    top_phi = np.full(n_rows, -np.inf)
    for i in range(phi.shape[0]):
        top_phi[row[i]] = max(top_phi[row[i]], phi[i])
    nb = grades.shape[0] * (zl.shape[1] + 1) + 2
    brk = np.empty((n_rows, nb))
    q = np.full((n_rows, nb - 1, n), -np.inf)
    spread = np.zeros((n_rows, nb - 1))
    bound = np.empty((n_rows, nb - 1))
    log_c = np.empty((n_rows, nb))
    crude = np.empty(nb - 1)
    scratch = np.empty((4, max(n, 32, x8.shape[0])))
    for r in range(n_rows):
        br, y_a = _row_breaks(zl[r], vl[r], lim[r], hd[r], zbar[r], v[r], grades, inactive)
        brk[r] = br
        cut = top_phi[r]
        if hd[r]:
            cut = min(cut, zbar[r] + v[r] + skip_peak * math.sqrt(v[r]))
        for k in range(nb - 1):
            a, h = br[k], br[k + 1] - br[k]
            top = -np.inf
            low = np.inf
            if h > 0 and a <= cut:
                for j in range(n):
                    y = a + h * xn[j]
                    q[r, k, j] = y + _log_h(y, zl[r], vl[r], lim[r], hd[r], zbar[r], v[r],
                                            ln_k[r], False)
                    top = max(top, q[r, k, j])
                    low = min(low, q[r, k, j])
            if top > -np.inf:
                spread[r, k] = top - low
                s = 0.0
                for j in range(n):
                    s += math.exp(q[r, k, j] - top) * wn[j]
                crude[k] = math.log(h * s) + top
                bound[r, k] = top + math.log(h)
            else:
                crude[k] = -np.inf
                bound[r, k] = math.log(h) if h > 0 else -np.inf
        # ln C at each panel start: the crude Gauss sums decide which steep panels to refine
        start = y_a + _log_h(y_a, zl[r], vl[r], lim[r], hd[r], zbar[r], v[r], ln_k[r], True)
        log_c[r, 0] = start
        for k in range(nb - 1):
            panel = crude[k]
            h = br[k + 1] - br[k]
            if (panel > -np.inf and h > 0 and spread[r, k] > gentle
                    and bound[r, k] > start - diluted):
                panel = _log_partial(q[r, k], 1.0, h, spread[r, k], amat, x3, w3, x6, w6, x8,
                                     w8, sub_range, negligible, scratch)
            start = _logaddexp(start, crude[k])
            log_c[r, k + 1] = _logaddexp(log_c[r, k], panel)
    out = np.empty(phi.shape[0])
    for i in range(phi.shape[0]):
        r, p_i = row[i], phi[i]
        br = brk[r]
        if p_i < br[0]:
            out[i] = _log_h(p_i, zl[r], vl[r], lim[r], hd[r], zbar[r], v[r], ln_k[r], True)
            continue
        p = np.searchsorted(br, p_i, side="right") - 1
        if p >= nb - 1:
            out[i] = log_c[r, nb - 1] - p_i
            continue
        a, h = br[p], br[p + 1] - br[p]
        t = min(max((p_i - a) / h, 0.0), 1.0) if h > 0 else 0.0
        part = -np.inf
        if t > 0 and q[r, p, 0] > -np.inf:
            sp = 0.0 if log_c[r, p] > bound[r, p] + diluted else spread[r, p]
            part = _log_partial(q[r, p], t, h, sp, amat, x3, w3, x6, w6, x8, w8, sub_range,
                                negligible, scratch)
        out[i] = _logaddexp(log_c[r, p], part) - p_i
    return out
