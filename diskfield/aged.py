"""Ages by quadrature for time-dependent envelopes (DESIGN §4).

Each record's age is integrated on its own prior by a composite Gauss-Legendre rule in time
whose panels equidistribute how fast the integrand can change: steps of ln T of at most two
record sds, steps of the prior's log density (its tails) and of time (per walker). Bodies
with the shared spin projection take one cumulative table in y = ln R - X per (walker, body)
(:mod:`diskfield.agedspin`), whose age sums are taken here.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from . import quadrature as quad
from ._lkcommon import _expand, _finite_support, load_kernel
from .errors import CompilationError
from .priorspec import Uniform
from .recording import LN_SQRT_2PI, emg_logpdf, emg_logsf


class _AgeRule:
    """Age nodes per record and summaries per record.

    The nodes are kept flat, ordered by walker, body, record (``row``, the flat index into
    (W, G, n)) and node (``col``): ln T (``flat_lf``) and ln weights (``flat_lw``,
    logsumexp over a record's nodes = 0); record (w, g, j) holds ``count[w, g, j]`` nodes
    from ``start[w, g, j]``. Records take from a few nodes to hundreds (a sharp drop of the
    field inside their window), so the padded (W, G, n, Q) arrays ``log_factor`` and
    ``logw`` (-inf weight in the padding) are built only when first read.
    """

    def __init__(self, flat_lf, flat_lw, row, col, shape, n_q, mean_log_factor,
                 var_log_factor, top_log_factor, low_log_factor):
        self.flat_lf, self.flat_lw, self.row, self.col = flat_lf, flat_lw, row, col
        self.shape, self.n_q = shape, n_q
        self.mean_log_factor = mean_log_factor   # (W, G, n)
        self.var_log_factor = var_log_factor     # (W, G, n)
        self.top_log_factor = top_log_factor     # (W, G, n): highest ln T at a node of
        self.low_log_factor = low_log_factor     # positive weight, lowest (-inf, inf: none)
        count = np.bincount(row, minlength=int(np.prod(shape)))
        self.count = count.reshape(shape)
        self.start = (np.cumsum(count) - count).reshape(shape)
        self._padded = None

    def _pad(self):
        if self._padded is None:
            logw = np.full((int(np.prod(self.shape)), self.n_q), -np.inf)
            lf = np.zeros(logw.shape)
            logw[self.row, self.col] = self.flat_lw
            lf[self.row, self.col] = self.flat_lf
            self._padded = (lf.reshape(self.shape + (self.n_q,)),
                            logw.reshape(self.shape + (self.n_q,)))
        return self._padded

    @property
    def log_factor(self):
        """ln T(t) at the nodes (W, G, n, Q), 0 in the padding."""
        return self._pad()[0]

    @property
    def logw(self):
        """ln weights (W, G, n, Q), -inf in the padding."""
        return self._pad()[1]


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


def _age_support(ages):
    """Finite support [lo, hi] (G, n) [Myr] of each padded record's age prior (a normal prior
    is cut at +-_NORMAL_CUT sd, beyond which its mass is < 1e-18)."""
    lo = np.where(ages.kind == 0, ages.a - _NORMAL_CUT * ages.b, ages.a)
    hi = np.where(ages.kind == 0, ages.a + _NORMAL_CUT * ages.b, ages.b)
    for prior, mask in ages.window.values():
        lo, hi = np.where(mask, prior.support[0], lo), np.where(mask, prior.support[1], hi)
    return lo, hi


def _log_age_pdf(ages, t):
    """ln p(t) of each padded record's age prior at t of shape (..., G, n, K) [1/Myr]."""
    t = np.asarray(t, float)

    def at(a):
        return np.broadcast_to(a[..., None], t.shape)

    return _age_logpdf(at(ages.kind), at(ages.a), at(ages.b),
                       [(prior, at(mask)) for prior, mask in ages.window.values()], t)


