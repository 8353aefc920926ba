"""Average-effect estimators and the overlap / balance diagnostics, against statsmodels and closed forms."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.metrics import roc_auc_score

from siteproof.blind.average import (
    OVERLAP_ESTIMAND,
    aipw,
    balance_table,
    covariate_auc_warnings,
    covariate_aucs,
    grouped_auc,
    ipw_hajek,
    kish_ess,
    naive,
    overlap_summary,
    overlap_weighted,
    regression_adjusted,
)
from siteproof.core.errors import SiteproofError
from siteproof.core.estimates import Z95
from siteproof.blind.nuisance import cross_fit_nuisances, make_folds


def _trial(n: int = 600, p: int = 4, seed: int = 0, share: float = 0.4):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    w = (rng.random(n) < share).astype(np.int8)
    y = X @ np.linspace(1.0, -1.0, p) + w * (1.0 + X[:, 0]) + rng.normal(size=n) * (1 + 0.5 * w)
    return X, y, w


def _statsmodels_lin(X: np.ndarray, y: np.ndarray, w: np.ndarray):
    Xc = X - X.mean(axis=0)
    Z = np.column_stack([np.ones(y.size), w, Xc, w[:, None] * Xc])
    return sm.OLS(y, Z).fit(cov_type="HC2")


def _check_ci(est) -> None:
    assert est.ci == pytest.approx((est.estimate - Z95 * est.se, est.estimate + Z95 * est.se), rel=1e-12)
    assert est.scores is not None and est.scores.mean() == pytest.approx(est.estimate, rel=1e-10, abs=1e-12)


# --------------------------------------------------------------------------------------------- naive / Lin


def test_naive_is_difference_in_means_with_neyman_se():
    X, y, w = _trial(seed=1)
    est = naive(y, w)
    y1, y0 = y[w == 1], y[w == 0]
    assert est.name == "naive"
    assert est.estimate == pytest.approx(y1.mean() - y0.mean(), rel=1e-12)
    assert est.se == pytest.approx(np.sqrt(y1.var(ddof=1) / y1.size + y0.var(ddof=1) / y0.size), rel=1e-12)
    _check_ci(est)


def test_lin_estimate_and_hc2_se_equal_statsmodels():
    X, y, w = _trial(n=500, p=5, seed=2)
    X = np.column_stack([X, (X[:, 1] > 0.5).astype(float)])  # a dummy column as well
    est = regression_adjusted(X, y, w)
    ref = _statsmodels_lin(X, y, w)  # source: statsmodels OLS(...).fit(cov_type="HC2"), same design
    assert est.name == "regression"
    assert est.estimate == pytest.approx(ref.params[1], rel=1e-8)
    assert est.se == pytest.approx(ref.bse[1], rel=1e-8)
    assert est.note == ""
    _check_ci(est)


def test_lin_drops_constant_and_collinear_columns():
    X, y, w = _trial(n=400, p=3, seed=3)
    padded = np.column_stack([X, np.full(y.size, 7.0), 2 * X[:, 0] - X[:, 2]])
    est = regression_adjusted(padded, y, w)
    ref = _statsmodels_lin(X, y, w)  # source: statsmodels HC2 OLS on the design without the redundant columns
    assert est.estimate == pytest.approx(ref.params[1], rel=1e-8)
    assert est.se == pytest.approx(ref.bse[1], rel=1e-8)
    assert "1 constant" in est.note and "2 linearly dependent" in est.note
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        full = _statsmodels_lin(padded, y, w)  # source: statsmodels (pinv) on the full rank-deficient design
    assert est.estimate == pytest.approx(full.params[1], rel=1e-7)
    assert est.se == pytest.approx(full.bse[1], rel=1e-7)


def test_lin_without_covariates_is_difference_in_means_with_neyman_se():
    """With Z = [1, W], HC2 reproduces the Neyman variance exactly (Imbens & Kolesár 2016)."""
    _, y, w = _trial(seed=4)
    est, ref = regression_adjusted(np.empty((y.size, 0)), y, w), naive(y, w)
    assert est.estimate == pytest.approx(ref.estimate, rel=1e-12)
    assert est.se == pytest.approx(ref.se, rel=1e-10)


# ------------------------------------------------------------------------------ IPW / AIPW / overlap


def test_ipw_with_known_constant_propensity_is_the_closed_form():
    _, y, w = _trial(n=300, seed=5)
    e = np.full(y.size, 0.4)
    est = ipw_hajek(y, w, e)
    y1, y0 = y[w == 1], y[w == 0]
    n, n1, n0 = y.size, y1.size, y0.size
    # Hájek with constant e is the difference in means; its score is τ̂ + (n/n₁)(Y−ȳ₁) (treated) or
    # τ̂ − (n/n₀)(Y−ȳ₀) (control), so var(ψ)/n = n/(n−1)·[(n₁−1)s₁²/n₁² + (n₀−1)s₀²/n₀²].
    se = np.sqrt(n / (n - 1) * ((n1 - 1) * y1.var(ddof=1) / n1**2 + (n0 - 1) * y0.var(ddof=1) / n0**2))
    assert est.name == "ipw" and est.estimand == "ATE"
    assert est.estimate == pytest.approx(y1.mean() - y0.mean(), rel=1e-12)
    assert est.se == pytest.approx(se, rel=1e-12)
    _check_ci(est)


def test_aipw_with_known_constant_propensity_is_the_closed_form():
    X, y, w = _trial(n=300, seed=6)
    e0 = 0.4
    e = np.full(y.size, e0)
    mu0, mu1 = 0.3 * X[:, 0], 1.0 + 0.8 * X[:, 0]
    est = aipw(y, w, e, mu0, mu1)
    n = y.size
    closed = np.mean(mu1 - mu0) + np.sum(w * (y - mu1)) / (n * e0) - np.sum((1 - w) * (y - mu0)) / (n * (1 - e0))
    psi = mu1 - mu0 + np.where(w == 1, (y - mu1) / e0, -(y - mu0) / (1 - e0))
    se = np.sqrt(np.sum((psi - closed) ** 2) / (n - 1) / n)
    assert est.name == "aipw"
    assert est.estimate == pytest.approx(closed, rel=1e-12)
    assert est.se == pytest.approx(se, rel=1e-12)
    _check_ci(est)
    # with zero outcome models AIPW is the Horvitz–Thompson estimator Σ W Y/(n e) − Σ (1−W) Y/(n (1−e))
    ht = aipw(y, w, e, np.zeros(n), np.zeros(n))
    assert ht.estimate == pytest.approx(np.sum(w * y) / (n * e0) - np.sum((1 - w) * y) / (n * (1 - e0)), rel=1e-12)


def test_overlap_weighted_closed_forms_and_estimand():
    _, y, w = _trial(n=300, seed=7)
    constant = overlap_weighted(y, w, np.full(y.size, 0.3))
    assert constant.estimate == pytest.approx(y[w == 1].mean() - y[w == 0].mean(), rel=1e-12)
    assert constant.estimand == OVERLAP_ESTIMAND and constant.name == "overlap"
    # a toy by hand: treated (y, e) = (1, .5), (3, .75); control (y, e) = (0, .5), (2, .25)
    y4 = np.array([1.0, 3.0, 0.0, 2.0])
    w4 = np.array([1, 1, 0, 0])
    e4 = np.array([0.5, 0.75, 0.5, 0.25])
    toy = overlap_weighted(y4, w4, e4)
    # treated weights 1−e = .5, .25 → mean (0.5 + 0.75)/0.75 = 5/3; control weights e = .5, .25 → 0.5/0.75 = 2/3
    assert toy.estimate == pytest.approx(5 / 3 - 2 / 3, rel=1e-12)
    _check_ci(toy)


def test_ipw_hajek_toy_by_hand():
    y4 = np.array([1.0, 3.0, 0.0, 2.0])
    w4 = np.array([1, 1, 0, 0])
    e4 = np.array([0.5, 0.75, 0.5, 0.25])
    # treated weights 1/e = 2, 4/3 → (2 + 4)/(10/3) = 1.8
    # control weights 1/(1−e) = 2, 4/3 → (0 + 8/3)/(10/3) = 0.8
    assert ipw_hajek(y4, w4, e4).estimate == pytest.approx(1.8 - 0.8, rel=1e-12)


def test_invalid_inputs_are_user_errors():
    _, y, w = _trial(n=50, seed=8)
    with pytest.raises(SiteproofError):
        naive(y, np.r_[1, np.zeros(y.size - 1)])
    with pytest.raises(SiteproofError):
        aipw(y, w, np.full(y.size, 0.5), np.zeros(3), np.zeros(y.size))
    with pytest.raises(SiteproofError, match=r"propensity must lie strictly inside \(0, 1\)"):
        ipw_hajek(y, w, np.where(w == 1, 1.0, 0.5))
    with pytest.raises(SiteproofError, match=rf"covariates has shape \({y.size},\)"):
        regression_adjusted(np.zeros(y.size), y, w)


def _aipw_draw(n: int, seed: int) -> tuple[float, float, float]:
    """(AIPW estimate, its SE, difference in means) on a confounded design with ATE exactly 1."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    e = 1.0 / (1.0 + np.exp(-(0.8 * X[:, 0] - 0.5 * X[:, 1])))
    w = (rng.random(n) < e).astype(np.int8)
    y = 1.0 + 2.0 * X[:, 0] - X[:, 1] + w * (1.0 + 0.5 * X[:, 2]) + rng.normal(size=n)  # τ(x) = 1 + 0.5 x₃
    learners = {"propensity": LogisticRegression(), "mu0": LinearRegression(), "mu1": LinearRegression(),
                "m": LinearRegression()}
    nu = cross_fit_nuisances(X, y, w, make_folds(w, seed=seed), learners=learners, seed=seed)
    est = aipw(y, w, nu.e_hat, nu.mu0, nu.mu1)
    return est.estimate, est.se, naive(y, w).estimate


