"""Paired differences, TOST, the four verdict classes and percent bias reduction."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from siteproof.unmask.correspondence import (
    compare,
    compare_scores,
    paired_difference,
    percent_bias_reduction,
    percent_bias_reduction_ci,
    tost_p_value,
    verdict,
    verdict_from_p,
)
from siteproof.core.errors import SiteproofError
from siteproof.core.outputs import to_json_text
from siteproof.core.scores import aipw_scores, ipw_scores


@pytest.mark.parametrize(
    ("d", "se", "expected"),
    [
        # δ = 1.  95% CI 0.05 ± 0.196 contains 0; 90% CI 0.05 ± 0.164 inside ±1.
        (0.05, 0.1, "equivalent"),
        # 95% CI 3 ± 0.196 excludes 0; 90% CI reaches past +1.
        (3.0, 0.1, "different"),
        # 95% CI 0.5 ± 0.196 excludes 0 and 90% CI 0.5 ± 0.164 lies inside ±1.
        (0.5, 0.1, "trivially different"),
        # 95% CI 0.5 ± 1.96 contains 0 and 90% CI 0.5 ± 1.64 crosses ±1.
        (0.5, 1.0, "indeterminate"),
    ],
)
def test_four_verdict_classes(d, se, expected):
    assert verdict(d, se, margin=1.0) == expected
    assert compare(blind=2.0 + d, design=2.0, se_difference=se, margin=1.0).verdict == expected


def test_verdict_agrees_with_the_confidence_interval_definitions():
    rng = np.random.default_rng(7)
    z95, z90 = stats.norm.ppf(0.975), stats.norm.ppf(0.95)  # scipy.stats.norm quantiles
    for d, se in zip(rng.normal(0, 1.5, 300), rng.uniform(0.05, 1.0, 300)):
        different = abs(d) > z95 * se
        equivalent = (d - z90 * se > -1.0) and (d + z90 * se < 1.0)
        expected = {
            (False, True): "equivalent",
            (True, False): "different",
            (True, True): "trivially different",
            (False, False): "indeterminate",
        }[(different, equivalent)]
        assert verdict(d, se, margin=1.0) == expected


def test_tost_p_value_equals_direct_scipy_norm_computation():
    d, se, delta = 0.12, 0.08, 0.25
    # Schuirmann (1987) two one-sided tests, computed directly with scipy.stats.norm.
    p_lower = stats.norm.sf((d + delta) / se)  # H0: D ≤ −δ
    p_upper = stats.norm.cdf((d - delta) / se)  # H0: D ≥ +δ
    res = compare(blind=1.12, design=1.0, se_difference=se, margin=delta)
    assert res.p_equivalence == pytest.approx(max(p_lower, p_upper), rel=1e-12)
    assert tost_p_value(d, se, delta) == pytest.approx(max(p_lower, p_upper), rel=1e-12)
    assert res.p_value == pytest.approx(2 * stats.norm.sf(abs(d) / se), rel=1e-12)
    assert res.z == pytest.approx(d / se, rel=1e-12)
    # The TOST at α corresponds to the (1 − 2α) = 90% CI (scipy.stats.norm.ppf(0.95)).
    half90 = stats.norm.ppf(0.95) * se
    assert res.equivalence_ci == pytest.approx((d - half90, d + half90), rel=1e-12)
    assert res.difference.ci == pytest.approx((d - 1.959964 * se, d + 1.959964 * se), rel=1e-6)


def test_alpha_sets_both_interval_levels():
    res = compare(blind=0.3, design=0.0, se_difference=0.1, margin=1.0, alpha=0.10)
    z90, z80 = stats.norm.ppf(0.95), stats.norm.ppf(0.90)  # scipy.stats.norm quantiles
    assert res.difference.ci == pytest.approx((0.3 - z90 * 0.1, 0.3 + z90 * 0.1), rel=1e-12)
    assert res.equivalence_ci == pytest.approx((0.3 - z80 * 0.1, 0.3 + z80 * 0.1), rel=1e-12)
    assert "0.9" in res.difference.note


def test_paired_se_beats_adding_variances_under_positive_correlation():
    rng = np.random.default_rng(11)
    common = rng.normal(0, 2.0, 400)
    blind = common + rng.normal(0.3, 0.5, 400)
    design = common + rng.normal(0.0, 0.5, 400)
    paired = paired_difference(blind, design)
    n = blind.size
    se_b, se_d = blind.std(ddof=1) / np.sqrt(n), design.std(ddof=1) / np.sqrt(n)
    assert paired.se < np.sqrt(se_b**2 + se_d**2)
    # Exact identity: Var(a − b) = Var a + Var b − 2 Cov(a, b).
    cov = np.cov(blind, design, ddof=1)[0, 1]
    assert paired.se**2 == pytest.approx(se_b**2 + se_d**2 - 2 * cov / n, rel=1e-10)
    assert paired.estimate == pytest.approx(blind.mean() - design.mean(), rel=1e-12)
    assert paired.scores == pytest.approx(blind - design)


def test_compare_scores_uses_the_paired_se_and_serialises():
    rng = np.random.default_rng(3)
    design = rng.normal(1.0, 1.0, 200)
    blind = design + rng.normal(0.02, 0.1, 200)
    res = compare_scores(blind, design, margin=0.1)
    paired = paired_difference(blind, design)
    assert res.difference.se == pytest.approx(paired.se, rel=1e-12)
    assert res.blind == pytest.approx(blind.mean()) and res.design == pytest.approx(design.mean())
    assert res.verdict == verdict(paired.estimate, paired.se, 0.1)
    assert '"verdict"' in to_json_text(res.to_dict())


def test_identical_scores_are_equivalent_with_zero_se():
    scores = np.linspace(-1, 1, 50)
    res = compare_scores(scores, scores, margin=0.1)
    assert res.difference.estimate == 0 and res.difference.se == 0
    assert res.p_value == 1 and res.p_equivalence == 0
    assert res.verdict == "equivalent"


def _coverage(reps: int, n: int, seed: int) -> float:
    """Share of reps whose 95% CI of D = AIPW(wrong constant e, wrong μ) − IPW(known rates) covers 5/6.

    Two equally likely sites: rates e = 0.2 (S = 0) and 0.6 (S = 1); Y = 1 + 2S + W + N(0, 1).  Design score
    Γ* = WY/e_S − (1−W)Y/(1−e_S) has mean ATE = 1.  Blind AIPW uses the constant propensity c = 0.4 and
    μ̂₀ = μ̂₁ = 1, so Γ_b = W(Y−1)/c − (1−W)(Y−1)/(1−c) with
    E[W(Y−1)] = ½·0.2·1 + ½·0.6·3 = 1.0 and E[(1−W)(Y−1)] = ½·0.4·2 = 0.4,
    hence E[Γ_b] = 1.0/0.4 − 0.4/0.6 = 11/6 and the true D = 11/6 − 1 = 5/6.
    """
    rng = np.random.default_rng(seed)
    s = rng.integers(0, 2, size=(reps, n))
    e = np.where(s == 1, 0.6, 0.2)
    w = (rng.uniform(size=(reps, n)) < e).astype(float)
    y = 1 + 2 * s + w + rng.normal(size=(reps, n))
    covered = 0
    for r in range(reps):
        blind = aipw_scores(y[r], w[r], np.full(n, 0.4), np.ones(n), np.ones(n))
        design = ipw_scores(y[r], w[r], e[r])
        lo, hi = paired_difference(blind, design).ci
        covered += lo <= 5 / 6 <= hi
    return covered / reps


def _coverage_bounds(reps: int) -> tuple[float, float]:
    """99.9% binomial acceptance region for coverage 0.95 (scipy.stats.binom), inside the 90–98 % band the coverage target allows."""
    lo = stats.binom.ppf(0.0005, reps, 0.95) / reps
    hi = stats.binom.ppf(0.9995, reps, 0.95) / reps
    return max(lo, 0.90), min(hi, 0.98)


def test_paired_ci_covers_the_true_difference():
    lo, hi = _coverage_bounds(200)
    assert lo <= _coverage(reps=200, n=400, seed=20240611) <= hi


@pytest.mark.slow
def test_paired_ci_covers_the_true_difference_1000_reps():
    lo, hi = _coverage_bounds(1000)
    assert lo <= _coverage(reps=1000, n=1000, seed=20240612) <= hi


def test_percent_bias_reduction():
    # Shadish, Clark & Steiner (2008): 100·(1 − |adjusted bias|/|naive bias|).
    assert percent_bias_reduction(2.0, 0.5) == pytest.approx(75.0)
    assert percent_bias_reduction(-2.0, 0.5) == pytest.approx(75.0)
    assert percent_bias_reduction(2.0, 0.0) == pytest.approx(100.0)
    assert percent_bias_reduction(1.0, -3.0) == pytest.approx(-200.0)
    assert np.isnan(percent_bias_reduction(0.0, 0.3))


def test_percent_bias_reduction_ci_is_the_delta_method():
    """SE by the textbook delta method: ∇fᵀ Σ ∇f / n with Σ the sample covariance of (d_a, d_n) and f(b_a, b_n)
    = 100(1 − |b_a|/|b_n|) (e.g. van der Vaart 1998, ch. 3) — computed here from the covariance matrix, not from
    the linearised scores the function uses."""
    rng = np.random.default_rng(3)
    n = 2000
    common = rng.normal(size=n)
    d_n = 1.0 + common + rng.normal(size=n)
    d_a = 0.3 + 0.5 * common + rng.normal(size=n)
    pbr = percent_bias_reduction_ci(d_a, d_n)
    b_a, b_n = d_a.mean(), d_n.mean()
    assert pbr.estimate == pytest.approx(100 * (1 - abs(b_a) / abs(b_n)), rel=1e-12)
    grad = np.array([-100 * np.sign(b_a) / abs(b_n), 100 * abs(b_a) * np.sign(b_n) / b_n**2])
    cov = np.cov(np.vstack([d_a, d_n]), ddof=1)
    assert pbr.se == pytest.approx(float(np.sqrt(grad @ cov @ grad / n)), rel=1e-10)
    assert pbr.ci == pytest.approx((pbr.estimate - 1.959964 * pbr.se, pbr.estimate + 1.959964 * pbr.se), rel=1e-6)
    assert np.isnan(percent_bias_reduction_ci(d_a, np.zeros(n)).se)  # no naive bias: undefined


def test_equivalence_bound_is_the_smallest_margin_that_passes():
    """At δ just above the bound the TOST passes, just below it fails (Schuirmann 1987: 90 % CI inside ±δ)."""
    res = compare(blind=1.3, design=1.0, se_difference=0.1, margin=1.0)
    bound = res.equivalence_bound
    assert bound == pytest.approx(0.3 + 1.6448536 * 0.1, rel=1e-6)  # z_0.95 = 1.6449 (normal table)
    assert compare(1.3, 1.0, 0.1, margin=bound * 1.001).p_equivalence < 0.05
    assert compare(1.3, 1.0, 0.1, margin=bound * 0.999).p_equivalence > 0.05


@pytest.mark.parametrize(("p_diff", "p_eq", "expected"), [
    (0.01, 0.01, "trivially different"), (0.01, 0.2, "different"), (0.3, 0.01, "equivalent"),
    (0.3, 0.2, "indeterminate")])
def test_verdict_from_p_values(p_diff, p_eq, expected):
    # Tryon & Lewis (2008): the four classes from the two tests at α = 0.05
    assert verdict_from_p(p_diff, p_eq, 0.05) == expected


@pytest.mark.parametrize(
    "call",
    [
        lambda: paired_difference([1.0, 2.0, 3.0], [1.0, 2.0]),
        lambda: paired_difference([1.0, np.nan, 3.0], [1.0, 2.0, 3.0]),
        lambda: paired_difference([1.0], [1.0]),
        lambda: compare(1.0, 0.5, 0.1, margin=0.0),
        lambda: compare(1.0, 0.5, 0.1, margin=-0.2),
        lambda: compare(1.0, 0.5, -0.1, margin=0.2),
        lambda: compare(1.0, 0.5, 0.1, margin=0.2, alpha=0.6),
        lambda: verdict(0.1, 0.1, margin=0.0),
        lambda: compare_scores([1.0, 2.0], [1.0, 2.0], margin=0.0),
    ],
)
def test_bad_input_raises_siteproof_error_with_fix(call):
    with pytest.raises(SiteproofError) as err:
        call()
    assert err.value.fix