def _log_age_pdf_at(ages, t, gi, ri):
    """ln p(t) at flat times ``t`` (N,) of padded records (``gi``, ``ri``) (N,) [1/Myr]."""
    return _age_logpdf(ages.kind[gi, ri], ages.a[gi, ri], ages.b[gi, ri],
                       [(prior, mask[gi, ri]) for prior, mask in ages.window.values()], t)


def _age_logpdf(kind, a, b, windows, t):
    """ln p(t) with each element's prior family ``kind`` (0 normal: mean ``a``, sd ``b``;
    1 uniform on [a, b]) and, where a window mask is set, that window prior's density."""
    normal = kind == 0
    z = (t - a) / b
    out = np.where(normal, -0.5 * z * z - np.log(b) - LN_SQRT_2PI,
                   -np.log(np.where(normal, 1.0, b - a)))
    for prior, mask in windows:
        if np.any(mask):
            out[mask] = prior.log_prob(t[mask])
    return out


#: Normal age priors are integrated over mean +- 9 sd (convention: the mass beyond, 2e-19, is
#: far below the 0.01-nat budget even for a record 30 nats into its prior's tail).
_NORMAL_CUT = 9.0
#: The age panels equidistribute a measure of how fast the integrand can change: per panel at
#: most ``_LEVEL_STEP`` record sds S of ln T (a record's density is a Gaussian of width S in
#: ln T), ``_LOG_PDF_STEP`` nats of the prior density (its tails: 6 Gauss nodes integrate
#: e^-10x on [0, 1] to ~2e-4, derived from the Gauss error term) and ``_WIDTH_STEP`` sds of
#: time for a normal prior (its core, where the log density is flat); a window is not split
#: by time alone. Conventions: with steps of 2, 6 and 2 the worst error at the tests' points
#: was 1.4e-3 nat, with 3, 10 and 3 1.6e-3 nat at two thirds of the nodes
#: (tests/test_aged.py, benchmarks/bench_aged.py); but at posterior draws of a dissipating
#: fit to the demo (an edge of 0.06 Myr, ln T falling by 3.5 record sds) a level step of 3
#: left bodies 0.005-0.009 nat off (0.012 on their sum), and 2 at most 0.0017 for 5 % more
#: age nodes (tests/test_agedspin.py).
_LEVEL_STEP = 2.0
#: The level step of a record whose ln T spreads over more than ``_SHARP_SPREAD`` of its sds
#: (a field that drops steeply inside its window): with 3 the panels across a 7-e-fold drop
#: within 0.05 Myr left 0.013-0.014 nat, with 2 up to 0.013, with 1 at most 0.0024
#: (tests/test_likelihood.py; convention). It triples those records' age panels in the drop.
_SHARP_LEVEL_STEP = 1.0
#: A record counts as sharp when its ln T spreads over more than this many of its sds
#: (numerical convention).
_SHARP_SPREAD = 20.0
_LOG_PDF_STEP = 10.0
_WIDTH_STEP = 3.0
#: Most panels per record, and points of the uniform time grid on which the measure is summed.
_MAX_PANELS = 64
_GRID = 97
_MEASURE_CONSTANTS = np.array([_SHARP_SPREAD, _SHARP_LEVEL_STEP, _LEVEL_STEP, _LOG_PDF_STEP,
                               _WIDTH_STEP, _MAX_PANELS], dtype=float)


