"""Propensity recovery: calibration against known rates, RMSE and its floor, weights, site predictability.

The synthetic set-up has three sites with rates r = (0.2, 0.5, 0.8) and site membership drawn from a known
multinomial logit P(S = s | x), so the true mixture propensity e(x) = Σ_s P(S = s | x)·r_s and the true
floor E[Var(e_S | X)] are available in closed form (recovery.py module docstring).  Tolerances are 4 standard
errors of the quantity checked (two-sided normal tail 6e-5).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from siteproof.blind.average import kish_ess
from siteproof.core.errors import SiteproofError
from siteproof.core.interpret import CALIBRATION_MARGIN, propensity_recovered
from siteproof.unmask.recovery import (
    calibration_bins,
    calibration_bound,
    calibration_line,
    recover_propensity,
    rmse,
    rmse_floor,
    site_means,
    site_predictability,
    weight_comparison,
)

RATES = np.array([0.2, 0.5, 0.8])
COEF = np.array([[0.0, 0.0], [1.2, -0.4], [-0.5, 1.5]])  # per site, logit coefficients on (x1, x2)


def mixture_world(n: int, seed: int):
    """Units with covariates x, site probabilities p(x), site S, known rate e_S, true mixture e(x), W."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2))
    logits = x @ COEF.T
    p = np.exp(logits - logits.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    site = np.array([rng.choice(3, p=row) for row in p])
    known = RATES[site]
    mixture = p @ RATES
    w = rng.binomial(1, known)
    return x, p, site, known, mixture, w


def test_calibration_slope_is_one_for_the_true_mixture_propensity():
    x, p, site, known, mixture, w = mixture_world(3000, seed=11)
    slope, intercept = calibration_line(mixture, known)
    # E[e_S | e(X)] = e(X) exactly (tower property), so the population line is e_S = 0 + 1·e(X).
    assert abs(slope.estimate - 1.0) < 4 * slope.se
    assert abs(intercept.estimate) < 4 * intercept.se
    assert slope.se < 0.1  # the check has power: a slope of 1.4 or 0.6 would be rejected
    bins = calibration_bins(mixture, known, n_bins=10)
    assert len(bins) == 10 and bins["n"].sum() == 3000
    # per decile, mean known rate − mean ê has mean 0 with SE known_rate_se; 10 bins, 4 SE each
    assert np.all(np.abs(bins["difference"]) < 4 * bins["known_rate_se"])


def test_calibration_line_detects_a_compressed_propensity():
    x, p, site, known, mixture, w = mixture_world(3000, seed=12)
    squeezed = 0.5 + 0.5 * (mixture - 0.5)
    slope, intercept = calibration_line(squeezed, known)
    # e(X) = 0.5 + 2(ê − 0.5) = −0.5 + 2ê, so E[e_S | ê] has slope 2 and intercept −0.5.
    assert abs(slope.estimate - 2.0) < 4 * slope.se
    assert abs(intercept.estimate + 0.5) < 4 * intercept.se


def test_verdict_separates_good_from_poor_learners():
    x, p, site, known, mixture, w = mixture_world(3000, seed=15)
    rng = np.random.default_rng(16)
    # a noisy but unbiased learner: reliability Var(e)/(Var(e) + 0.05²) ≈ 0.85 here, so its slope is
    # diluted well below the old 0.9 cut-off, yet it is calibrated within δ and informative
    noisy = np.clip(mixture + rng.normal(0, 0.05, mixture.size), 0.02, 0.98)
    cases = {
        "true mixture": (mixture, True),
        "noisy": (noisy, True),
        "noise fit": (np.clip(known.mean() + rng.normal(0, 0.05, known.size), 0.02, 0.98), False),
        "constant": (np.full(known.size, known.mean()), False),
    }
    for label, (e_hat, expected) in cases.items():
        rec = recover_propensity(e_hat, known, site, w)
        assert rec.recovered is expected, label
        assert rec.to_dict()["recovered"] is expected
    slope, _ = calibration_line(noisy, known)
    reliability = np.var(mixture) / (np.var(mixture) + 0.05**2)
    # dilution: the slope of e_S on e + u is Var(e)/(Var(e) + Var(u)) (clipping at 0.02/0.98 hardly binds)
    assert abs(slope.estimate - reliability) < 4 * slope.se + 0.01
    assert slope.ci[1] < 0.9  # the old rule (CI covers 1 or |b − 1| ≤ 0.1) calls this learner not recovered
    # the constant learner is calibrated (bound ≈ 0): calibration alone would not catch it
    assert calibration_bound(calibration_bins(np.full(known.size, known.mean()), known)) < CALIBRATION_MARGIN


def test_calibration_bound_closed_form():
    bins = calibration_bins(np.array([0.2, 0.2, 0.6, 0.6]), np.array([0.3, 0.3, 0.5, 0.7]), n_bins=2)
    # bin 1: |0.3 − 0.2| = 0.1, SE 0; bin 2: |0.6 − 0.6| = 0, SE sd(0.5, 0.7)/√2 = 0.1
    # ECE = ½·0.1 + ½·0 = 0.05; bound = 0.05 + 1.6449·√(¼·0.1²) = 0.05 + 0.08224 (scipy norm.ppf(0.95))
    assert calibration_bound(bins) == pytest.approx(0.05 + 1.6448536269514722 * 0.05, rel=1e-9)
    assert propensity_recovered(0.04, (0.6, 1.0)) and not propensity_recovered(0.06, (0.6, 1.0))
    assert not propensity_recovered(0.01, (0.4, 1.0)) and not propensity_recovered(0.01, (np.nan, np.nan))


def test_rmse_of_the_perfect_propensity_equals_its_floor():
    x, p, site, known, mixture, w = mixture_world(4000, seed=13)
    # E[(e(X) − e_S)² | X] = Var(e_S | X) = Σ_s p_s(x)(r_s − e(x))²: the floor, exactly.
    cond_var = np.sum(p * (RATES[None, :] - mixture[:, None]) ** 2, axis=1)
    d = (mixture - known) ** 2 - cond_var  # mean-zero given X
    assert abs(rmse(mixture, known) ** 2 - cond_var.mean()) < 4 * d.std(ddof=1) / np.sqrt(d.size)
    # with the true site probabilities the floor formula reproduces √mean Var(e_S | X) exactly
    assert rmse_floor(p, RATES) == pytest.approx(np.sqrt(cond_var.mean()), rel=1e-12)
    assert rmse(mixture, known) > 0.1  # the floor is far from zero here: RMSE alone would mislead


def test_estimated_floor_from_a_well_specified_site_model():
    x, p, site, known, mixture, w = mixture_world(3000, seed=14)
    rec = recover_propensity(
        mixture, known, site, w, X=x, site_learner=LogisticRegression(max_iter=500), seed=1
    )
    true_floor = np.sqrt(np.mean(np.sum(p * (RATES[None, :] - mixture[:, None]) ** 2, axis=1)))
    # the multinomial logit is correctly specified; with 2 covariates and n = 3000 its coefficients have SEs
    # ≈ 0.05, which moves the floor by a few percent — 10 % is a loose bound
    assert rec.rmse_floor == pytest.approx(true_floor, rel=0.10)
    assert rec.site_prediction is not None and rec.site_prediction.n_sites == 3
    assert rec.site_prediction.accuracy.estimate > rec.site_prediction.majority_share
    out = rec.to_dict()
    assert {"calibration_slope", "rmse", "by_site", "rmse_caveat", "weights", "site_prediction"} <= out.keys()
    assert out["calibration_slope"]["estimate"] == pytest.approx(rec.calibration_slope.estimate)


def test_site_means_table():
    site = np.array(["a"] * 4 + ["b"] * 2)
    e_hat = np.array([0.2, 0.4, 0.6, 0.4, 0.5, 0.7])
    known = np.array([0.3] * 4 + [0.6] * 2)
    table = site_means(e_hat, known, site).set_index("site")
    assert table.loc["a", "e_hat_mean"] == pytest.approx(0.4)
    assert table.loc["a", "difference"] == pytest.approx(0.1)
    assert table.loc["b", "known_rate"] == pytest.approx(0.6)
    assert table.loc["a", "e_hat_se"] == pytest.approx(np.std([0.2, 0.4, 0.6, 0.4], ddof=1) / 2)


def test_weights_and_kish_ess():
    assert kish_ess(np.ones(37)) == pytest.approx(37.0)
    assert kish_ess(np.array([1.0, 3.0])) == pytest.approx(16.0 / 10.0)  # (1+3)²/(1+9)
    rng = np.random.default_rng(3)
    rate = rng.choice([0.25, 0.75], size=500)
    w = rng.binomial(1, rate)
    same = weight_comparison(w, rate, rate)
    assert same["ratio_quantiles"]["q01"] == pytest.approx(1.0) and same["ratio_quantiles"]["q99"] == pytest.approx(1.0)
    assert same["share_ratio_outside_half_to_double"] == 0.0
    assert same["ess"]["treated"]["ess_learned"] == pytest.approx(same["ess"]["treated"]["ess_true"])
    flat = weight_comparison(w, np.full(500, 0.5), rate)
    # treated with rate 0.25: ratio e_S/ê = 0.5; treated with 0.75: 1.5; controls mirror this
    assert flat["ratio_quantiles"]["q01"] == pytest.approx(0.5) and flat["ratio_quantiles"]["q99"] == pytest.approx(1.5)
    # constant learned weights within an arm give the full ESS
    assert flat["ess"]["treated"]["ess_learned"] == pytest.approx(w.sum())


def test_site_predictability_visible_and_invisible_sites():
    rng = np.random.default_rng(5)
    n = 1500
    site = rng.choice(["big", "mid", "small"], size=n, p=[0.6, 0.25, 0.15])
    onehot = (site[:, None] == np.array(["big", "mid", "small"])[None, :]).astype(float)
    visible = site_predictability(onehot + 0.01 * rng.normal(size=(n, 3)), site, seed=0,
                                  learner=LogisticRegression(max_iter=500))
    assert visible.accuracy.estimate == 1.0 and visible.excess == pytest.approx(1.0)
    noise = site_predictability(rng.normal(size=(n, 3)), site, seed=0, learner=LogisticRegression(max_iter=500))
    # covariates independent of the site: no classifier beats the majority share in expectation; the
    # out-of-fold accuracy is within 3 binomial SEs of it
    assert abs(noise.accuracy.estimate - noise.majority_share) < 3 * noise.accuracy.se
    assert noise.majority_site == "big"
    assert noise.pseudo_r2 < 0.01


def test_site_predictability_is_deterministic_given_the_seed():
    x, p, site, known, mixture, w = mixture_world(600, seed=21)
    a = site_predictability(x, site, seed=4, learner=LogisticRegression(max_iter=500))
    b = site_predictability(x, site, seed=4, learner=LogisticRegression(max_iter=500))
    c = site_predictability(x, site, seed=5, learner=LogisticRegression(max_iter=500))
    assert np.array_equal(a.proba, b.proba)
    assert not np.array_equal(a.proba, c.proba)  # other folds
    sub = site_predictability(x, site, seed=4, learner=LogisticRegression(max_iter=500), max_units=200)
    again = site_predictability(x, site, seed=4, learner=LogisticRegression(max_iter=500), max_units=200)
    assert sub.index.size == 200 and np.array_equal(sub.index, again.index) and np.array_equal(sub.proba, again.proba)
    assert sub.to_dict()["n"] == 200


def test_default_site_learner_is_seeded():
    x, p, site, known, mixture, w = mixture_world(300, seed=22)
    a = site_predictability(x, site, seed=2)
    b = site_predictability(x, site, seed=2)
    assert np.array_equal(a.proba, b.proba) and a.learner == "RandomForestClassifier"


def test_bad_inputs_raise_the_project_error():
    with pytest.raises(SiteproofError):
        calibration_line(np.array([0.5, 0.5, 0.5]), np.array([0.5, 0.5]))
    with pytest.raises(SiteproofError):
        rmse(np.array([0.0, 0.5]), np.array([0.5, 0.5]))
    with pytest.raises(SiteproofError):
        site_predictability(np.zeros((5, 1)), np.array(["a"] * 5))
