"""The one number-formatting rule (reporting.formatting): the SE fixes the decimals of an estimate and its CI,
a non-zero CI bound never prints as 0, percentages carry a % sign and ordinary magnitudes are never written in
scientific notation.

Every expected string below is worked out by hand from the rule in the module docstring (SE rounded to two
significant digits, GUM JCGM 100:2008 §7.2.6 — common practice in reporting; the estimate to the same decimal
place).
"""

from __future__ import annotations

import math

import pytest

from siteproof.reporting import formatting as f


@pytest.mark.parametrize("se, decimals", [
    (0.1912, 2),    # 0.19
    (0.0996, 2),    # rounds up to 0.10: two significant digits at 2 decimals, not 0.100
    (0.17, 2),
    (1.0, 1),       # 1.0
    (12.3, 0),      # 12
    (1283.0, -2),   # 1300
    (0.000123, 5),  # 0.00012
    (0.0, None), (None, None), (math.nan, None),
])
def test_se_decimals_are_the_place_of_the_second_significant_digit(se, decimals):
    assert f.se_decimals(se) == decimals


@pytest.mark.parametrize("est, se, text", [
    (0.3791, 0.1912, "0.38"),
    (0.000656, 0.0867, "0.001"),    # SE 0.087 → 3 decimals
    (0.000356, 0.0867, "0.000"),    # rounds to zero: no minus sign, no scientific notation
    (-0.000356, 0.0867, "0.000"),
    (3.837, 0.061, "3.837"),
    (3.837, 0.61, "3.84"),
    (1283.4, 312.0, "1280"),        # SE 310 → tens
    (-766.2, 45.0, "-766"),
    (14.0, 0.52, "14.00"),          # trailing zeros are significant
    (2.5, None, "2.50"),            # no SE: three significant digits
])
def test_an_estimate_is_rounded_to_the_place_of_its_se(est, se, text):
    assert f.fmt_est(est, se) == text


def test_estimate_plus_minus_se_uses_the_rule_and_honours_fixed_decimals():
    assert f.fmt_pm(0.3791, 0.1912) == "0.38 ± 0.19"
    assert f.fmt_pm(0.000656, 0.17) == "0.00 ± 0.17"
    assert f.fmt_pm(1283.4, 312.0) == "1280 ± 310"
    assert f.fmt_pm(0.3791, 0.1912, 3) == "0.379 ± 0.191"  # the old call with explicit decimals
    assert f.fmt_se(0.0996) == "0.10" and f.fmt_se(1283.0) == "1300"


@pytest.mark.parametrize("ci, se, text", [
    ([0.0041, 0.75], 0.19, "[0.004, 0.750]"),       # excludes 0: the low bound keeps its sign
    ([-0.75, -0.0041], 0.19, "[-0.750, -0.004]"),
    ([0.00004, 0.75], 0.19, "[0.00004, 0.75000]"),
    ([-1.7, 9.77], 2.9, "[-1.7, 9.8]"),             # one decimal place for both bounds
    ([-0.31, 0.29], 0.153, "[-0.31, 0.29]"),
    ([0.0, 0.5], 0.13, "[0.00, 0.50]"),             # an exact 0 stays 0
])
def test_a_ci_is_rounded_by_its_se_and_never_rounds_onto_zero(ci, se, text):
    assert f.fmt_ci_se(ci, se) == text


def test_a_ci_without_se_takes_the_se_from_its_width():
    # Wald: SE = (0.75 − 0.0041) / (2 × 1.959964) = 0.190 → 2 decimals, then one more for the low bound.
    assert f.fmt_ci_se([0.0041, 0.75]) == "[0.004, 0.750]"
    assert f.fmt_est_ci(0.3791, [0.0041, 0.75]) == "0.38 [0.004, 0.750]"
    assert f.fmt_ci_se([None, 1.0]) == "—" and f.fmt_est_ci(None, [0, 1]) == "—"


def test_fixed_decimal_ci_keeps_the_sign_of_non_zero_bounds():
    assert f.fmt_ci([0.0041, 0.75], 2) == "[0.004, 0.750]"
    assert f.fmt_ci([-0.5, 0.25], 2) == "[-0.50, 0.25]"
    assert f.fmt_ci([0.1, None]) == "—"


@pytest.mark.parametrize("value, text", [
    (1283.0, "1280"), (14.0, "14.0"), (16.4, "16.4"), (-1.7, "-1.70"), (0.000656, "0.000656"),
    (0.0, "0.00"), (9.996, "10.0"), (3.837, "3.84"), (2.0e12, "2.00e+12"), (None, "—"),
])
def test_significant_digits_keep_trailing_zeros_and_avoid_scientific_notation(value, text):
    assert f.fmt_sig(value) == text


def test_percentages_carry_a_percent_sign_also_when_negative():
    assert f.fmt_percent_change(-766.2) == "-766 %"
    assert f.fmt_percent_change(85.2) == "85 %"
    assert f.fmt_percent_change(-0.2) == "0 %"
    assert f.fmt_percent_change(None) == "—"
    assert f.fmt_pct(0.42) == "42 %" and f.fmt_pct(-0.05) == "-5 %"


def test_fixed_decimals_write_no_negative_zero():
    assert f.fmt(-0.0004, 3) == "0.000" and f.fmt(-0.0004, 4) == "-0.0004"