def _age_rule(ages, envelope, p, s, var=None):
    """Composite Gauss-Legendre rule in time on each record's age prior (per walker).

    Parameters
    ----------
    ages : _AgePriors
    envelope : Envelope
    p : dict of ndarray (W,)
    s : QuadratureSettings
    var : ndarray, shape (W, G, n), optional
        Each record's total log variance S^2 (None: the intrinsic scatter alone, a finer rule).

    Notes
    -----
    Nodes are in time, not in the prior's CDF: a record whose data need an age far in its
    prior's tail (a limit passed only late in a fast-decaying field) is integrated there too;
    in the CDF such tails are crushed into the last 1e-13 of [0, 1].
    """
    w = len(p["intrinsic_scatter"])
    shape = (w,) + ages.a.shape
    if var is None:
        var = np.broadcast_to((p["intrinsic_scatter"] ** 2)[:, None, None], shape)
    lo, hi = _age_support(ages)
    # records with one age prior share their grid: ln T and ln p are evaluated once per prior
    first, inverse, sub = _distinct_priors(ages)
    grid = _time_grid(lo[first], hi[first], _envelope_features(p), w)     # (W, U, N)
    lf = envelope.log_factor(grid, _expand(p, 2))
    lp = _log_age_pdf(sub, grid)
    sd = np.sqrt(np.maximum(var, 1e-10))
    scale = np.where(ages.kind == 0, ages.b, (hi - lo) / _WIDTH_STEP)
    kernel = _kernel()
    if kernel is not None:
        measure = kernel.measure_breaks(grid, lf, lp, inverse, np.ascontiguousarray(sd), scale,
                                        hi, _MEASURE_CONSTANTS)
    else:
        measure = _measure_breaks(grid[:, inverse], lf[:, inverse], lp[:, inverse], sd, scale,
                                  hi)
    env_p = {k: p[k] for k in envelope.parameter_names}
    if kernel is not None:
        x, wx = quad.gauss_legendre_unit(s.age_nodes)
        t_flat, lw_flat, row, col, n_q = kernel.lay_out_nodes(
            measure, lo, hi, ages.kind, ages.a, ages.b, x, np.log(wx))
        per_walker = int(np.prod(shape[1:]))
        wi, rec = np.divmod(row, per_walker)          # walker; (body, record) flat
        for prior, mask in ages.window.values():
            sel = np.flatnonzero(mask.ravel()[rec])
            if len(sel):
                lw_flat[sel] += prior.log_prob(t_flat[sel])
        lf_flat = envelope.log_factor(t_flat[:, None], {k: v[wi][:, None]
                                                        for k, v in env_p.items()})[:, 0]
        lf_flat = np.ascontiguousarray(lf_flat, dtype=float)
        mean, var_lf, top, low = kernel.finish_rule(lw_flat, lf_flat, row, int(np.prod(shape)))
        return _AgeRule(lf_flat, lw_flat, row, col, shape, n_q, mean.reshape(shape),
                        var_lf.reshape(shape), top.reshape(shape), low.reshape(shape))
    breaks = np.concatenate([
        measure, np.broadcast_to(np.stack([lo, hi, np.clip(0.0, lo, hi)], axis=-1),
                                 shape + (3,))], axis=-1)
    breaks = np.sort(breaks, axis=-1)
    # zero-width panels (slots a record does not need) carry no weight: only the others'
    # nodes are laid out (each row's first, in order) and evaluated; the rest is padding
    h = np.diff(breaks, axis=-1)
    keep = h > 0
    slot = np.cumsum(keep, axis=-1) - 1                              # panel's rank in its row
    n_q = max(int(keep.sum(axis=-1).max()) * s.age_nodes, 1)
    wi, gi, ri, ki = np.nonzero(keep)
    x, wx = quad.gauss_legendre_unit(s.age_nodes)
    hk = h[wi, gi, ri, ki][:, None]
    t_flat = (breaks[wi, gi, ri, ki][:, None] + hk * x).ravel()
    col = (slot[wi, gi, ri, ki][:, None] * s.age_nodes + np.arange(s.age_nodes)).ravel()
    at = tuple(np.repeat(i, s.age_nodes) for i in (wi, gi, ri))
    lw_flat = (np.log(hk) + np.log(wx)).ravel() + _log_age_pdf_at(ages, t_flat, at[1], at[2])
    lf_flat = envelope.log_factor(t_flat[:, None], {k: v[at[0]][:, None]
                                                    for k, v in env_p.items()})[:, 0]
    # per record (runs of equal (walker, body, record) in the flat order): normalise the
    # weights exactly, then the mean and variance of ln T
    row = np.ravel_multi_index(at, shape)
    starts = np.flatnonzero(np.r_[True, row[1:] != row[:-1]])
    counts = np.diff(np.r_[starts, len(row)])
    top = np.maximum.reduceat(lw_flat, starts)
    lw_flat -= np.repeat(np.log(np.add.reduceat(np.exp(lw_flat - np.repeat(top, counts)),
                                                starts)) + top, counts)
    wts = np.exp(lw_flat)
    mean_r = np.add.reduceat(wts * lf_flat, starts)
    var_r = np.add.reduceat(wts * (lf_flat - np.repeat(mean_r, counts)) ** 2, starts)
    mean, var_lf = np.zeros(shape), np.zeros(shape)
    mean.ravel()[row[starts]] = mean_r
    var_lf.ravel()[row[starts]] = var_r
    finite = np.isfinite(lw_flat)
    top, low = np.full(shape, -np.inf), np.full(shape, np.inf)
    top.ravel()[row[starts]] = np.maximum.reduceat(np.where(finite, lf_flat, -np.inf), starts)
    low.ravel()[row[starts]] = np.minimum.reduceat(np.where(finite, lf_flat, np.inf), starts)
    return _AgeRule(lf_flat, lw_flat, row, col, shape, n_q, mean, var_lf, top, low)


