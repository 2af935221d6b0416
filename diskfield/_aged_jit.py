"""Compiled (numba) age sums of :mod:`diskfield.agedspin`.

For points y of one body (each with its walker), the sum over the body's records of
ln sum_q w_q p(record | ln B = y + ln T(t_q)): a detection's Gaussian density, a limit's
normal CDF, summed over the record's age nodes of positive weight in linear space, and again
in logs where that sum underflows. The array form is :func:`diskfield.aged._records_sum`
(the same sums; tested equal to ~1e-12).

The linear sums take exp from :func:`diskfield._special_jit.exp_ftz` and a limit's CDF as
exp of the tabulated ln Phi; their additions may be reordered (``fastmath`` reassociation
only: no assumption about NaN or inf), so the detections' loop vectorises.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._special_jit import exp_ftz, log_ndtr, log_ndtr_ftz

_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
#: Below this linear sum the record is summed again in logs (convention, as in aged.py).
_LINEAR_FLOOR = 1e-280


@njit(cache=True, fastmath={"reassoc", "contract"})
def records_sum(y, wi, z, var, is_lim, lf, lw, n_q):
    """Sum over records of ln sum_q w_q p(record | y + ln T_q), (P,).

    Parameters
    ----------
    y : (P,) float; wi : (P,) int
        Points and their walkers.
    z : (M,) float; is_lim : (M,) bool
        The body's records (corrected ln values) and which are upper limits.
    var : (W, M) float
        Total log variances.
    lf, lw : (W, M, Q) float
        ln T and ln weights at the age nodes, nodes of positive weight first.
    n_q : (W, M) int
        Age nodes of positive weight.
    """
    n_p = y.shape[0]
    n_m = z.shape[0]
    out = np.zeros(n_p)
    for p in range(n_p):
        w = wi[p]
        acc = 0.0
        for j in range(n_m):
            v = var[w, j]
            n = n_q[w, j]
            tot = 0.0
            if is_lim[j]:
                s = -1.0 / math.sqrt(v)
                for q in range(n):
                    tot += exp_ftz(lw[w, j, q] + log_ndtr_ftz((y[p] + lf[w, j, q] - z[j]) * s))
                if tot >= _LINEAR_FLOOR:
                    acc += math.log(tot)
                    continue
                sd = math.sqrt(v)
                top = -np.inf
                for q in range(n):
                    top = max(top, lw[w, j, q] + log_ndtr((z[j] - y[p] - lf[w, j, q]) / sd))
                if top == -np.inf:
                    acc += top
                    continue
                tot = 0.0
                for q in range(n):
                    tot += exp_ftz(lw[w, j, q] + log_ndtr((z[j] - y[p] - lf[w, j, q]) / sd)
                                    - top)
                acc += math.log(tot) + top
                continue
            c = -0.5 / v
            for q in range(n):
                d = y[p] + lf[w, j, q] - z[j]
                tot += exp_ftz(c * d * d + lw[w, j, q])
            norm = -0.5 * math.log(v) - _LN_SQRT_2PI
            if tot >= _LINEAR_FLOOR:
                acc += math.log(tot) + norm
                continue
            top = -np.inf
            for q in range(n):
                d = y[p] + lf[w, j, q] - z[j]
                top = max(top, c * d * d + lw[w, j, q])
            tot = 0.0
            for q in range(n):
                d = y[p] + lf[w, j, q] - z[j]
                tot += exp_ftz(c * d * d + lw[w, j, q] - top)
            acc += math.log(tot) + top + norm
        out[p] = acc
    return out


@njit(cache=True)
def measure_breaks(grid, lf, lp, inverse, sd, scale, hi, consts):
    """``aged._measure_breaks`` with each record's grid, ln T and ln p read through its
    distinct prior ``inverse`` (G, n) from (W, U, N) arrays, (W, G, n, _MAX_PANELS - 1).

    ``consts`` = (sharp spread, sharp level step, level step, log-pdf step, width step, most
    panels): ``aged._MEASURE_CONSTANTS``. The same sums in the same order; the inverse of
    the cumulative measure by a forward walk instead of one offset ``searchsorted``.
    """
    sharp_spread, sharp_step, level_step = consts[0], consts[1], consts[2]
    log_pdf_step, width_step, max_panels = consts[3], consts[4], consts[5]
    n_w, n_g, n_r = sd.shape
    n = grid.shape[2]
    n_j = int(max_panels) - 1
    out = np.empty((n_w, n_g, n_r, n_j))
    cum = np.empty(n)
    for w in range(n_w):
        for g in range(n_g):
            for r in range(n_r):
                u = inverse[g, r]
                s = sd[w, g, r]
                top, low = -np.inf, np.inf
                for i in range(n):
                    top = max(top, lf[w, u, i])
                    low = min(low, lf[w, u, i])
                a = (sharp_step if top - low > sharp_spread * s else level_step) * s
                sc = width_step * scale[g, r]
                cum[0] = 0.0
                for i in range(n - 1):
                    c = max(abs(lf[w, u, i + 1] - lf[w, u, i]) / a,
                            abs(lp[w, u, i + 1] - lp[w, u, i]) / log_pdf_step)
                    cum[i + 1] = cum[i] + max(c, (grid[w, u, i + 1] - grid[w, u, i]) / sc)
                total = cum[n - 1]
                n_pan = min(max(math.ceil(total), 1.0), max_panels)
                denom = total if total > 0 else 1.0
                k = 0
                for j in range(1, n_j + 1):
                    if j >= n_pan:
                        out[w, g, r, j - 1] = hi[g, r]
                        continue
                    target = j / n_pan
                    while k < n and cum[k] / denom < target:   # searchsorted, side="left"
                        k += 1
                    kk = min(max(k, 1), n - 1)
                    f0, f1 = cum[kk - 1] / denom, cum[kk] / denom
                    g0, g1 = grid[w, u, kk - 1], grid[w, u, kk]
                    step = (target - f0) / (f1 - f0) if f1 > f0 else 0.0
                    step = min(max(step, 0.0), 1.0)
                    out[w, g, r, j - 1] = g0 + step * (g1 - g0)
    return out
