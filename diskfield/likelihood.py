"""The marginalised likelihood and the Model object (DESIGN §4, §7).

Only the global parameters θ (profile, envelope, ``intrinsic_scatter``) are sampled; every
latent leaves the likelihood here:

* Gaussian log terms (measurement, recording fraction, calibration, σ_int) add into one
  variance per record (:mod:`diskfield.recording`);
* the spin projection ``X = -ln u`` in closed form (exponentially modified Gaussian), or, for
  a body with upper limits, numerically over X with nodes in the CDF of the distribution the
  detections put on X;
* ages by quadrature on each record's age prior (skipped for the steady envelope);
* the body distance by composite Gauss–Legendre quadrature on the body's distance prior, with
  breakpoints on the profile's features and graded around the points where the model field
  crosses the body's likelihood level (:mod:`diskfield.quadrature`). A body's records are
  multiplied inside the distance integral: they share one distance.

The per-body marginal log-likelihood is the pointwise unit.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import quadrature as quad
from . import aged, steady, workspace
from ._lkcommon import _detection_stats, _expand, _finite_support, load_kernel
from .aged import _PLATEAU_SPREAD, _age_priors, _age_rule, _integrand_aged, log_factor_range
from .errors import CompilationError, OptionError, PriorFileError, Problem
from .ordering import label_ordering
from .priorspec import Uniform
from .recording import record_terms

__all__ = ["SPIN_MODES", "Model", "build_model", "compile_kernels"]

SPIN_MODES = ("body", "record", "none")

#: The compiled distance rule (:mod:`diskfield._rule_jit`), imported on first use like the
#: limits kernel of :mod:`diskfield.steady`; None: the array code below (numba missing, or
#: tests comparing both).
_rule_compiled = ...


def _rule_kernel():
    global _rule_compiled
    _rule_compiled = load_kernel(_rule_compiled, "_rule_jit")
    return _rule_compiled


#: The one-call steady kernel (:mod:`diskfield._body_jit`); in use when the compiled rule is.
_body_compiled = ...


def _body_kernel():
    global _body_compiled
    if _rule_kernel() is None:
        return None
    _body_compiled = load_kernel(_body_compiled, "_body_jit")
    return _body_compiled


def compile_kernels() -> None:
    """Compile (or load from numba's cache) every compiled kernel of the likelihood now.

    Worker processes forked afterwards inherit the compiled code instead of each compiling
    it (or racing to write numba's cache) on first use. No-op without numba.
    """
    steady.compile_kernels()
    aged.compile_kernels()
    kernel = _rule_kernel()
    if kernel is None:
        return
    # ring count and break are run-time values: one specialisation serves every profile
    one = np.ones(1)
    args = (np.array([[0.0, 1.0, 2.0, 1.0, 0.5, 2.0, 0.3, 0.5, 4.0, 0.3]]), 2, True, 1e-9,
            np.zeros((1, 1)), one[:, None], 0.5 * one, 4.0 * one, np.array([[0.5, 2.0, 4.0]]),
            np.array([0.5, 4.0]), np.linspace(-6, 6, 5), np.zeros(1), np.array([1.0, 3.0]),
            np.array([0.5]), np.zeros(1), 2)
    kernel.steady_nodes(*args)
    # one body of a detection and an upper limit (``_fused_static``'s layouts)
    statics = (np.array([[1.0, 0.5]]), np.full((1, 2), 0.1), np.array([[True, False]]),
               np.array([[False, True]]), np.ones(1, np.int64), np.ones((1, 1), np.int64),
               np.ones(1, np.int64), *args[6:], np.zeros((1, 4)), *steady.limits_rules(5))
    workspace.call(_body_kernel().steady_body_loglike, *args[:4], np.full(1, 0.1), _MIN_VAR,
                   *statics)


#: Floor on a record's total log variance: a limit without stated error and without
#: calibration terms has only σ_int, whose prior reaches 0 (numerical convention).
_MIN_VAR = 1e-10


@dataclass(frozen=True)
class QuadratureSettings:
    """Node counts of the quadrature rules (defaults tested for < 0.01 nat error).

    Attributes
    ----------
    base_panels : int
        Equal panels across each distance prior's support.
    panel_nodes : int
        Gauss–Legendre nodes per panel.
    scout_nodes : int
        Log-spaced points on which level crossings are searched.
    ring_scout : int
        Extra scout points across r0 ± 6 w of each ring.
    max_crossings : int
        Largest number of crossings of one level per body (5 covers two rings).
    age_nodes : int
        Nodes per panel of an age integral.
    spin_panel_nodes : int
        Gauss–Legendre nodes per panel of the body-shared spin integral (steady: bodies
        with upper limits; time-dependent: every body of two or more records).
    grade_factors : tuple of float
        Breakpoints at these multiples of the integrand's width either side of each crossing
        and of the closest approach.
    """

    base_panels: int = 2
    panel_nodes: int = 4
    scout_nodes: int = 48
    ring_scout: int = 33
    max_crossings: int = 5
    age_nodes: int = 6
    grade_factors: tuple = (1.0, 3.0, 9.0)
    spin_panel_nodes: int = 5


@dataclass(frozen=True)
class _Bodies:
    """Records padded to a (n_bodies, n_max) table with masks."""

    z: np.ndarray          # corrected ln values (G, n)
    var_fixed: np.ndarray  # variance without σ_int (G, n)
    det: np.ndarray        # detection mask (G, n)
    lim: np.ndarray        # upper-limit mask (G, n)
    index: np.ndarray      # record index, -1 for padding (G, n)
    lo: np.ndarray         # distance support low (G,) AU
    hi: np.ndarray         # distance support high (G,) AU
    priors: tuple          # distance Prior per body
    needs_x: np.ndarray    # body needs the numerical spin integral (G,) bool
    lone_limit: np.ndarray  # body's only record is an upper limit (G,) bool


class Model:
    """A fitted-model definition: priors, profile, envelope, spin mode and the data.

    Build with :func:`build_model`. Holds no parameter state: every method is a pure function
    of ``theta`` (shape ``(P,)`` or ``(W, P)``, columns in ``parameter_names`` order).
    """

    def __init__(self, comp, profile, envelope, spin, priorset, settings=None):
        self.compilation = comp
        self.profile, self.envelope, self.spin = profile, envelope, spin
        self.priorset = priorset
        self.settings = settings or QuadratureSettings()
        names = profile.parameter_names + envelope.parameter_names + ("intrinsic_scatter",)
        all_priors = _parameter_priors(priorset, names)
        self.fixed = {n: p.value for n, p in zip(names, all_priors) if p.is_fixed}
        self.parameter_names = tuple(n for n in names if n not in self.fixed)
        self.priors = tuple(p for p in all_priors if not p.is_fixed)
        self.ordering = label_ordering(profile, dict(zip(names, all_priors)),
                                       self.parameter_names)
        self._support_bounds = _support_bounds(self.priors)
        self.body_names = comp.body_names
        self.n_records = len(comp.records)
        self.n_bodies = len(comp.bodies)
        self._terms = record_terms(comp.records, priorset.calibration, priorset.remanence)
        self._bodies = _pad_bodies(comp, self._terms, _distance_priors(comp, priorset), spin)
        self._group_priors, self._prior_group = _prior_groups(self._bodies.priors)
        self._ages = _age_priors(comp, priorset) if envelope.time_dependent else None
        self._obliquity = getattr(priorset, "spin_obliquity", None)
        self._rule_static = _rule_static(self._bodies, self.settings)
        self._fused = _fused_static(self._bodies, spin, self._obliquity, self.settings,
                                    self._rule_static)
        self.config = {"profile": profile.name, "envelope": envelope.name, "spin": spin,
                       "prior_files": [str(f) for f in getattr(priorset, "files", ())],
                       "label_ordering": self.ordering.describe()}

    # ------------------------------------------------------------------ parameters
    def _theta(self, theta):
        theta = np.asarray(theta, dtype=float)
        if theta.shape[-1:] != (len(self.parameter_names),) or theta.ndim > 2:
            raise OptionError("theta", f"array of shape {theta.shape}",
                              f"shape (P,) or (W, P) with P = {len(self.parameter_names)} "
                              f"({', '.join(self.parameter_names)})")
        return np.atleast_2d(theta), theta.ndim == 1

    def params(self, theta) -> dict:
        """Parameter name -> array of shape (W,), fixed values included."""
        t2, _ = self._theta(theta)
        out = {n: t2[:, i] for i, n in enumerate(self.parameter_names)}
        out.update({n: np.full(len(t2), v) for n, v in self.fixed.items()})
        return out

    def log_prior(self, theta):
        """Log density of the (normalised) prior; ``-inf`` outside the support.

        The sum of the parameters' log prior densities; under a label ordering
        (``self.ordering``, :mod:`diskfield.ordering`) plus ln k! inside the ordered region
        and ``-inf`` outside it, so that it stays the normalised density of the points
        :meth:`prior_transform` produces.

        Parameters
        ----------
        theta : ndarray, shape (P,) or (W, P)

        Returns
        -------
        ndarray, shape (W,) (or float for 1-d input)
        """
        t2, one = self._theta(theta)
        lp = self._log_prior_product(t2)
        if self.ordering.applied:
            lp = np.where(self.ordering.in_order(t2), lp + self.ordering.log_norm, -np.inf)
        lp[~np.isfinite(lp)] = -np.inf
        return float(lp[0]) if one else lp

    def _log_prior_product(self, t2):
        """Σ of the parameters' own log prior densities at ``t2`` (W, P), no ordering."""
        lp = np.zeros(len(t2))
        for i, prior in enumerate(self.priors):
            lp += prior.log_prob(t2[:, i])
        return lp

    def _in_support(self, t2):
        """Rows of ``t2`` (W, P) inside every parameter's prior support (the likelihood is
        defined there whatever the label order): where the log prior is finite. For the
        families whose density is positive and finite on their whole closed, finite support
        (uniform, log-uniform, truncated normal, half-normal with a top) that is a bounds
        check; the others take their ``log_prob`` (a normal's overflows far out)."""
        lo, hi, exact = self._support_bounds
        ok = np.all((t2 >= lo) & (t2 <= hi), axis=1)
        for i in exact:
            ok &= np.isfinite(self.priors[i].log_prob(t2[:, i]))
        return ok

    def prior_transform(self, u):
        """Map the unit cube to parameter values (nested sampling).

        Under a label ordering the exchangeable groups of ``u`` are first sorted by their key
        (a k!-to-1 fold onto the ordered prior; :mod:`diskfield.ordering`).

        Parameters
        ----------
        u : ndarray, shape (P,) or (W, P), values in [0, 1]
        """
        u = np.asarray(u, dtype=float)
        if self.ordering.applied:
            u = self.ordering.sort(u)
        out = np.empty_like(u)
        for i, prior in enumerate(self.priors):
            out[..., i] = prior.ppf(u[..., i])
        return out

    # ------------------------------------------------------------------ likelihood
    def log_likelihood_pointwise(self, theta):
        """Per-body marginal log-likelihood.

        Parameters
        ----------
        theta : ndarray, shape (P,) or (W, P)

        Returns
        -------
        ndarray, shape (W, n_bodies) (or (n_bodies,) for 1-d input); ``-inf`` rows where
        theta is outside the prior support; never NaN.
        """
        t2, one = self._theta(theta)
        out = np.full((len(t2), self.n_bodies), -np.inf)
        ok = self._in_support(t2)
        if np.any(ok):
            with np.errstate(all="ignore"):
                ll = self._body_loglike(self.params(t2[ok]))
            out[ok] = np.where(np.isnan(ll), -np.inf, ll)
        return out[0] if one else out

    def log_likelihood(self, theta):
        """Total marginal log-likelihood (sum over bodies), shape (W,) or float."""
        ll = self.log_likelihood_pointwise(theta)
        return ll.sum(axis=-1) if ll.ndim == 2 else float(ll.sum())

    def log_field(self, theta, r_au, t_myr=0.0):
        """ln(B / uT) of the disk field (no recording terms).

        Parameters
        ----------
        theta : ndarray, shape (P,) or (W, P)
        r_au : array_like
            Distance [AU].
        t_myr : array_like
            Time after CAI formation [Myr] (broadcast with ``r_au``).

        Returns
        -------
        ndarray, shape (W,) + broadcast(r_au, t_myr).shape
        """
        t2, _ = self._theta(theta)
        r, t = np.broadcast_arrays(np.asarray(r_au, float), np.asarray(t_myr, float))
        p = _expand(self.params(t2), r.ndim)
        shape = (len(t2),) + r.shape
        rr, tt = np.broadcast_to(r, shape), np.broadcast_to(t, shape)
        return self.profile.log_field(rr, p) + self.envelope.log_factor(tt, p)

    def body_distance_posterior(self, theta):
        """Posterior of each body's distance given theta, on the quadrature nodes.

        Returns
        -------
        r_nodes : ndarray, shape (W, n_bodies, K) [AU]
        weights : ndarray, shape (W, n_bodies, K), summing to 1 over K
        """
        t2, _ = self._theta(theta)
        with np.errstate(all="ignore"):
            r, log_terms = self._distance_terms(self.params(t2))
        total = quad.log_sum_exp(log_terms, axis=-1)[..., None]
        w = np.exp(log_terms - total)
        return r, np.where(np.isfinite(w), w, 0.0)

    def simulate_ln_values(self, theta, rng):
        """ln values simulated through the full recording model, shape (W, n_records)."""
        from .simulate import simulate_ln_values

        return simulate_ln_values(self, theta, rng)

    # ------------------------------------------------------------------ internals
    def _body_loglike(self, p):
        if self.envelope.time_dependent:
            return quad.log_sum_exp(self._distance_terms(p)[1], axis=-1)
        fused = self._fused_loglike(p)
        if fused is not None:
            return fused
        _, terms, wi, gi, _ = self._steady_terms(p)
        return self._node_sums(terms, wi, gi, len(p["intrinsic_scatter"]))

    def _node_sums(self, terms, wi, gi, n_walkers, out=None):
        """ln sum exp of the flat node terms per (walker, body), (W, G); with ``out``, only
        the (walker, body) pairs that have nodes are written into it."""
        row = wi * self.n_bodies + gi
        start = np.flatnonzero(np.r_[True, row[1:] != row[:-1]])
        # every (walker, body) has nodes: the base panels across its support have width > 0
        top = np.maximum.reduceat(terms, start)
        top = np.where(np.isfinite(top), top, 0.0)
        with np.errstate(divide="ignore"):
            total = np.log(np.add.reduceat(np.exp(terms - np.repeat(top, np.diff(
                np.r_[start, len(row)]))), start)) + top
        if out is None:
            return total.reshape(n_walkers, self.n_bodies)
        out.ravel()[row[start]] = total
        return out

    def _fused_loglike(self, p):
        """Steady envelope: the whole per-body log-likelihood (W, G) in one compiled call
        (:func:`diskfield._body_jit.steady_body_loglike`): variances, the detections'
        Gaussian, the distance rule with the closed-form bodies integrated in its pass (with
        spin "none" or "record", every body), the bodies with upper limits on the nodes it
        returns (body-shared spin), the sums. The same rule, integrands and sums as
        :meth:`_steady_terms` (tested equal to ~1e-12). None when it does not apply (no
        power-law form, numba missing, an obliquity prior with a spin, a distance prior of
        another form)."""
        if self._fused is None or self.profile.power_law_form is None or _body_kernel() is None:
            return None
        from .profiles.ring import MIN_RING_FACTOR

        rows = _form_rows(self.profile.power_law_form(p), len(p["intrinsic_scatter"]))
        if rows is None:
            return None
        sigma = np.ascontiguousarray(p["intrinsic_scatter"], dtype=float)
        return workspace.call(_body_kernel().steady_body_loglike, *rows, MIN_RING_FACTOR,
                              sigma, _MIN_VAR, *self._fused)

    def _setup(self, p):
        """Variances (W, G, n), detection statistics, age rule and distance breakpoints."""
        var, stats, ages, level, scale = self._levels(p)
        extra = _plateau_levels(self._bodies, var, stats, ages) if ages is not None else ()
        return var, stats, ages, self._distance_rule(p, level, scale, extra)

    def _levels(self, p):
        """Variances (W, G, n), detection statistics, age rule, and each body's ln-field level
        and its scale (W, G): what both distance rules (array and compiled) start from."""
        b = self._bodies
        var = np.maximum(b.var_fixed + p["intrinsic_scatter"][:, None, None] ** 2, _MIN_VAR)
        stats = _detection_stats(b.z, var, b.det)
        ages = _age_rule(self._ages, self.envelope, p, self.settings, var) if self._ages else None
        return (var, stats, ages) + self._level(b, var, stats, ages)

    def _distance_terms(self, p):
        """Distance nodes (W, G, K) and ln(weight x prior x integrand) at them (dense: the
        zero-width panels' nodes are kept, with ln term -inf)."""
        b = self._bodies
        if not self.envelope.time_dependent:
            r, logw = quad.panel_rule(self._setup(p)[3], self.settings.panel_nodes)
            out = np.full(r.shape, -np.inf)
            out[np.isfinite(logw)] = self._steady_terms(p, compiled=False)[1]
            return r, out
        var, stats, ages, breaks = self._setup(p)
        r, logw = quad.panel_rule(breaks, self.settings.panel_nodes)
        phi = self.profile.log_field(r, _expand(p, 2))
        log_f = self._log_integrand(phi, b, var, stats, ages, p)
        gi = np.broadcast_to(np.arange(self.n_bodies)[:, None], r.shape)
        return r, logw + self._log_distance_prior(r, gi) + log_f

    def _steady_terms(self, p, compiled=True):
        """Steady envelope: the distance rule's nodes of positive weight only, flat.

        Zero-width panels (unused crossing slots, breaks clipped to a support, ring breaks
        outside a body's support: over half the panels of a ring) carry no weight and are not
        evaluated. Nodes are ordered by walker, body, panel, node (the dense rule's order).

        With ``compiled`` and a profile that declares its power-law form, the rule and ln R
        at the nodes come from the compiled kernel (:mod:`diskfield._rule_jit`: the same rule;
        the per-body values agree with the array code to ~1e-9 nat); ``keep`` is then None.

        Returns
        -------
        r, terms : ndarray, shape (N,)
            Nodes [AU] and ln(weight x prior x integrand).
        wi, gi : ndarray of int, shape (N,)
            Walker and body of each node.
        keep : ndarray of bool, shape (W, G, B - 1)
            Panels of positive width.
        """
        b = self._bodies
        nodes = self._compiled_nodes(p) if compiled else None
        if nodes is not None:
            var, stats, r, logw, phi, wi, gi = nodes
            keep = None
        else:
            var, stats, r, logw, phi, wi, gi, keep = self._array_nodes(p)
        terms = (logw + self._log_distance_prior(r, gi)
                 + self._log_integrand(phi, b, var, stats, None, p, at=(wi, gi)))
        return r, terms, wi, gi, keep

    def _array_nodes(self, p):
        """The steady rule's nodes in array code (any profile)."""
        n = self.settings.panel_nodes
        var, stats, _, breaks = self._setup(p)
        h = np.diff(breaks, axis=-1)
        keep = h > 0
        wi, gi, _ = np.nonzero(keep)
        x, w = quad.gauss_legendre_unit(n)
        hk = h[keep][:, None]
        r = (breaks[..., :-1][keep][:, None] + hk * x).ravel()
        logw = (np.log(hk) + np.log(w)).ravel()
        wi, gi = np.repeat(wi, n), np.repeat(gi, n)
        return var, stats, r, logw, self._log_field_at(p, r, wi), wi, gi, keep

    def _compiled_nodes(self, p):
        """The steady rule's nodes through the compiled kernel: the same rule as
        :meth:`_distance_rule` and :meth:`_array_nodes`. None when the profile declares no
        power-law form (or one the kernel does not take) or numba is not available."""
        inputs = self._rule_inputs(p)
        if inputs is None:
            return None
        var, stats, args = inputs
        return (var, stats) + _rule_kernel().steady_nodes(*args)

    def _rule_inputs(self, p):
        """Variances, detection statistics and the compiled steady rule's arguments for this
        call; None when the rule does not apply (no power-law form or one the kernel does not
        take, or numba not available)."""
        from .profiles.ring import MIN_RING_FACTOR

        if self.profile.power_law_form is None or _rule_kernel() is None:
            return None
        rows = _form_rows(self.profile.power_law_form(p), len(p["intrinsic_scatter"]))
        if rows is None:
            return None
        coef, n_rings, has_break = rows
        var, stats, _, level, scale = self._levels(p)   # steady: no age rule
        return var, stats, (coef, n_rings, has_break, MIN_RING_FACTOR,
                            np.ascontiguousarray(level), np.ascontiguousarray(scale),
                            *self._rule_static, self.settings.max_crossings)

    def _log_field_at(self, p, r, wi):
        """ln R at flat distances ``r`` (N,) of walkers ``wi`` (N,).

        The profile is called on an (N, 1) array with every parameter gathered to (N, 1):
        each node is a walker of its own under the plug-in contract (leading walker axis),
        so no padding is evaluated (packing walkers' nodes into rows wasted ~35 %: their
        node counts differ).
        """
        return self.profile.log_field(r[:, None], {k: v[wi][:, None] for k, v in p.items()}
                                      )[:, 0]

    def _log_distance_prior(self, r, gi):
        """ln prior density of each body's distance at ``r`` (any shape; ``gi`` its bodies).

        Bodies sharing one prior (a reservoir's) are evaluated in one call.
        """
        out = np.empty_like(r)
        group = self._prior_group[gi]
        for k, prior in enumerate(self._group_priors):
            sel = group == k
            out[sel] = prior.log_prob(r[sel])
        return out

    def _level(self, b, var, stats, ages):
        """ln-field level and its scale (W, G) around which each body's integrand is sharp."""
        zbar, v, _ = stats
        z = np.where(b.det | b.lim, b.z, np.nan)
        if ages is not None:
            zbar, v, _ = _detection_stats(b.z - ages.mean_log_factor, var + ages.var_log_factor,
                                          b.det)
            z = z - ages.mean_log_factor   # ln R level of each record at its mean ln T
        if self.spin == "record":
            # with ages, a record's ln R spreads by its age's Var ln T as well (as above)
            v_rec = var if ages is None else var + ages.var_log_factor
            zmax = np.nanmax(np.where(b.det, z, -np.inf), axis=-1)
            zbar = np.where(np.isfinite(zmax), zmax, zbar)
            v = np.where(np.isfinite(zmax), np.min(np.where(b.det, v_rec, np.inf), axis=-1), v)
        no_det = ~np.isfinite(v)
        zlim = np.nanmin(np.where(b.lim, z, np.inf), axis=-1)
        vlim = np.min(np.where(b.lim, var, np.inf), axis=-1)
        level = np.where(no_det, zlim, zbar)
        if self._obliquity is not None and self.spin != "none" and ages is None:
            from .obliquity import level_offset

            level = level + level_offset(self._obliquity)
        scale = np.sqrt(np.where(no_det, vlim, v))
        return level, np.where(np.isfinite(scale), scale, 1.0)

    def _distance_rule(self, p, level, scale, extra=()):
        """Sorted breakpoints (W, G, B) [AU] of the composite Gauss–Legendre distance rule.

        ``extra``: further (level, scale) pairs (W, G) whose crossings get graded breaks too
        (the plateaus of a time-dependent field, :func:`_plateau_levels`)."""
        s, b = self.settings, self._bodies
        w = len(level)
        lo = np.broadcast_to(b.lo, level.shape)
        hi = np.broadcast_to(b.hi, level.shape)
        base = _base_breaks(b, s)
        features = _feature_breaks(p, self.profile)
        scout = _scout_grid(b, features, p, s)
        phi_s = self.profile.log_field(scout, _expand(p, 1))

        def slots(lev, sc):
            return _crossing_slots(self.profile, p, scout, phi_s, lev, sc, b, s.max_crossings)

        def graded(cr, wd):  # unused slots (NaN) put all their breaks at lo: empty panels
            return quad.graded_breaks(np.where(np.isnan(cr), lo[..., None], cr), wd,
                                      lo[..., None], hi[..., None],
                                      s.grade_factors).reshape(w, len(b.lo), -1)

        cross, width, found = slots(level, scale)
        # the closest approach of ln R to the level is a crossing when there is one; without
        # one it is where the integrand peaks (a Gaussian tail): it takes the first slot
        edge, edge_width = _approach_point(self.profile, p, scout, phi_s, level, scale, b)
        cross[..., 0] = np.where(found[..., 0], cross[..., 0], edge)
        width[..., 0] = np.where(found[..., 0], width[..., 0], edge_width)
        parts = [np.broadcast_to(base, (w,) + base.shape), graded(cross, width),
                 _edge_breaks(self.profile, p, level, scale, b, s.grade_factors)]
        parts += [graded(*slots(lev_k, sc_k)[:2]) for lev_k, sc_k in extra]
        if features is not None:
            parts.append(np.clip(features[:, None, :], lo[..., None], hi[..., None]))
        return np.sort(np.concatenate(parts, axis=-1), axis=-1)

    def _log_integrand(self, phi, b, var, stats, ages, p, at=None):
        """ln p(records of body | ln R = phi): the one place where the integrand is chosen.

        Time-dependent envelopes: ``phi`` has shape (W, G, K) (dense nodes). Steady envelope:
        ``phi`` has shape (N,) and ``at = (wi, gi)`` gives each node's walker and body.
        """
        if self._obliquity is not None and self.spin != "none" and ages is None:
            from .obliquity import log_integrand_obliquity

            return log_integrand_obliquity(phi, b, var, stats, self.spin, self._obliquity, at)
        if ages is not None:
            return _integrand_aged(phi, b, var, ages, self.spin, self.settings)
        wi, gi = at
        if self.spin == "none":
            return steady.no_spin(phi, wi, gi, b, var, stats)
        if self.spin == "record":
            return steady.record_spin(phi, wi, gi, b, var)
        if not np.any(b.needs_x | b.lone_limit):
            return steady.body_spin(phi, wi, gi, stats)
        out = np.empty_like(phi)
        nx, lone = b.needs_x[gi], b.lone_limit[gi]
        closed = ~(nx | lone)
        out[closed] = steady.body_spin(phi[closed], wi[closed], gi[closed], stats)
        if np.any(lone):
            # one record: the shared projection is that record's own (EMG survival function)
            out[lone] = steady.record_spin(phi[lone], wi[lone], gi[lone], b, var)
        if np.any(nx):
            out[nx] = steady.body_spin_with_limits(phi[nx], wi[nx], gi[nx],
                                                   np.flatnonzero(b.needs_x), b, var, stats,
                                                   self.settings.spin_panel_nodes)
        return out


# ---------------------------------------------------------------------- setup helpers
def _parameter_priors(priorset, names):
    if hasattr(priorset, "parameter_priors"):
        return priorset.parameter_priors(names)
    missing = [n for n in names if n not in priorset.parameters]
    if missing:
        raise PriorFileError(f"no prior for parameter(s) {', '.join(missing)}; add "
                             "[parameters.<name>] tables to a prior file")
    return tuple(priorset.parameters[n] for n in names)




def _support_bounds(priors):
    """Lower and upper support bounds (P,) of the parameter priors, and the indices of those
    whose finite log density is not implied by lying inside them (see
    ``Model._in_support``)."""
    from .priorspec import HalfNormal, LogUniform, TruncatedNormal

    bounded = (Uniform, LogUniform, TruncatedNormal, HalfNormal)
    sup = np.array([p.support for p in priors], dtype=float).reshape(len(priors), 2)
    exact = [i for i, p in enumerate(priors)
             if type(p) not in bounded or not np.all(np.isfinite(sup[i]))]
    return sup[:, 0], sup[:, 1], tuple(exact)


def _distance_priors(comp, priorset):
    """Distance prior of each body (override -> uniform; else its reservoir's)."""
    out = []
    for body in comp.bodies:
        if np.isfinite(body.distance_min) and np.isfinite(body.distance_max):
            out.append(Uniform(body.distance_min, body.distance_max, unit="AU",
                               source="per-body override"))
            continue
        if body.reservoir not in priorset.reservoirs:
            raise CompilationError(
                f"body {body.name!r}: reservoir {body.reservoir!r} has no distance prior in the "
                f"prior files; defined: {', '.join(sorted(priorset.reservoirs)) or 'none'}",
                source=comp.source)
        prior = priorset.reservoirs[body.reservoir]
        lo, _ = _finite_support(prior, f"[reservoirs.{body.reservoir}] (body {body.name!r})")
        if lo <= 0:
            raise PriorFileError(f"[reservoirs.{body.reservoir}]: distance support must be > 0 AU;"
                                 f" got {prior.describe()}")
        out.append(prior)
    return tuple(out)


def _prior_groups(priors):
    """Distinct distance priors and each body's index into them."""
    distinct, group = [], []
    for prior in priors:
        k = next((i for i, d in enumerate(distinct) if d is prior or d == prior), None)
        if k is None:
            distinct.append(prior)
            k = len(distinct) - 1
        group.append(k)
    return tuple(distinct), np.array(group, int)


def _pad_bodies(comp, terms, priors, spin):
    recs = comp.records
    n_max = max(len(b.record_indices) for b in comp.bodies)
    g = len(comp.bodies)
    index = np.full((g, n_max), -1)
    for k, body in enumerate(comp.bodies):
        index[k, :len(body.record_indices)] = body.record_indices
    valid = index >= 0
    safe = np.where(valid, index, 0)
    is_lim = np.asarray(recs.is_limit, bool)[safe] & valid
    det = valid & ~is_lim
    n_lim = is_lim.sum(axis=1)
    needs_x = (n_lim > 1) | ((n_lim == 1) & det.any(axis=1))
    support = np.array([p.support for p in priors], float)
    return _Bodies(z=np.where(valid, terms.z[safe], 0.0),
                   var_fixed=np.where(valid, terms.var_fixed[safe], 1.0),
                   det=det, lim=is_lim, index=index, lo=support[:, 0], hi=support[:, 1],
                   priors=priors, needs_x=needs_x & (spin == "body"),
                   lone_limit=(n_lim == 1) & ~det.any(axis=1) & (spin == "body"))




# ---------------------------------------------------------------------- node placement
def _plateau_levels(b, var, stats, ages):
    """Crossing levels (W, G) of the highest and lowest ln T a body's records meet.

    A field that dissipates within an age window has (nearly) two plateaus of ln T, and a
    precise record then gives the distance integrand two sharp features, where ln R meets the
    record's level at each plateau; the level at the mean ln T with the width inflated by
    Var ln T lies between them (seen: 0.03 nat off on a one-record body). These levels carry
    the records' own width. Bodies whose ln T spreads by less than
    :data:`diskfield.aged._PLATEAU_SPREAD` widths get no extra level (NaN: no crossing).
    """
    zbar, v, _ = stats
    no_det = ~np.isfinite(v)
    z = np.where(no_det, np.nanmin(np.where(b.lim, b.z, np.inf), axis=-1), zbar)
    width = np.sqrt(np.where(no_det, np.min(np.where(b.lim, var, np.inf), axis=-1), v))
    lt_hi, lt_lo = log_factor_range(b, ages)
    wide = (lt_hi - lt_lo) > _PLATEAU_SPREAD * width
    return tuple((np.where(wide, z - lt, np.nan), width) for lt in (lt_hi, lt_lo))
#: Breakpoints across a ring, in ring widths either side of its centre (numerical convention).
_FEATURE_OFFSETS = np.array([-6.0, -3.0, -1.5, 0.0, 1.5, 3.0, 6.0])


def _form_rows(form, n_walkers):
    """Pack a :class:`~diskfield.profiles.base.PowerLawForm` into the kernel's (W, 10) rows
    (None for a form the kernel does not take: more than two rings, a half-declared break;
    :func:`diskfield.testing.check_profile` reports those)."""
    rings = tuple(form.rings)
    if len(rings) > 2 or (form.break_radius is None) != (form.index_outer is None):
        return None
    has_break = form.break_radius is not None
    coef = np.zeros((n_walkers, 10))
    coef[:, 0], coef[:, 1] = form.log_norm, form.index
    if has_break:
        coef[:, 2], coef[:, 3] = form.break_radius, form.index_outer
    for k, ring in enumerate(rings):
        coef[:, 4 + 3 * k:7 + 3 * k] = np.column_stack(ring)
    return coef, len(rings), has_break


def _fused_static(b, spin, obliquity, settings, rule_static):
    """The one-call steady kernel's fixed inputs (``_body_jit.steady_body_loglike`` after
    ``min_var``), or None when it does not apply (an obliquity prior, a distance prior
    without the closed form of :func:`_prior_form`).

    Each body's kind (body-shared spin: detections only, closed form in the rule's pass;
    upper limits with the shared spin integral; a lone upper limit. Spin "none" or
    "record": every body in the rule's pass, with that mode's integrand) and its limit
    columns first, in record order, padded to the most limits of a body that needs the spin
    integral (the limits kernel's breaks depend on that width: the same as
    ``steady._subset``)."""
    if obliquity is not None and spin != "none":    # without spin the obliquity plays no part
        return None
    rows = [_prior_form(prior) for prior in b.priors]
    if any(row is None for row in rows):
        return None
    from ._body_jit import CLOSED, LIMITS, LONE_LIMIT, NO_SPIN, PER_RECORD

    kind = np.where(b.needs_x, LIMITS, np.where(b.lone_limit, LONE_LIMIT, CLOSED))
    if spin != "body":
        kind = np.full(len(kind), NO_SPIN if spin == "none" else PER_RECORD)
    n_lim = b.lim.sum(axis=1)
    width = max(int(n_lim[b.needs_x].max()) if b.needs_x.any() else 1, 1)
    order = np.argsort(~b.lim, axis=1, kind="stable")[:, :width]
    ints = (lambda a: np.ascontiguousarray(a, dtype=np.int64))
    return (np.ascontiguousarray(b.z, dtype=float), np.ascontiguousarray(b.var_fixed, float),
            np.ascontiguousarray(b.det), np.ascontiguousarray(b.lim), ints(kind), ints(order),
            ints(n_lim), *rule_static, settings.max_crossings,
            np.array(rows, dtype=float, order="C"),
            *steady.limits_rules(settings.spin_panel_nodes))


def _prior_form(prior):
    """[c, k, mu, s] with ln p(r) = c - k ln r - (r - mu)^2 s^2 / 2 inside the support, for
    the distance-prior families that have it (uniform, log-uniform, truncated normal);
    checked against ``prior.log_prob`` at points across the support (None on a mismatch or
    another family)."""
    from .priorspec import LogUniform, TruncatedNormal

    if isinstance(prior, Uniform):
        row = [-np.log(prior.high - prior.low), 0.0, 0.0, 0.0]
    elif isinstance(prior, LogUniform):
        row = [-np.log(np.log(prior.high / prior.low)), 1.0, 0.0, 0.0]
    elif isinstance(prior, TruncatedNormal):
        row = [-np.log(prior.sd) - 0.5 * np.log(2.0 * np.pi) - prior._lognorm, 0.0,
               prior.mean, 1.0 / prior.sd]
    else:
        return None
    lo, hi = prior.support
    x = lo + (hi - lo) * np.linspace(0.01, 0.99, 7)
    c, k, mu, sc = row
    form = c - k * np.log(x) - 0.5 * ((x - mu) * sc) ** 2
    return row if np.allclose(form, prior.log_prob(x), rtol=1e-12, atol=1e-12) else None


def _rule_static(b, s):
    """The compiled rule's fixed inputs (lo, hi, base breaks, fixed scout, ring scout and
    feature offsets, grade factors, Gauss–Legendre nodes and ln weights), each a writable
    C-contiguous float array: numba compiles one specialisation per array layout, and
    :func:`compile_kernels` compiles this one."""
    x, w = quad.gauss_legendre_unit(s.panel_nodes)
    parts = (b.lo, b.hi, _base_breaks(b, s), _fixed_scout(b, s), np.linspace(-6.0, 6.0, s.ring_scout),
             _FEATURE_OFFSETS, s.grade_factors, x, np.log(w))
    return tuple(np.array(a, dtype=float, order="C") for a in parts)


def _base_breaks(b, s):
    """Breaks of ``s.base_panels`` equal panels across each body's support (G, P + 1) [AU]."""
    return b.lo[:, None] + (b.hi - b.lo)[:, None] * np.linspace(0, 1, s.base_panels + 1)


def _fixed_scout(b, s):
    """Scout points shared by every walker: log-spaced over all supports, every support end."""
    # every distinct support end once: bodies of one reservoir share theirs, so the grid
    # (and the (W, G, N) crossing search on it) does not grow with the number of bodies
    return np.unique(np.concatenate([np.geomspace(b.lo.min(), b.hi.max(), s.scout_nodes),
                                     b.lo, b.hi]))


def _feature_breaks(p, profile):
    """Breakpoints on the profile's own features (rings: r0 + w x offsets; breaks), (W, F)."""
    names = set(profile.parameter_names)
    offsets = _FEATURE_OFFSETS
    cols = []
    for prefix in ("ring", "ring2"):
        if f"{prefix}_radius" in names and f"{prefix}_width" in names:
            cols.append(p[f"{prefix}_radius"][:, None] + p[f"{prefix}_width"][:, None] * offsets)
    if "break_radius" in names:
        cols.append(p["break_radius"][:, None])
    return np.concatenate(cols, axis=1) if cols else None


def _scout_grid(b, features, p, s):
    """Increasing scout abscissae (W, N): log-spaced over all supports, plus feature points."""
    lo, hi = b.lo.min(), b.hi.max()
    fixed = _fixed_scout(b, s)
    pts = [np.broadcast_to(fixed, (len(p["intrinsic_scatter"]), len(fixed)))]
    for prefix in ("ring", "ring2"):
        if f"{prefix}_radius" in p:
            u = np.linspace(-6.0, 6.0, s.ring_scout)
            pts.append(p[f"{prefix}_radius"][:, None] + p[f"{prefix}_width"][:, None] * u)
    if features is not None and "break_radius" in p:
        pts.append(p["break_radius"][:, None])
    grid = np.clip(np.concatenate(pts, axis=1), lo, hi)
    return np.sort(grid, axis=1)


def _crossing_slots(profile, p, scout, phi_s, level, scale, b, max_count):
    """Crossings of ``level`` (W, G, M; NaN in unused slots), the widths of their graded
    breaks (``scale`` over ln R's slope; 0 in an unused slot, so its breaks all sit at lo),
    and the found mask."""
    cross, slope, found = _crossings(profile, p, scout, phi_s, level, b, max_count)
    width = np.where(found, scale[..., None] / np.maximum(np.abs(slope), 1e-12), 0.0)
    return cross, width, found


def _crossings(profile, p, scout, phi_s, level, b, max_count):
    """Points (W, G, M) where ln R crosses each body's level, ln R's slope there, and a mask."""
    w, g = level.shape
    x = np.broadcast_to(scout[:, None, :], (w, g, scout.shape[1]))
    f = phi_s[:, None, :] - level[..., None]
    mid = 0.5 * (x[..., 1:] + x[..., :-1])
    valid = (mid > b.lo[:, None]) & (mid < b.hi[:, None])
    lo, hi, f_lo, f_hi, found = quad.first_crossings(x, f, valid, max_count)
    if lo.shape[-1] == 0:
        return np.full((w, g, 1), np.nan), np.ones((w, g, 1)), np.zeros((w, g, 1), bool)
    pe = _expand(p, 2)
    root = quad.refine_crossings(lambda r: profile.log_field(r, pe) - level[..., None],
                                 lo, hi, f_lo, f_hi)
    slope = (f_hi - f_lo) / np.maximum(hi - lo, 1e-300)
    return np.where(found, root, np.nan), np.where(found, slope, 1.0), found


def _tail_width(profile, p, centre, level, scale):
    """Width [AU] of a body's integrand at ``centre`` (W, G): ~ min(s / |ln R'|, 1 / |g'|,
    1 / sqrt|g''|) with g = (ln R - c)^2 / 2 s^2, from central differences of ln R."""
    h = 1e-4 * np.maximum(scale, 1e-3) * np.maximum(centre, 0.1)
    pts = np.stack([centre - h, centre, centre + h], axis=-1)
    ph = profile.log_field(pts, _expand(p, 2))
    d1 = (ph[..., 2] - ph[..., 0]) / (2 * h)
    d2 = (ph[..., 2] - 2 * ph[..., 1] + ph[..., 0]) / (h * h)
    off = ph[..., 1] - level
    v = scale * scale
    g1, g2 = np.abs(off * d1) / v, np.abs(d1 * d1 + off * d2) / v
    return np.minimum(scale / np.maximum(np.abs(d1), 1e-12),
                      np.minimum(1.0 / np.maximum(g1, 1e-12), 1.0 / np.sqrt(np.maximum(g2, 1e-24))))


def _edge_breaks(profile, p, level, scale, b, factors):
    """One-sided graded breakpoints at the support end whose ln R is nearest the level (W, G, F).

    A crossing at (or just beyond) a support end is invisible to the scout's sign changes;
    the integrand then has a step or a Gaussian tail at that end.
    """
    ends = np.broadcast_to(np.stack([b.lo, b.hi], axis=-1), level.shape + (2,))
    phi = profile.log_field(ends, _expand(p, 2))
    use_lo = np.abs(phi[..., 0] - level) <= np.abs(phi[..., 1] - level)
    edge = np.where(use_lo, b.lo, b.hi)
    inward = np.where(use_lo, 1.0, -1.0)
    width = _tail_width(profile, p, np.clip(edge + 1e-9 * inward, b.lo, b.hi), level, scale)
    pts = edge[..., None] + (inward * width)[..., None] * np.asarray(factors)
    return np.clip(pts, b.lo[:, None], b.hi[:, None])


def _approach_point(profile, p, scout, phi_s, level, scale, b):
    """Where ln R comes closest to each body's level, and the integrand's width there (W, G).

    When the field never reaches a body's level the integrand is a Gaussian tail
    exp(-(ln R - c)^2 / 2 s^2) peaked at the closest approach (a support end or an extremum
    of ln R, e.g. a ring top); with g = (ln R - c)^2 / 2 s^2 its width is
    ~ min(s / |ln R'|, 1 / |g'|, 1 / sqrt|g''|).
    """
    w, g = level.shape
    x = scout[:, None, :]
    dist = np.where((x >= b.lo[:, None]) & (x <= b.hi[:, None]),
                    np.abs(phi_s[:, None, :] - level[..., None]), np.inf)
    k = np.argmin(dist, axis=-1)
    km, kp = np.maximum(k - 1, 0), np.minimum(k + 1, scout.shape[1] - 1)
    rows = np.arange(w)[:, None]
    r0, rm, rp = scout[rows, k], scout[rows, km], scout[rows, kp]
    f0, fm, fp = phi_s[rows, k], phi_s[rows, km], phi_s[rows, kp]
    # vertex of the parabola through the three scout points (an extremum between them)
    num = (r0 - rm) ** 2 * (f0 - fp) - (r0 - rp) ** 2 * (f0 - fm)
    den = (r0 - rm) * (f0 - fp) - (r0 - rp) * (f0 - fm)
    vertex = r0 - 0.5 * num / np.where(np.abs(den) > 0, den, np.inf)
    centre = np.clip(vertex, np.maximum(rm, b.lo), np.minimum(rp, b.hi))
    width = _tail_width(profile, p, centre, level, scale)
    return centre, width


# ---------------------------------------------------------------------- factory
def build_model(comp, profile: str = "ring", envelope: str = "steady", spin: str = "body",
                priors=None, settings: QuadratureSettings | None = None) -> Model:
    """Build the marginalised model of a compilation.

    Parameters
    ----------
    comp : diskfield.records.Compilation
        The validated compilation.
    profile : str
        Radial profile name (``diskfield profiles`` lists them).
    envelope : str
        Temporal envelope name (default ``steady``).
    spin : {"body", "record", "none"}
        Spin-projection mode (default ``body``: one projection per parent body).
    priors : PriorSet, path, list of paths, or None
        A loaded :class:`~diskfield.priorset.PriorSet`, prior file path(s) (read on top of the
        shipped defaults by :func:`~diskfield.priorset.load_priors`), or None for the shipped
        files.
    settings : QuadratureSettings, optional
        Node counts (defaults are tested for < 0.01 nat quadrature error).

    Returns
    -------
    Model

    Raises
    ------
    OptionError
        Unknown profile, envelope or spin mode (the message lists the valid names).
    PriorFileError, CompilationError
        Missing priors, priors without finite support, or bodies whose reservoir has no
        distance prior (naming the body and the reservoir).
    """
    from .profiles import get_envelope, get_profile

    if spin not in SPIN_MODES:
        raise OptionError("spin", spin, "one of " + ", ".join(SPIN_MODES))
    prof, env = get_profile(profile), get_envelope(envelope)
    if not hasattr(priors, "parameters"):
        from .priorset import load_priors

        priors = load_priors(priors)
    if len(comp.records) == 0 or len(comp.bodies) == 0:
        raise CompilationError("the compilation has no included records to fit",
                               source=comp.source)
    _refuse_obliquity_prior(priors, spin, env)
    return Model(comp, prof, env, spin, priors, settings)


def _refuse_obliquity_prior(priors, spin: str, envelope=None) -> None:
    """A user obliquity prior is marginalised for the steady envelope (:mod:`diskfield.obliquity`);
    with a time-dependent envelope it is refused clearly, never ignored.
    """
    if getattr(priors, "spin_obliquity", None) is None or spin == "none":
        return
    if envelope is None or not envelope.time_dependent:
        return
    origin = getattr(priors, "origins", {}).get("spin.obliquity", "a prior file")
    raise PriorFileError(
        [Problem(str(origin), "a user prior on the spin obliquity is supported with the steady "
                 f"envelope only (got --envelope {envelope.name}); remove the table to use "
                 "isotropic axes, fit with --envelope steady, or fit with --spin none",
                 column="spin.obliquity")])
