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

from ._rule_jit import _insertion_sort, panel_nodes
from ._special_jit import exp_ftz, log_ndtr, log_ndtr_ftz, log_ndtr_vec, log_vec

_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
#: Below this linear sum the record is summed again in logs (convention, as in aged.py).
_LINEAR_FLOOR = 1e-280


@njit(cache=True, fastmath={"reassoc", "contract"})
def records_sum(y, wi, z, var, is_lim, lf, lw, start, n_q):
    """Sum over records of ln sum_q w_q p(record | y + ln T_q), (P,).

    Parameters
    ----------
    y : (P,) float; wi : (P,) int
        Points and their walkers.
    z : (M,) float; is_lim : (M,) bool
        The body's records (corrected ln values) and which are upper limits.
    var : (W, M) float
        Total log variances.
    lf, lw : (N,) float
        ln T and ln weights at the age nodes, flat (``aged._AgeRule``).
    start, n_q : (W, M) int
        Where each (walker, record)'s nodes start in ``lf``, ``lw`` and how many there are.
    """
    n_p = y.shape[0]
    n_m = z.shape[0]
    out = np.zeros(n_p)
    # per (walker, record), once: the limits' -1/sd, the detections' -1/(2 V) and ln norm
    n_w = var.shape[0]
    k_s = np.empty((n_w, n_m))
    k_c = np.empty((n_w, n_m))
    k_norm = np.empty((n_w, n_m))
    for w in range(n_w):
        for j in range(n_m):
            v = var[w, j]
            k_s[w, j] = -1.0 / math.sqrt(v)
            k_c[w, j] = -0.5 / v
            k_norm[w, j] = -0.5 * math.log(v) - _LN_SQRT_2PI
    for p in range(n_p):
        w = wi[p]
        acc = 0.0
        for j in range(n_m):
            v = var[w, j]
            # unsigned offsets: numba then adds no negative-index wraparound, and the
            # loops over q vectorise
            n = np.uint64(n_q[w, j])
            o = np.uint64(start[w, j])
            tot = 0.0
            if is_lim[j]:
                s = k_s[w, j]
                for q in range(n):
                    tot += exp_ftz(lw[o + q] + log_ndtr_ftz((y[p] + lf[o + q] - z[j]) * s))
                if tot >= _LINEAR_FLOOR:
                    acc += math.log(tot)
                    continue
                sd = math.sqrt(v)
                top = -np.inf
                for q in range(n):
                    top = max(top, lw[o + q] + log_ndtr((z[j] - y[p] - lf[o + q]) / sd))
                if top == -np.inf:
                    acc += top
                    continue
                tot = 0.0
                for q in range(n):
                    tot += exp_ftz(lw[o + q] + log_ndtr((z[j] - y[p] - lf[o + q]) / sd)
                                    - top)
                acc += math.log(tot) + top
                continue
            c = k_c[w, j]
            for q in range(n):
                d = y[p] + lf[o + q] - z[j]
                tot += exp_ftz(c * d * d + lw[o + q])
            norm = k_norm[w, j]
            if tot >= _LINEAR_FLOOR:
                acc += math.log(tot) + norm
                continue
            top = -np.inf
            for q in range(n):
                d = y[p] + lf[o + q] - z[j]
                top = max(top, c * d * d + lw[o + q])
            tot = 0.0
            for q in range(n):
                d = y[p] + lf[o + q] - z[j]
                tot += exp_ftz(c * d * d + lw[o + q] - top)
            acc += math.log(tot) + top + norm
        out[p] = acc
    return out


