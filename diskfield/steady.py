"""Steady-envelope integrands ln p(records of a body | ln R = phi), at compacted distance nodes.

The distance rule of :mod:`diskfield.likelihood` is a dense (W, G, K) array in which most
panels have zero width (unused crossing slots, graded breaks clipped to the support, ring
breaks outside a body's support). Only the nodes with positive weight are evaluated: they come
here as flat arrays ``phi`` (N,) with their walker and body indices ``wi``, ``gi`` (N,), and
every per-(walker, body) quantity is gathered once per node.

Bodies whose records are all detections (shared spin) cost one exponentially modified Gaussian
per node. A body with upper limits and the shared spin needs the spin integral numerically:
with Y = ln B - X the recorded log field, F(phi) = e^-phi C(phi), C(phi) = int_-inf^phi e^Y h(Y)
dY, and h(Y) (detections' Gaussian product times the limits' normal CDFs) does not depend on the
distance. C is tabulated once per (walker, body) on Gauss–Legendre panels graded around the
detections' peak and every limit, from 20 widths below the lowest of them (where ln C has a
closed form) to 20 above the highest. A read inside a panel integrates exp of the polynomial
that interpolates q(Y) = ln[e^Y h(Y)] at the panel's nodes: q is smooth (a parabola plus
normal log-CDFs) where e^q spans many e-folds, so the read keeps its relative accuracy at the
steep foot of a panel, where interpolating e^q itself loses it (measured: tens of nats for a
body whose limit sits below its detections).
"""
from __future__ import annotations

import types
from functools import lru_cache

import numpy as np
from scipy import special

from . import quadrature as quad
from . import workspace
from ._lkcommon import load_kernel
from .recording import LN_SQRT_2PI, emg_logpdf, emg_logsf

#: The compiled kernel of the same rule (:mod:`diskfield._steady_jit`), imported on first use
#: (numba's import costs ~0.3 s that commands without a likelihood need not pay); None: the
#: array code below (numba missing or its cache unwritable; tests set it to compare both).
_compiled = ...


def _kernel():
    global _compiled
    _compiled = load_kernel(_compiled, "_steady_jit")
    return _compiled

__all__ = ["body_spin", "no_spin", "record_spin", "body_spin_with_limits", "compile_kernels"]

#: Breakpoints of the Y rule, in units of the feature's width, either side of the
#: detections' peak and of each limit (GL panels between them; +-20 widths is the range kept).
_Y_GRADES = np.array([-20.0, -9.0, -3.0, -1.0, 0.0, 1.0, 3.0, 9.0, 20.0])


def body_spin(phi, wi, gi, stats):
    """Closed form for bodies of detections only: ln K + EMG density (a body whose only
    record is a limit takes :func:`record_spin`: with one record the shared projection is
    that record's own).

    Parameters
    ----------
    phi : ndarray, shape (N,)
        ln(R / uT) at the nodes.
    wi, gi : ndarray of int, shape (N,)
        Walker and body of each node.
    stats : tuple of ndarray, each (W, G)
        Detections' precision-weighted mean, variance V (inf: none) and ln K.
    """
    zbar, v, ln_k = (a[wi, gi] for a in stats)
    return ln_k + emg_logpdf(phi - zbar, np.where(np.isfinite(v), v, 1.0))


def _limits_at(b, var, wi, gi):
    """Each node's body's limit values (N, L), variances (N, L) and mask, limits compacted."""
    n_l = max(int(b.lim.sum(axis=1).max()), 1)
    order = np.argsort(~b.lim, axis=1, kind="stable")[:, :n_l]
    zl = np.take_along_axis(b.z, order, axis=1)[gi]
    vl = np.take_along_axis(var[wi, gi], order[gi], axis=1)
    return zl, vl, np.take_along_axis(b.lim, order, axis=1)[gi]


