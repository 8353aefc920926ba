"""Omitted-variable-bias sensitivity of the blind AIPW: the OLS special case, robustness values, benchmarks."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm

from siteproof.blind.average import aipw
from siteproof.blind.nuisance import GcvRidge, cross_fit_nuisances, default_learners, make_folds
from siteproof.core.errors import SiteproofError
from siteproof.core.estimates import Estimate
from siteproof.unmask.sensitivity import (
    bias_bound,
    covariate_groups,
    ovb_scale,
    robustness_value,
    robustness_value_alpha,
    sensitivity_analysis,
)


def _ols_case(seed: int = 1, n: int = 500):
    """Y = D + Xβ + 0.8 Z + ε with D = 0.5 X₁ + 0.6 Z + η; Z is the omitted confounder."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    z = rng.normal(size=n)
    d = 0.5 * X[:, 0] + 0.6 * z + rng.normal(size=n)
    y = d + X @ np.array([0.3, -0.2, 0.1]) + 0.8 * z + rng.normal(size=n)
    return X, z, d, y


def test_linear_case_is_the_ols_omitted_variable_bias_formula():
    X, z, d, y = _ols_case()
    short = sm.OLS(y, sm.add_constant(np.column_stack([d, X]))).fit()
    long = sm.OLS(y, sm.add_constant(np.column_stack([d, X, z]))).fit()
    d_on_xz = sm.OLS(d, sm.add_constant(np.column_stack([X, z]))).fit()
    # partial R² from a t statistic, R² = t²/(t² + df) (Cinelli & Hazlett 2020, section 4)
    r2_y = long.tvalues[-1] ** 2 / (long.tvalues[-1] ** 2 + long.df_resid)
    r2_d = d_on_xz.tvalues[-1] ** 2 / (d_on_xz.tvalues[-1] ** 2 + d_on_xz.df_resid)
    # partially linear model: Riesz representer α = D̃/E[D̃²], m(W; α) = ∂α/∂D = 1/E[D̃²]
    d_tilde = sm.OLS(d, sm.add_constant(X)).fit().resid
    riesz = d_tilde / np.mean(d_tilde**2)
    sigma2, nu2 = ovb_scale(short.resid, np.full(d.size, 1.0 / np.mean(d_tilde**2)))
    assert nu2 == pytest.approx(np.mean(riesz**2), rel=1e-12)  # Riesz identity E[m(W; α)] = E[α²], exact here
    scale = math.sqrt(sigma2 * nu2)
    # S = se(τ̂)·√df, statsmodels OLS as reference (Frisch–Waugh–Lovell; exact up to rounding)
    assert scale == pytest.approx(short.bse[1] * math.sqrt(short.df_resid), rel=1e-10)
    # the OLS bias identity |τ̂_short − τ̂_long| = se·√df·√(R²_Y R²_D/(1 − R²_D)) holds exactly in sample
    # (Cinelli & Hazlett 2020, eq. for the bias in terms of partial R²; statsmodels fits as reference)
    assert bias_bound(scale, r2_y, r2_d) == pytest.approx(abs(short.params[1] - long.params[1]), rel=1e-9)


def test_robustness_value_of_the_darfur_example_from_memory():
    # Cinelli & Hazlett (2020), Darfur example (from memory): estimate 0.0973, SE 0.0232, df 783,
    # RV = 13.9 %, RV at α = 0.05 = 7.6 %.  Tolerance: the published inputs and outputs are rounded
    # (0.05 percentage points each, plus ≈0.03 from the rounding of the SE).
    estimate, se, df = 0.0973, 0.0232, 783
    scale = se * math.sqrt(df)
    assert robustness_value(estimate / scale) == pytest.approx(0.139, abs=0.001)
    assert robustness_value_alpha(estimate, se, scale, 0.05, df=df) == pytest.approx(0.076, abs=0.001)


