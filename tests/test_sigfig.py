"""Significant-figure rounding from uncertainties.

Convention under test (common practice, no source): the uncertainty keeps one significant
figure, two when its leading digit is 1; the value is rounded to the same decimal place;
half-up rounding on the decimal representation.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from diskfield.sigfig import (format_significant, round_asymmetric, round_to_decimals,
                              round_with_uncertainty, uncertainty_decimals)

from conftest import seed_for


@pytest.mark.parametrize("value, err, expected", [
    # worked examples of the convention (common practice, no source)
    (12.345, 0.678, ("12.3", "0.7")),
    (0.0012345, 0.000056, ("0.00123", "0.00006")),
    (3.14159, 0.0123, ("3.142", "0.012")),      # leading digit 1: two figures
    (12345.0, 678.0, ("12300", "700")),         # rounding to hundreds
    (5.0, 0.15, ("5.00", "0.15")),              # leading 1 judged before rounding
    (1.2345, 0.96, ("1.2", "1.0")),             # carry to a leading 1 keeps the place
    (1.2345, 0.096, ("1.23", "0.10")),
    (-7.777, 0.33, ("-7.8", "0.3")),
    (2.25, 0.3, ("2.3", "0.3")),                # half-up, not half-even
    (-0.01, 0.3, ("0.0", "0.3")),               # no "-0.0"
])
def test_worked_examples(value, err, expected):
    assert round_with_uncertainty(value, err) == expected


@pytest.mark.parametrize("err", [0.0, -1.0, math.nan, math.inf])
def test_unusable_uncertainty_falls_back_to_significant_figures(err):
    assert round_with_uncertainty(0.00123456, err) == ("0.00123", "")
    with pytest.raises(ValueError, match="positive and finite"):
        uncertainty_decimals(err)


def test_asymmetric_uses_the_smaller_uncertainty():
    assert round_asymmetric(2.4567, 0.123, 0.31) == ("2.46", "0.12", "0.31")
    assert round_asymmetric(100.0, 30.0, 4.0) == ("100", "30", "4")
    assert round_asymmetric(1.0, math.nan, math.nan) == ("1.00", "", "")


def test_format_significant_and_fixed_rounding():
    assert format_significant(0.00123456, 2) == "0.0012"
    assert format_significant(123456.0, 2) == "120000"
    assert format_significant(0.0) == "0"
    assert format_significant(math.nan) == "nan"
    assert round_to_decimals(math.inf, 2) == "inf"
    assert round_to_decimals(-math.inf, 2) == "-inf"


def test_rounded_uncertainty_has_one_or_two_figures_and_matches_the_value_place():
    rng = np.random.default_rng(seed_for("sigfig-property"))
    for _ in range(500):
        err = 10.0 ** rng.uniform(-6, 6)
        value = rng.normal(0.0, 10.0 ** rng.uniform(-6, 7))
        v, e = round_with_uncertainty(value, err)
        digits = e.replace(".", "").lstrip("0")
        # whole-number uncertainties carry trailing zeros that are not significant
        sig = digits.rstrip("0") if "." not in e else digits
        leading_one = f"{err:e}"[0] == "1"
        # two figures only for a leading 1, before rounding (1.96 -> 2.0) or after (0.97 -> 1.0)
        assert len(sig) == 1 or (len(sig) == 2 and (leading_one or sig[0] == "1"))
        dec = lambda s: len(s.split(".")[1]) if "." in s else 0  # noqa: E731
        assert dec(v) == dec(e)
        # the rounded numbers stay within half a unit of the last place
        assert abs(float(e) - err) <= 0.5 * 10.0 ** -uncertainty_decimals(err) * (1 + 1e-9)
        assert abs(float(v) - value) <= 0.5 * 10.0 ** -uncertainty_decimals(err) * (1 + 1e-9)