def no_spin(phi, wi, gi, b, var, stats):
    """Non-rotating bodies: Gaussian product of detections times normal CDFs of limits, (N,)."""
    zbar, v, ln_k = (a[wi, gi] for a in stats)
    has = np.isfinite(v)
    vv = np.where(has, v, 1.0)
    out = np.where(has, ln_k - 0.5 * (phi - zbar) ** 2 / vv - 0.5 * np.log(vv) - LN_SQRT_2PI,
                   0.0)
    if np.any(b.lim):
        zl, vl, lim = _limits_at(b, var, wi, gi)
        arg = (zl - phi[:, None]) / np.sqrt(vl)
        out = out + np.where(lim, special.log_ndtr(arg), 0.0).sum(axis=-1)
    return out


def record_spin(phi, wi, gi, b, var):
    """Independent spin per record: one EMG density (detection) or survival (limit) each, (N,)."""
    d = phi[:, None] - b.z[gi]
    vv = var[wi, gi]
    dens = np.where(b.det[gi], emg_logpdf(d, vv), 0.0)
    if np.any(b.lim):
        dens = dens + np.where(b.lim[gi], emg_logsf(d, vv), 0.0)
    return dens.sum(axis=-1)


# ---------------------------------------------------------------------- shared spin, limits
def body_spin_with_limits(phi, wi, gi, gx, b, var, stats, n_nodes):
    """Body-shared spin with upper limits, by a cumulative integral in the recorded log field.

    Parameters
    ----------
    phi : ndarray, shape (N,)
        ln R at nodes of the bodies ``gx`` only.
    wi, gi : ndarray of int, shape (N,)
        Walker and body of each node (every ``gi`` in ``gx``).
    gx : ndarray of int
        The bodies needing the numerical spin integral.
    b, var, stats
        Padded bodies, total variances (W, G, n) and detection statistics (W, G).
    n_nodes : int
        Gauss–Legendre nodes per Y panel.

    Returns
    -------
    ndarray, shape (N,)
        ln F(phi). Below the tabulated range the limits are all but certain to pass:
        F ~ prod Phi (limits only) or the closed-form EMG times prod Phi.
    """
    z, vl, lim, zbar, v, ln_k = _subset(b, var, stats, gx)
    has_det = np.isfinite(v)
    if _kernel() is not None:
        return _compiled_reads(phi, wi, gi, gx, b, (z, vl, lim, zbar, v, ln_k, has_det),
                               n_nodes)
    args = (z, vl, lim, zbar, v, ln_k, has_det)
    breaks, y_a = _y_breaks(z, vl, lim, zbar, v, has_det)
    w, g, nb = breaks.shape
    pos = np.zeros(b.lim.shape[0], int)
    pos[gx] = np.arange(len(gx))
    row = wi * g + pos[gi]
    y, logw = quad.panel_rule(breaks, n_nodes)
    keep = np.isfinite(logw) & _needed(breaks, row, phi, has_det, zbar, v, n_nodes)
    yw, yg, _ = np.nonzero(keep)
    lf = np.full(y.shape, -np.inf)
    yk = y[keep]
    lf[keep] = yk + _log_h(yk, yw, yg, *args)
    rw, rg = np.indices((w, g)).reshape(2, -1)
    tail0 = y_a + _log_h(y_a.ravel(), rw, rg, *args, tail=True).reshape(w, g)
    table = _cumulative_table(breaks.reshape(w * g, nb), lf.reshape(w * g, -1),
                              tail0.ravel(), n_nodes)
    out, below = _read_table(table, phi, row)
    if np.any(below):
        gw, gg = wi[below], pos[gi[below]]
        out[below] = _log_h(phi[below], gw, gg, *args, tail=True)
    return out


def compile_kernels() -> None:
    """Compile (or load from numba's cache) the limits kernel now, on a one-body input.

    Worker processes forked afterwards inherit the compiled code instead of each compiling
    it (or racing to write the cache) on first use. No-op without numba.
    """
    if _kernel() is None:
        return
    b = types.SimpleNamespace(z=np.array([[1.0, 0.5]]), lim=np.array([[False, True]]))
    var = np.full((1, 1, 2), 0.1)
    stats = (np.array([[1.0]]), np.array([[0.1]]), np.array([[0.0]]))
    one = np.zeros(1, int)
    _compiled_reads(np.array([1.0]), one, one, one, b,
                    _subset(b, var, stats, one) + (np.array([[True]]),), 5)
    rules = limits_rules(5)     # the age tables' reads (agedspin.body_spin_table)
    workspace.call(_kernel().table_reads, np.array([[0.0, 1.0]]), np.zeros((1, 5)),
                   np.zeros(1), np.array([0.5]), np.zeros(1, np.int64), *rules[:9], rules[10])