def _time_grid(lo, hi, feats, w):
    """Sorted times (W, ..., N) for supports ``lo``, ``hi`` of any shape: uniform on each
    support, plus the envelope's features."""
    u = np.linspace(0.0, 1.0, _GRID)
    grid = np.broadcast_to(lo[..., None] + (hi - lo)[..., None] * u, (w,) + lo.shape + (_GRID,))
    if feats is None:
        return grid
    f = np.clip(feats.reshape((w,) + (1,) * lo.ndim + (-1,)), lo[..., None], hi[..., None])
    return np.sort(np.concatenate([grid, f], axis=-1), axis=-1)


def _measure_breaks(grid, lf, lp, sd, scale, hi):
    """Times (W, G, n, _MAX_PANELS - 1) splitting each record's support into panels of equal
    measure (see ``_LEVEL_STEP``), at most ``_MAX_PANELS``; unused slots are ``hi``.

    ``grid``, ``lf``, ``lp`` (W, G, n, N): each record's time grid, ln T and ln p on it;
    ``sd`` (W, G, n) its sd of ln B; ``scale``, ``hi`` (G, n). The measure is summed on the
    grid and inverted by linear interpolation (one ``searchsorted`` over all rows, each row
    offset to keep the whole increasing). The compiled form is
    ``_aged_jit.measure_breaks`` (tested equal).
    """
    scale = scale[..., None]
    sharp = (lf.max(axis=-1) - lf.min(axis=-1)) > _SHARP_SPREAD * sd
    step = np.where(sharp, _SHARP_LEVEL_STEP, _LEVEL_STEP)
    cell = np.maximum(np.abs(np.diff(lf, axis=-1)) / (step * sd)[..., None],
                      np.abs(np.diff(lp, axis=-1)) / _LOG_PDF_STEP)
    cell = np.maximum(cell, np.diff(grid, axis=-1) / (_WIDTH_STEP * scale))
    cum = np.concatenate([np.zeros(cell.shape[:-1] + (1,)), np.cumsum(cell, axis=-1)], axis=-1)
    total = cum[..., -1]
    n_pan = np.clip(np.ceil(total), 1, _MAX_PANELS)
    frac = cum / np.where(total > 0, total, 1.0)[..., None]
    n = frac.shape[-1]
    j = np.arange(1, _MAX_PANELS)
    target = np.where(j < n_pan[..., None], j / n_pan[..., None], 1.0)   # (W, G, n, J)
    rows = np.arange(frac[..., 0].size).reshape(frac.shape[:-1])[..., None]
    k = np.searchsorted((frac + 2.0 * rows).ravel(), (target + 2.0 * rows).ravel())
    k = np.clip(k.reshape(target.shape) - rows * n, 1, n - 1)
    f0, f1 = np.take_along_axis(frac, k - 1, axis=-1), np.take_along_axis(frac, k, axis=-1)
    g0, g1 = np.take_along_axis(grid, k - 1, axis=-1), np.take_along_axis(grid, k, axis=-1)
    step = np.clip(np.where(f1 > f0, (target - f0) / np.where(f1 > f0, f1 - f0, 1.0), 0.0), 0, 1)
    return np.where(target < 1.0, g0 + step * (g1 - g0), hi[..., None])