@pytest.mark.parametrize("f", [0.05, 0.3, 1.0, 4.0])
def test_robustness_value_is_where_the_bound_reaches_the_estimate(f):
    # closed form: with r_Y = r_D = RV the bound S·RV/√(1 − RV) equals f·S (Cinelli & Hazlett 2020)
    rv = robustness_value(f)
    assert bias_bound(2.0, rv, rv) == pytest.approx(2.0 * f, rel=1e-12)
    assert robustness_value(-1.0) == 0.0


def test_rv_at_alpha_with_ols_uses_the_t_quantile():
    X, _, d, y = _ols_case(seed=3)
    fit = sm.OLS(y, sm.add_constant(np.column_stack([d, X]))).fit()
    df, t = fit.df_resid, fit.tvalues[1]
    scale = fit.bse[1] * math.sqrt(df)
    # f_α = |t|/√df − t*_{0.975, df−1}/√(df − 1) (Cinelli & Hazlett 2020), scipy t quantile via statsmodels df
    from scipy import stats
    f_alpha = abs(t) / math.sqrt(df) - stats.t.ppf(0.975, df - 1) / math.sqrt(df - 1)
    assert robustness_value_alpha(fit.params[1], fit.bse[1], scale, 0.05, df=int(df)) == pytest.approx(
        robustness_value(f_alpha), rel=1e-9)


def _confounded(seed: int = 5, n: int = 3000):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    e = 1 / (1 + np.exp(-(0.8 * X[:, 0] + 0.3 * X[:, 1])))
    w = (rng.random(n) < e).astype(np.int8)
    y = w + X[:, 0] + 0.5 * X[:, 1] + rng.normal(size=n)
    return X, w, y


def _linear_fit(X, y, w, folds):
    learners = {k: v["linear"] for k, v in default_learners(False, 1).items()}
    return cross_fit_nuisances(X, y, w, folds, learners=learners, seed=1), learners


def test_aipw_estimate_and_benchmarks():
    X, w, y = _confounded()
    folds = make_folds(w, 5, 1)
    nuis, learners = _linear_fit(X, y, w, folds)
    res = sensitivity_analysis(y, w, nuis.e_hat, nuis.mu0, nuis.mu1, X=X, feature_names=["a", "b", "c"],
                               covariates=["a", "b", "c"], folds=folds, learner=GcvRidge(), realized_bias=0.2)
    # the estimate is the blind AIPW itself (same scores)
    assert res.estimate.estimate == pytest.approx(aipw(y, w, nuis.e_hat, nuis.mu0, nuis.mu1).estimate, rel=1e-12)
    bench = {b.covariate: b for b in res.benchmarks}
    # c is independent of treatment and outcome: its population partial R²s are 0; with n = 3000 a
    # sampling error of order 1/n is expected, 0.01 is a generous bound
    assert bench["c"].r2_treatment < 0.01 and bench["c"].r2_outcome < 0.01
    # a is the strongest confounder (coefficient 0.8 on the logit, 1 on the outcome)
    assert res.strongest.covariate == "a"
    assert bench["a"].r2_outcome > 0.3 and bench["a"].r2_treatment > 0.05
    # RV to design: the bound at r_Y = r_D = RV equals the realized bias (closed form)
    rv = res.robustness_value_to_design
    assert bias_bound(res.scale, rv, rv) == pytest.approx(0.2, rel=1e-9)
    assert res.warned is True and res.to_dict()["warned"] is True
    assert set(res.to_dict()) >= {"estimator", "robustness_value", "robustness_value_to_design", "benchmarks",
                                  "realized_bias", "warned"}