def _compiled_reads(phi, wi, gi, gx, b, args, n_nodes):
    """The same rule through the compiled kernel (:mod:`diskfield._steady_jit`)."""
    z, vl, lim, zbar, v, ln_k, has_det = args
    w, g = zbar.shape
    pos = np.zeros(b.lim.shape[0], int)
    pos[gx] = np.arange(len(gx))
    flat = (lambda a: np.ascontiguousarray(np.broadcast_to(a, (w, g) + a.shape[2:]).reshape(
        (w * g,) + a.shape[2:])))
    return workspace.call(
        _kernel().body_spin_with_limits, np.ascontiguousarray(phi, float), wi * g + pos[gi],
        flat(z[None]), flat(vl), flat(lim[None]), flat(has_det),
        flat(np.where(has_det, zbar, 0.0)),
        flat(np.where(has_det, v, 1.0)), flat(np.where(has_det, ln_k, 0.0)),
        *limits_rules(n_nodes))


@lru_cache(maxsize=16)
def limits_rules(n_nodes):
    """The compiled limits kernel's fixed inputs: the Y panels' Gauss–Legendre rule of
    ``n_nodes`` nodes and its monomial interpolation matrix, the reads' 3-, 6- and
    ``_SUB_NODES``-node rules, the Y grades and the conventions (inactive, skip above peak,
    sub range, negligible, diluted, gentle), each a C-contiguous float array (cached: do not
    modify them)."""
    rules = [quad.gauss_legendre_unit(k) for k in (n_nodes, 3, 6, _SUB_NODES)]
    consts = np.array([_INACTIVE, _SKIP_ABOVE_PEAK, _SUB_RANGE, _NEGLIGIBLE, _DILUTED,
                       _GENTLE])
    parts = (*rules[0], quad.monomial_interpolation(n_nodes),
             *(a for rule in rules[1:] for a in rule), _Y_GRADES, consts)
    return tuple(np.array(a, dtype=float, order="C") for a in parts)


#: Above the detections' peak by this many sds, e^Y N(Y; zbar, V) is below e^-40.5 of its
#: peak value: those Y panels add nothing to C (numerical convention).
_SKIP_ABOVE_PEAK = 9.0


def _needed(breaks, row, phi, has_det, zbar, v, n_nodes):
    """Y panels whose integrand can matter (W, G, Q) (node mask, panels repeated n times).

    A panel is skipped when it starts above every phi read from its row (C is only read up
    to phi), or, for a body with detections, above the peak by ``_SKIP_ABOVE_PEAK`` sds.
    """
    w, g, nb = breaks.shape
    top = np.full(w * g, -np.inf)
    np.maximum.at(top, row, phi)
    a = breaks[..., :-1]
    sv = np.sqrt(np.where(has_det, v, 1.0))
    cut = np.where(has_det, np.minimum(top.reshape(w, g), zbar + v + _SKIP_ABOVE_PEAK * sv),
                   top.reshape(w, g))
    return np.repeat(a <= cut[..., None], n_nodes, axis=-1)


def _subset(b, var, stats, gx):
    """Limits (compacted to (Gx, L)) and detection stats of the bodies ``gx``."""
    lim = b.lim[gx]
    n_l = max(int(lim.sum(axis=1).max()), 1)
    order = np.argsort(~lim, axis=1, kind="stable")[:, :n_l]
    zl = np.take_along_axis(b.z[gx], order, axis=-1)
    vl = np.take_along_axis(var[:, gx], order[None], axis=-1)
    zbar, v, ln_k = (a[:, gx] for a in stats)
    return zl, vl, np.take_along_axis(lim, order, axis=-1), zbar, v, ln_k


#: Limits are inactive this many sds above Y (ln Phi(6) = -1e-9; numerical convention).
_INACTIVE = 6.0


