"""Ages by quadrature for time-dependent envelopes (DESIGN §4).

Each record's age is integrated on its own prior: nodes in the prior's CDF, split at the
envelope's fast features (per walker). Bodies with the shared spin projection integrate it
numerically against a truncated-normal proposal (importance mapping).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from . import quadrature as quad
from ._lkcommon import _detection_stats, _expand, _finite_support
from .errors import CompilationError
from .priorspec import Uniform
from .recording import LN_SQRT_2PI, emg_logpdf, emg_logsf


@dataclass(frozen=True)
class _AgeRule:
    """Age nodes per record: t (W, G, n, Q) [Myr] and ln weights; summaries per record."""

    log_factor: np.ndarray       # ln T(t) at the nodes (W, G, n, Q)
    logw: np.ndarray             # ln weights (W, G, n, Q), logsumexp over Q = 0
    mean_log_factor: np.ndarray  # (W, G, n)
    var_log_factor: np.ndarray   # (W, G, n)


@dataclass(frozen=True)
class _AgePriors:
    """Each padded record's age prior as an inverse-CDF family (G, n)."""

    kind: np.ndarray   # 0 normal, 1 uniform/window
    a: np.ndarray      # mean or low [Myr]
    b: np.ndarray      # sd or high [Myr]
    window: dict       # (G, n) mask -> Prior for non-uniform reservoir windows


def _age_priors(comp, priorset):
    """Age priors of the padded records; windows must have finite support."""
    recs = comp.records
    n_max = max(len(b.record_indices) for b in comp.bodies)
    g = len(comp.bodies)
    kind, a, bb = np.ones((g, n_max), int), np.zeros((g, n_max)), np.ones((g, n_max))
    windows = {}
    for k, body in enumerate(comp.bodies):
        for j, i in enumerate(body.record_indices):
            ak = recs.age_kind[i]
            if ak in ("normal", "uniform"):
                kind[k, j] = 0 if ak == "normal" else 1
                a[k, j], bb[k, j] = recs.age_a[i], recs.age_b[i]
                continue
            prior = priorset.age_windows.get(body.reservoir)
            if prior is None:
                raise CompilationError(
                    f"record {recs.record[i]!r} (body {body.name!r}) has no age and reservoir "
                    f"{body.reservoir!r} has no [age_windows.{body.reservoir}] prior; defined: "
                    f"{', '.join(sorted(priorset.age_windows)) or 'none'}", source=comp.source)
            lo, hi = _finite_support(prior, f"[age_windows.{body.reservoir}]")
            if isinstance(prior, Uniform):
                a[k, j], bb[k, j] = lo, hi
            else:
                windows.setdefault(id(prior), (prior, np.zeros((g, n_max), bool)))[1][k, j] = True
                kind[k, j] = 2
    return _AgePriors(kind=kind, a=a, b=bb, window={k: v for k, v in windows.items()})


def _age_cdf_ppf(ages):
    """cdf(t) and ppf(u) vectorised over padded records (broadcasting on leading axes)."""
    def cdf(t):
        out = np.where(ages.kind == 0, special.ndtr((t - ages.a) / ages.b),
                       np.clip((t - ages.a) / (ages.b - ages.a), 0.0, 1.0))
        for prior, mask in ages.window.values():
            out = np.where(mask, prior.cdf(t), out)
        return out

    def ppf(u):
        out = np.where(ages.kind[..., None] == 0,
                       ages.a[..., None] + ages.b[..., None] * special.ndtri(u),
                       ages.a[..., None] + (ages.b - ages.a)[..., None] * u)
        for prior, mask in ages.window.values():
            out = np.where(mask[..., None], prior.ppf(u), out)
        return out

    return cdf, ppf