def _distinct_priors(ages):
    """The distinct age priors of the padded records: the (body, record) index of each one's
    first record (2, U), each record's prior (G, n) as an index into them, and the distinct
    priors as an _AgePriors of shape (U,)."""
    win = np.full(ages.kind.shape, -1.0)
    for k, (_, mask) in enumerate(ages.window.values()):
        win[mask] = k
    key = np.stack([ages.kind, ages.a, ages.b, win], axis=-1).reshape(-1, 4)
    _, idx, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    first = np.unravel_index(idx, ages.kind.shape)
    sub = _AgePriors(kind=ages.kind[first], a=ages.a[first], b=ages.b[first],
                     window={k: (prior, mask[first]) for k, (prior, mask)
                             in ages.window.items()})
    return first, inverse.reshape(ages.kind.shape), sub


def _envelope_features(p):
    """Times [Myr] where the envelope changes fast, (W, F), or None."""
    if "dissipation_time" not in p:
        return None
    offsets = np.array([-8.0, -3.0, -1.0, 0.0, 1.0, 3.0, 8.0])
    return p["dissipation_time"][:, None] + p["dissipation_edge"][:, None] * offsets


def _integrand_aged(phi, b, var, ages, spin, s):
    """Records with ages on their priors (time-dependent envelope), shape (W, G, K).

    Under the shared spin a body with a single record is computed as under the per-record
    spin (the same model: one record, one projection), in closed form per age node: the
    importance-mapped spin rule of the other bodies cannot resolve the two sharp modes in X
    that a dissipating field gives one record (seen: 0.06 nat on a one-record body).
    """
    if spin == "body":
        lone = (b.det | b.lim).sum(axis=1) == 1
        out = _integrand_aged_body_table(phi, b, var, ages, s, skip=lone)
        if np.any(lone):
            out[:, lone] = _records_dedup(phi, b, var, ages, "record", lone)[:, lone]
        return out
    return _records_dedup(phi, b, var, ages, spin)


def _records_dedup(phi, b, var, ages, spin, bodies=None):
    """:func:`_records_flat` (or its compiled form, ``_aged_jit.records_sum`` and
    ``records_sum_emg``) on the distinct distance nodes only (zero-width distance panels
    repeat one node; their values are copied), shape (W, G, K)."""
    first = np.ones(phi.shape, bool)
    first[..., 1:] = phi[..., 1:] != phi[..., :-1]
    kernel = _kernel()
    if kernel is not None:
        # compiled: one call per body over its distinct nodes only (a padded (W, K') block
        # would evaluate every body at the most nodes any body has: 3-4x the work here)
        out = np.zeros(phi.shape)
        sums = kernel.records_sum_emg if spin == "record" else kernel.records_sum
        for g in range(phi.shape[1]):
            if (bodies is not None and not bodies[g]) or not (b.det[g] | b.lim[g]).any():
                continue
            wi, ki = np.nonzero(first[:, g])
            out[wi, g, ki] = sums(np.ascontiguousarray(phi[wi, g, ki], dtype=float),
                                  wi.astype(np.int64), *_record_args(b, var, ages, g))
    else:
        order = np.argsort(~first, axis=-1, kind="stable")[..., :max(int(first.sum(-1).max()),
                                                                      1)]
        packed = _records_flat(np.take_along_axis(phi, order, axis=-1), b, var, ages, spin,
                               bodies)
        out = np.empty(phi.shape)
        np.put_along_axis(out, order, packed, axis=-1)
    src = np.where(first, np.arange(phi.shape[-1]), 0)
    np.maximum.accumulate(src, axis=-1, out=src)
    return np.take_along_axis(out, src, axis=-1)