def _y_breaks(z, var, lim, zbar, v, has_det):
    """Sorted Y breakpoints (W, G, B) and the range start Y_a (W, G).

    Graded around the detections' peak and each limit; the range starts where every limit is
    still inactive (``_INACTIVE`` sds below the lowest, or 20 widths below the lowest feature
    if that is higher: ln C(Y_a) has a closed form there) and ends 20 widths above the
    highest.
    """
    sv = np.sqrt(np.where(has_det, v, 1.0))
    peak = zbar + np.where(has_det, v, 0.0)       # e^Y N(Y; zbar, V) peaks at zbar + V
    sd = np.sqrt(var)
    zl = np.broadcast_to(z, sd.shape)
    lim_pts = zl[..., None] + sd[..., None] * _Y_GRADES
    lo_lim = np.min(np.where(lim, zl - 20.0 * sd, np.inf), axis=-1)
    hi_lim = np.max(np.where(lim, zl + 20.0 * sd, -np.inf), axis=-1)
    y_a = np.minimum(np.where(has_det, peak - 20.0 * sv, np.inf), lo_lim)
    # below every limit by _INACTIVE sds their normal CDFs are 1 to 1e-9: ln C is in closed
    # form there (the detections' EMG), so the table need not start lower
    y_a = np.maximum(y_a, np.min(np.where(lim, zl - _INACTIVE * sd, np.inf), axis=-1))
    y_b = np.maximum(np.where(has_det, peak + 20.0 * sv, -np.inf), hi_lim)
    det_pts = np.where(has_det[..., None], peak[..., None] + sv[..., None] * _Y_GRADES,
                       y_a[..., None])
    lim_pts = np.where(lim[..., None], lim_pts, y_a[..., None, None])
    pts = np.concatenate([det_pts, lim_pts.reshape(sd.shape[:2] + (-1,)),
                          y_a[..., None], y_b[..., None]], axis=-1)
    pts = np.clip(pts, y_a[..., None], y_b[..., None])
    return np.sort(pts, axis=-1), y_a


def _log_h(y, wi, gi, z, var, lim, zbar, v, ln_k, has_det, tail=False):
    """ln h(Y) at points ``y`` (N,) of (walker, body) ``wi``, ``gi``: the detections' Gaussian
    product (K N(zbar; Y, V)) plus the limits' ln Phi. With ``tail``, ln F below the table:
    the closed-form EMG in place of the Gaussian (``y`` is then phi)."""
    hd = has_det[wi, gi]
    vv = np.where(hd, v[wi, gi], 1.0)
    zb, lk = zbar[wi, gi], ln_k[wi, gi]
    if tail:
        det = lk + emg_logpdf(y - zb, vv)
    else:
        det = lk - 0.5 * (zb - y) ** 2 / vv - 0.5 * np.log(vv) - LN_SQRT_2PI
    m = lim[gi]
    terms = np.zeros(m.shape)
    terms[m] = special.log_ndtr((z[gi] - y[:, None])[m] / np.sqrt(var[wi, gi][m]))
    return np.where(hd, det, 0.0) + terms.sum(axis=-1)


