"""Spin projection under a user prior on the obliquity, marginalised by quadrature (issue 3).

A body spinning about an axis at angle theta to the field records ``u = |cos theta|``; with
``X = -ln u`` a record's corrected log value is ``z = phi - X + eps``, ``phi = ln B``. For
isotropic axes X ~ Exponential(1) and the closed forms of :mod:`diskfield.recording` apply.
With a user prior pi(theta) on [a, b] degrees (``[spin.obliquity]``), X lives on
[-ln cos a, -ln cos b] (infinite for b = 90 deg) with density pi(theta) |dtheta/dX|, which is
singular at X = 0 when a = 0 (theta ~ sqrt(2 X)). The integrals are therefore taken over theta
itself, where the integrand pi(theta) g(X(theta)) is smooth::

    spin "body":   ln int pi(theta) K N(zbar; phi - X, V) prod_j Phi((X - phi + z_j) / S_j) dtheta
    spin "record": sum_i ln int pi(theta) p(record_i | phi - X) dtheta

(detections of a body combine into one Gaussian in X, :func:`diskfield._lkcommon._detection_stats`;
upper limits j enter through their normal CDFs). The rule is composite Gauss–Legendre in theta
with breakpoints at the prior's support ends and quartiles and, mapped from X, graded around
every sharp feature of g: the detections' Gaussian (centre phi - zbar, width sqrt V) and each
limit's step (centre phi - z_j, width S_j). A feature whose centre lies outside the support
is graded from the nearest support end with the width of its tail there, min(s, s^2 / d)
(d the distance from the end), where the integrand is a one-sided Gaussian tail.

A ``fixed`` obliquity prior is a point mass: X = -ln cos(theta0), no integral.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import special

from . import quadrature as quad
from .recording import LN_SQRT_2PI

__all__ = ["ObliquityRule", "obliquity_rule", "log_integrand_obliquity", "level_offset"]

#: Breakpoints around each feature, in units of its width (GL panels between them); beyond
#: +-12 widths a Gaussian has fallen by e^-72 (convention; accuracy tested against quad).
_GRADES = np.array([-12.0, -6.0, -3.0, -1.0, 0.0, 1.0, 3.0, 6.0, 12.0])

#: Prior quantiles used as breakpoints (the prior's own shape, e.g. a log-uniform's 1/theta)
#: (convention).
_QUANTILES = (0.25, 0.5, 0.75)


@dataclass(frozen=True)
class ObliquityRule:
    """A user obliquity prior prepared for the likelihood.

    Attributes
    ----------
    prior : diskfield.priorspec.Prior
        Prior on theta [deg], support within [0, 90].
    x_lo, x_hi : float
        Support of X = -ln cos theta (``x_hi`` is inf when the prior reaches 90 deg).
    theta_breaks : ndarray
        Support ends and quartiles of the prior [deg], sorted.
    fixed_x : float or None
        X of a fixed obliquity (point mass), else None.
    panel_nodes : int
        Gauss–Legendre nodes per theta panel.
    """

    prior: object
    x_lo: float
    x_hi: float
    theta_breaks: np.ndarray
    fixed_x: float | None
    panel_nodes: int


def _x_of_theta(theta_deg):
    """X = -ln cos theta for theta in degrees (inf at 90)."""
    with np.errstate(divide="ignore"):
        return -np.log(np.cos(np.deg2rad(theta_deg)))


def _theta_of_x(x):
    """theta [deg] = arccos(e^-X) for X >= 0 (90 at X = inf)."""
    return np.rad2deg(np.arccos(np.exp(-x)))


def obliquity_rule(prior, panel_nodes: int = 5) -> ObliquityRule:
    """Prepare an obliquity prior (degrees) for :func:`log_integrand_obliquity`.

    Parameters
    ----------
    prior : diskfield.priorspec.Prior
        Prior on the obliquity theta [deg] with support within [0, 90] (checked by the prior
        file reader).
    panel_nodes : int
        Gauss–Legendre nodes per panel in theta (default 5, tested for < 0.01 nat).
    """
    lo, hi = (float(v) for v in prior.support)
    if prior.is_fixed:
        x0 = float(_x_of_theta(lo)) if lo < 90.0 else np.inf
        return ObliquityRule(prior, x0, x0, np.array([lo, hi]), x0, panel_nodes)
    hi = min(hi, 90.0)
    quart = np.asarray(prior.ppf(np.asarray(_QUANTILES)), float)
    breaks = np.unique(np.clip(np.concatenate([[lo, hi], quart]), lo, hi))
    x_hi = np.inf if hi >= 90.0 else float(_x_of_theta(hi))
    return ObliquityRule(prior, float(_x_of_theta(lo)), x_hi, breaks, None, panel_nodes)


# ---------------------------------------------------------------------- the likelihood term
@lru_cache(maxsize=16)
def _cached_rule(prior, panel_nodes):
    return obliquity_rule(prior, panel_nodes)


def level_offset(prior) -> float:
    """Smallest X = -ln cos theta the prior allows (capped at 50): the shift of the
    ln-field level at which a body's distance integrand switches on (0 for isotropic axes).
    """
    return float(min(_cached_rule(prior, 5).x_lo, 50.0))


def log_integrand_obliquity(phi, b, var, stats, spin, prior, at=None, panel_nodes=5):
    """ln p(records of a body | ln R = phi) with the spin projection under an obliquity prior.

    Parameters
    ----------
    phi : ndarray, shape (N,) or (W, G, K)
        ln R at the distance nodes (natural-log field units): flat nodes with ``at``, or a
        dense (walkers, bodies, nodes) array without.
    b : diskfield.likelihood._Bodies
        Padded records (``z``, ``det``, ``lim`` of shape (G, n)).
    var : ndarray, shape (W, G, n)
        Each record's total log variance.
    stats : tuple of ndarray, shape (W, G)
        Detections' precision-weighted mean, variance (inf: none) and ln K.
    spin : {"body", "record"}
        Shared projection per body, or one per record.
    prior : diskfield.priorspec.Prior
        Obliquity prior [deg] (``[spin.obliquity]``).
    at : tuple of ndarray, shape (N,), optional
        Walker and body of each flat node.
    panel_nodes : int
        Gauss–Legendre nodes per theta panel.

    Returns
    -------
    ndarray, shape of ``phi``; -inf where the records are impossible, never NaN.
    """
    rule = _cached_rule(prior, panel_nodes)
    if at is None:
        w, g, k = phi.shape
        wi = np.broadcast_to(np.arange(w)[:, None, None], phi.shape).ravel()
        gi = np.broadcast_to(np.arange(g)[None, :, None], phi.shape).ravel()
        flat = log_integrand_obliquity(phi.ravel(), b, var, stats, spin, prior, (wi, gi),
                                       panel_nodes)
        return flat.reshape(phi.shape)
    wi, gi = at
    if spin == "record":
        return _record_spin(phi, wi, gi, b, var, rule)
    return _body_spin(phi, wi, gi, b, var, stats, rule)


def _body_spin(phi, wi, gi, b, var, stats, rule):
    """One X per body: nodes of bodies without limits, then of bodies with limits."""
    zbar, v, ln_k = stats
    out = np.empty(phi.shape)
    has_lim = b.lim.any(axis=1)
    sel_lim = has_lim[gi]
    for sel in (~sel_lim, sel_lim):
        if not sel.any():
            continue
        w, g = wi[sel], gi[sel]
        det = (phi[sel] - zbar[w, g], v[w, g], ln_k[w, g])
        lims = _limits_at(phi[sel], w, g, b, var) if has_lim[g[0]] else None
        out[sel] = _log_spin_integral(det, lims, rule)
    return out


def _limits_at(ph, w, g, b, var):
    """Limit step centres c = phi - z_j, variances and mask at flat nodes: (M, L)."""
    lim = b.lim
    n_l = int(lim.sum(axis=1).max())
    order = np.argsort(~lim, axis=1, kind="stable")[:, :n_l]        # limits first, (G, L)
    idx = order[g]
    zl = b.z[g[:, None], idx]
    vl = var[w[:, None], g[:, None], idx]
    return ph[:, None] - zl, vl, lim[g[:, None], idx]


def _record_spin(phi, wi, gi, b, var, rule):
    """One X per record: a one-dimensional integral per record, summed over the body."""
    out = np.zeros(phi.shape)
    for j in range(b.z.shape[1]):
        sel = (b.det[:, j] | b.lim[:, j])[gi]
        if not sel.any():
            continue
        w, g = wi[sel], gi[sel]
        det, lim = b.det[g, j], b.lim[g, j]
        m = phi[sel] - b.z[g, j]
        vj = var[w, g, j]
        s = np.sqrt(vj)
        pts = np.where(det[:, None], _feature_points(m, s, rule, det),
                       _feature_points(m, s, rule, lim, tail="lower"))
        d_stats = (m, np.where(det, vj, np.inf), np.zeros(m.shape))
        lims = (m[:, None], vj[:, None], lim[:, None]) if lim.any() else None
        out[sel] += _log_spin_integral(d_stats, lims, rule, pts)
    return out


def _log_spin_integral(det, lims, rule, x_breaks=None):
    """ln int pi(theta) g(X(theta)) dtheta for every point of the leading shape (...).

    Parameters
    ----------
    det : tuple of ndarray, shape (...)
        Detections' Gaussian in X: centre m = phi - zbar, variance V (inf: no detections),
        ln K.
    lims : tuple of ndarray, shape (..., L), or None
        Limits' step centres c_j = phi - z_j, variances S_j^2 and mask.
    rule : ObliquityRule
    x_breaks : ndarray, shape (..., F), optional
        Breakpoints in X (default: graded around the detections' centre and every limit).
    """
    m, v, ln_k = det
    has = np.isfinite(v)
    vv = np.where(has, v, 1.0)
    if rule.fixed_x is not None:
        return _log_g(np.full(m.shape + (1,), rule.fixed_x), m, vv, ln_k, has, lims)[..., 0]
    if x_breaks is None:
        x_breaks = _default_breaks(m, vv, has, lims, rule)
    t_lo, t_hi = rule.theta_breaks[0], rule.theta_breaks[-1]
    theta_b = np.concatenate([np.clip(_theta_of_x(x_breaks), t_lo, t_hi),
                              np.broadcast_to(rule.theta_breaks, m.shape + rule.theta_breaks.shape)],
                             axis=-1)
    theta, logw = quad.panel_rule(np.sort(theta_b, axis=-1), rule.panel_nodes)
    x = _x_of_theta(theta)
    log_f = logw + rule.prior._logpdf(theta) + _log_g(x, m, vv, ln_k, has, lims)
    return quad.log_sum_exp(log_f, axis=-1)


def _default_breaks(m, vv, has, lims, rule):
    """X breakpoints around the detections' Gaussian and every limit's step, (..., F)."""
    breaks = [_feature_points(m, np.sqrt(vv), rule, has)]
    if lims is not None:
        c, s2, mask = lims
        pts = _feature_points(c, np.sqrt(s2), rule, mask, tail="lower")
        breaks.append(pts.reshape(pts.shape[:-2] + (-1,)))
    return np.concatenate(breaks, axis=-1)


def _feature_points(c, s, rule, mask, tail="both"):
    """Breakpoints in X graded around a feature (centre c, width s), clipped to the support.

    A centre outside the support is replaced by the nearest end and the width by the tail's
    width there, min(s, s^2 / d). ``tail="lower"``: the feature is a normal CDF step, sharp
    only on its lower side (a centre below the support leaves a plateau: width s kept).
    """
    e = np.clip(c, rule.x_lo, rule.x_hi)
    d = np.abs(c - e)
    if tail == "lower":
        d = np.where(c > e, d, 0.0)
    w = np.where(d > 0, np.minimum(s, s * s / np.where(d > 0, d, 1.0)), s)
    pts = np.clip(e[..., None] + w[..., None] * _GRADES, rule.x_lo, rule.x_hi)
    return np.where(mask[..., None], pts, rule.x_lo)


def _log_g(x, m, vv, ln_k, has, lims):
    """ln g at X (..., Q): detections' Gaussian in X plus the limits' ln Phi."""
    out = np.where(has[..., None], ln_k[..., None] - 0.5 * (x - m[..., None]) ** 2 / vv[..., None]
                   - 0.5 * np.log(vv[..., None]) - LN_SQRT_2PI, 0.0)
    if lims is not None:
        c, s2, mask = lims
        arg = (x[..., None] - c[..., None, :]) / np.sqrt(s2[..., None, :])
        out = out + np.where(mask[..., None, :], special.log_ndtr(arg), 0.0).sum(axis=-1)
    return out