@njit(cache=True, error_model="numpy", fastmath={"reassoc", "contract"})
def records_sum_emg(y, wi, z, var, is_lim, lf, lw, start, n_q):
    """:func:`records_sum` with a spin per record: each detection's EMG density
    ``recording.emg_logpdf`` and each limit's EMG survival function ``recording.emg_logsf``
    (the same arguments). In linear space, the EMG's ln Phi from the table (its flushed far
    tail adds 0 there), and again in logs with the exact ln Phi where that sum underflows
    (or is implausibly large: an EMG density is at most 1 / sqrt(2 pi V)); both in passes
    over the age nodes that vectorise (the far tail's ln Phi by :func:`log_ndtr_vec`)."""
    n_p = y.shape[0]
    n_m = z.shape[0]
    out = np.zeros(n_p)
    n_w = var.shape[0]
    k_isd = np.empty((n_w, n_m))
    longest = 0
    for w in range(n_w):
        for j in range(n_m):
            k_isd[w, j] = 1.0 / math.sqrt(var[w, j])
            longest = max(longest, n_q[w, j])
    buf = np.empty(longest)
    for p in range(n_p):
        w = wi[p]
        acc = 0.0
        for j in range(n_m):
            v = var[w, j]
            isd = k_isd[w, j]
            n = np.uint64(n_q[w, j])
            o = np.uint64(start[w, j])
            zj = z[j] - y[p]                   # d = lf - zj
            tot = 0.0
            if is_lim[j]:
                for q in range(n):
                    d = lf[o + q] - zj
                    tot += (exp_ftz(lw[o + q] + log_ndtr_ftz(-d * isd))
                            + exp_ftz(lw[o + q] - d + 0.5 * v + log_ndtr_ftz((d - v) * isd)))
            else:
                for q in range(n):
                    d = lf[o + q] - zj
                    tot += exp_ftz(lw[o + q] - d + 0.5 * v + log_ndtr_ftz((d - v) * isd))
            if tot >= _LINEAR_FLOOR and tot < 1e300:
                acc += math.log(tot)
                continue
            # in logs: lw + ln EMG density (a limit: ln of its survival function)
            for q in range(n):
                d = lf[o + q] - zj
                buf[q] = lw[o + q] - d + 0.5 * v + log_ndtr_vec((d - v) * isd)
            if is_lim[j]:
                for q in range(n):
                    d = lf[o + q] - zj
                    a = lw[o + q] + log_ndtr_vec(-d * isd)
                    hi = max(a, buf[q])
                    buf[q] = hi + log_vec(1.0 + exp_ftz(min(a, buf[q]) - hi))
            top = -np.inf
            for q in range(n):
                top = max(top, buf[q])
            if top == -np.inf or top == np.inf or top != top:
                acc += top
                continue
            tot = 0.0
            for q in range(n):
                tot += exp_ftz(buf[q] - top)
            acc += math.log(tot) + top
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


@njit(cache=True)
def lay_out_nodes(measure, lo, hi, kind, a, b, gl_x, gl_logw):
    """The age nodes of every record, flat: ``aged._age_rule``'s layout in one pass.

    Each record's breaks are its measure's (``measure`` (W, G, n, J)) with its support ends
    ``lo``, ``hi`` (G, n) and t = 0 clipped to them, sorted; every panel of positive width
    takes the Gauss–Legendre rule ``gl_x``, ``gl_logw`` (nodes on [0, 1], ln weights).

    Returns
    -------
    t : (N,) float
        Node times [Myr], ordered by walker, body, record, panel, node.
    lw : (N,) float
        ln(panel width x weight) + ln p(t) for normal (``kind`` 0: mean a, sd b) and uniform
        (1: [a, b]) age priors; a window prior's (kind 2) ln p is left to the caller.
    row, col : (N,) int
        Flat (walker, body, record) index and the node's slot among the record's nodes.
    n_q : int
        Most nodes of any record.
    """
    n_w, n_g, n_r, n_j = measure.shape
    n_n = gl_x.shape[0]
    n_b = n_j + 3
    brk = np.empty(n_b)
    cap = n_w * n_g * n_r * (n_b - 1) * n_n
    t = np.empty(cap)
    lw = np.empty(cap)
    row = np.empty(cap, np.int64)
    col = np.empty(cap, np.int64)
    pos = 0
    n_q = 0
    for w in range(n_w):
        for g in range(n_g):
            for r in range(n_r):
                for j in range(n_j):
                    brk[j] = measure[w, g, r, j]
                l0, h0 = lo[g, r], hi[g, r]
                brk[n_j], brk[n_j + 1] = l0, h0
                brk[n_j + 2] = min(max(0.0, l0), h0)
                _insertion_sort(brk, n_b)            # the measure's run is sorted already
                kd, pa, pb = kind[g, r], a[g, r], b[g, r]
                if kd == 0:
                    inv = 1.0 / pb if pb > 0 else 0.0       # padding records have no panels
                    c0 = -math.log(pb) - _LN_SQRT_2PI if pb > 0 else -np.inf
                elif kd == 1:
                    c0 = -math.log(pb - pa) if pb > pa else -np.inf
                    inv = 0.0
                else:
                    c0 = 0.0
                    inv = 0.0
                flat = (w * n_g + g) * n_r + r
                end = panel_nodes(brk, n_b, gl_x, gl_logw, t, lw, pos)
                for k in range(pos, end):
                    if kd == 0:
                        z = (t[k] - pa) * inv
                        lw[k] += -0.5 * z * z + c0
                    elif kd == 1:
                        lw[k] += c0
                    row[k] = flat
                    col[k] = k - pos
                n_q = max(n_q, end - pos)
                pos = end
    return t[:pos], lw[:pos], row[:pos], col[:pos], max(n_q, 1)


