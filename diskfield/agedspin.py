"""Body-shared spin with ages, through one cumulative table per (walker, body).

With the field separable, ln B = phi + ln T(t) with phi = ln R, and the shared projection
X = -ln u ~ Exp(1), a body's records see y + ln T(t_i) with y = phi - X. Each record's age
integral is a function of y alone,

    A_i(y) = sum_q w_q p(record i | ln B = y + ln T(t_q)),

so the spin integral is the cumulative integral of the steady limits case
(:mod:`diskfield.steady`) with h replaced by H = prod_i A_i:

    F(phi) = int_0^inf e^-X H(phi - X) dX = e^-phi C(phi),  C(y) = int_-inf^y e^s H(s) ds.

C is tabulated once per (walker, body) on Gauss–Legendre panels in y and read at every
distance node: the age sums are taken at the table's nodes only (a few dozen per body), not
at every (distance node x spin node) pair, and the spin integral needs no proposal. The table
and its reads are those of the steady limits case (``steady._cumulative_table``,
``steady._read_table``: q = y + ln H is interpolated per panel and exp of the interpolant
integrated, sub-panels where q is steep).

The y panels: each record's density of y varies fastest on [z - ln T_max, z - ln T_min]
widened by ``_CORE_SDS`` of its sds; across the union of these intervals the panels are at
most ``_CORE_STEP`` of the narrowest record's sds wide (q, a sum of logs of Gaussian
mixtures and normal CDFs, is smooth on that scale), and outside it they widen by
``_OUTER_GRADES`` to a start ``_TAIL_SDS`` below, where every detection's density is in its
Gaussian lower tail and every limit is passed for sure; there ln C has the closed form of a
quadratic q (exact for a Gaussian tail or a linear one).
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import special

from . import quadrature as quad
from . import steady, workspace
from .aged import _kernel as aged_kernels
from .steady import _cumulative_table, _horner, _read_table

__all__ = ["body_spin_table"]

#: Half-widths [record sds] added to each record's interval of fast change (convention).
_CORE_SDS = 4.0
#: Widest panel inside the union of those intervals [narrowest record sd] (convention, held
#: to the 0.01-nat budget by the dense-reference tests of tests/test_likelihood.py).
_CORE_STEP = 1.5
#: Break points outside the core, in narrowest-record sds beyond it (convention).
_OUTER_GRADES = np.array([3.0, 9.0])
#: Break points around each limit's step, in its own sds (as the steady table's; convention).
_STEP_GRADES = np.array([-9.0, -3.0, -1.0, 0.0, 1.0, 3.0, 9.0])
#: The table starts this many sds below the lowest record interval, and ends as far above the
#: highest: a detection's density there is below e^-200 of its peak; limits are passed with
#: probability 1 - 1e-9 at 6 sds (ln C then has a closed form; numerical convention).
_TAIL_SDS = 20.0
_LIMIT_SDS = 6.0
#: Most core panels per (walker, body) (a cap: a limit without stated error at a tiny
#: intrinsic scatter is ~1e-3 wide, and ln T can spread over thousands of such widths inside
#: the age window). The age sum of such a limit is a staircase of its age nodes; with 64 panels
#: across an 11-unit core (a viscous decline of 3 e-folds) the table was 0.09 nat off the
#: dense reference, with 128 within 1e-4 (tests/test_agedspin.py; convention).
_MAX_CORE = 128


def body_spin_table(phi, first, b, var, ages, g, n_nodes, records):
    """ln F at the distinct distance nodes of body ``g`` (shared spin, ages).

    Parameters
    ----------
    phi : ndarray, shape (W, K)
        ln R at the body's distance nodes.
    first : ndarray of bool, shape (W, K)
        The distinct nodes (the others repeat them and are not read).
    b, var, ages
        Padded bodies, total variances (W, G, n) and the age rule.
    g : int
        The body.
    n_nodes : int
        Gauss–Legendre nodes per y panel.
    records : callable
        ``records(y, wi)`` -> sum over the body's records of ln A_i(y) at points ``y`` (P,)
        of walkers ``wi`` (P,) (the age sums of :mod:`diskfield.aged`).

    Returns
    -------
    ndarray, shape (W, K)
        ln F at the distinct nodes (``-inf`` elsewhere).
    """
    data = b.det[g] | b.lim[g]
    lt_hi = ages.top_log_factor[:, g][:, data]                     # (W, M)
    lt_lo = ages.low_log_factor[:, g][:, data]
    z = b.z[g, data]
    sd = np.sqrt(var[:, g][:, data])
    is_lim = b.lim[g, data]
    narrow = sd.min(axis=-1)                                       # (W,)
    core_lo = np.min(z - lt_hi - _CORE_SDS * sd, axis=-1)
    core_hi = np.max(z - lt_lo + _CORE_SDS * sd, axis=-1)
    reads = np.where(first, phi, np.nan)
    low_read, top_read = np.nanmin(reads, axis=-1), np.nanmax(reads, axis=-1)
    # the start: below every record's interval (detections by _TAIL_SDS, limits by
    # _LIMIT_SDS of their own sds) and below the lowest read
    tail = np.where(is_lim, _LIMIT_SDS, _TAIL_SDS) * sd
    y_a = np.minimum(np.min(z - lt_hi - tail, axis=-1), low_read - narrow)
    y_b = np.max(z - lt_lo + _TAIL_SDS * sd, axis=-1)
    n_core = np.clip(np.ceil((core_hi - core_lo) / (_CORE_STEP * narrow)), 1, _MAX_CORE)
    u = np.arange(_MAX_CORE + 1) / n_core[:, None]
    core = np.where(u <= 1.0, core_lo[:, None] + (core_hi - core_lo)[:, None] * u,
                    core_hi[:, None])
    outer = np.concatenate([core_lo[:, None] - narrow[:, None] * _OUTER_GRADES,
                            core_hi[:, None] + narrow[:, None] * _OUTER_GRADES], axis=-1)
    # a limit's step, at each end of its interval, graded in its own sds as in the steady
    # table: where the core's panels are capped, a limit far narrower than them (no stated
    # error, intrinsic scatter near 0) would otherwise fall inside one panel (seen 0.015 nat
    # under a constant envelope, against the steady likelihood)
    ends = np.stack([z - lt_hi, z - lt_lo], axis=-1)[:, is_lim]        # (W, L, 2)
    steps = (ends[..., None] + sd[:, is_lim, None, None] * _STEP_GRADES).reshape(len(ends), -1)
    breaks = np.concatenate([core, outer, steps, y_a[:, None], y_b[:, None]], axis=-1)
    breaks = _distinct(np.sort(np.clip(breaks, y_a[:, None], np.maximum(y_b, y_a)[:, None]),
                               axis=-1))
    y, _ = quad.panel_rule(breaks, n_nodes)                        # (W, (B - 1) n)
    h = np.diff(breaks, axis=-1)
    # C is read up to the highest read only: panels starting above it are not needed
    need = np.repeat((h > 0) & (breaks[:, :-1] <= top_read[:, None]), n_nodes, axis=-1)
    rw, _ = np.nonzero(need)
    q = np.full(y.shape, -np.inf)
    q[need] = y[need] + records(y[need], rw)
    aged_kernel = aged_kernels()
    if aged_kernel is not None:
        _, w = quad.gauss_legendre_unit(n_nodes)
        aged_kernel.tame(q, n_nodes, steady.limits_rules(n_nodes)[2], _check_points(n_nodes),
                         np.ascontiguousarray(w))
    else:
        q = _tame(q, n_nodes)
    tail0 = _tail_start(y_a, narrow, records)
    wi, ki = np.nonzero(first)
    out = np.full(phi.shape, -np.inf)
    # y_a lies below every read, so no read falls below the table
    kernel = steady._kernel()
    if kernel is not None:
        rules = steady.limits_rules(n_nodes)
        out[wi, ki] = workspace.call(
            kernel.table_reads, np.ascontiguousarray(breaks), np.ascontiguousarray(q),
            np.ascontiguousarray(tail0, dtype=float), np.ascontiguousarray(phi[wi, ki]),
            wi.astype(np.int64), *rules[:9], rules[10])
        return out
    table = _cumulative_table(breaks, q, tail0, n_nodes)
    out[wi, ki] = _read_table(table, phi[wi, ki], wi)[0]
    return out


def _distinct(breaks):
    """Sorted breaks (R, B) without their repeats: each row's distinct values first, padded
    with its last one (zero-width panels at the end), as few columns as the longest row needs.
    Most of the _MAX_CORE + 1 core slots repeat the core's end; the table's array work is
    per column."""
    keep = np.ones(breaks.shape, bool)
    keep[:, 1:] = breaks[:, 1:] > breaks[:, :-1]
    n_keep = keep.sum(axis=-1)
    order = np.argsort(~keep, axis=-1, kind="stable")[:, :n_keep.max()]
    out = np.take_along_axis(breaks, order, axis=-1)
    last = breaks[:, -1:]
    return np.where(np.arange(out.shape[1]) < n_keep[:, None], out, last)


@lru_cache(maxsize=8)
def _check_points(n_nodes):
    """Where :func:`_tame` checks a panel's interpolant: both ends and the midpoints between
    its Gauss–Legendre nodes, on [0, 1] (cached: do not modify)."""
    x, _ = quad.gauss_legendre_unit(n_nodes)
    return np.concatenate([[0.0], 0.5 * (x[:-1] + x[1:]), [1.0]])


def _tame(q, n_nodes):
    """q at the table's nodes (R, (B - 1) n), with each panel whose interpolant is not
    trustworthy replaced by a constant: the log of the panel's Gauss mean of e^q.

    The table integrates exp of the polynomial through a panel's node values. Where q is not
    smooth on the panel's scale, that polynomial swings far outside the node values: a limit
    much narrower than the panel (no stated error, intrinsic scatter near 0) makes its age
    sum a staircase of the age nodes (ln of it jumps by hundreds of nats between nodes), and
    the swing read e^q as e^500000 (seen in a fit, which then climbed that spike). A panel is
    replaced when its interpolant, between and beyond its nodes, leaves the node values'
    range by more than 1 nat plus 10 % of that range, or when a node value is not finite.
    The panel then keeps the Gauss estimate of its integral (a staircase's steps err by at
    most one node's weight), and a read inside it interpolates C linearly.
    """
    r, m = q.shape
    qp = q.reshape(r, m // n_nodes, n_nodes)
    live = np.isfinite(qp[..., 0]) | np.isfinite(qp[..., -1])
    if not np.any(live):
        return q
    ql = qp[live]                                                  # (L, n)
    finite = np.isfinite(ql).all(axis=-1)
    qf = np.where(np.isfinite(ql), ql, 0.0)
    coef = qf @ quad.monomial_interpolation(n_nodes).T
    _, w = quad.gauss_legendre_unit(n_nodes)
    check = _check_points(n_nodes)
    vals = _horner(coef, np.broadcast_to(check, (len(ql), len(check))))
    top, low = qf.max(axis=-1), qf.min(axis=-1)
    slack = 1.0 + 0.1 * (top - low)
    wild = ~finite | (vals.max(axis=-1) > top + slack) | (vals.min(axis=-1) < low - slack)
    if not np.any(wild):
        return q
    qw = ql[wild]
    mx = np.max(qw, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.log(np.exp(qw - mx[:, None]) @ w) + mx
    ql[wild] = mean[:, None]
    qp[live] = ql
    return qp.reshape(r, m)


def _tail_start(y_a, narrow, records):
    """ln C(y_a) = ln int_-inf^y_a e^q, with q quadratic through y_a -+ d (d a tenth of the
    narrowest sd): exact for the Gaussian lower tail of detections and for the linear q of
    limits passed for sure, the two regimes at the table's start."""
    d = 0.1 * narrow
    pts = np.stack([y_a - d, y_a, y_a + d], axis=-1)               # (W, 3)
    wi = np.repeat(np.arange(len(y_a)), 3)
    qv = (pts.ravel() + records(pts.ravel(), wi)).reshape(pts.shape)
    q0 = qv[:, 1]
    slope = (qv[:, 2] - qv[:, 0]) / (2.0 * d)
    curv = -(qv[:, 2] - 2.0 * q0 + qv[:, 0]) / d ** 2              # a = -q'' >= 0
    curv = np.maximum(curv, 0.0)
    x = slope / np.sqrt(np.where(curv > 0, curv, 1.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        # int_-inf^0 exp(g s - a s^2 / 2) ds = sqrt(2 pi / a) e^(g^2 / 2a) Phi(-g / sqrt a);
        # for g / sqrt(a) > 30 its asymptotic form e^q0 / g (1 - a / g^2 + 3 a^2 / g^4)
        r = curv / slope ** 2
        asym = q0 - np.log(slope) + np.log1p(-r + 3.0 * r * r)
        exact = (q0 + 0.5 * x * x + 0.5 * np.log(2.0 * np.pi / np.where(curv > 0, curv, 1.0))
                 + special.log_ndtr(-x))
    return np.where((curv > 0) & (x <= 30.0), exact, asym)