def test_aipw_is_unbiased_small():
    """Mean of 12 seeded draws within 4 Monte Carlo SEs of the true ATE 1 (naive is biased here)."""
    draws = np.array([_aipw_draw(600, seed) for seed in range(12)])
    mc_se = draws[:, 0].std(ddof=1) / np.sqrt(len(draws))
    assert abs(draws[:, 0].mean() - 1.0) < 4 * mc_se
    assert draws[:, 2].mean() - 1.0 > 10 * draws[:, 2].std(ddof=1) / np.sqrt(len(draws))  # confounded
    # the reported SE matches the spread of the estimates: (R−1)·sd²/σ² ~ χ²_{R−1}, central 99.9% range
    reps = len(draws)
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], reps - 1)
    ratio = draws[:, 1].mean() / draws[:, 0].std(ddof=1)
    assert np.sqrt((reps - 1) / hi) < ratio < np.sqrt((reps - 1) / lo)


@pytest.mark.slow
def test_aipw_is_unbiased_and_covers():
    reps = 400
    draws = np.array([_aipw_draw(2000, 1000 + seed) for seed in range(reps)])
    mc_se = draws[:, 0].std(ddof=1) / np.sqrt(reps)
    assert abs(draws[:, 0].mean() - 1.0) < 4 * mc_se
    covered = np.mean(np.abs(draws[:, 0] - 1.0) < Z95 * draws[:, 1])
    assert abs(covered - 0.95) < 3 * np.sqrt(0.95 * 0.05 / reps)  # binomial Monte Carlo error


