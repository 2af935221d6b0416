"""Compiled (numba) age sums of :mod:`diskfield.agedspin`.

For points y of one body (each with its walker), the sum over the body's records of
ln sum_q w_q p(record | ln B = y + ln T(t_q)): a detection's Gaussian density, a limit's
normal CDF, summed over the record's age nodes of positive weight in linear space, and again
in logs where that sum underflows. The array form is :func:`diskfield.aged._records_sum`
(the same sums; tested equal to ~1e-12).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._steady_jit import log_ndtr

_SQRT_HALF = math.sqrt(0.5)
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
#: Below this linear sum the record is summed again in logs (convention, as in aged.py).
_LINEAR_FLOOR = 1e-280


@njit(cache=True)
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
                s = _SQRT_HALF / math.sqrt(v)
                for q in range(n):
                    tot += math.exp(lw[w, j, q]) * 0.5 * math.erfc((y[p] + lf[w, j, q] - z[j]) * s)
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
                    tot += math.exp(lw[w, j, q] + log_ndtr((z[j] - y[p] - lf[w, j, q]) / sd)
                                    - top)
                acc += math.log(tot) + top
                continue
            c = -0.5 / v
            for q in range(n):
                d = y[p] + lf[w, j, q] - z[j]
                tot += math.exp(c * d * d + lw[w, j, q])
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
                tot += math.exp(c * d * d + lw[w, j, q] - top)
            acc += math.log(tot) + top + norm
        out[p] = acc
    return out
