"""Compiled (numba) form of the steady distance rule of :mod:`diskfield.likelihood`.

For a profile that declares its power-law form (:class:`diskfield.profiles.base.PowerLawForm`:
every shipped radial profile does), one pass per (walker, body) places the breakpoints of the
composite Gauss–Legendre distance rule and evaluates ln R at the nodes of its panels of
positive width. It is the rule of ``Model._distance_rule`` and ``Model._steady_terms`` step
for step (scout grid, first crossings of the body's level refined by Illinois regula falsi,
closest approach, the support end nearest the level, graded breaks, the profile's own
features, base panels), so both give the same nodes, weights and ln R to round-off (tested).
The array code spends most of its time in numpy call overhead on small (walkers x bodies x
points) arrays; here there is none.

The coefficient rows ``form`` (W, 10) hold, per walker:
``[log_norm, index, break_radius, index_outer, A1, r1, w1, A2, r2, w2]`` (see
``PowerLawForm``); ``n_rings`` (0-2) and ``has_break`` say which entries are used.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._special_jit import _X0 as _TABLE_LOW
from ._special_jit import exp_ftz, log1p, log_ndtr, log_ndtr_ftz, log_vec


#: Integrands of the bodies integrated in the rule's pass (``closed`` argument of
#: :func:`_rule`): the body-shared spin's EMG of the detections' Gaussian, no spin (the
#: detections' Gaussian times each limit's normal CDF), a spin per record (each record's
#: EMG density or survival function). 0: the body's nodes are returned instead.
EMG_BODY, NO_SPIN, PER_RECORD = 1, 2, 3
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)

#: ln(1e-17): a ring factor 1 + x with |x| below 1e-17 leaves ln R unchanged to double
#: precision (ln(1 + x) = x - ..., and ln R is O(1)); its exp is not taken.
_LN_TINY = math.log(1e-17)


@njit(cache=True, fastmath={"contract"})
def _ring_constants(amp, width):
    """A ring's inverse width and the z^2 above which |A| exp(-z^2 / 2) < 1e-17 (at most
    1491, where exp underflows to 0)."""
    inv = 1.0 / width if width > 0 else 0.0
    if amp == 0.0:
        return inv, -1.0
    return inv, min(1491.0, 2.0 * (math.log(abs(amp)) - _LN_TINY))


@njit(cache=True, fastmath={"contract"})
def _coefficients(form, w):
    """Row ``w`` of ``form`` as a tuple, with per-walker constants appended: each ring's
    inverse width and z^2 cut (:func:`_ring_constants`), ln of the break radius. Passed by
    value, so the per-node calls below carry no array (numba reference-counts every array
    argument of a call, which cost more than the arithmetic here)."""
    inv1, cut1 = _ring_constants(form[w, 4], form[w, 6])
    inv2, cut2 = _ring_constants(form[w, 7], form[w, 9])
    ln_break = math.log(form[w, 2]) if form[w, 2] > 0 else 0.0
    return (form[w, 0], form[w, 1], form[w, 2], form[w, 3], form[w, 4], form[w, 5],
            form[w, 6], form[w, 7], form[w, 8], form[w, 9], inv1, inv2, cut1, cut2, ln_break)


@njit(cache=True, fastmath={"contract"})
def log_field(r, c, n_rings, has_break, min_factor):
    """ln R at one distance ``r`` [AU] for the coefficients ``c`` (:func:`_coefficients`)."""
    lr = math.log(r)
    if has_break:
        lrb = c[14]
        val = c[0] - c[1] * min(lr, lrb) - c[3] * max(lr - lrb, 0.0)
    else:
        val = c[0] - c[1] * lr
    for k in range(n_rings):
        z = (r - c[5 + 3 * k]) * c[10 + k]
        if z * z > c[12 + k]:
            continue  # |A| exp(-z^2 / 2) < 1e-17: ln(1 + x) = x adds nothing to ln R
        a_g = max(c[4 + 3 * k] * math.exp(-0.5 * z * z), min_factor - 1.0)
        # ln(1 + x) = x - x^2/2 + ...: x itself to double precision below 1e-17
        val += a_g if abs(a_g) < 1e-17 else log1p(a_g)
    return val


@njit(cache=True, fastmath={"contract"})
def _first_at_least(x, n_x, value):
    """The first index k < n_x with x[k] >= value in increasing ``x`` (n_x if none)."""
    lo, hi = 0, n_x
    while lo < hi:
        mid = (lo + hi) >> 1
        if x[mid] < value:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _field_nodes(x, out, tmp, lx, n_x, c, n_rings, has_break, min_factor):
    """ln R at increasing ``x[:n_x]`` into ``out[:n_x]``: :func:`log_field` in passes over
    the nodes (the power law, then each ring) that the compiler vectorises. A ring's passes
    cover only the nodes where it can change ln R (within its z^2 cut, with a margin: the
    nodes are sorted, so they are one run, found by bisection); the values agree with
    :func:`log_field` to ~1e-16 (a ring's factor is taken at every node of the run, and
    below |x| = 1e-4 ln(1 + x) is its series). ``tmp`` (at least n_x) is scratch; ``lx``
    receives ln x (the distance prior's term reads it)."""
    for k in range(n_x):
        lx[k] = log_vec(x[k])
    if has_break:
        lrb = c[14]
        for k in range(n_x):
            lr = lx[k]
            out[k] = c[0] - c[1] * min(lr, lrb) - c[3] * max(lr - lrb, 0.0)
    else:
        for k in range(n_x):
            out[k] = c[0] - c[1] * lx[k]
    floor = min_factor - 1.0
    for i in range(n_rings):
        amp, r0, inv, cut = c[4 + 3 * i], c[5 + 3 * i], c[10 + i], c[12 + i]
        if amp == 0.0:
            continue
        half = 1.001 * math.sqrt(cut) / inv if inv > 0.0 else np.inf
        # unsigned bounds: with signed ones numba tests each index for wraparound and the
        # loops below no longer vectorise (2x slower)
        k0 = np.uint64(_first_at_least(x, n_x, r0 - half))
        k1 = np.uint64(_first_at_least(x, n_x, r0 + half))
        # two passes (the factor, then its ln): one pass with both ran ~40 % slower
        for k in range(k0, k1):
            z = (x[k] - r0) * inv
            tmp[k] = max(amp * exp_ftz(-0.5 * z * z), floor)
        for k in range(k0, k1):
            a = tmp[k]
            # ln(1 + a): its series below |a| = 1e-4 (as log1p), else ln of 1 + a
            series = a * (1.0 - a * (0.5 - a * (1.0 / 3.0 - a * 0.25)))
            out[k] += series if abs(a) < 1e-4 else log_vec(1.0 + a)


@njit(cache=True, fastmath={"contract"})
def log_field_rows(r, form, n_rings, has_break, min_factor):
    """ln R at distances ``r`` (W, K) [AU], row w with the coefficients ``form[w]``."""
    out = np.empty(r.shape)
    for w in range(r.shape[0]):
        for k in range(r.shape[1]):
            out[w, k] = log_field(r[w, k], _coefficients(form, w), n_rings, has_break,
                                  min_factor)
    return out


@njit(cache=True, fastmath={"contract"})
def _clip(x, lo, hi):
    return min(max(x, lo), hi)


@njit(cache=True, fastmath={"contract"})
def _secant(lo, hi, f_lo, f_hi):
    den = f_lo - f_hi
    t = f_lo / den if abs(den) > 0 else 0.5
    return lo + _clip(t, 0.0, 1.0) * (hi - lo)


@njit(cache=True, fastmath={"contract"})
def _refine(lo, hi, f_lo, f_hi, c, n_rings, has_break, mf, level):
    """Illinois regula falsi, three evaluations (``quadrature.refine_crossings``)."""
    side = 0
    for _ in range(3):
        root = _secant(lo, hi, f_lo, f_hi)
        f_root = log_field(root, c, n_rings, has_break, mf) - level
        left = (f_root > 0) == (f_lo > 0)
        if left:
            lo, f_lo = root, f_root
        else:
            hi, f_hi = root, f_root
        if left and side == 1:
            f_hi = 0.5 * f_hi
        if (not left) and side == -1:
            f_lo = 0.5 * f_lo
        side = 1 if left else -1
    return _secant(lo, hi, f_lo, f_hi)


@njit(cache=True)
def carve(ws, off, size):
    """ws[off:off + size] when ``ws`` holds it, else a new array of that size: kernels take
    their large arrays from a caller's workspace, kept between calls (new memory on every
    call cost ~15 % of the steady likelihood in page faults), and still run without one."""
    if ws.shape[0] >= off + size:
        return ws[off:off + size]
    return np.empty(size, ws.dtype)


@njit(cache=True, fastmath={"contract"})
def _insertion_sort(a, m):
    """Sort a[:m] in place: a few dozen breaks, mostly in sorted runs (faster here than
    ``np.sort``'s introsort)."""
    for i in range(1, m):
        x = a[i]
        j = i - 1
        while j >= 0 and a[j] > x:
            a[j + 1] = a[j]
            j -= 1
        a[j + 1] = x


@njit(cache=True, inline="always")
def panel_nodes(brk, m, gl_x, gl_logw, xs, lws, at):
    """The Gauss–Legendre nodes and ln(panel width x weight) of the panels of positive width
    of the sorted breaks ``brk[:m]`` (``gl_x`` on [0, 1], ``gl_logw`` ln weights), written to
    ``xs``, ``lws`` from index ``at``; returns the index after the last node written."""
    k = at
    for i in range(m - 1):
        h = brk[i + 1] - brk[i]
        if not h > 0:
            continue
        lh = math.log(h)
        for j in range(gl_x.shape[0]):
            xs[k] = brk[i] + h * gl_x[j]
            lws[k] = lh + gl_logw[j]
            k += 1
    return k


@njit(cache=True, fastmath={"contract"})
def _merge_next(a, n_a, n_b, buf):
    """Merge the sorted runs a[:n_a] and a[n_a:n_a + n_b] in place (``buf`` scratch of at
    least n_a + n_b); an unsorted second run is merged by insertion instead."""
    end = n_a + n_b
    for j in range(n_a + 1, end):
        if not a[j] >= a[j - 1]:
            _insertion_sort(a, end)
            return
    i, j, k = 0, n_a, 0
    while i < n_a and j < end:
        if a[j] < a[i]:
            buf[k] = a[j]
            j += 1
        else:
            buf[k] = a[i]
            i += 1
        k += 1
    while i < n_a:
        buf[k] = a[i]
        i += 1
        k += 1
    for k in range(j):      # a[j:] is already in place
        a[k] = buf[k]


@njit(cache=True, fastmath={"contract"})
def _monotone_runs(phi, runs):
    """Split ``phi`` (S,) into runs over which it is monotone (equal neighbours continue a
    run); run k spans indices runs[k]..runs[k + 1] (neighbouring runs share their end).
    Returns the number of runs."""
    n = phi.shape[0]
    runs[0] = 0
    n_runs = 0
    direction = 0
    for i in range(1, n):
        d = phi[i] - phi[i - 1]
        s = 1 if d > 0 else (-1 if d < 0 else 0)
        if s != 0:
            if direction != 0 and s != direction:
                n_runs += 1
                runs[n_runs] = i - 1
            direction = s
    runs[n_runs + 1] = max(n - 1, 0)
    return n_runs + 1


@njit(cache=True, fastmath={"contract"})
def _sign_change(phi, level, i0, i1):
    """The interval (i, i + 1) of a monotone run i0..i1 where phi - level changes sign
    (``phi - level > 0`` differs at its ends), or -1 when it does not."""
    pos = phi[i0] - level > 0
    if (phi[i1] - level > 0) == pos:
        return -1
    while i1 - i0 > 1:
        mid = (i0 + i1) >> 1
        if (phi[mid] - level > 0) == pos:
            i0 = mid
        else:
            i1 = mid
    return i0


@njit(cache=True, fastmath={"contract"})
def _tail_width(centre, level, scale, c, n_rings, has_break, mf):
    """``likelihood._tail_width`` at one point."""
    h = 1e-4 * max(scale, 1e-3) * max(centre, 0.1)
    p0 = log_field(centre - h, c, n_rings, has_break, mf)
    p1 = log_field(centre, c, n_rings, has_break, mf)
    p2 = log_field(centre + h, c, n_rings, has_break, mf)
    d1 = (p2 - p0) / (2 * h)
    d2 = (p2 - 2 * p1 + p0) / (h * h)
    off = p1 - level
    v = scale * scale
    g1 = abs(off * d1) / v
    g2 = abs(d1 * d1 + off * d2) / v
    return min(scale / max(abs(d1), 1e-12),
               min(1.0 / max(g1, 1e-12), 1.0 / math.sqrt(max(g2, 1e-24))))


@njit(cache=True, error_model="numpy", fastmath={"contract"}, inline="always")
def _emg_terms(phs, lws, terms, k_t, zb, vv, lk):
    """terms = ln weight + ln K EMG(ph - zbar; V) at the body's nodes (the body-shared spin,
    detections only): ln K - (ph - zbar) + V/2 + ln Phi((ph - zbar - V) / sqrt V)
    (``recording.emg_logpdf``); ln Phi from the table, its far lower tail (x < -40, rare)
    again through the asymptotic series."""
    lk += 0.5 * vv            # the EMG's V / 2
    zb += vv                  # its argument (d - V) / sqrt V, with d = ph - zbar
    isd = 1.0 / math.sqrt(vv)
    # the lowest argument in its own pass: a min inside the loop below stopped its
    # vectorisation (2x slower)
    low = np.inf
    for k in range(k_t):
        low = min(low, (phs[k] - zb) * isd)
    for k in range(k_t):
        arg = (phs[k] - zb) * isd
        terms[k] = lws[k] + lk - (phs[k] - zb + vv) + log_ndtr_ftz(arg)
    if low < _TABLE_LOW:
        for k in range(k_t):
            arg = (phs[k] - zb) * isd
            if arg < _TABLE_LOW:
                terms[k] = lws[k] + lk - (phs[k] - zb + vv) + log_ndtr(arg)


@njit(cache=True, error_model="numpy", fastmath={"contract"}, inline="always")
def _record_terms(per_record, phs, lws, terms, rec, scratch, k_t, zb, vv, lk, rz, rvar, rdet,
                  rlim, w, g):
    """terms = ln weight + ln p(body's records | ln R = ph) at the body's nodes, without
    spin (``steady.no_spin``: the detections' Gaussian, closed form, times each limit's
    Phi((z - ph) / sd)) or with a spin per record (``steady.record_spin``: each detection's
    EMG density, each limit's EMG survival function). One pass per record that vectorises
    (ln Phi from the table), and the far lower tail (argument < -40) again through the
    asymptotic series; ``rec`` and ``scratch`` are scratch of the nodes' length."""
    lo_ph, hi_ph = np.inf, -np.inf
    for k in range(k_t):
        lo_ph = min(lo_ph, phs[k])
    for k in range(k_t):
        hi_ph = max(hi_ph, phs[k])
    has_det = False
    for j in range(rz.shape[1]):
        has_det = has_det or rdet[g, j]
    if per_record or not has_det:
        for k in range(k_t):
            terms[k] = lws[k]
    else:
        c = lk - 0.5 * math.log(vv) - _LN_SQRT_2PI
        for k in range(k_t):
            terms[k] = lws[k] + (c - 0.5 * (phs[k] - zb) ** 2 / vv)
    for j in range(rz.shape[1]):
        z, var = rz[g, j], rvar[w, g, j]
        is_det, is_lim = rdet[g, j], rlim[g, j]
        if not (is_lim or (per_record and is_det)):
            continue
        isd = 1.0 / math.sqrt(var)
        if not per_record:
            # Phi((z - ph) / sd), lowest at the highest node
            for k in range(k_t):
                rec[k] = log_ndtr_ftz((z - phs[k]) * isd)
            if (z - hi_ph) * isd < _TABLE_LOW:
                for k in range(k_t):
                    x = (z - phs[k]) * isd
                    if x < _TABLE_LOW:
                        rec[k] = log_ndtr(x)
        else:
            # EMG density: -d + V/2 + ln Phi((d - V) / sd), d = ph - z; its survival function
            # ln[Phi(-d / sd) + e^(-d + V/2) Phi((d - V) / sd)] (recording.emg_logsf)
            for k in range(k_t):
                rec[k] = -(phs[k] - z) + 0.5 * var + log_ndtr_ftz((phs[k] - z - var) * isd)
            if is_lim:
                for k in range(k_t):
                    a = log_ndtr_ftz((z - phs[k]) * isd)
                    b = rec[k]
                    top = max(a, b)
                    scratch[k] = top + log_vec(1.0 + exp_ftz(min(a, b) - top))
                for k in range(k_t):
                    rec[k] = scratch[k]
            far_d = (lo_ph - z - var) * isd < _TABLE_LOW
            if far_d or (is_lim and (z - hi_ph) * isd < _TABLE_LOW):
                for k in range(k_t):
                    x_d = (phs[k] - z - var) * isd
                    x_s = (z - phs[k]) * isd
                    if x_d < _TABLE_LOW or (is_lim and x_s < _TABLE_LOW):
                        b = -(phs[k] - z) + 0.5 * var + log_ndtr(x_d)
                        if is_lim:
                            a = log_ndtr(x_s)
                            top = max(a, b)
                            b = top + log1p(math.exp(min(a, b) - top)) if top > -np.inf else top
                        rec[k] = b
        for k in range(k_t):
            terms[k] += rec[k]


@njit(cache=True, fastmath={"contract"})
def steady_nodes(form, n_rings, has_break, min_factor, level, scale, lo, hi, base, fixed,
                 ring_u, offsets, grades, gl_x, gl_logw, max_count):
    """Nodes of the distance rule with positive weight, flat, ordered by walker, body, panel
    (:func:`_rule` without the fused closed form; see there for the parameters).

    Returns
    -------
    r, logw, phi : ndarray (N,)
        Nodes [AU], ln weights, ln R there.
    wi, gi : ndarray of int (N,)
        Walker and body of each node.
    """
    n_w, n_g = level.shape
    none = np.zeros(n_g, np.int64)
    empty = np.zeros((n_w, n_g))
    no_rec = np.zeros((n_g, 0), np.bool_)
    r, lw, phi, wi, gi, _ = _rule(form, n_rings, has_break, min_factor, level, scale, lo, hi,
                                  base, fixed, ring_u, offsets, grades, gl_x, gl_logw,
                                  max_count, False, none, np.zeros((n_g, 4)), empty, empty,
                                  empty, np.zeros((n_g, 0)), np.zeros((n_w, n_g, 0)), no_rec,
                                  no_rec, np.empty(0), np.empty(0, np.int64),
                                  np.zeros(2, np.int64))
    return r, lw, phi, wi, gi


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _rule(form, n_rings, has_break, min_factor, level, scale, lo, hi, base, fixed, ring_u,
          offsets, grades, gl_x, gl_logw, max_count, fused, closed, prior, zbar, v, ln_k, rz,
          rvar, rdet, rlim, wsf, wsi, need):
    """The distance rule, one pass per (walker, body); with ``fused`` the closed bodies'
    integrals too (the driver :func:`diskfield._body_jit.steady_body_loglike` calls it so).

    Parameters
    ----------
    form : ndarray (W, 10)
        Power-law-form coefficients per walker.
    level, scale : ndarray (W, G)
        ln-field level of each body's integrand and its width in ln R.
    lo, hi : ndarray (G,)
        Distance supports [AU]; ``base`` (G, P + 1) the base panels' breaks.
    fixed : ndarray (S,)
        Sorted scout points shared by all walkers (log-spaced plus every support end).
    ring_u, offsets : ndarray
        Scout points and feature breaks across each ring, in ring widths.
    grades : ndarray (F,)
        Graded-break factors (e.g. 1, 3, 9).
    gl_x, gl_logw : ndarray (n,)
        Gauss–Legendre nodes on [0, 1] and ln of their weights.
    max_count : int
        Crossing slots per body.

    fused : bool
        Integrate the ``closed`` bodies here: the sum over a body's nodes of weight x prior
        density x K EMG(ln R - zbar; V), in logs (ll); every other body's nodes are returned
        flat with ln weight + ln prior density in place of the ln weight.
    closed : ndarray of int (G,)
        The integrand of each body integrated here (:data:`EMG_BODY`, :data:`NO_SPIN`,
        :data:`PER_RECORD`), 0 for the others.
    prior : ndarray (G, 4)
        Each body's distance prior as ln p(r) = c - k ln r - (r - mu)^2 s^2 / 2, rows
        ``[c, k, mu, s]`` (``likelihood._prior_form``; valid inside the support, where
        every node lies).
    zbar, v, ln_k : ndarray (W, G)
        Detections' precision-weighted mean, variance and ln K (closed bodies).
    rz, rvar, rdet, rlim : ndarray (G, n), (W, G, n), (G, n), (G, n)
        Records' corrected ln values, total log variances, detection and limit masks (the
        :data:`NO_SPIN` and :data:`PER_RECORD` integrands; may have n = 0 otherwise).
    wsf, wsi, need : ndarray (float, int64, int64 (2,))
        Workspace for the returned node arrays (:func:`carve`); ``need`` receives the
        float and int lengths they take.

    Returns
    -------
    r, log_term, phi, wi, gi : ndarray (N,)
        Nodes of the bodies not integrated here [AU], ln weight (+ ln prior when fused),
        ln R, walker and body (views of the workspace when it holds them).
    ll : ndarray (W, G)
        The closed bodies' log-likelihoods (0 for the others).
    """
    n_w, n_g = level.shape
    n_f = grades.shape[0]
    n_graded = 2 * n_f + 1
    sym = np.empty(n_graded)
    for i in range(n_f):
        sym[i] = -grades[n_f - 1 - i]
        sym[n_f + 1 + i] = grades[i]
    sym[n_f] = 0.0
    n_feat = offsets.shape[0] * n_rings + (1 if has_break else 0)
    n_brk = base.shape[1] + n_graded * max_count + n_f + n_feat
    n_scout = fixed.shape[0] + ring_u.shape[0] * n_rings + (1 if has_break else 0)
    n = gl_x.shape[0]
    n_open = 0              # bodies whose nodes are returned
    for g in range(n_g):
        if not (fused and closed[g] == 1):
            n_open += 1
    cap = n_w * n_open * (n_brk - 1) * n
    r_out = carve(wsf, 0, cap)
    lw_out = carve(wsf, cap, cap)
    phi_out = carve(wsf, 2 * cap, cap)
    wi_out = carve(wsi, 0, cap)
    gi_out = carve(wsi, cap, cap)
    need[0], need[1] = 3 * cap, 2 * cap
    r_min, r_max = lo.min(), hi.max()
    # the distinct support ends (bodies of one reservoir share theirs): ln R at each is
    # taken once per walker; end_at[g] / end_at[n_g + g] index body g's lower / upper end
    ends = np.empty(2 * n_g)
    end_at = np.empty(2 * n_g, np.int64)
    n_ends = 0
    for i in range(2 * n_g):
        x = lo[i] if i < n_g else hi[i - n_g]
        e = 0
        while e < n_ends and ends[e] != x:
            e += 1
        if e == n_ends:
            ends[e] = x
            n_ends += 1
        end_at[i] = e
    ph_end = np.empty(n_ends)
    scout = np.empty(n_scout)
    phi_s = np.empty(n_scout)
    runs = np.empty(n_scout + 1, np.int64)
    feat = np.empty(max(n_feat, 1))
    brk = np.empty(n_brk)
    cross = np.empty(max_count)
    width = np.empty(max_count)
    found = np.empty(max_count, np.bool_)
    ll = np.zeros((n_w, n_g))
    terms = np.empty((n_brk - 1) * n)
    xs = np.empty((n_brk - 1) * n)
    lws = np.empty((n_brk - 1) * n)
    phs = np.empty((n_brk - 1) * n)
    tmp = np.empty(max((n_brk - 1) * n, n_scout))
    lxs = np.empty(max((n_brk - 1) * n, n_scout))
    pos = 0
    for w in range(n_w):
        c = _coefficients(form, w)
        # scout grid and the profile's features (``_scout_grid``, ``_feature_breaks``)
        m = 0
        for i in range(fixed.shape[0]):
            scout[m] = fixed[i]
            m += 1
        k_f = 0
        for k in range(n_rings):
            r0, wd = c[5 + 3 * k], c[6 + 3 * k]
            for i in range(ring_u.shape[0]):
                scout[m] = r0 + wd * ring_u[i]
                m += 1
            for i in range(offsets.shape[0]):
                feat[k_f] = r0 + wd * offsets[i]
                k_f += 1
        if has_break:
            scout[m] = c[2]
            feat[k_f] = c[2]
        for i in range(n_scout):
            scout[i] = _clip(scout[i], r_min, r_max)
        # the fixed points, each ring's and the break are sorted runs (clipping keeps their
        # order): merged one after another (an insertion sort of the rings' points into the
        # fixed ones cost ~10 % of the rule for two rings)
        m = fixed.shape[0]
        _insertion_sort(scout, m)
        for k in range(n_rings):
            _merge_next(scout, m, ring_u.shape[0], tmp)
            m += ring_u.shape[0]
        if has_break:
            _merge_next(scout, m, 1, tmp)
        _field_nodes(scout, phi_s, tmp, lxs, n_scout, c, n_rings, has_break, min_factor)
        # runs of the scout grid over which ln R is monotone (ties continue a run): a level
        # crosses each at most once, so a body's crossings are found by bisection per run
        n_runs = _monotone_runs(phi_s, runs)
        for e in range(n_ends):
            ph_end[e] = log_field(ends[e], c, n_rings, has_break, min_factor)
        for g in range(n_g):
            lev, sc, a_lo, a_hi = level[w, g], scale[w, g], lo[g], hi[g]
            # first crossings of the level inside the support (``quadrature.first_crossings``:
            # the same intervals, in the same order)
            n_found = 0
            for k in range(n_runs):
                if n_found == max_count:
                    break
                i = _sign_change(phi_s, lev, runs[k], runs[k + 1])
                if i < 0:
                    continue
                mid = 0.5 * (scout[i + 1] + scout[i])
                if not (mid > a_lo and mid < a_hi):
                    continue
                f0, f1 = phi_s[i] - lev, phi_s[i + 1] - lev
                x0, x1 = scout[i], scout[i + 1]
                cross[n_found] = _refine(x0, x1, f0, f1, c, n_rings, has_break, min_factor,
                                         lev)
                slope = (f1 - f0) / max(x1 - x0, 1e-300)
                width[n_found] = sc / max(abs(slope), 1e-12)
                found[n_found] = True
                n_found += 1
            for k in range(n_found, max_count):
                found[k] = False
                cross[k] = a_lo
                width[k] = 0.0            # unused slot: its graded breaks all sit at lo
            if not found[0]:
                # closest approach on the scout grid (``_approach_point``)
                # the scout points inside the support: one run of the sorted grid
                best, kb = np.inf, 0
                for i in range(_first_at_least(scout, n_scout, a_lo), n_scout):
                    if scout[i] > a_hi:
                        break
                    d = abs(phi_s[i] - lev)
                    if d < best:
                        best, kb = d, i
                km, kp = max(kb - 1, 0), min(kb + 1, n_scout - 1)
                r0, rm, rp = scout[kb], scout[km], scout[kp]
                f0, fm, fp = phi_s[kb], phi_s[km], phi_s[kp]
                num = (r0 - rm) ** 2 * (f0 - fp) - (r0 - rp) ** 2 * (f0 - fm)
                den = (r0 - rm) * (f0 - fp) - (r0 - rp) * (f0 - fm)
                vertex = r0 - 0.5 * num / (den if abs(den) > 0 else np.inf)
                centre = min(max(vertex, max(rm, a_lo)), min(rp, a_hi))
                cross[0] = centre
                width[0] = _tail_width(centre, lev, sc, c, n_rings, has_break, min_factor)
            # breaks: base, graded around each crossing, the nearest support end, features
            # only breaks inside the support are stored, and each support end once if any
            # break fell on or beyond it: the same distinct breaks as clipping them all,
            # hence the same panels of positive width, with less to sort
            m = 0
            for i in range(base.shape[1]):
                brk[m] = base[g, i]
                m += 1
            at_lo, at_hi = False, False
            for k in range(max(n_found, 1)):   # unused slots would only add breaks at lo
                for i in range(n_graded):
                    x = cross[k] + width[k] * sym[i]
                    if x > a_lo and x < a_hi:
                        brk[m] = x
                        m += 1
                    elif x >= a_hi:
                        at_hi = True
                    else:
                        at_lo = True
            ph_lo, ph_hi = ph_end[end_at[g]], ph_end[end_at[n_g + g]]
            use_lo = abs(ph_lo - lev) <= abs(ph_hi - lev)
            edge = a_lo if use_lo else a_hi
            inward = 1.0 if use_lo else -1.0
            e_w = _tail_width(_clip(edge + 1e-9 * inward, a_lo, a_hi), lev, sc, c, n_rings,
                              has_break, min_factor)
            for i in range(n_f + n_feat):
                x = edge + (inward * e_w) * grades[i] if i < n_f else feat[i - n_f]
                if x > a_lo and x < a_hi:
                    brk[m] = x
                    m += 1
                elif x >= a_hi:
                    at_hi = True
                else:
                    at_lo = True
            if at_lo:
                brk[m] = a_lo
                m += 1
            if at_hi:
                brk[m] = a_hi
                m += 1
            _insertion_sort(brk, m)
            # Gauss–Legendre nodes of the panels of positive width, in passes over the body's
            # nodes that the compiler vectorises (ln x, ln R, the prior, the EMG)
            k_t = panel_nodes(brk, m, gl_x, gl_logw, xs, lws, 0)
            _field_nodes(xs, phs, tmp, lxs, k_t, c, n_rings, has_break, min_factor)
            if fused:
                p_c, p_k, p_mu, p_s = prior[g, 0], prior[g, 1], prior[g, 2], prior[g, 3]
                for k in range(k_t):
                    dx = (xs[k] - p_mu) * p_s
                    lws[k] += p_c - 0.5 * dx * dx - p_k * lxs[k]
            code = closed[g] if fused else 0
            if code == 0:
                # one loop per array, at an unsigned offset: they vectorise
                at = np.uint64(pos)
                for k in range(np.uint64(k_t)):
                    r_out[at + k] = xs[k]
                for k in range(np.uint64(k_t)):
                    lw_out[at + k] = lws[k]
                for k in range(np.uint64(k_t)):
                    phi_out[at + k] = phs[k]
                for k in range(np.uint64(k_t)):
                    wi_out[at + k] = w
                    gi_out[at + k] = g
                pos += k_t
                continue
            if code == EMG_BODY:
                _emg_terms(phs, lws, terms, k_t, zbar[w, g], v[w, g], ln_k[w, g])
            else:
                _record_terms(code == PER_RECORD, phs, lws, terms, tmp, lxs, k_t, zbar[w, g],
                              v[w, g], ln_k[w, g], rz, rvar, rdet, rlim, w, g)
            top = -np.inf
            for k in range(k_t):
                top = max(top, terms[k])
            if top == -np.inf or top == np.inf:
                ll[w, g] = top
                continue
            # exps in a pass of their own, then the sum: an exp inside a floating-point sum
            # does not vectorise (the sum's order is fixed), ~3.5x slower
            for k in range(k_t):
                tmp[k] = exp_ftz(terms[k] - top)
            acc = 0.0
            for k in range(k_t):
                acc += tmp[k]
            ll[w, g] = top + math.log(acc)
    return r_out[:pos], lw_out[:pos], phi_out[:pos], wi_out[:pos], gi_out[:pos], ll