def _cumulative_table(breaks, lf, tail0, n_nodes):
    """Per-panel data for reading ln C anywhere.

    Parameters
    ----------
    breaks : ndarray, shape (R, B)
    lf : ndarray, shape (R, (B - 1) n)
        q(Y) = ln[e^Y h(Y)] at the panels' Gauss–Legendre nodes (``-inf``: panel skipped).
    tail0 : ndarray, shape (R,)
        ln C at the first break.

    Returns
    -------
    dict
        ``key`` (flat search keys), ``lo``, ``span`` (R,); ``a``, ``h``, ``log_c`` (ln C at
        each panel start), ``range`` (spread of q over the panel's nodes), ``bound`` (ln of
        the panel's top value times its width) of shape (R, B - 1); ``q`` (R, B - 1, n) the
        node values; ``log_end`` (R,).

    Notes
    -----
    A panel's integral is taken over the polynomial interpolating q (not e^q) at its nodes:
    q is smooth where e^q spans many e-folds, so exp of the interpolant stays accurate, and
    the panel is cut into as many equal sub-panels as keep each within ``_SUB_RANGE`` nats.
    """
    r, nb = breaks.shape
    q = lf.reshape(r, nb - 1, n_nodes)
    top = np.max(q, axis=-1)
    low = np.min(q, axis=-1)
    with np.errstate(invalid="ignore"):
        spread = np.where(np.isfinite(top), top - low, 0.0)
    a, h = breaks[:, :-1], np.diff(breaks, axis=-1)
    _, wts = quad.gauss_legendre_unit(n_nodes)
    top0 = np.where(np.isfinite(top), top, 0.0)
    with np.errstate(divide="ignore"):
        panel = np.log(h * (np.exp(q - top0[..., None]) @ wts)) + top0
    # the Gauss rule on e^q is good to ~1e-5 up to a 5-nat spread; steeper panels integrate
    # exp of q's interpolant on sub-panels unless even their top (times the width) lies
    # _DILUTED nats below ln C at their start (C then hardly changes: decaying tails)
    start = np.logaddexp.accumulate(np.concatenate([tail0[:, None], panel[:, :-1]], axis=-1),
                                    axis=-1)
    with np.errstate(divide="ignore"):
        bound = top0 + np.log(h)
    pr, pp = np.nonzero(np.isfinite(top) & (h > 0) & (spread > _GENTLE)
                        & (bound > start - _DILUTED))
    panel[pr, pp] = _log_partial(q[pr, pp], np.ones(len(pr)), h[pr, pp], spread[pr, pp])
    log_c = np.logaddexp.accumulate(np.concatenate([tail0[:, None], panel], axis=-1), axis=-1)
    lo, span = breaks[:, 0], breaks[:, -1] - breaks[:, 0]
    span = np.where(span > 0, span, 1.0)
    key = ((breaks - lo[:, None]) / span[:, None] + 3.0 * np.arange(r)[:, None]).ravel()
    return dict(key=key, lo=lo, span=span, a=a, h=h, q=q, range=spread, bound=bound,
                log_c=log_c[:, :-1], log_end=log_c[:, -1], nb=nb)


#: Largest spread of q [nats] over a panel whose table entry keeps the 5-node Gauss sum on e^q
#: (~1e-5 relative for a pure exponential; numerical convention).
_GENTLE = 5.0

#: Largest spread of q [nats] over one sub-panel of the 8-node Gauss–Legendre rule that
#: integrates exp of q's interpolant (relative error ~4e-5 for a pure exponential of that
#: spread, less with curvature; numerical convention).
_SUB_RANGE = 12.0
_SUB_NODES = 8


