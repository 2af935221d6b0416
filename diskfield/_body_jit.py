"""The steady, body-shared-spin log-likelihood in one compiled call (numba).

From the coefficient rows of the profile's power-law form and each walker's intrinsic
scatter to the per-body log-likelihoods (W, G), with no array code between the steps:

1. each record's total log variance, max(fixed part + sigma_int^2, floor);
2. each body's detections combined into one Gaussian (``_lkcommon._detection_stats``), and
   the level and width of its integrand in ln R (``Model._level``);
3. the distance rule, integrating the detections-only bodies in the same pass
   (:func:`diskfield._rule_jit._rule`);
4. the other bodies' integrands at the nodes it returns: the body-shared spin integral with
   upper limits (:func:`diskfield._steady_jit.body_spin_with_limits`), or, for a body whose
   only record is a limit, that record's EMG survival function (``steady.record_spin``);
5. ln sum exp over each (walker, body)'s nodes (``Model._node_sums``).

Every step is the array code's rule; the per-body values agree with it to round-off (tested).
The array code costs ~0.7 ms of numpy calls per 64-walker call on the demo; here none.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._special_jit import log_ndtr
from ._rule_jit import EMG_BODY, _rule, carve
from ._rule_jit import NO_SPIN as _RULE_NO_SPIN
from ._rule_jit import PER_RECORD as _RULE_PER_RECORD
from ._steady_jit import body_spin_with_limits

_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)

#: Body kinds (``kind`` argument): with the body-shared spin, detections only (closed form in
#: the rule's pass), upper limits with the shared spin integral, a single upper limit; for
#: the other spin modes, every body in the rule's pass: no spin, a spin per record.
CLOSED, LIMITS, LONE_LIMIT, NO_SPIN, PER_RECORD = 0, 1, 2, 3, 4


@njit(cache=True)
def _logaddexp(a, b):
    top = max(a, b)
    if top == -np.inf:
        return top
    return top + math.log(math.exp(a - top) + math.exp(b - top))


@njit(cache=True)
def steady_body_loglike(form, n_rings, has_break, min_factor, sigma, min_var, z, var_fixed,
                        det, lim, kind, lim_order, n_lim, lo, hi, base, fixed, ring_u,
                        offsets, grades, gl_x, gl_logw, max_count, prior, xn, wn, amat, x3,
                        w3, x6, w6, x8, w8, y_grades, consts, wsf, wsi, need):
    """Per-body log-likelihoods (W, G) of the steady envelope with the body-shared spin.

    Parameters
    ----------
    form, n_rings, has_break, min_factor
        The profile's power-law form (see :mod:`diskfield._rule_jit`).
    sigma : ndarray (W,)
        Intrinsic scatter of each walker (ln units).
    min_var : float
        Floor on a record's total log variance.
    z, var_fixed : ndarray (G, n)
        Records' corrected ln values and fixed log variances, padded.
    det, lim : ndarray of bool (G, n)
        Detections and upper limits (padding: neither).
    kind : ndarray of int (G,)
        :data:`CLOSED`, :data:`LIMITS` or :data:`LONE_LIMIT` (body-shared spin), or
        :data:`NO_SPIN` or :data:`PER_RECORD` (the other spin modes, every body).
    lim_order : ndarray of int (G, L)
        Each body's limit columns first, in record order (``steady._subset``'s compaction).
    n_lim : ndarray of int (G,)
        Limits per body.
    lo, hi, base, fixed, ring_u, offsets, grades, gl_x, gl_logw, max_count, prior
        The distance rule's fixed inputs (``likelihood._rule_static``, ``_fused_static``).
    xn, wn, amat, x3, w3, x6, w6, x8, w8, y_grades, consts
        The limits kernel's rules and conventions (``steady._compiled_reads``).
    wsf, wsi, need : ndarray (float, int64, int64 (2,))
        Workspace for the large arrays (:func:`diskfield._rule_jit.carve`); ``need``
        receives the float and int lengths that would hold them all (the caller grows the
        workspace to that for its next call).
    """
    n_w = sigma.shape[0]
    n_g, n_r = z.shape
    n_l = lim_order.shape[1]
    var = np.empty((n_w, n_g, n_r))
    zbar = np.zeros((n_w, n_g))
    v = np.ones((n_w, n_g))
    ln_k = np.zeros((n_w, n_g))
    has = np.zeros((n_w, n_g), np.bool_)
    level = np.empty((n_w, n_g))
    scale = np.empty((n_w, n_g))
    for w in range(n_w):
        s2 = sigma[w] * sigma[w]
        for g in range(n_g):
            prec, pz, log_var, n_det = 0.0, 0.0, 0.0, 0
            zlim, vlim = np.inf, np.inf
            for j in range(n_r):
                vj = max(var_fixed[g, j] + s2, min_var)
                var[w, g, j] = vj
                if det[g, j]:
                    prec += 1.0 / vj
                    pz += z[g, j] / vj
                    log_var += math.log(vj)
                    n_det += 1
                elif lim[g, j]:
                    zlim = min(zlim, z[g, j])
                    vlim = min(vlim, vj)
            if kind[g] == PER_RECORD and n_det > 0:
                # each record its own spin: the integrand is sharp around the highest
                # detection, as wide as the narrowest (``Model._level``)
                top_z, min_v = -np.inf, np.inf
                for j in range(n_r):
                    if det[g, j]:
                        top_z = max(top_z, z[g, j])
                        min_v = min(min_v, var[w, g, j])
                level[w, g], scale[w, g] = top_z, math.sqrt(min_v)
            if n_det > 0:
                vv = 1.0 / prec
                zb = pz * vv
                rss = 0.0
                for j in range(n_r):
                    if det[g, j]:
                        d = z[g, j] - zb
                        rss += d * d / var[w, g, j]
                zbar[w, g], v[w, g], has[w, g] = zb, vv, True
                ln_k[w, g] = (-0.5 * log_var - _LN_SQRT_2PI * n_det + 0.5 * math.log(vv)
                              + _LN_SQRT_2PI - 0.5 * rss)
                if kind[g] != PER_RECORD:
                    level[w, g], scale[w, g] = zb, math.sqrt(vv)
            else:
                level[w, g] = zlim
                scale[w, g] = math.sqrt(vlim) if vlim < np.inf else 1.0
    closed = np.zeros(n_g, np.int64)
    for g in range(n_g):
        if kind[g] == CLOSED:
            closed[g] = EMG_BODY
        elif kind[g] == NO_SPIN:
            closed[g] = _RULE_NO_SPIN
        elif kind[g] == PER_RECORD:
            closed[g] = _RULE_PER_RECORD
    _, lw, phi, wi, gi, ll = _rule(form, n_rings, has_break, min_factor, level, scale, lo,
                                   hi, base, fixed, ring_u, offsets, grades, gl_x, gl_logw,
                                   max_count, True, closed, prior, zbar, v, ln_k, z, var, det,
                                   lim, wsf, wsi, need)
    of, oi = need[0], need[1]       # the workspace after the rule's node arrays
    n = phi.shape[0]
    if n == 0:
        return ll
    # the limits bodies' reads: rows (walker, limits body), per-row data compacted
    pos = np.full(n_g, -1)
    n_x = 0
    for g in range(n_g):
        if kind[g] == LIMITS:
            pos[g] = n_x
            n_x += 1
    terms = carve(wsf, of, n)
    of += n
    terms[:] = lw
    if n_x > 0:
        n_rows = n_w * n_x
        zl = np.zeros((n_rows, n_l))
        vl = np.ones((n_rows, n_l))
        lm = np.zeros((n_rows, n_l), np.bool_)
        hd = np.zeros(n_rows, np.bool_)
        zb_r = np.zeros(n_rows)
        v_r = np.ones(n_rows)
        lk_r = np.zeros(n_rows)
        for w in range(n_w):
            for g in range(n_g):
                if pos[g] < 0:
                    continue
                r = w * n_x + pos[g]
                for k in range(n_l):
                    col = lim_order[g, k]
                    zl[r, k] = z[g, col]
                    vl[r, k] = var[w, g, col]
                    lm[r, k] = k < n_lim[g]
                if has[w, g]:
                    hd[r], zb_r[r], v_r[r], lk_r[r] = True, zbar[w, g], v[w, g], ln_k[w, g]
        n_read = 0
        for i in range(n):
            if kind[gi[i]] == LIMITS:
                n_read += 1
        at = carve(wsi, oi, n_read)
        row = carve(wsi, oi + n_read, n_read)
        oi += 2 * n_read
        ph_x = carve(wsf, of, n_read)
        of += n_read
        m = 0
        for i in range(n):
            if kind[gi[i]] == LIMITS:
                at[m], ph_x[m], row[m] = i, phi[i], wi[i] * n_x + pos[gi[i]]
                m += 1
        ln_f = body_spin_with_limits(ph_x, row, zl, vl, lm, hd, zb_r, v_r, lk_r, xn, wn, amat,
                                     x3, w3, x6, w6, x8, w8, y_grades, consts, wsf[of:],
                                     wsi[oi:], need)
        of += need[0]
        oi += need[1]
        for m in range(n_read):
            terms[at[m]] += ln_f[m]
    for i in range(n):
        g = gi[i]
        if kind[g] == LONE_LIMIT:
            # EMG survival: ln[Phi(-d/sd) + exp(-d + V/2) Phi((d - V)/sd)] (recording.emg_logsf)
            col = lim_order[g, 0]
            vv = var[wi[i], g, col]
            sd = math.sqrt(vv)
            d = phi[i] - z[g, col]
            terms[i] += _logaddexp(log_ndtr(-d / sd), -d + 0.5 * vv + log_ndtr((d - vv) / sd))
    need[0], need[1] = of, oi
    # ln sum exp over each (walker, body)'s run of nodes
    start = 0
    while start < n:
        w, g = wi[start], gi[start]
        stop = start
        top = -np.inf
        while stop < n and wi[stop] == w and gi[stop] == g:
            top = max(top, terms[stop])
            stop += 1
        if top == -np.inf or top == np.inf or top != top:
            ll[w, g] = top
        else:
            acc = 0.0
            for i in range(start, stop):
                acc += math.exp(terms[i] - top)
            ll[w, g] = top + math.log(acc)
        start = stop
    return ll