# ----------------------------------------------------------------------------------------------- diagnostics


def test_balance_table_toy_by_hand():
    """Treated x = 2, 4 (e = .5, .25); control x = 1, 2, 3 (e = .5, .5, .75)."""
    X = np.array([[2.0], [4.0], [1.0], [2.0], [3.0]])
    w = np.array([1, 1, 0, 0, 0])
    e = np.array([0.5, 0.25, 0.5, 0.5, 0.75])
    table = balance_table(X, w, e, ["x"])
    pooled_sd = np.sqrt((2.0 + 1.0) / 2)  # s₁² = 2, s₀² = 1 (Austin 2009 pooled SD)
    assert table.loc[0, "smd_before"] == pytest.approx((3.0 - 2.0) / pooled_sd, rel=1e-12)
    # weights: treated 1/e = 2, 4 → mean 20/6; control 1/(1−e) = 2, 2, 4 → mean 18/8
    assert table.loc[0, "smd_after"] == pytest.approx((20 / 6 - 18 / 8) / pooled_sd, rel=1e-12)
    assert list(table.columns[:3]) == ["feature", "smd_before", "smd_after"]
    assert not table.loc[0, "balanced_after"]


def test_weighting_with_the_true_propensity_removes_the_imbalance():
    """With the true e, the IPW-weighted mean difference of a covariate estimates 0; it equals the Hájek IPW
    "effect" on that covariate, whose SE gives the tolerance."""
    rng = np.random.default_rng(9)
    n = 3000
    X = rng.normal(size=(n, 2))
    e = 1.0 / (1.0 + np.exp(-X[:, 0]))
    w = (rng.random(n) < e).astype(int)
    table = balance_table(X, w, e, ["a", "b"])
    assert table.loc[0, "smd_before"] > 0.5  # E[x | W=1] − E[x | W=0] ≈ 0.8 for this design
    for j in range(2):
        pooled_sd = np.sqrt((X[w == 1, j].var(ddof=1) + X[w == 0, j].var(ddof=1)) / 2)
        diff = ipw_hajek(X[:, j], w, e)
        assert table.loc[j, "smd_after"] * pooled_sd == pytest.approx(diff.estimate, rel=1e-10)
        assert abs(diff.estimate) < 4 * diff.se