def _records_flat(phi, b, var, ages, spin, bodies=None):
    """Spin "none" or "record": sum over each body's records of ln sum_q w_q p(record |
    ln B = phi + ln T(t_q)), shape (W, G, K) (only the ``bodies`` mask (G,) when given; the
    others are 0).

    The array code (:func:`_records_dedup` calls the compiled sums instead when numba is
    there). Each record has its own number of age nodes (from a few to hundreds): the nodes
    of positive weight of every (walker, record) are laid out flat, one row of K distance
    nodes each, and summed per record by ``reduceat``, in chunks of whole records.
    """
    w, g, k = phi.shape
    data = b.det | b.lim
    if bodies is not None:
        data = data & bodies[:, None]
    keep = np.broadcast_to(data[None], ages.shape).ravel()[ages.row] & np.isfinite(ages.flat_lw)
    rec = ages.row[keep]
    wi, gi, ri = np.unravel_index(rec, ages.shape)
    lw, lf = ages.flat_lw[keep], ages.flat_lf[keep]
    starts = np.flatnonzero(np.r_[True, rec[1:] != rec[:-1]])
    ends = np.r_[starts[1:], len(rec)]
    out = np.zeros(phi.shape)
    per = max(1, _CHUNK_ELEMENTS // max(k, 1))
    c0 = 0
    while c0 < len(starts):
        c1 = c0 + 1
        while c1 < len(starts) and ends[c1] - starts[c0] <= per:
            c1 += 1
        sl = slice(starts[c0], ends[c1 - 1])
        lp = _flat_chunk(phi, b, var, spin, wi[sl], gi[sl], ri[sl], lw[sl], lf[sl],
                         starts[c0:c1] - starts[c0])
        r0 = starts[c0:c1]
        np.add.at(out, (wi[r0], gi[r0]), lp)
        c0 = c1
    return out


def _flat_chunk(phi, b, var, spin, wi, gi, ri, lw, lf, starts):
    """ln sum over age nodes for the records starting at ``starts`` of a flat chunk, (R, K)."""
    vv = var[wi, gi, ri][:, None]
    d = phi[wi, gi] + (lf - b.z[gi, ri])[:, None]                    # ln B - z, (N, K)
    is_lim = b.lim[gi, ri][:, None]
    if spin == "record":
        term = np.where(is_lim, emg_logsf(d, vv), emg_logpdf(d, vv))
    else:
        # a detection's normalisation does not depend on the age node: added after the sum
        term = np.where(is_lim, special.log_ndtr(d * (-1.0 / np.sqrt(vv))), d * d * (-0.5 / vv))
    term += lw[:, None]
    top = np.maximum.reduceat(term, starts, axis=0)
    top = np.where(np.isfinite(top), top, 0.0)
    term -= np.repeat(top, np.diff(np.r_[starts, len(term)]), axis=0)
    np.exp(term, out=term)
    with np.errstate(divide="ignore"):
        lp = np.log(np.add.reduceat(term, starts, axis=0)) + top
    if spin != "record":
        v0 = vv[starts]
        lp += np.where(is_lim[starts], 0.0, -0.5 * np.log(v0) - LN_SQRT_2PI)
    return lp


def _integrand_aged_body_table(phi, b, var, ages, s, skip=None):
    """Body-shared spin with ages by one cumulative table in y = phi - X per (walker, body)
    (:mod:`diskfield.agedspin`), shape (W, G, K); bodies in ``skip`` are left -inf."""
    from .agedspin import body_spin_table

    out = np.full(phi.shape, -np.inf)
    first = np.ones(phi.shape, bool)
    first[..., 1:] = phi[..., 1:] != phi[..., :-1]
    for g in range(phi.shape[1]):
        if skip is not None and skip[g]:
            continue
        out[:, g] = body_spin_table(phi[:, g], first[:, g], b, var, ages, g,
                                    s.spin_panel_nodes, _records_at(b, var, ages, g))
    # copy each distinct node's value onto its repeats (runs of equal phi along K)
    src = np.where(first, np.arange(phi.shape[-1]), 0)
    np.maximum.accumulate(src, axis=-1, out=src)
    return np.take_along_axis(out, src, axis=-1)


#: The compiled age sums and measure (:mod:`diskfield._aged_jit`), imported on first use; None:
#: the array code (:func:`_records_sum`, :func:`_measure_breaks`; tests set it to compare).
_compiled = ...


def _kernel():
    global _compiled
    _compiled = load_kernel(_compiled, "_aged_jit")
    return _compiled


def compile_kernels() -> None:
    """Compile (or load from numba's cache) the age sums and the age rule's kernels now, in
    the layout models pass."""
    kernel = _kernel()
    if kernel is None:
        return
    one = np.zeros(1, np.int64)
    for sums in (kernel.records_sum, kernel.records_sum_emg):
        sums(np.zeros(1), one, np.zeros(1), np.ones((1, 1)), np.zeros(1, bool), np.zeros(1),
             np.zeros(1), np.zeros((1, 1), np.int64), np.ones((1, 1), np.int64))
    grid = np.linspace(0.0, 1.0, 3)[None, None]
    kernel.measure_breaks(grid, np.zeros((1, 1, 3)), np.zeros((1, 1, 3)),
                          np.zeros((1, 1), np.int64), np.ones((1, 1, 1)), np.ones((1, 1)),
                          np.ones((1, 1)), _MEASURE_CONSTANTS)
    x, wx = quad.gauss_legendre_unit(2)
    t, lw, row, col, n_q = kernel.lay_out_nodes(np.ones((1, 1, 1, 2)), np.zeros((1, 1)),
                                                np.ones((1, 1)), np.ones((1, 1), int),
                                                np.zeros((1, 1)), np.ones((1, 1)), x, np.log(wx))
    kernel.finish_rule(lw, np.zeros(len(t)), row, 1)
    from . import steady
    from .agedspin import _check_points

    _, w = quad.gauss_legendre_unit(5)        # the age tables' safety net (agedspin._tame)
    kernel.tame(np.zeros((1, 5)), 5, steady.limits_rules(5)[2], _check_points(5), w)


def _records_at(b, var, ages, g):
    """``records(y, wi)``: sum over body ``g``'s records of ln sum_q w_q p(record | ln B =
    y + ln T(t_q)) at points ``y`` (P,) of walkers ``wi`` (P,)."""
    kernel = _kernel()
    if kernel is not None:
        args = _record_args(b, var, ages, g)
        # C-contiguous arguments throughout: the layout compile_kernels compiled
        return lambda y, wi: kernel.records_sum(np.ascontiguousarray(y, float),
                                                np.ascontiguousarray(wi, np.int64), *args)
    kinds = [rec for rec in (_body_records(b, var, ages, g, key) for key in ("det", "lim"))
             if rec is not None]

    def records(y, wi):
        out = np.zeros(len(y))
        for rec in kinds:
            need = rec["n_q"][wi]
            for q in np.unique(need):
                pts = np.flatnonzero(need == q)
                step = max(1, _CHUNK_ELEMENTS // (rec["lf"].shape[2] * int(q)))
                for c in range(0, len(pts), step):
                    sl = pts[c:c + step]
                    out[sl] += _records_sum(y[sl, None], wi[sl], rec, int(q))[:, 0]
        return out

    return records


def _record_args(b, var, ages, g):
    """Body ``g``'s records, variances and age nodes as the compiled age sums take them
    (``records_sum`` after the points and walkers)."""
    data = np.flatnonzero(b.det[g] | b.lim[g])
    return (b.z[g, data], np.ascontiguousarray(var[:, g, data]), b.lim[g, data],
            ages.flat_lf, ages.flat_lw, np.ascontiguousarray(ages.start[:, g, data]),
            np.ascontiguousarray(ages.count[:, g, data]))


#: Spread of ln T over a body's age nodes, in units of its records' own width, above which the
#: field counts as changing within the age window: the distance rule adds crossing levels at
#: the extremes of ln T (numerical convention).
_PLATEAU_SPREAD = 2.0


def log_factor_range(b, ages):
    """Highest and lowest ln T (W, G) at the age nodes of positive weight of a body's
    records (the spread that decides the plateau levels)."""
    data = (b.det | b.lim)[None]
    lt_hi = np.max(np.where(data, ages.top_log_factor, -np.inf), axis=-1)
    lt_lo = np.min(np.where(data, ages.low_log_factor, np.inf), axis=-1)
    return lt_hi, lt_lo


#: Elements (points x records x age nodes) per chunk of the array age sums: temporaries of
#: ~2 MB stay in the cache (convention, measured in benchmarks/bench_aged.py).
_CHUNK_ELEMENTS = 1 << 18


def _body_records(b, var, ages, g, key):
    """One body's detections or limits: z (M,), variances (W, M) and its age nodes of
    non-zero weight, laid out age-node first: ln T and ln weights (Q, W, M); None if none."""
    idx = np.flatnonzero(b.det[g] if key == "det" else b.lim[g])
    if not len(idx):
        return None
    lw = ages.logw[:, g, idx]                                       # (W, M, Q)
    order = np.argsort(~np.isfinite(lw), axis=-1, kind="stable")
    need = np.maximum(np.isfinite(lw).sum(axis=-1).max(axis=-1), 1)  # per walker (W,)
    order = order[..., :need.max()]
    lf = np.take_along_axis(ages.log_factor[:, g, idx], order, axis=-1)
    lw = np.take_along_axis(lw, order, axis=-1)
    vv = var[:, g, idx]
    return dict(det=key == "det", z=b.z[g, idx], var=vv, n_q=need,
                lf=np.ascontiguousarray(np.moveaxis(lf, -1, 0)),
                lw=np.ascontiguousarray(np.moveaxis(lw, -1, 0)))


def _records_sum(m, wi, rec, n_q):
    """sum over the records of ln p(record | ln B = m + ln T(t)) on the first ``n_q`` age
    nodes (those of positive weight of walkers ``wi``), (P, Q_x).

    Age nodes lead the temporaries, so the sum over them is a reduction over the first axis
    (contiguous slabs) and every step is done in place.
    """
    vv = rec["var"][wi][:, None, :]                                 # (P, 1, M)
    d = (m[..., None] - rec["z"])[None] + rec["lf"][:n_q, wi, None, :]  # (Q, P, Q_x, M)
    lw = rec["lw"][:n_q, wi, None, :]
    if not rec["det"]:
        return _limits_sum(d, vv, lw)
    # summed in linear space (no max pass); the sums below _LINEAR_FLOOR again in logs
    np.multiply(d, d, out=d)
    d *= -0.5 / vv
    np.exp(d, out=d)
    d *= np.exp(lw)
    tot = d.sum(axis=0)
    with np.errstate(divide="ignore"):
        lp = np.log(tot)
    low = tot < _LINEAR_FLOOR
    if np.any(low):
        ip, ix, im = np.nonzero(low)
        dl = (m[ip, ix] - rec["z"][im])[None] + rec["lf"][:n_q, wi[ip], im]   # (Q, L)
        lp[ip, ix, im] = quad.log_sum_exp(dl * dl * (-0.5 / vv[ip, 0, im])
                                          + rec["lw"][:n_q, wi[ip], im], axis=0)
    return (lp - 0.5 * np.log(vv) - LN_SQRT_2PI).sum(axis=-1)


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
