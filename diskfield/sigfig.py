"""Significant-figure rounding of a value from its uncertainty.

Convention (common practice, no source): the uncertainty keeps one significant figure, or two
when its leading digit is 1; the value is rounded to the same decimal place. Rounding is
half-up on the decimal representation of the float (``repr``), so ``0.25 -> 0.3`` and the
result does not depend on binary floating-point accidents. Worked examples::

    12.345 ± 0.678       -> 12.3 ± 0.7
    0.0012345 ± 0.000056 -> 0.00123 ± 0.00006
    3.14159 ± 0.0123     -> 3.142 ± 0.012
    12345 ± 678          -> 12300 ± 700

Values without a usable uncertainty are written with a fixed number of significant figures.
"""
from __future__ import annotations

import math
from decimal import ROUND_HALF_UP, Decimal

__all__ = [
    "uncertainty_decimals",
    "round_to_decimals",
    "round_with_uncertainty",
    "round_asymmetric",
    "format_significant",
]


def _decimal(x: float) -> Decimal:
    return Decimal(repr(float(x)))


def _leading_exponent(x: float) -> int:
    """Power of ten of the leading digit of ``|x|`` (``x`` finite and non-zero)."""
    return _decimal(abs(x)).adjusted()


def uncertainty_decimals(err: float) -> int:
    """Decimal place to which an uncertainty (and its value) is rounded.

    Parameters
    ----------
    err : float
        The uncertainty (positive, finite), in the value's unit.

    Returns
    -------
    int
        Number of decimals (negative: round to tens, hundreds, ...). One significant figure
        of ``err``, two when its leading digit is 1. A carry keeps the decimal place:
        0.96 -> 1.0 and 0.096 -> 0.10.
    """
    if not (math.isfinite(err) and err > 0):
        raise ValueError(f"uncertainty must be positive and finite; got {err!r}")
    exponent = _leading_exponent(err)
    leading = int(str(_decimal(err).scaleb(-exponent))[0])
    n_sig = 2 if leading == 1 else 1
    return -(exponent - (n_sig - 1))


def round_to_decimals(x: float, decimals: int) -> str:
    """Round ``x`` half-up to ``decimals`` places and write it in fixed-point notation.

    Parameters
    ----------
    x : float
        Value (any unit).
    decimals : int
        Decimal places; negative rounds to tens, hundreds, ...

    Returns
    -------
    str
        E.g. ``round_to_decimals(12345, -2) == "12300"``; a rounded zero has no sign
        (``"-0.0"`` is written ``"0.0"``).
    """
    if not math.isfinite(x):
        return _nonfinite(x)
    q = _decimal(x).quantize(Decimal(1).scaleb(-decimals), rounding=ROUND_HALF_UP)
    return f"{q.copy_abs() if q.is_zero() else q:f}"


def round_with_uncertainty(value: float, err: float, *, fallback_sig: int = 3) -> tuple[str, str]:
    """Round a value and its 1-sigma uncertainty together (module convention).

    Parameters
    ----------
    value, err : float
        Value and uncertainty in the same unit.
    fallback_sig : int
        Significant figures of ``value`` when ``err`` is zero, negative or not finite
        (then the uncertainty is returned as ``""``).

    Returns
    -------
    (str, str)
        The rounded value and uncertainty, e.g. ``("12.3", "0.7")``.
    """
    if not (math.isfinite(err) and err > 0):
        return format_significant(value, fallback_sig), ""
    d = uncertainty_decimals(err)
    return round_to_decimals(value, d), round_to_decimals(err, d)


def round_asymmetric(value: float, minus: float, plus: float, *,
                     fallback_sig: int = 3) -> tuple[str, str, str]:
    """Round a value with asymmetric uncertainties (e.g. median and 16/84 % offsets).

    The decimal place is set by the smaller of the two uncertainties, so neither loses
    its leading digit.

    Parameters
    ----------
    value : float
        Central value.
    minus, plus : float
        Distances (>= 0) down and up, in the value's unit.
    fallback_sig : int
        Significant figures when neither uncertainty is usable.

    Returns
    -------
    (str, str, str)
        Rounded value, minus and plus, e.g. ``("2.45", "0.12", "0.31")``.
    """
    usable = [e for e in (minus, plus) if math.isfinite(e) and e > 0]
    if not usable:
        return format_significant(value, fallback_sig), "", ""
    d = uncertainty_decimals(min(usable))
    return (round_to_decimals(value, d), round_to_decimals(minus, d),
            round_to_decimals(plus, d))


def format_significant(x: float, sig: int = 3) -> str:
    """Write ``x`` with ``sig`` significant figures in fixed-point notation.

    Parameters
    ----------
    x : float
        Value (any unit).
    sig : int
        Significant figures (>= 1).

    Returns
    -------
    str
        E.g. ``format_significant(0.00123456, 2) == "0.0012"``; ``nan``/``inf`` as words.
    """
    if not math.isfinite(x):
        return _nonfinite(x)
    if x == 0:
        return "0"
    return round_to_decimals(x, sig - 1 - _leading_exponent(x))


def _nonfinite(x: float) -> str:
    if math.isnan(x):
        return "nan"
    return "inf" if x > 0 else "-inf"