def _age_rule(ages, envelope, p, s):
    """Nodes in each record's age-prior CDF, split at the envelope's features (per walker)."""
    cdf, ppf = _age_cdf_ppf(ages)
    feats = _envelope_features(p)
    w = len(p["intrinsic_scatter"])
    breaks = [np.zeros((w,) + ages.a.shape + (1,)), np.ones((w,) + ages.a.shape + (1,))]
    if feats is not None:
        breaks.append(np.clip(_cdf_points(cdf, feats), 0.0, 1.0))
    u_breaks = np.sort(np.concatenate(breaks, axis=-1), axis=-1)
    u, logw = quad.panel_rule(u_breaks, s.age_nodes)
    u = np.clip(u, 1e-15, 1 - 1e-15)
    t = _ppf_nodes(ppf, u)  # (W, G, n, Q)
    lf = envelope.log_factor(t, _expand(p, 3))
    wts = np.exp(logw)
    mean = (wts * lf).sum(-1)
    var = (wts * (lf - mean[..., None]) ** 2).sum(-1)
    return _AgeRule(log_factor=lf, logw=logw, mean_log_factor=mean, var_log_factor=var)


def _cdf_points(cdf, feats):
    """cdf of each record's age prior at each walker's feature times: (W, G, n, F)."""
    t = feats[:, None, None, :]
    return np.stack([cdf(t[..., k]) for k in range(feats.shape[1])], axis=-1)


def _ppf_nodes(ppf, u):
    """ppf of each record's prior at u of shape (W, G, n, Q)."""
    w = u.shape[0]
    flat = np.moveaxis(u, 0, 2).reshape(u.shape[1], u.shape[2], -1)
    t = ppf(flat).reshape(u.shape[1], u.shape[2], w, u.shape[3])
    return np.moveaxis(t, 2, 0)


def _envelope_features(p):
    """Times [Myr] where the envelope changes fast, (W, F), or None."""
    if "dissipation_time" not in p:
        return None
    offsets = np.array([-8.0, -3.0, -1.0, 0.0, 1.0, 3.0, 8.0])
    return p["dissipation_time"][:, None] + p["dissipation_edge"][:, None] * offsets


def _integrand_aged(phi, b, var, ages, spin, s):
    """Records with ages on their priors (time-dependent envelope), shape (W, G, K)."""
    if spin == "body":
        return _integrand_aged_body_spin(phi, b, var, ages, s)
    rec = _aged_records(b, var, ages, _compact(b.det), _compact(b.lim))
    return _aged_records_log_prob(phi, rec, spin)


def _integrand_aged_body_spin(phi, b, var, ages, s):
    """Body-shared spin with ages: X by nodes in the CDF of a truncated-normal proposal.

    The proposal q(X) is the e^-X N(...) form of the steady case with each record's ln T
    replaced by its age-prior mean and its variance added; the integrand f/q is exact
    (importance mapping), so the proposal only has to cover where f lives.

    The work is done body by body on the distinct distance nodes only (zero-width distance
    panels repeat one node; their values are copied), with each body's own detections,
    limits and age nodes of non-zero weight, in chunks of points sized for the cache: the
    same sums as one (W, G, K, Q_x, M, Q_age) array, without materialising it.
    """
    veff = var + ages.var_log_factor
    zbar, v, _ = _detection_stats(b.z - ages.mean_log_factor, veff, b.det)
    out = np.full(phi.shape, -np.inf)
    first = np.ones(phi.shape, bool)
    first[..., 1:] = phi[..., 1:] != phi[..., :-1]
    for g in range(phi.shape[1]):
        wi, ki = np.nonzero(first[:, g])
        out[wi, g, ki] = _body_spin_points(phi[wi, g, ki], wi, g, b, var, ages,
                                           zbar[:, g], v[:, g], s.spin_nodes)
    # copy each distinct node's value onto its repeats (runs of equal phi along K)
    src = np.where(first, np.arange(phi.shape[-1]), 0)
    np.maximum.accumulate(src, axis=-1, out=src)
    return np.take_along_axis(out, src, axis=-1)


