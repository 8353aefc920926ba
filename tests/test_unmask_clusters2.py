"""Clustered units in propensity recovery, transport and the sensitivity bounds.

Outside sources: statsmodels OLS with cov_type="HC2" (the unit-level calibration SEs, which the CR2 sandwich
must reproduce with one unit per cluster, Bell & McCaffrey 2002); scipy.linalg.fractional_matrix_power for
an independent (I − H_gg)^(−1/2) in the CR2 formula written out here; Kish's (1965) design effect
1 + (m − 1)·ICC for clusters of m units.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import linalg

from conftest import SMALL_RATES, small_trial
from siteproof.blind.rules import rule_value
from siteproof.intake.study import StudySpec, fingerprint, load_study
from siteproof.unmask.recovery import (
    calibration_bins,
    calibration_line,
    cluster_ols_se,
    recover_propensity,
    site_means,
)
from siteproof.unmask.sensitivity import sensitivity_analysis
from siteproof.unmask.transport import clustered_rule_value, training_data

from test_unmask import SPEC


def _cluster_sum_se(values: np.ndarray, clusters: np.ndarray) -> float:
    """Liang & Zeger (1986) sandwich for a mean with the G/(G − 1) factor, written out."""
    totals = pd.Series(values - values.mean()).groupby(clusters).sum().to_numpy()
    g = totals.size
    return float(np.sqrt(g / (g - 1) * np.sum(totals ** 2)) / values.size)


def _propensities(n: int = 300, m: int = 6, seed: int = 0):
    """ê, known rate, site and clusters of m units with a cluster-level error in ê (ICC > 0)."""
    rng = np.random.default_rng(seed)
    cluster = np.repeat(np.arange(n // m), m)
    site = np.where(cluster < (n // m) // 2, "a", "b")
    rate = np.where(site == "a", 0.4, 0.7) + 0.05 * rng.normal(size=cluster.max() + 1)[cluster]
    e_hat = np.clip(rate + 0.05 * rng.normal(size=cluster.max() + 1)[cluster] + 0.03 * rng.normal(size=n),
                    0.05, 0.95)
    w = (rng.uniform(size=n) < rate).astype(int)
    return e_hat, rate, site, w, cluster


# ── propensity recovery ────────────────────────────────────────────────────────────────────────────────
def test_recovery_without_clusters_is_the_unit_figures_and_singletons_reproduce_them():
    e_hat, rate, site, w, _ = _propensities()
    slope, intercept = calibration_line(e_hat, rate)
    fit = sm.OLS(rate, sm.add_constant(e_hat)).fit(cov_type="HC2")  # statsmodels HC2, the unit-level SEs
    assert (intercept.se, slope.se) == pytest.approx(tuple(fit.bse), rel=1e-10)
    single = np.arange(e_hat.size)
    s1, i1 = calibration_line(e_hat, rate, single)
    # CR2 with one unit per cluster is HC2 (Bell & McCaffrey 2002)
    assert (i1.se, s1.se) == pytest.approx(tuple(fit.bse), rel=1e-10)
    base, same = calibration_bins(e_hat, rate), calibration_bins(e_hat, rate, clusters=single)
    pd.testing.assert_frame_equal(base, same, rtol=1e-12)
    pd.testing.assert_frame_equal(site_means(e_hat, rate, site), site_means(e_hat, rate, site, single), rtol=1e-12)
    ranks = pd.Series(e_hat).rank(method="first").to_numpy()
    which = np.minimum((ranks - 1) * 10 // e_hat.size, 9).astype(int)
    for b in range(10):  # the unit bin SE, sd/√n (n − 1 divisor) by hand
        r = rate[which == b]
        assert base.loc[b, "known_rate_se"] == pytest.approx(r.std(ddof=1) / np.sqrt(r.size), rel=1e-12)


def test_clustered_calibration_ses_are_the_cluster_formulas_written_out():
    e_hat, rate, site, w, cluster = _propensities()
    slope, intercept = calibration_line(e_hat, rate, cluster)
    X = sm.add_constant(e_hat)
    beta = np.linalg.lstsq(X, rate, rcond=None)[0]
    resid = rate - X @ beta
    bread = np.linalg.inv(X.T @ X)
    meat = np.zeros((2, 2))
    for g in np.unique(cluster):
        rows = cluster == g
        h_gg = X[rows] @ bread @ X[rows].T
        a_g = linalg.fractional_matrix_power(np.eye(rows.sum()) - h_gg, -0.5).real  # (I − H_gg)^(−1/2)
        s_g = X[rows].T @ a_g @ resid[rows]
        meat += np.outer(s_g, s_g)
    cr2 = np.sqrt(np.diag(bread @ meat @ bread))  # Bell & McCaffrey (2002) CR2, written out
    assert (intercept.se, slope.se) == pytest.approx(tuple(cr2), rel=1e-8)
    assert slope.estimate == pytest.approx(beta[1], rel=1e-10)
    bins = calibration_bins(e_hat, rate, clusters=cluster)
    ranks = pd.Series(e_hat).rank(method="first").to_numpy()
    which = np.minimum((ranks - 1) * 10 // e_hat.size, 9).astype(int)
    for b in range(10):
        inside = which == b
        assert bins.loc[b, "known_rate_se"] == pytest.approx(_cluster_sum_se(rate[inside], cluster[inside]), rel=1e-10)
    by_site = site_means(e_hat, rate, site, cluster)
    for _, row in by_site.iterrows():
        inside = site == row["site"]
        assert row["e_hat_se"] == pytest.approx(_cluster_sum_se(e_hat[inside], cluster[inside]), rel=1e-10)
    whole = recover_propensity(e_hat, rate, site, w, clusters=cluster)
    assert whole.calibration_slope.se == pytest.approx(cr2[1], rel=1e-8)
    # cluster-level errors in ê and e_S (ICC well above 0 in the residuals): the clustered SE is larger
    assert slope.se > calibration_line(e_hat, rate)[0].se


def test_cluster_ols_se_needs_two_clusters():
    e_hat, rate, *_ = _propensities(n=60)
    X = sm.add_constant(e_hat)
    assert np.all(np.isnan(cluster_ols_se(X, rate - rate.mean(), np.zeros(60))))


# ── sensitivity ────────────────────────────────────────────────────────────────────────────────────────
def _cluster_randomized(g: int, m: int, icc: float, seed: int):
    """g clusters of m units, half of them treated whole; outcome with ICC ``icc`` (variance 1), no effect."""
    rng = np.random.default_rng(seed)
    cluster = np.repeat(np.arange(g), m)
    w = rng.permutation(np.r_[np.ones(g // 2), np.zeros(g - g // 2)])[cluster]
    y = np.sqrt(icc) * rng.normal(size=g)[cluster] + np.sqrt(1 - icc) * rng.normal(size=g * m)
    return y, w, cluster


def test_sensitivity_se_takes_clusters_and_none_is_unchanged():
    y, w, cluster = _cluster_randomized(g=40, m=5, icc=0.3, seed=1)
    e, zero = np.full(y.size, 0.5), np.zeros(y.size)
    plain = sensitivity_analysis(y, w, e, zero, zero)
    psi = 2 * w * y - 2 * (1 - w) * y  # AIPW scores with μ̂ = 0 and e = 1/2
    assert plain.estimate.se == pytest.approx(psi.std(ddof=1) / np.sqrt(psi.size), rel=1e-12)
    clustered = sensitivity_analysis(y, w, e, zero, zero, clusters=cluster)
    assert clustered.estimate.se == pytest.approx(_cluster_sum_se(psi, cluster), rel=1e-12)
    assert clustered.estimate.estimate == pytest.approx(plain.estimate.estimate, rel=1e-12)
    assert (clustered.sigma2, clustered.nu2) == (plain.sigma2, plain.nu2)  # the bound ignores the clustering


def test_clustered_sensitivity_se_exceeds_the_unit_one_by_the_design_effect():
    m, icc = 10, 0.2
    kish = 1 + (m - 1) * icc  # Kish (1965): 2.8
    ratios = []
    for seed in range(5):
        y, w, cluster = _cluster_randomized(g=200, m=m, icc=icc, seed=seed)
        e, zero = np.full(y.size, 0.5), np.zeros(y.size)
        unit = sensitivity_analysis(y, w, e, zero, zero).estimate.se
        clustered = sensitivity_analysis(y, w, e, zero, zero, clusters=cluster).estimate.se
        assert clustered > unit
        ratios.append((clustered / unit) ** 2)
    # Tolerance: ψ = ±2y is constant in sign within a cluster, so its ICC is that of y and the variance ratio
    # is the design effect.  The cluster-sum variance over 200 clusters has relative SD ≈ √(2/199) ≈ 0.10 per
    # draw, ≈ 0.045 for the mean of 5; the unit variance is nearly exact.  15 % is > 3 of those SDs.
    assert np.mean(ratios) == pytest.approx(kish, rel=0.15)


# ── transport ──────────────────────────────────────────────────────────────────────────────────────────
def test_training_data_keeps_and_recodes_the_cluster_codes():
    study = load_study(StudySpec(**dict(SPEC, rates=SMALL_RATES)), frame=small_trial(n=300, seed=3))
    data = study.blind
    assert training_data(data, np.ones(data.n, bool)).clusters is None  # unclustered stays unclustered
    rng = np.random.default_rng(0)
    codes = rng.permutation(np.arange(data.n) // 5)  # shuffled integer codes, as the blind view carries
    clustered = dataclasses.replace(data, clusters=codes)
    keep = np.asarray(study.site).astype(str) != "north"
    train = training_data(clustered, keep)
    kept = codes[keep]
    # same partition of the kept rows, codes 0..G'−1 in order of first appearance
    assert train.n_clusters == np.unique(kept).size
    assert sorted(set(train.clusters)) == list(range(np.unique(kept).size))
    pairs = pd.DataFrame({"old": kept, "new": train.clusters}).drop_duplicates()
    assert pairs["old"].is_unique and pairs["new"].is_unique
    assert train.fingerprint == fingerprint(train.row_key, train.y, train.w, train.X, train.feature_names,
                                            train.cost, train.clusters)
    plain = training_data(data, keep)
    assert plain.fingerprint == fingerprint(plain.row_key, plain.y, plain.w, plain.X, plain.feature_names,
                                            plain.cost)


def test_transported_rule_ses_use_cluster_sums():
    y, w, cluster = _cluster_randomized(g=30, m=4, icc=0.4, seed=2)
    rng = np.random.default_rng(5)
    g0, g1 = y - w, y + rng.normal(size=y.size)
    pi = (rng.uniform(size=y.size) < 0.4).astype(int)
    val = rule_value(pi, g0, g1)
    assert clustered_rule_value(val, None) is val
    moved = clustered_rule_value(val, cluster)
    assert moved.value.estimate == val.value.estimate and moved.gain.estimate == val.gain.estimate
    assert moved.value.se == pytest.approx(_cluster_sum_se(val.value.scores, cluster), rel=1e-12)
    assert moved.gain.se == pytest.approx(_cluster_sum_se(val.gain.scores, cluster), rel=1e-12)


# ── wired through run_unmask ───────────────────────────────────────────────────────────────────────────
def test_run_unmask_passes_the_clusters_to_recovery_and_sensitivity():
    from siteproof.blind.analysis import run_blind
    from siteproof.unmask.scoring import run_unmask

    from test_unmask import linear_config, site_learner

    study = load_study(StudySpec(**dict(SPEC, rates=SMALL_RATES)), frame=small_trial(n=600, seed=7))
    claims = run_blind(study, linear_config())
    # blocks of 8 rows in data order, prefixed with the site so that clusters nest in sites
    site = np.asarray(study.site).astype(str)
    labels = np.array([f"{s}-{i // 8}" for i, s in enumerate(site)], dtype=object)
    card = run_unmask(dataclasses.replace(study, cluster=labels), claims, site_learner=site_learner())
    inc = card.design.included
    e_hat = claims.units["e_hat"].to_numpy(float)[inc]
    rate = np.asarray(study.known_rate, float)[inc]
    slope, _ = calibration_line(e_hat, rate, labels[inc])
    assert card.propensity.calibration_slope.se == pytest.approx(slope.se, rel=1e-12)
    assert card.propensity.calibration_slope.se != pytest.approx(calibration_line(e_hat, rate)[0].se, rel=1e-6)
    sens = card.sensitivity["estimate"]
    psi = next(a for a in card.ate if a.estimator == "aipw").blind.scores
    assert sens["se"] == pytest.approx(_cluster_sum_se(psi, labels[inc]), rel=1e-8)
