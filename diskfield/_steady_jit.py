"""Compiled (numba) form of :func:`diskfield.steady.body_spin_with_limits`.

The same rule as the array code in :mod:`diskfield.steady`, node for node (breakpoints, panels
skipped, sub-panels, reads); only the order of floating-point operations differs (and fused
multiply-adds: the kernels compile with ``fastmath={"contract"}``), so the two agree to
~1e-12 (tested). The array code builds dozens of temporary (rows x panels x nodes) arrays per
call; here one pass per (walker, body) row builds its table and the reads follow, which makes
the limits part several times faster (``benchmarks/bench_likelihood.py``). The table keeps
each panel's monomial coefficients of q's interpolant (not its node values), so a read costs
only its own short Gauss rule; reads of one sub-panel or fewer are evaluated in passes over
the reads that vectorise (:func:`_gentle_reads`). Large arrays come from the caller's
workspace (:mod:`diskfield.workspace`).

ln Phi is read from the table of :mod:`diskfield._special_jit` (numba has no ``scipy.special``).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._rule_jit import _insertion_sort, carve
from ._special_jit import _X0 as _TABLE_LOW
from ._special_jit import exp_ftz, log1p, log_ndtr, log_ndtr_ftz, log_vec

_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


@njit(cache=True, fastmath={"contract"})
def _logaddexp(a, b):
    if b == -np.inf:  # exact: a + log1p(exp(-inf)) is a, and most skipped panels add -inf
        return a
    if a == b:
        return a + math.log(2.0) if a != -np.inf else a
    if a > b:
        return a + log1p(math.exp(b - a))
    return b + log1p(math.exp(a - b))


@njit(cache=True, fastmath={"contract"})
def _row_breaks(r, lz, lsd, n_lim, det, grades, inactive, pts):
    """Sorted Y breakpoints of row ``r`` into ``pts`` and the range start (see
    ``steady._y_breaks``)."""
    hd = det[r, 0] != 0.0
    n_l = lz.shape[1]
    nl = n_lim[r]
    sv = det[r, 5] if hd else 1.0
    peak = det[r, 1] + (det[r, 2] if hd else 0.0)
    lo_lim, hi_lim, lowest = np.inf, -np.inf, np.inf
    for j in range(nl):
        sd = lsd[r, j]
        lo_lim = min(lo_lim, lz[r, j] - 20.0 * sd)
        hi_lim = max(hi_lim, lz[r, j] + 20.0 * sd)
        lowest = min(lowest, lz[r, j] - inactive * sd)
    y_a = min(peak - 20.0 * sv if hd else np.inf, lo_lim)
    y_a = max(y_a, lowest)
    y_b = max(peak + 20.0 * sv if hd else -np.inf, hi_lim)
    ng = grades.shape[0]
    for i in range(ng):
        pts[i] = peak + sv * grades[i] if hd else y_a
    # the padding slots (the array code's masked limits) sit at y_a, like its clip does
    for j in range(n_l):
        for i in range(ng):
            pts[ng * (j + 1) + i] = lz[r, j] + lsd[r, j] * grades[i] if j < nl else y_a
    nb = pts.shape[0]
    pts[nb - 2] = y_a
    pts[nb - 1] = y_b
    for i in range(nb):
        pts[i] = min(max(pts[i], y_a), y_b)
    # a few dozen values, mostly in runs already sorted (the graded points)
    _insertion_sort(pts, nb)
    return y_a


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def body_spin_with_limits(phi, row, zl, vl, lim, hd, zbar, v, ln_k, xn, wn, amat, x3, w3,
                          x6, w6, x8, w8, grades, consts, wsf, wsi, need):
    """ln F(phi) at flat reads ``phi`` (N,) of rows ``row`` (N,); per-row data (R, ...).

    ``consts`` = (inactive, skip_above_peak, sub_range, negligible, diluted, gentle): the
    numerical conventions of :mod:`diskfield.steady`. The Y panels and q on them are built
    here; the cumulative table and its reads are :func:`table_reads` (which the age tables of
    :mod:`diskfield.agedspin` share). ``wsf``, ``wsi``, ``need``: workspace for the large
    arrays, as for :func:`diskfield._rule_jit._rule`.
    """
    inactive, skip_peak = consts[0], consts[1]
    n_rows, n_l = zl.shape
    n = xn.shape[0]
    top_phi = np.full(n_rows, -np.inf)
    for i in range(phi.shape[0]):
        top_phi[row[i]] = max(top_phi[row[i]], phi[i])
    # per row, once: the limits compacted (mask order: the sums below add in the array code's
    # order) with their sds; the detections' (has, zbar, V, ln K, ln(V) / 2, sqrt(V))
    lz = np.empty((n_rows, n_l))
    lsd = np.empty((n_rows, n_l))
    n_lim = np.zeros(n_rows, np.int64)
    det = np.zeros((n_rows, 6))
    for r in range(n_rows):
        for j in range(n_l):
            if lim[r, j]:
                lz[r, n_lim[r]] = zl[r, j]
                lsd[r, n_lim[r]] = math.sqrt(vl[r, j])
                n_lim[r] += 1
        if hd[r]:
            det[r, 0] = 1.0
            det[r, 4] = 0.5 * math.log(v[r])
            det[r, 5] = math.sqrt(v[r])
        det[r, 1], det[r, 2], det[r, 3] = zbar[r], v[r], ln_k[r]
    nb = grades.shape[0] * (n_l + 1) + 2
    n_brk = n_rows * nb
    brk = carve(wsf, 0, n_brk).reshape((n_rows, nb))
    # q = Y + ln h(Y) at the nodes of the panels needed (-inf elsewhere), ln C at each row's
    # start; the table and its reads are table_reads'
    n_q = n_rows * (nb - 1) * n
    q = carve(wsf, n_brk, n_q).reshape((n_rows, (nb - 1) * n))
    q[:] = -np.inf
    tail0 = np.empty(n_rows)

    # An inner function: numba inlines it, and the arrays it reads stay this function's own.
    # A compiled function taking arrays pays an atomic reference increment and decrement per
    # array per call, which was half the kernel's time.
    def log_h(y, r, tail):
        """ln h(Y) of row ``r`` (see ``steady._log_h``); with ``tail`` the EMG replaces the
        detections' Gaussian (ln F below the table, ``y`` is then phi)."""
        out = 0.0
        if det[r, 0] != 0.0:
            zb, vr, lk = det[r, 1], det[r, 2], det[r, 3]
            if tail:
                out = lk - (y - zb) + 0.5 * vr + log_ndtr((y - zb - vr) / det[r, 5])
            else:
                out = lk - 0.5 * (zb - y) ** 2 / vr - det[r, 4] - _LN_SQRT_2PI
        for j in range(n_lim[r]):
            out += log_ndtr((lz[r, j] - y) / lsd[r, j])
        return out

    ys = np.empty((nb - 1) * n)
    kept = np.empty(nb - 1, np.int64)
    acc = np.empty((nb - 1) * n)
    for r in range(n_rows):
        y_a = _row_breaks(r, lz, lsd, n_lim, det, grades, inactive, brk[r])
        cut = top_phi[r]
        if det[r, 0] != 0.0:
            cut = min(cut, det[r, 1] + det[r, 2] + skip_peak * det[r, 5])
        # q = Y + ln h(Y) at the nodes of the panels of positive width that start at or
        # below the cut, compacted, in passes over the nodes that vectorise (log_h, term by
        # term in its order), then put in place
        n_k = 0
        for k in range(nb - 1):
            a, h = brk[r, k], brk[r, k + 1] - brk[r, k]
            if not a <= cut:
                break
            if h > 0:
                for j in range(n):
                    ys[n_k * n + j] = a + h * xn[j]
                kept[n_k] = k
                n_k += 1
        m = n_k * n
        if det[r, 0] != 0.0:
            zb, vr, lk, half_ln_v = det[r, 1], det[r, 2], det[r, 3], det[r, 4]
            for i in range(m):
                acc[i] = lk - 0.5 * (zb - ys[i]) ** 2 / vr - half_ln_v - _LN_SQRT_2PI
        else:
            for i in range(m):
                acc[i] = 0.0
        for j in range(n_lim[r]):
            zj, sj = lz[r, j], lsd[r, j]
            # the nodes increase, so the argument falls: those below the table's start
            # (the far tail, through the asymptotic series) are a suffix
            i_lo = m
            while i_lo > 0 and not (zj - ys[i_lo - 1]) / sj >= _TABLE_LOW:
                i_lo -= 1
            for i in range(i_lo):
                acc[i] += log_ndtr_ftz((zj - ys[i]) / sj)
            for i in range(i_lo, m):
                acc[i] += log_ndtr((zj - ys[i]) / sj)
        for i in range(n_k):
            k = kept[i]
            for j in range(n):
                q[r, k * n + j] = ys[i * n + j] + acc[i * n + j]
        tail0[r] = y_a + log_h(y_a, r, True)
    out = table_reads(brk, q, tail0, phi, row, xn, wn, amat, x3, w3, x6, w6, x8, w8, consts,
                      wsf[n_brk + n_q:], wsi, need)
    need[0] += n_brk + n_q
    # below a row's table the limits are all but certain to pass: ln F in closed form
    for i in range(phi.shape[0]):
        if phi[i] < brk[row[i], 0]:
            out[i] = log_h(phi[i], row[i], True)
    return out