#: Elements (points x spin nodes x records x age nodes) per chunk of the aged body-spin sums:
#: temporaries of ~2 MB stay in the cache (convention, measured in benchmarks/bench_aged.py).
_CHUNK_ELEMENTS = 1 << 18


def _body_spin_points(ph, wi, g, b, var, ages, zbar, v, n_spin):
    """ln F at the points ``ph`` (P,) of body ``g``, walker of each point ``wi`` (P,)."""
    has = np.isfinite(v[wi])
    vq = np.where(has, v[wi], 1.0)
    sd = np.sqrt(vq)[:, None]
    mu_q = (ph - np.where(has, zbar[wi], 0.0) - vq)[:, None]
    u, w = quad.gauss_legendre_unit(n_spin)
    log_tail = special.log_ndtr(mu_q / sd)
    x = np.where(has[:, None], mu_q - sd * special.ndtri_exp(log_tail + np.log1p(-u)),
                 -np.log1p(-u))                                      # (P, Q_x)
    log_q = np.where(has[:, None], -0.5 * ((x - mu_q) / sd) ** 2 - np.log(sd) - LN_SQRT_2PI
                     - log_tail, -x)
    log_f = -x - log_q + np.log(w)
    kinds = [_body_records(b, var, ages, g, key) for key in ("det", "lim")]
    for rec in kinds:
        if rec is None:
            continue
        size = n_spin * rec["lf"].shape[1] * rec["lf"].shape[2]
        step = max(1, _CHUNK_ELEMENTS // size)
        for c in range(0, len(ph), step):
            sl = slice(c, c + step)
            log_f[sl] += _records_sum(ph[sl, None] - x[sl], wi[sl], rec)
    return quad.log_sum_exp(log_f, axis=-1)


def _body_records(b, var, ages, g, key):
    """One body's detections or limits: z (M,), variances (W, M) and its age nodes of
    non-zero weight, laid out age-node first: ln T and ln weights (Q, W, M); None if none."""
    idx = np.flatnonzero(b.det[g] if key == "det" else b.lim[g])
    if not len(idx):
        return None
    lw = ages.logw[:, g, idx]                                       # (W, M, Q)
    order = np.argsort(~np.isfinite(lw), axis=-1, kind="stable")
    n_q = max(int(np.isfinite(lw).sum(axis=-1).max()), 1)
    order = order[..., :n_q]
    lf = np.take_along_axis(ages.log_factor[:, g, idx], order, axis=-1)
    lw = np.take_along_axis(lw, order, axis=-1)
    vv = var[:, g, idx]
    return dict(det=key == "det", z=b.z[g, idx], var=vv,
                lf=np.ascontiguousarray(np.moveaxis(lf, -1, 0)),
                lw=np.ascontiguousarray(np.moveaxis(lw, -1, 0)))


def _records_sum(m, wi, rec):
    """sum over the records of ln p(record | ln B = m + ln T(t)) on the age rule, (P, Q_x).

    Age nodes lead the temporaries, so the sum over them is a reduction over the first axis
    (contiguous slabs) and every step is done in place.
    """
    vv = rec["var"][wi][:, None, :]                                 # (P, 1, M)
    d = (m[..., None] - rec["z"])[None] + rec["lf"][:, wi, None, :]  # (Q, P, Q_x, M)
    lw = rec["lw"][:, wi, None, :]
    if not rec["det"]:
        return _limits_sum(d, vv, lw)
    np.multiply(d, d, out=d)
    d *= -0.5 / vv
    d += lw
    top = d.max(axis=0)
    top = np.where(np.isfinite(top), top, 0.0)
    d -= top
    np.exp(d, out=d)
    with np.errstate(divide="ignore"):
        lp = np.log(d.sum(axis=0)) + top - 0.5 * np.log(vv) - LN_SQRT_2PI
    return lp.sum(axis=-1)


#: Below this age-summed probability a limit is re-summed in logs (``ndtr`` underflows near
#: 1e-308; convention).
_LINEAR_FLOOR = 1e-280


def _limits_sum(d, vv, lw):
    """Limits' ln sum_q w_q Phi(-d_q / S), summed over records, (P, Q_x).

    Summed in linear space with ``ndtr`` (half the cost of ``log_ndtr``, relative accuracy
    kept in the lower tail since ``ndtr`` is computed from ``erfc``); only the entries whose
    sum falls below ``_LINEAR_FLOOR`` are re-summed with ``log_ndtr`` in logs.
    """
    d *= -1.0 / np.sqrt(vv)
    prob = special.ndtr(d)
    prob *= np.exp(lw)
    tot = prob.sum(axis=0)
    with np.errstate(divide="ignore"):
        lp = np.log(tot)
    low = tot < _LINEAR_FLOOR
    if np.any(low):
        idx = np.nonzero(low)
        lt = special.log_ndtr(d[(slice(None),) + idx]) + np.broadcast_to(lw, d.shape)[
            (slice(None),) + idx]
        lp[idx] = quad.log_sum_exp(lt, axis=0)
    return lp.sum(axis=-1)


def _compact(mask):
    """Column indices (G, M) of each row's True entries first, and their mask (G, M)."""
    m = max(int(mask.sum(axis=1).max()), 1)
    order = np.argsort(~mask, axis=1, kind="stable")[:, :m]
    return order, np.take_along_axis(mask, order, axis=1)


def _aged_records(b, var, ages, det_i, lim_i):
    """Detections and limits compacted per body: z (1, G, M, 1), variances (W, G, M, 1), age
    log factors and ln weights (W, G, M, Q), mask (G, M) and the rows (bodies) that have any."""
    out = {}
    for key, (order, mask) in (("det", det_i), ("lim", lim_i)):
        pick = lambda a: np.take_along_axis(a, order[None, ..., None], axis=2)  # noqa: E731
        out[key] = dict(z=np.take_along_axis(b.z, order, axis=1)[None, ..., None],
                        var=np.take_along_axis(var, order[None], axis=-1)[..., None],
                        lf=pick(ages.log_factor), lw=pick(ages.logw), mask=mask,
                        rows=np.flatnonzero(mask.any(axis=1)))
    return out


def _aged_records_log_prob(m, rec, spin):
    """Sum over each body's records of ln p(record | ln B = m + ln T(t)) on the age rule.

    Parameters
    ----------
    m : ndarray, shape (W, G) + E
        ln B before the envelope factor (E: any extra node axes).
    rec : dict
        From :func:`_aged_records`.
    spin : {"none", "record"}
        ``"record"``: each record's own spin offset marginalised in closed form (EMG).

    Returns
    -------
    ndarray, shape (W, G) + E
    """
    out = np.zeros(m.shape)
    extra = m.ndim - 2
    for key in ("det", "lim"):
        r = rec[key]
        rows = r["rows"]
        if not len(rows):
            continue
        grow = lambda a: np.expand_dims(a[:, rows], tuple(range(2, 2 + extra)))  # noqa: E731
        z, vv, lf, lw = grow(r["z"]), grow(r["var"]), grow(r["lf"]), grow(r["lw"])
        d = m[:, rows][..., None, None] + lf - z      # ln B - z at (W, Gr, E, M, Q)
        const = 0.0
        if spin == "record":
            term = emg_logpdf(d, vv) if key == "det" else emg_logsf(d, vv)
        elif key == "det":
            # the normalisation does not depend on the age node: added after the sum
            term = d * d * (-0.5 / vv)
            const = -0.5 * np.log(vv[..., 0]) - LN_SQRT_2PI
        else:
            term = special.log_ndtr(d * (-1.0 / np.sqrt(vv)))
        lp = quad.log_sum_exp(lw + term, axis=-1) + const
        mask = np.expand_dims(r["mask"][rows], tuple(range(1, 1 + extra)))
        out[:, rows] += np.where(mask, lp, 0.0).sum(-1)
    return out