def _log_partial(qv, t, h, spread):
    """ln int_0^t h exp(q~(s)) ds for panels' node values ``qv`` (M, n) (q~ their
    interpolating polynomial on [0, 1]), upper limits ``t`` (M,) in [0, 1], widths ``h``.

    An entry whose spread over [0, t] is at most 6 nats takes one Gauss–Legendre rule of 3 or
    6 nodes (a pure exponential of that spread to ~1e-5); a steeper one is cut into equal sub-panels
    of at most ``_SUB_RANGE`` nats (up to 32) with 8 nodes each, and sub-panels whose ends lie
    more than ``_NEGLIGIBLE`` nats below the entry's highest end are skipped. q~ is read by
    Horner's rule on monomial coefficients (degree n - 1 on [0, 1]: well conditioned for the
    few nodes used here).
    """
    coef = qv @ quad.monomial_interpolation(qv.shape[1]).T                    # (M, n), c_k of s^k
    need = spread * t
    out = np.empty(len(t))
    # one short rule: 3 nodes up to a 1.5-nat spread (~1e-5), 6 up to 6 nats (~3e-6); the
    # spread bounds the values, so exp is shifted by the first coefficient (q~ at s = 0)
    for lo_need, hi_need, nodes in ((-1.0, 1.5, 3), (1.5, 6.0, 6)):
        sel = np.flatnonzero((need > lo_need) & (need <= hi_need))
        if not len(sel):
            continue
        xs, ws = quad.gauss_legendre_unit(nodes)
        c = coef[sel]
        shift = c[:, :1]
        vals = _horner(c, t[sel, None] * xs) - shift
        with np.errstate(divide="ignore"):
            out[sel] = (np.log(np.exp(vals) @ ws) + shift[:, 0]) + np.log(t[sel] * h[sel])
    steep = np.flatnonzero(need > 6.0)
    if len(steep):
        n_sub = np.minimum(np.ceil(need[steep] / _SUB_RANGE), 32).astype(int)
        ent = np.repeat(np.arange(len(steep)), n_sub)
        first = np.cumsum(n_sub) - n_sub
        frac = 1.0 / n_sub[ent]
        s0 = (np.arange(len(ent)) - first[ent]) * frac
        c = coef[steep][ent]
        tt = t[steep][ent]
        ends = _horner(c, tt[:, None] * np.column_stack([s0, s0 + frac]))
        hi = ends.max(axis=-1)
        best = np.full(len(steep), -np.inf)
        np.maximum.at(best, ent, hi)
        live = hi >= best[ent] - _NEGLIGIBLE
        ent, s0, frac, c, tt = ent[live], s0[live], frac[live], c[live], tt[live]
        xs, ws = quad.gauss_legendre_unit(_SUB_NODES)
        vals = _horner(c, tt[:, None] * (s0[:, None] + frac[:, None] * xs))
        part = quad.log_sum_exp(vals + np.log(ws), axis=-1) + np.log(frac)
        top = np.full(len(steep), -np.inf)
        np.maximum.at(top, ent, part)
        with np.errstate(divide="ignore"):
            tot = np.log(np.bincount(ent, np.exp(part - top[ent]), minlength=len(steep)))
            out[steep] = top + tot + np.log(t[steep] * h[steep])
    return out


#: Sub-panels of a steep panel whose ends lie this far below the panel's highest end peak at
#: least 30 - ``_SUB_RANGE`` = 18 nats below it (q is concave): they change ln C by < 1e-7;
#: skipped.
_NEGLIGIBLE = 30.0

#: A panel adding at most e^-20 of ln C at its start changes ln C by < 3e-9 whatever the
#: accuracy of its own integral (the crude Gauss sum on e^q is within a few nats), and a read
#: inside it takes ln C at its start; numerical convention.
_DILUTED = 20.0


def _horner(coef, x):
    """Polynomials with monomial coefficients ``coef`` (M, n) at points ``x`` (M, k)."""
    acc = coef[:, -1:] * x + coef[:, -2:-1]
    for j in range(coef.shape[1] - 3, -1, -1):
        acc = acc * x + coef[:, j:j + 1]
    return acc


def _read_table(table, phi, row):
    """ln[e^-phi C(phi)] at points ``phi`` (N,) of table rows ``row`` (N,), and a mask of the
    points below the table (left for the caller)."""
    nb = table["nb"]
    # one search over all rows: row k's keys lie in [3k, 3k + 1], its queries in [3k - 1, 3k + 2]
    q = np.clip((phi - table["lo"][row]) / table["span"][row], -1.0, 2.0) + 3.0 * row
    idx = np.searchsorted(table["key"], q, side="right") - 1 - row * nb
    above = idx >= nb - 1
    out = table["log_end"][row] - phi
    inside = np.flatnonzero((idx >= 0) & ~above)
    if len(inside):
        ri, p = row[inside], idx[inside]
        a, h = table["a"][ri, p], table["h"][ri, p]
        t = np.clip((phi[inside] - a) / np.where(h > 0, h, 1.0), 0.0, 1.0)
        part = np.full(len(inside), -np.inf)
        # where ln C at the panel start exceeds the panel's whole bound by _DILUTED nats, the
        # read's own part changes ln C by < 3e-9: it is not taken
        diluted = table["log_c"][ri, p] > table["bound"][ri, p] + _DILUTED
        live = (t > 0) & np.isfinite(table["q"][ri, p, 0]) & ~diluted
        part[live] = _log_partial(table["q"][ri, p][live], t[live], h[live],
                                  table["range"][ri, p][live])
        out[inside] = np.logaddexp(table["log_c"][ri, p], part) - phi[inside]
    return out, idx < 0