@njit(cache=True, fastmath={"contract"})
def table_reads(brk, q, tail0, phi, row, xn, wn, amat, x3, w3, x6, w6, x8, w8, consts, wsf,
                wsi, need):
    """``steady._cumulative_table`` then ``steady._read_table`` in one compiled pass: the
    cumulative table ln C of rows with breaks ``brk`` (R, B), node values ``q`` (R, (B - 1) n)
    and ln C at each row's start ``tail0`` (R,), read at flat points ``phi`` (N,) of rows
    ``row`` (N,); returns ln[e^-phi C(phi)] (N,). Every read must lie at or above its row's
    first break (the caller's table starts below every read; a read below it is NaN).

    The table part of :func:`body_spin_with_limits`, which calls it with q computed from the
    limits, and of the age tables (``agedspin.body_spin_table``), with q from the age sums;
    held to the array code by ``tests/test_steady.py`` and ``tests/test_agedspin.py``.
    ``consts`` as there; ``wsf``, ``wsi``, ``need`` workspace for the large arrays, as for
    :func:`diskfield._rule_jit._rule`.
    """
    sub_range, negligible, diluted, gentle = consts[2], consts[3], consts[4], consts[5]
    n_rows, nb = brk.shape
    n = xn.shape[0]
    n_p = n_rows * (nb - 1)
    coef = carve(wsf, 0, n_p * n).reshape((n_rows, nb - 1, n))
    read_spread = carve(wsf, n_p * n, n_p).reshape((n_rows, nb - 1))   # set for every panel
    log_c = carve(wsf, n_p * (n + 1), n_rows * nb).reshape((n_rows, nb))
    of = n_p * (n + 1) + n_rows * nb
    live = np.zeros((n_rows, nb - 1), np.bool_)
    crude = np.empty(nb - 1)
    spread = np.empty(nb - 1)
    bound = np.empty(nb - 1)
    sub_hi = np.empty(32)
    sub_part = np.empty(32)
    sub_vals = np.empty(x8.shape[0])
    ln_w8 = np.empty(x8.shape[0])
    for j in range(x8.shape[0]):
        ln_w8[j] = math.log(w8[j])

    # inner functions: numba inlines them and the arrays they read stay this function's own
    # (a compiled function taking arrays pays an atomic reference count per array per call)
    def horner(r, k, x):
        acc = coef[r, k, n - 1] * x + coef[r, k, n - 2]
        for j in range(n - 3, -1, -1):
            acc = acc * x + coef[r, k, j]
        return acc

    def log_partial(r, k, t, h, spread):
        """ln int_0^t h exp(q~(s)) ds for panel ``k`` of row ``r`` (``steady._log_partial``,
        whose ``need`` is ``steep`` here)."""
        steep = spread * t
        if steep <= 6.0:
            shift = coef[r, k, 0]
            s = 0.0
            if steep <= 1.5:
                for j in range(x3.shape[0]):
                    s += math.exp(horner(r, k, t * x3[j]) - shift) * w3[j]
            else:
                for j in range(x6.shape[0]):
                    s += math.exp(horner(r, k, t * x6[j]) - shift) * w6[j]
            return math.log(s * (t * h)) + shift
        n_sub = min(int(math.ceil(steep / sub_range)), 32)
        frac = 1.0 / n_sub
        ln_frac = math.log(frac)
        best = -np.inf
        for i in range(n_sub):
            s0 = i * frac
            sub_hi[i] = max(horner(r, k, t * s0), horner(r, k, t * (s0 + frac)))
            best = max(best, sub_hi[i])
        top = -np.inf
        n_live = 0
        for i in range(n_sub):
            sub_part[i] = -np.inf
            if sub_hi[i] < best - negligible:
                continue
            n_live += 1
            s0 = i * frac
            m = -np.inf
            for j in range(x8.shape[0]):
                sub_vals[j] = horner(r, k, t * (s0 + frac * x8[j])) + ln_w8[j]
                m = max(m, sub_vals[j])
            acc = 0.0
            for j in range(x8.shape[0]):
                acc += math.exp(sub_vals[j] - m)
            sub_part[i] = math.log(acc) + m + ln_frac
            top = max(top, sub_part[i])
        if n_live == 1:
            return top + math.log(t * h)
        tot = 0.0
        for i in range(n_sub):
            if sub_part[i] > -np.inf:
                tot += math.exp(sub_part[i] - top)
        return top + math.log(tot) + math.log(t * h)

    for r in range(n_rows):
        for k in range(nb - 1):
            a, h = brk[r, k], brk[r, k + 1] - brk[r, k]
            top = -np.inf
            low = np.inf
            for j in range(n):
                top = max(top, q[r, k * n + j])
                low = min(low, q[r, k * n + j])
            live[r, k] = q[r, k * n] > -np.inf
            if top > -np.inf:
                for i in range(n):
                    c = 0.0
                    for j in range(n):
                        c += amat[i, j] * q[r, k * n + j]
                    coef[r, k, i] = c
                spread[k] = top - low
                s = 0.0
                for j in range(n):
                    s += math.exp(q[r, k * n + j] - top) * wn[j]
                crude[k] = math.log(h * s) + top if h > 0 else -np.inf
                bound[k] = top + math.log(h) if h > 0 else -np.inf
            else:
                spread[k] = 0.0
                crude[k] = -np.inf
                bound[k] = math.log(h) if h > 0 else -np.inf
        # ln C at each panel start: the crude Gauss sums decide which steep panels to refine
        start = tail0[r]
        log_c[r, 0] = start
        for k in range(nb - 1):
            panel = crude[k]
            h = brk[r, k + 1] - brk[r, k]
            if (panel > -np.inf and h > 0 and spread[k] > gentle
                    and bound[k] > start - diluted):
                panel = log_partial(r, k, 1.0, h, spread[k])
            start = _logaddexp(start, crude[k])
            log_c[r, k + 1] = _logaddexp(log_c[r, k], panel)
            read_spread[r, k] = -1.0 if log_c[r, k] > bound[k] + diluted else spread[k]
    # the reads: each one's panel (a scalar pass); a read past the table's last break, below
    # its first (NaN), or with nothing to add inside its panel (t = 0, a dead or diluted
    # panel) is done there, and so is one through two or more sub-panels; the partials of
    # 3, 6 and 8 nodes (one sub-panel) and their ln-sum-exp with ln C at the panel start
    # are taken in passes over the reads that vectorise (:func:`_gentle_reads`)
    n_ph = phi.shape[0]
    out = np.empty(n_ph)
    cf = coef.reshape(-1)
    pick3 = carve(wsi, 0, n_ph)
    pick6 = carve(wsi, n_ph, n_ph)
    pick8 = carve(wsi, 2 * n_ph, n_ph)
    base = carve(wsi, 3 * n_ph, n_ph)
    t_at = carve(wsf, of, n_ph)
    th_at = carve(wsf, of + n_ph, n_ph)
    need[0], need[1] = of + 2 * n_ph, 4 * n_ph
    n3, n6, n8 = 0, 0, 0
    prev_r, p = -1, 0
    for i in range(n_ph):
        r, p_i = row[i], phi[i]
        if not p_i >= brk[r, 0]:
            out[i] = np.nan
            continue
        if r != prev_r:
            p, hi = 0, nb
            while hi - p > 1:
                mid = (p + hi) >> 1
                if brk[r, mid] <= p_i:
                    p = mid
                else:
                    hi = mid
        else:
            while p < nb - 1 and brk[r, p + 1] <= p_i:
                p += 1
            while brk[r, p] > p_i:
                p -= 1
        prev_r = r
        if p >= nb - 1:
            out[i] = log_c[r, nb - 1] - p_i
            continue
        a, h = brk[r, p], brk[r, p + 1] - brk[r, p]
        t = min(max((p_i - a) / h, 0.0), 1.0) if h > 0 else 0.0
        if not (t > 0 and live[r, p] and read_spread[r, p] >= 0.0):
            out[i] = log_c[r, p] - p_i
            continue
        steep = read_spread[r, p] * t       # log_partial's "need": nats across [0, t]
        if steep > sub_range:
            out[i] = _logaddexp(log_c[r, p], log_partial(r, p, t, h, read_spread[r, p])) - p_i
            continue
        base[i] = (r * (nb - 1) + p) * n
        t_at[i], th_at[i] = t, t * h
        out[i] = log_c[r, p]            # the passes below add the partial and take phi off
        if steep <= 1.5:
            pick3[n3] = i
            n3 += 1
        elif steep <= 6.0:
            pick6[n6] = i
            n6 += 1
        else:
            pick8[n8] = i
            n8 += 1
    _gentle_reads(pick3[:n3], x3, w3, False, cf, base, t_at, th_at, phi, out, n)
    _gentle_reads(pick6[:n6], x6, w6, False, cf, base, t_at, th_at, phi, out, n)
    _gentle_reads(pick8[:n8], x8, w8, True, cf, base, t_at, th_at, phi, out, n)
    return out


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _gentle_reads(pick, xg, wg, by_max, cf, base, t_at, th_at, phi, out, n):
    """For the reads ``pick``: out = ln(C + P) - phi, with C = e^out on entry the integral up
    to the read's panel start and P = t h sum_j w_j exp(q~(t x_j)) its partial in the panel
    by the Gauss rule ``xg``, ``wg``, as passes over the reads: ``log_partial``'s gentle
    branch (exps relative to q~(0)) or, with ``by_max``, its branch of one sub-panel (exps
    of q~ + ln w relative to their largest). Each read's panel coefficients are first copied
    from the flat ``cf`` (at ``base``) into rows by degree, so every later pass is a loop
    over contiguous arrays without branches, which vectorises (a read in the scalar pass
    cost ~2.5x more). Reads go in chunks of ``_CHUNK``, so the scratch stays small."""
    n_all = pick.shape[0]
    n_j = xg.shape[0]
    if n_all == 0:
        return
    size = min(n_all, _CHUNK)
    cs = np.empty((n, size))
    ts = np.empty(size)
    ths = np.empty(size)
    lcs = np.empty(size)
    phs = np.empty(size)
    shift = np.empty(size)
    acc = np.empty(size)
    hv = np.empty((n_j, size))
    for c0 in range(0, n_all, size):
        m_n = min(size, n_all - c0)
        for m in range(m_n):
            i = pick[c0 + m]
            b = np.uint64(base[i])
            for d in range(n):
                cs[d, m] = cf[b + np.uint64(d)]
            ts[m], ths[m], lcs[m], phs[m] = t_at[i], th_at[i], out[i], phi[i]
            acc[m] = 0.0
        for j in range(n_j):
            xj = xg[j]
            # Horner's rule on the panel's monomial coefficients at s = t x_j
            for m in range(m_n):
                hv[j, m] = cs[n - 1, m]
            for d in range(n - 2, -1, -1):
                for m in range(m_n):
                    hv[j, m] = hv[j, m] * (ts[m] * xj) + cs[d, m]
        if by_max:
            for m in range(m_n):
                shift[m] = -np.inf
            for j in range(n_j):
                lw = math.log(wg[j])
                for m in range(m_n):
                    hv[j, m] += lw
                    shift[m] = max(shift[m], hv[j, m])
            for j in range(n_j):
                for m in range(m_n):
                    acc[m] += exp_ftz(hv[j, m] - shift[m])
        else:
            for m in range(m_n):
                shift[m] = cs[0, m]
            for j in range(n_j):
                wj = wg[j]
                for m in range(m_n):
                    acc[m] += exp_ftz(hv[j, m] - shift[m]) * wj
        for m in range(m_n):
            # ln(e^lc + th s e^shift) - phi, with the larger exponent factored out
            lc, sh = lcs[m], shift[m]
            top = max(lc, sh)
            ts[m] = (top + log_vec(exp_ftz(lc - top) + (acc[m] * ths[m]) * exp_ftz(sh - top))
                     - phs[m])
        for m in range(m_n):
            out[pick[c0 + m]] = ts[m]


#: Reads per pass of :func:`_gentle_reads`.
_CHUNK = 512