def test_refit_benchmark_bounds_the_shift_from_dropping_the_covariate():
    X, w, y = _confounded(seed=7)
    folds = make_folds(w, 5, 2)
    nuis, learners = _linear_fit(X, y, w, folds)
    res = sensitivity_analysis(y, w, nuis.e_hat, nuis.mu0, nuis.mu1, X=X, feature_names=["a", "b", "c"],
                               covariates=["a"], folds=folds, mode="refit", learners=learners)
    short_nuis, _ = _linear_fit(X[:, 1:], y, w, folds)
    short = sensitivity_analysis(y, w, short_nuis.e_hat, short_nuis.mu0, short_nuis.mu1)
    shift = abs(short.estimate.estimate - res.estimate.estimate)
    b = res.benchmarks[0]
    # Cauchy–Schwarz (Chernozhukov et al. 2022): |θ_short − θ_long| ≤ S_short·√(r_Y r_D/(1 − r_D)); the
    # population inequality, checked with a 10 % allowance for the estimation error of the four moments
    assert shift <= 1.1 * bias_bound(short.scale, b.r2_outcome, b.r2_treatment)
    # and dropping a is a large confounder here: the bound is not vacuous either
    assert shift > 0.3 * bias_bound(short.scale, b.r2_outcome, b.r2_treatment)


def test_riesz_identity_for_the_ate():
    # E[m(W; α)] = E[α²] for the true propensity (Riesz representation, Chernozhukov et al. 2022): the plug-in
    # mean(α²) and ν² = mean(1/e + 1/(1 − e)) agree within 4 Monte Carlo SEs of their per-unit difference
    from siteproof.unmask.sensitivity import ate_riesz
    rng = np.random.default_rng(0)
    e = rng.uniform(0.1, 0.9, 20000)
    w = (rng.random(e.size) < e).astype(float)
    alpha, m = ate_riesz(w, e)
    _, nu2 = ovb_scale(rng.normal(size=e.size), m)
    diff = alpha**2 - m
    assert abs(np.mean(alpha**2) - nu2) < 4 * diff.std(ddof=1) / np.sqrt(e.size)


def test_groups_and_errors():
    names = ["age", "age_band=old", "book=a", "book:missing", "bookshelf"]
    assert covariate_groups(names, ["age", "book", "bookshelf"]) == {"age": [0], "book": [2, 3], "bookshelf": [4]}
    y = np.ones(10)
    with pytest.raises(SiteproofError):
        sensitivity_analysis(y, np.r_[np.zeros(5), np.ones(5)], np.full(10, 0.5), y, y)  # no residual variance
    X, w, yy = _confounded(n=200)
    with pytest.raises(SiteproofError):
        sensitivity_analysis(yy, w, np.full(200, 0.5), yy * 0, yy * 0, X=X, feature_names=["a", "b", "c"],
                             covariates=["a"])  # benchmarks without folds
    res = sensitivity_analysis(yy, w, np.full(200, 0.5), yy * 0, yy * 0)
    assert res.warned is None and res.robustness_value_to_design is None
    assert isinstance(res.estimate, Estimate)


def test_hook_from_a_study_and_its_sidecar():
    import warnings

    import pandas as pd

    from siteproof.core.errors import SiteproofWarning
    from siteproof.intake.study import StudySpec, load_study
    from siteproof.simulation.simulate import simulate
    from siteproof.unmask.sensitivity import sensitivity_for_claims

    trial = simulate("hidden_branch", n=400, seed=2)
    roles = trial.design.roles
    spec = StudySpec(data=trial.data, outcome=roles.outcome, treatment=roles.treatment, site=roles.site, id=roles.id,
                     covariates=["spring_wcpm", "age"], rates=dict(trial.rates))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        study = load_study(spec)
    d = study.blind
    folds = make_folds(d.w, 3, 0)
    nuis, _ = _linear_fit(d.X, d.y, d.w, folds)
    units = pd.DataFrame({"e_hat": nuis.e_hat, "mu0": nuis.mu0, "mu1": nuis.mu1, "fold": folds})
    keep = np.arange(d.n) % 7 != 0
    bias = Estimate.from_value("blind − design", 1.5, 0.3, estimand="difference")
    hook = sensitivity_for_claims(study, units, keep, bias)
    direct = sensitivity_analysis(d.y[keep], d.w[keep], nuis.e_hat[keep], nuis.mu0[keep], nuis.mu1[keep], X=d.X[keep],
                                  feature_names=d.feature_names, covariates=d.covariates, folds=folds[keep],
                                  realized_bias=bias)
    assert hook.to_dict() == direct.to_dict()
