"""Tests of siteproof.core.checks: each helper passes clean input through and names the bad input otherwise."""

from __future__ import annotations

import numpy as np
import pytest

from siteproof.core.checks import (
    alpha_level,
    at_least,
    finite_matrix,
    finite_vector,
    in_unit_interval,
    one_dimensional,
    same_length,
    standard_error,
    unit_vector,
    unit_vector_or_scalar,
)
from siteproof.core.errors import SiteproofError


def test_finite_vector_flattens_and_rejects_nan_and_inf():
    np.testing.assert_array_equal(finite_vector("x", [[1, 2], [3, 4]]), [1.0, 2.0, 3.0, 4.0])
    for bad in ([1.0, np.nan], [np.inf], [-np.inf, 0.0]):
        with pytest.raises(SiteproofError, match="the scores: NaN or infinite") as info:
            finite_vector("the scores", bad, "drop those units")
        assert info.value.fix == "drop those units"


def test_one_dimensional_keeps_shape_and_rejects_matrices():
    assert one_dimensional("tau", [1, 2, 3]).shape == (3,)
    with pytest.raises(SiteproofError, match=r"tau must be one-dimensional, got shape \(2, 2\)"):
        one_dimensional("tau", np.zeros((2, 2)))


def test_unit_vector_checks_shape_length_and_finiteness():
    np.testing.assert_array_equal(unit_vector("y", [1, 2, 3], 3), [1.0, 2.0, 3.0])
    with pytest.raises(SiteproofError, match="y must be one-dimensional"):
        unit_vector("y", np.zeros((3, 1)), 3)
    with pytest.raises(SiteproofError, match="y has 2 entries but 3 were expected"):
        unit_vector("y", [1.0, 2.0], 3)
    with pytest.raises(SiteproofError, match="y: NaN or infinite") as info:
        unit_vector("y", [1.0, np.nan], fix="drop those units")
    assert info.value.fix == "drop those units"


def test_unit_vector_or_scalar_repeats_a_scalar():
    np.testing.assert_array_equal(unit_vector_or_scalar("e", 0.25, 3), [0.25, 0.25, 0.25])
    np.testing.assert_array_equal(unit_vector_or_scalar("e", [0.1, 0.2], 2), [0.1, 0.2])
    with pytest.raises(SiteproofError, match="e has 2 entries but 3"):
        unit_vector_or_scalar("e", [0.1, 0.2], 3)
    with pytest.raises(SiteproofError, match="e: NaN or infinite"):
        unit_vector_or_scalar("e", np.inf, 3)


def test_finite_matrix_keeps_the_shape_and_names_the_input():
    assert finite_matrix("X", np.zeros((4, 2)), 4).shape == (4, 2)
    with pytest.raises(SiteproofError, match=r"X has shape \(4,\), expected \(4, p\)"):
        finite_matrix("X", np.zeros(4), 4)
    with pytest.raises(SiteproofError, match=r"expected \(3, p\)"):
        finite_matrix("X", np.zeros((4, 2)), 3)
    with pytest.raises(SiteproofError, match="X: NaN or infinite"):
        finite_matrix("X", [[0.0, np.nan]])


def test_same_length_and_at_least_report_the_counts():
    same_length("a", np.zeros(3), "b", np.zeros(3), "fix")
    with pytest.raises(SiteproofError, match="3 estimates but 2 variances"):
        same_length("estimates", np.zeros(3), "variances", np.zeros(2), "one variance per estimate")
    at_least("a paired difference", np.zeros(2), 2, "score more units")
    with pytest.raises(SiteproofError, match="needs at least 2 units, got 1"):
        at_least("a paired difference", np.zeros(1), 2, "score more units")


def test_unit_interval_closed_and_open():
    in_unit_interval("p", np.array([0.0, 0.5, 1.0]), "fix")
    with pytest.raises(SiteproofError, match=r"p must lie in \[0, 1\]; 1 value"):
        in_unit_interval("p", np.array([0.2, 1.5]), "fix")
    in_unit_interval("e", np.array([0.01, 0.99]), "fix", strict=True)
    with pytest.raises(SiteproofError, match=r"strictly inside \(0, 1\); 2 value"):
        in_unit_interval("e", np.array([0.0, 0.5, 1.0]), "fix", strict=True)


def test_standard_error_and_alpha():
    assert standard_error("SE", 0.0) == 0.0
    for bad in (-0.1, np.nan, np.inf):
        with pytest.raises(SiteproofError, match="SE must be finite and ≥ 0"):
            standard_error("SE", bad)
    assert alpha_level(0.05) == 0.05
    for bad in (0.0, 1.0, -0.2):
        with pytest.raises(SiteproofError, match=r"alpha must lie in \(0, 1\)"):
            alpha_level(bad)
    with pytest.raises(SiteproofError, match=r"\(0, 0.5\)"):  # a TOST at level α needs α < 1/2
        alpha_level(0.5, upper=0.5)
