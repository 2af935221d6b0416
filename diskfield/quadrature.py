"""Quadrature building blocks: Gauss rules, composite panels, level crossings, log-sums.

Everything is vectorised over leading axes (walkers, bodies): a rule is a pair of arrays
``(nodes, log_weights)`` of shape ``(..., K)``, so an integral is
``log_sum_exp(log_f(nodes) + log_weights, axis=-1)``.

The distance integral of a body has two kinds of sharp feature: the likelihood's own peak or
step (width ~ sqrt(V) in ln B, narrow in r for a body with many precise records) and the
profile's features (rings, breaks). Composite Gauss–Legendre panels whose breakpoints sit on
both — graded geometrically around every point where ln B crosses the likelihood's level —
keep the error below 0.01 in log-likelihood (tested against adaptive integration).
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np

__all__ = [
    "gauss_legendre_unit",
    "gauss_hermite_normal",
    "panel_rule",
    "log_sum_exp",
    "first_crossings",
    "refine_crossings",
    "graded_breaks",
    "monomial_interpolation",
]


@lru_cache(maxsize=64)
def gauss_legendre_unit(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss–Legendre nodes and weights on [0, 1] (weights sum to 1).

    Parameters
    ----------
    n : int
        Number of nodes (exact for polynomials of degree < 2n).
    """
    x, w = np.polynomial.legendre.leggauss(int(n))
    x, w = 0.5 * (x + 1.0), 0.5 * w
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


@lru_cache(maxsize=64)
def gauss_hermite_normal(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes and weights for expectations over a standard normal (weights sum to 1).

    ``E[f(Z)] ~ sum_k w_k f(x_k)``, Z ~ N(0, 1), from ``numpy.polynomial.hermite_e``.
    """
    x, w = np.polynomial.hermite_e.hermegauss(int(n))
    w = w / w.sum()
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


def panel_rule(breaks: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Composite Gauss–Legendre rule on sorted breakpoints.

    Parameters
    ----------
    breaks : ndarray, shape (..., B)
        Non-decreasing breakpoints (any unit); zero-width panels get zero weight.
    n : int
        Nodes per panel.

    Returns
    -------
    nodes : ndarray, shape (..., (B - 1) n)
    log_weights : ndarray, same shape
        ln of the weights (``-inf`` for zero-width panels), in the unit of ``breaks``.
    """
    x, w = gauss_legendre_unit(n)
    a = breaks[..., :-1, None]
    h = breaks[..., 1:, None] - a
    nodes = (a + h * x).reshape(breaks.shape[:-1] + (-1,))
    with np.errstate(divide="ignore"):
        logw = (np.log(h) + np.log(w)).reshape(nodes.shape)
    return nodes, logw


def log_sum_exp(a: np.ndarray, axis: int = -1) -> np.ndarray:
    """ln sum exp(a) along ``axis``; ``-inf`` (no warning) when every term is ``-inf``.

    A max-shifted sum: ~3x faster than ``scipy.special.logsumexp`` on small arrays
    (LIBRARIES.md, numerics).
    """
    m = np.max(a, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        out = np.log(np.sum(np.exp(a - m), axis=axis)) + np.squeeze(m, axis=axis)
    return out


def first_crossings(x: np.ndarray, f: np.ndarray, valid: np.ndarray, max_count: int):
    """Brackets of the first sign changes of ``f`` along the last axis.

    Parameters
    ----------
    x : ndarray, shape (..., N)
        Increasing abscissae.
    f : ndarray, shape (..., N)
        Function values (a crossing is a sign change of f between neighbours).
    valid : ndarray of bool, shape (..., N - 1)
        Which intervals may hold a crossing.
    max_count : int
        Largest number of crossings returned.

    Returns
    -------
    lo, hi, f_lo, f_hi : ndarray, shape (..., M)
        Bracketing abscissae and values of each crossing (M = number found, <= max_count).
    found : ndarray of bool, shape (..., M)
    """
    change = ((f[..., :-1] > 0) != (f[..., 1:] > 0)) & valid
    count = np.cumsum(change, axis=-1)
    m = int(min(max_count, count[..., -1].max(initial=0)))
    ks = np.arange(1, m + 1)
    # index of the k-th change: first interval whose running count reaches k
    idx = np.argmax(count[..., None, :] >= ks[:, None], axis=-1)
    found = count[..., -1:] >= ks
    take = lambda arr, off: np.take_along_axis(arr, idx + off, axis=-1)  # noqa: E731
    return take(x, 0), take(x, 1), take(f, 0), take(f, 1), found


def refine_crossings(func, lo, hi, f_lo, f_hi, iterations: int = 3):
    """Refine bracketed roots of ``func`` by the Illinois variant of regula falsi.

    Parameters
    ----------
    func : callable
        ``func(x)`` with ``x`` of the brackets' shape, returning values of the same shape.
    lo, hi, f_lo, f_hi : ndarray
        Brackets with ``f_lo * f_hi <= 0`` (from :func:`first_crossings`).
    iterations : int
        Evaluations of ``func``.

    Returns
    -------
    root : ndarray
        Root estimates inside each bracket.
    """
    lo, hi, f_lo, f_hi = (np.array(v, dtype=float) for v in (lo, hi, f_lo, f_hi))
    side = np.zeros(lo.shape, dtype=int)
    for _ in range(iterations):
        root = _secant(lo, hi, f_lo, f_hi)
        f_root = func(root)
        left = (f_root > 0) == (f_lo > 0)
        lo, f_lo = np.where(left, root, lo), np.where(left, f_root, f_lo)
        hi, f_hi = np.where(left, hi, root), np.where(left, f_hi, f_root)
        # Illinois: halve the stale end's value when the same end is kept twice
        f_hi = np.where(left & (side == 1), 0.5 * f_hi, f_hi)
        f_lo = np.where(~left & (side == -1), 0.5 * f_lo, f_lo)
        side = np.where(left, 1, -1)
    return _secant(lo, hi, f_lo, f_hi)


def _secant(lo, hi, f_lo, f_hi):
    den = f_lo - f_hi
    safe = np.abs(den) > 0
    t = np.where(safe, f_lo / np.where(safe, den, 1.0), 0.5)
    return lo + np.clip(t, 0.0, 1.0) * (hi - lo)


def graded_breaks(centre, scale, lo, hi, factors=(1.0, 3.0, 9.0)):
    """Breakpoints graded geometrically around ``centre``, clipped to [lo, hi].

    Parameters
    ----------
    centre, scale : ndarray, shape (...,)
        Centre and smallest panel width (same unit as lo, hi).
    lo, hi : ndarray, broadcastable to centre
        Interval ends.
    factors : tuple of float
        Multiples of ``scale`` placed either side.

    Returns
    -------
    ndarray, shape (..., 2 len(factors) + 1)
    """
    f = np.concatenate([-np.asarray(factors)[::-1], [0.0], np.asarray(factors)])
    pts = centre[..., None] + scale[..., None] * f
    return np.clip(pts, np.asarray(lo)[..., None], np.asarray(hi)[..., None])


@lru_cache(maxsize=16)
def monomial_interpolation(n: int) -> np.ndarray:
    """A with ``c = A @ f`` the monomial coefficients (c_k of s^k) of the polynomial that
    interpolates f at the n Gauss–Legendre nodes of [0, 1] (read-only, shape (n, n);
    well conditioned for the few nodes used per panel)."""
    x, _ = gauss_legendre_unit(n)
    out = np.linalg.inv(np.vander(x, n, increasing=True))   # V[i, k] = x_i^k
    out.setflags(write=False)
    return out