def test_overlap_summary_closed_forms():
    e_raw = np.array([0.005, 0.02, 0.5, 0.5, 0.97, 0.995, 0.5, 0.25])
    w = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    out = overlap_summary(e_raw, w, (0.01, 0.99))
    assert out["n_clipped"] == 2 and out["n_clipped_low"] == 1 and out["n_clipped_high"] == 1
    assert out["share_outside_band"] == pytest.approx(4 / 8)  # 0.005, 0.02, 0.97, 0.995
    treated, control = out["by_arm"]["treated"], out["by_arm"]["control"]
    assert treated["share_outside_band"] == pytest.approx(0.5) and control["share_outside_band"] == pytest.approx(0.5)
    # Kish ESS (Σa)²/Σa² with clipped e: treated a = 1/.01, 1/.02, 2, 2; control a = 1/.03, 1/.01, 2, 4/3
    for arm, a in ((treated, np.array([100.0, 50.0, 2.0, 2.0])), (control, np.array([1 / 0.03, 100.0, 2.0, 4 / 3]))):
        assert arm["kish_ess"] == pytest.approx(a.sum() ** 2 / np.sum(a**2), rel=1e-9)
        assert arm["kish_ess_share"] == pytest.approx(arm["kish_ess"] / 4)
    assert treated["quantiles"]["min"] == 0.005 and control["quantiles"]["max"] == 0.995
    assert kish_ess(np.full(7, 3.0)) == pytest.approx(7.0)  # equal weights → the count


def test_grouped_auc_equals_sklearn_with_ties():
    rng = np.random.default_rng(10)
    score = rng.integers(0, 5, size=400).astype(float)
    label = (rng.random(400) < 0.2 + 0.1 * score).astype(int)
    values = np.unique(score)
    pos = np.array([np.sum(label[score == v]) for v in values])
    neg = np.array([np.sum(1 - label[score == v]) for v in values])
    assert grouped_auc(values, pos, neg) == pytest.approx(roc_auc_score(label, score), rel=1e-12)  # source: sklearn


def test_covariate_auc_flags_design_variables_including_non_monotone():
    rng = np.random.default_rng(11)
    n = 2000
    X = rng.normal(size=(n, 4))
    w = (np.abs(X[:, 1]) > 0.7).astype(int)  # treatment determined by |x₁|: non-monotone
    X[:, 2] = w + 0.05 * rng.normal(size=n)  # a near copy of treatment
    folds = make_folds(w, seed=0)
    aucs = covariate_aucs(X, w, folds)
    assert aucs[1] > 0.95 and aucs[2] > 0.99
    assert abs(aucs[0] - 0.5) < 0.05 and abs(aucs[3] - 0.5) < 0.05  # ≈ 4 SE of an AUC of 0.5 at this n
    flagged = covariate_auc_warnings(X, w, folds, ["a", "b", "c", "d"])
    assert [name for name, _ in flagged] == ["c", "b"]
