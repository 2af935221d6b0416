"""Special functions for the compiled kernels: ln Phi, ln(1 + x), and exp and ln inlined.

The kernels spend their time in a few functions. ``log_ndtr`` and ``log1p`` are below;
``exp_ftz`` is exp written out (Cody & Waite reduction x = k ln 2 + r, |r| <= ln 2 / 2, the
Taylor series of e^r to degree 12, 2^k built in the exponent bits; common practice, no
source): 4e-16 relative, flushed to 0 below e^-708 where the kernels' sums treat values as
underflowed anyway. ``log_vec`` is ln written out (fdlibm's reduction to [sqrt(2)/2, sqrt(2))
and minimax polynomial, within 1 ulp). Inlined into a loop without a call (and, for
``log_vec``'s division, compiled with ``error_model="numpy"``, so there is no
division-by-zero test), the compiler vectorises them: ~2 and ~1.5 ns per element against ~5
and ~3.7 ns for the C library's ``exp`` and ``log`` here (``benchmarks/bench_likelihood.py``
(f)). They are used where that happens: the record sums of the time-dependent kernel
(:mod:`diskfield._aged_jit`, 93 -> 61 ms of a ~150 ms call) and the passes over a body's
distance nodes in :mod:`diskfield._rule_jit` (5-14 % of a steady call); elsewhere the C
library's functions stay.

ln Phi(x) (Phi the standard normal CDF) is the one special function of every compiled
likelihood kernel: a limit's censoring term, the exponentially modified Gaussian of a body's
shared spin. Through the C library's ``erfc`` it costs ~19 ns here; read from a table it costs
~2.5 ns (``benchmarks/bench_likelihood.py`` (f)), with no branch on the argument's size.

The table holds, on [``_X0``, ``_X1``) in steps of ``_STEP``, each piece's monomial
coefficients in t = (x - x_k) / step of the quintic that matches ln Phi and its first two
derivatives at both ends (Hermite interpolation). The values come from
``scipy.special.log_ndtr`` at import; the derivatives from the Mills ratio,
d ln Phi / dx = m = phi(x) / Phi(x) and d2 ln Phi / dx2 = -m (x + m) (common practice, no
source). The largest error against ``scipy.special.log_ndtr`` is ~6e-13 absolute (tested:
below 1e-11 on a dense grid across the table and both tails). Below ``_X0`` the asymptotic
series is used (Abramowitz & Stegun 1964, 26.2.12: the same as in
:func:`log_ndtr_erfc`); at or above ``_X1`` ln Phi = -Phi(-x) > -5e-18, and 0.0 is returned.

:func:`log_ndtr_erfc` (through ``erfc``) is kept as the reference the tests compare with.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, types
from numba.extending import intrinsic
from scipy import special

_SQRT_HALF = math.sqrt(0.5)
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
#: Table range and step (numerical convention: the error is ~6e-13 at this step; the
#: asymptotic series below -40 has relative error < 1e-12 there).
_X0, _X1, _STEP = -40.0, 8.5, 1.0 / 16.0
_INV_STEP = 1.0 / _STEP


def _hermite_table():
    """Monomial coefficients (K, 6) of the quintic Hermite pieces of ln Phi."""
    n = int(round((_X1 - _X0) / _STEP))
    x = _X0 + _STEP * np.arange(n + 1)
    f = special.log_ndtr(x)
    m = np.exp(-0.5 * x * x - _LN_SQRT_2PI - f)           # d ln Phi / dx (Mills ratio)
    d1, d2 = m * _STEP, -m * (x + m) * _STEP ** 2         # first, second derivative in t
    c0, c1, c2 = f[:-1], d1[:-1], 0.5 * d2[:-1]
    # c3..c5 from the value, slope and curvature at t = 1
    lhs = np.array([[1.0, 1.0, 1.0], [3.0, 4.0, 5.0], [6.0, 12.0, 20.0]])
    rhs = np.stack([f[1:] - c0 - c1 - c2, d1[1:] - c1 - 2.0 * c2, d2[1:] - 2.0 * c2])
    c3, c4, c5 = np.linalg.solve(lhs, rhs)
    return np.ascontiguousarray(np.column_stack([c0, c1, c2, c3, c4, c5]))


_TABLE = _hermite_table()
_LAST = len(_TABLE) - 1


@njit(cache=True)
def _asymptotic(x):
    """ln Phi(x) for x < -20: Phi(x) = phi(x)/(-x) (1 - 1/x^2 + 3/x^4 - ...) (A&S 26.2.12)."""
    r = 1.0 / (x * x)
    series = 1.0 - r * (1.0 - r * (3.0 - r * (15.0 - r * (105.0 - r * 945.0))))
    return -0.5 * x * x - math.log(-x) - _LN_SQRT_2PI + math.log(series)


@njit(cache=True)
def log_ndtr(x):
    """ln Phi(x) for a float x, accurate in both tails (table; see the module notes)."""
    if x >= _X1:
        return 0.0
    if not x >= _X0:     # also NaN, which the series passes on
        return _asymptotic(x)
    u = (x - _X0) * _INV_STEP
    k = min(int(u), _LAST)   # u rounds up to the table's end just below _X1
    t = u - k
    c = _TABLE
    return c[k, 0] + t * (c[k, 1] + t * (c[k, 2] + t * (c[k, 3] + t * (c[k, 4]
                                                                       + t * c[k, 5]))))


@njit(cache=True, inline="always")
def log_ndtr_ftz(x):
    """ln Phi(x) from the table without branches, for sums of Phi in linear space: as
    :func:`log_ndtr` for x >= ``_X0`` (-40), and -1000 below it, where Phi(x) < 1e-349
    underflows to 0 anyway (so ``exp_ftz(lw + log_ndtr_ftz(x))`` is exact to the sum's
    precision; NaN passes through). Selects only, so a loop over it can vectorise."""
    xc = min(max(x, _X0), _X1)
    u = (xc - _X0) * _INV_STEP
    k = min(np.int64(u), _LAST)
    t = u - k
    v = _TABLE[k, 0] + t * (_TABLE[k, 1] + t * (_TABLE[k, 2] + t * (_TABLE[k, 3] + t * (
        _TABLE[k, 4] + t * _TABLE[k, 5]))))
    v = v if x < _X1 else 0.0
    v = v if x >= _X0 else -1000.0
    return v if x == x else x


@intrinsic
def _bits_as_float(typingctx, bits):
    """The float64 whose IEEE bits are the 64-bit integer ``bits``, signed or not (a bit
    cast)."""
    if not (isinstance(bits, types.Integer) and bits.bitwidth == 64):
        return None
    sig = types.float64(bits)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.float64))

    return sig, codegen


@intrinsic
def _float_bits(typingctx, x):
    """The uint64 whose bits are the float64 ``x``'s IEEE bits (a bit cast; unsigned, so
    shifts are logical: AVX2 has no 64-bit arithmetic shift to vectorise a signed one)."""
    sig = types.uint64(types.float64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], context.get_value_type(types.int64))

    return sig, codegen


#: fdlibm's e_log.c minimax coefficients of (ln(1 + f) - f + f^2/2) in s = f / (2 + f)
#: (Sun Microsystems 1993; error below 1 ulp).
_LG1, _LG2, _LG3 = 6.666666666666735130e-01, 3.999999999940941908e-01, 2.857142874366239149e-01
_LG4, _LG5 = 2.222219843214978396e-01, 1.818357216161805012e-01
_LG6, _LG7 = 1.531383769920937332e-01, 1.479819860511658591e-01
_SQRT2 = 1.4142135623730951


@njit(cache=True, inline="always")
def log_vec(x):
    """ln x for a positive normal x (>= 2.2e-308), within 1 ulp of the C library's ``log``
    (fdlibm's reduction and polynomial, written out); inf for inf, -inf for 0, NaN for
    negative x and NaN; subnormal x are not supported (their result is wrong). Selects only,
    so a loop over it can vectorise (``benchmarks/bench_likelihood.py`` (f))."""
    bits = _float_bits(x)
    m = _bits_as_float((bits & np.uint64(0x000FFFFFFFFFFFFF))
                        | np.uint64(0x3FF0000000000000))                    # in [1, 2)
    # the biased exponent as a float through 2^52's mantissa (AVX2 has no int64 -> float)
    e = _bits_as_float((bits >> np.uint64(52)) | np.uint64(0x4330000000000000)) \
        - 4503599627370496.0
    big = m > _SQRT2
    m = m * 0.5 if big else m
    dk = (e - 1022.0) if big else (e - 1023.0)
    f = m - 1.0
    hfsq = 0.5 * f * f
    s = f / (2.0 + f)
    z = s * s
    w = z * z
    t1 = w * (_LG2 + w * (_LG4 + w * _LG6))
    t2 = z * (_LG1 + w * (_LG3 + w * (_LG5 + w * _LG7)))
    v = dk * _LN2_HI - ((hfsq - (s * (hfsq + t2 + t1) + dk * _LN2_LO)) - f)
    v = v if x < np.inf else np.inf
    v = v if x > 0.0 else (-np.inf if x == 0.0 else np.nan)
    return v if x == x else x


_LOG2E = 1.4426950408889634
#: ln 2 split in two: k ln2_hi is exact for |k| < 2^20 (Cody & Waite 1980).
_LN2_HI, _LN2_LO = 6.93147180369123816490e-01, 1.90821492927058770002e-10


@njit(cache=True, inline="always")
def exp_ftz(x):
    """e^x to 4e-16 relative for -708 <= x <= 709; 0 below -708, inf above 709, NaN for NaN.

    Branch-free (selects only), so a loop over it vectorises (see the module notes)."""
    xc = min(max(x, -708.0), 709.0)
    k = math.floor(xc * _LOG2E + 0.5)
    r = xc - k * _LN2_HI - k * _LN2_LO
    p = 1.0 + r * (1.0 + r * (1.0 / 2 + r * (1.0 / 6 + r * (1.0 / 24 + r * (
        1.0 / 120 + r * (1.0 / 720 + r * (1.0 / 5040 + r * (1.0 / 40320 + r * (
            1.0 / 362880 + r * (1.0 / 3628800 + r * (1.0 / 39916800
                                                      + r * (1.0 / 479001600))))))))))))
    v = p * _bits_as_float((np.int64(k) + 1023) << 52)
    v = v if x <= 709.0 else np.inf
    v = v if x >= -708.0 else 0.0
    return v if x == x else x


@njit(cache=True)
def log1p(x):
    """ln(1 + x) for x > -1: the series x - x^2/2 + x^3/3 - x^4/4 below |x| = 1e-4 (next
    term < 2e-21), else ln of 1 + x (absolute error ~1e-16). Three to four times faster here
    than the C library's ``log1p``, with the absolute accuracy the kernels' sums need
    (common practice, no source; tested against ``numpy.log1p``)."""
    if abs(x) < 1e-4:
        return x * (1.0 - x * (0.5 - x * (1.0 / 3.0 - x * 0.25)))
    return math.log(1.0 + x)


@njit(cache=True)
def log_ndtr_erfc(x):
    """ln Phi(x) through the C library's ``erfc`` (the reference for :func:`log_ndtr`)."""
    if x > 8.3:  # ln Phi = -Phi(-x) to 1e-33, and |Phi(-8.3)| < 5.2e-17: 0 to double precision
        return 0.0
    if x > 6.0:
        return math.log1p(-0.5 * math.erfc(x * _SQRT_HALF))
    if x > -20.0:
        return math.log(0.5 * math.erfc(-x * _SQRT_HALF))
    return _asymptotic(x)


@njit(cache=True, inline="always", error_model="numpy")
def log_ndtr_vec(x):
    """ln Phi(x) without branches and accurate in both tails: the table (as
    :func:`log_ndtr_ftz`) for x >= ``_X0`` (-40), the asymptotic series of
    :func:`_asymptotic` (with :func:`log_vec`) below; NaN for NaN, -inf at -inf. Both are
    computed and one is selected, so a loop over it vectorises (~2x the cost of the table
    alone); for the far lower tails of the kernels' log-space sums."""
    t = log_ndtr_ftz(x)
    xa = min(x, _X0)
    r = 1.0 / (xa * xa)
    series = 1.0 - r * (1.0 - r * (3.0 - r * (15.0 - r * (105.0 - r * 945.0))))
    asym = -0.5 * xa * xa - log_vec(-xa) - _LN_SQRT_2PI + log_vec(series)
    return t if x >= _X0 else asym