@njit(cache=True)
def finish_rule(lw, lf, row, n_rows):
    """Each record's age weights normalised in place (ln sum = 0), and the mean and variance
    of ln T under them and its extremes over the nodes of finite weight (n_rows,) each:
    ``aged._age_rule``'s end. ``lw``, ``lf``, ``row`` (N,) as from :func:`lay_out_nodes`
    (runs of equal row); rows without nodes get 0, 0, -inf, inf.
    """
    mean = np.zeros(n_rows)
    var = np.zeros(n_rows)
    top_lf = np.full(n_rows, -np.inf)
    low_lf = np.full(n_rows, np.inf)
    n = lw.shape[0]
    s = 0
    while s < n:
        e = s
        rr = row[s]
        while e < n and row[e] == rr:
            e += 1
        top = -np.inf
        for i in range(s, e):
            top = max(top, lw[i])
        acc = 0.0
        for i in range(s, e):
            acc += math.exp(lw[i] - top)
        norm = math.log(acc) + top
        m = 0.0
        for i in range(s, e):
            lw[i] -= norm
            m += math.exp(lw[i]) * lf[i]
        sq = 0.0
        hi_v, lo_v = -np.inf, np.inf
        for i in range(s, e):
            d = lf[i] - m
            sq += math.exp(lw[i]) * d * d
            if lw[i] > -np.inf:
                hi_v = max(hi_v, lf[i])
                lo_v = min(lo_v, lf[i])
        mean[rr], var[rr], top_lf[rr], low_lf[rr] = m, sq, hi_v, lo_v
        s = e
    return mean, var, top_lf, low_lf


@njit(cache=True)
def tame(q, n, amat, check, w):
    """:func:`diskfield.agedspin._tame` compiled, in place on ``q`` (R, (B - 1) n): a live
    panel (finite at its first or last node) whose interpolant at the points ``check`` leaves
    its node values' range by more than 1 nat + 10 % of that range, or that has a node value
    that is not finite, takes the log of its Gauss mean of e^q (weights ``w``) at every
    node. ``amat`` is the nodes' monomial interpolation matrix. The same panels and values as
    the array code, up to the order of its matrix product's additions (tested)."""
    n_r, m = q.shape
    qf = np.empty(n)
    cf = np.empty(n)
    for i in range(n_r):
        for b in range(0, m - n + 1, n):
            if not (np.isfinite(q[i, b]) or np.isfinite(q[i, b + n - 1])):
                continue
            finite = True
            for j in range(n):
                v = q[i, b + j]
                if np.isfinite(v):
                    qf[j] = v
                else:
                    qf[j] = 0.0
                    finite = False
            top, low = qf[0], qf[0]
            for j in range(1, n):
                top = max(top, qf[j])
                low = min(low, qf[j])
            for a in range(n):
                c = 0.0
                for j in range(n):
                    c += qf[j] * amat[a, j]
                cf[a] = c
            slack = 1.0 + 0.1 * (top - low)
            wild = not finite
            for x in check:
                acc = cf[n - 1] * x + cf[n - 2]
                for j in range(n - 3, -1, -1):
                    acc = acc * x + cf[j]
                if acc > top + slack or acc < low - slack:
                    wild = True
            if not wild:
                continue
            mx = q[i, b]
            for j in range(1, n):
                v = q[i, b + j]
                mx = v if (v != v or v > mx) else mx       # np.max: NaN wins
            s = 0.0
            for j in range(n):
                s += math.exp(q[i, b + j] - mx) * w[j]
            mean = math.log(s) + mx if not s == 0.0 else -np.inf
            for j in range(n):
                q[i, b + j] = mean
    return q
