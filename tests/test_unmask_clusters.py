"""Clustered units in the design-based truths (intake.sitetrials) and in the unmask stage.

Outside sources: statsmodels OLS with cov_type="cluster" (CR1), turned into CR2 by the relation for whole
clusters of equal size with G/2 per arm, CR2 = CR1·(G − 1)(n − 2)/((G − 2)(n − 1)) (docs/methods-clusters.md
§2, verified there against statsmodels' use_correction=False output); Kish's (1965) design effect
1 + (m − 1)·ICC for clusters of m units.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from conftest import SMALL_RATES, small_trial
from siteproof.core.outputs import to_json_text
from siteproof.intake.sitetrials import design_ate, site_table
from siteproof.unmask.balance import within_site_balance
from siteproof.unmask.correspondence import compare_scores
from siteproof.unmask.scoring import run_unmask

from test_unmask import SPEC, linear_config, site_learner


def _cluster_randomized(sites: int, g: int, m: int, icc: float, seed: int, tau: float = 1.0):
    """``sites`` sites × ``g`` clusters × ``m`` units; g/2 whole clusters treated per site; outcome noise with
    intra-cluster correlation ``icc`` (total variance 1) and a constant effect ``tau``."""
    rng = np.random.default_rng(seed)
    n_cl = sites * g
    cluster = np.repeat(np.arange(n_cl), m)
    site = np.repeat(np.arange(sites), g * m).astype(str)
    arm = np.concatenate([rng.permutation(np.r_[np.ones(g // 2), np.zeros(g - g // 2)]) for _ in range(sites)])
    w = arm[cluster].astype(int)
    y = (np.sqrt(icc) * rng.normal(size=n_cl)[cluster] + np.sqrt(1 - icc) * rng.normal(size=cluster.size)
         + tau * w)
    return y, w, site, cluster


# ── per-site CR2 against statsmodels ───────────────────────────────────────────────────────────────────
def test_site_table_cr2_matches_statsmodels_cr1_after_the_cr2_relation():
    g, m = 12, 5
    y, w, site, cluster = _cluster_randomized(sites=2, g=g, m=m, icc=0.3, seed=3)
    table = site_table(y, w, site, clusters=cluster)
    n = g * m
    for _, row in table.iterrows():
        part = site == row["site"]
        fit = sm.OLS(y[part], sm.add_constant(w[part].astype(float))).fit(
            cov_type="cluster", cov_kwds={"groups": cluster[part]})
        cr1 = fit.bse[1] ** 2  # statsmodels CR1 = G/(G−1)·(n−1)/(n−k)·CR0
        # CR2 for equal-sized whole clusters, G/2 per arm (docs/methods-clusters.md §2)
        assert row["se"] ** 2 == pytest.approx(cr1 * (g - 1) * (n - 2) / ((g - 2) * (n - 1)), rel=1e-10)
        assert row["difference_in_means"] == pytest.approx(fit.params[1], rel=1e-10)
        assert row["df"] == pytest.approx(g - 2, rel=1e-10)  # Satterthwaite df of this design: G − 2
        half = stats.t.ppf(0.975, g - 2) * row["se"]  # the per-site CI uses t(ν), not the normal quantile
        assert row["ci_high"] - row["ci_low"] == pytest.approx(2 * half, rel=1e-10)
        assert (row["n_clusters"], row["clusters_treated"], row["clusters_control"]) == (g, g // 2, g // 2)


def test_without_clusters_the_site_table_is_the_unit_level_one():
    y, w, site, cluster = _cluster_randomized(sites=3, g=8, m=4, icc=0.2, seed=1)
    plain = site_table(y, w, site)
    assert "df" not in plain.columns and "n_clusters" not in plain.columns
    for _, row in plain.iterrows():
        part = site == row["site"]
        y1, y0 = y[part & (w == 1)], y[part & (w == 0)]
        # Neyman (1923) variance s²₁/n₁ + s²₀/n₀, by hand
        assert row["se"] ** 2 == pytest.approx(y1.var(ddof=1) / y1.size + y0.var(ddof=1) / y0.size, rel=1e-12)
    # one unit per cluster: CR2 is HC2 = Neyman (Imbens & Kolesár 2016), so the figures coincide
    single = site_table(y, w, site, known_rate=np.full(y.size, 0.5), clusters=np.arange(y.size))
    base = site_table(y, w, site, known_rate=np.full(y.size, 0.5))
    for column in ("difference_in_means", "se", "ht", "ht_se", "hajek", "hajek_se"):
        np.testing.assert_allclose(single[column], base[column], rtol=1e-10)
    ate_single, ate_base = design_ate(y, w, site, clusters=np.arange(y.size)), design_ate(y, w, site)
    assert ate_single.estimate.se == pytest.approx(ate_base.estimate.se, rel=1e-12)


# ── the design effect ──────────────────────────────────────────────────────────────────────────────────
def test_clustered_design_se_exceeds_the_unit_one_by_the_design_effect():
    m, icc = 10, 0.2
    kish = 1 + (m - 1) * icc  # Kish (1965): variance inflation of a mean over clusters of m units
    ratios = []
    for seed in range(5):
        y, w, site, cluster = _cluster_randomized(sites=4, g=50, m=m, icc=icc, seed=seed)
        clustered = design_ate(y, w, site, clusters=cluster).estimate.se
        unit = design_ate(y, w, site).estimate.se
        assert clustered > unit
        ratios.append((clustered / unit) ** 2)
    # Tolerance: the pooled CR2 variance sums 4 sites × 2 arms of 25 cluster means, ≈ 196 df in all, so one
    # variance estimate has relative SD ≈ √(2/196) ≈ 0.10 and the mean of 5 draws ≈ 0.045; the unit-level
    # variance is nearly exact.  15 % is > 3 of those SDs.
    assert np.mean(ratios) == pytest.approx(kish, rel=0.15)


def test_paired_difference_se_uses_cluster_sums():
    y, w, site, cluster = _cluster_randomized(sites=2, g=40, m=10, icc=0.3, seed=4)
    rng = np.random.default_rng(0)
    shared = rng.normal(size=cluster.max() + 1)[cluster]  # a cluster-level error common to the blind scores
    blind, design = y + shared, y
    unit = compare_scores(blind, design, 1.0)
    clustered = compare_scores(blind, design, 1.0, clusters=cluster)
    d = (blind - design) - (blind - design).mean()
    totals = pd.Series(d).groupby(cluster).sum().to_numpy()
    g = totals.size
    # Liang & Zeger (1986) sandwich for a mean with the G/(G − 1) correction, written out
    assert clustered.difference.se == pytest.approx(np.sqrt(g / (g - 1) * np.sum(totals ** 2)) / d.size, rel=1e-12)
    assert clustered.difference.se > 2 * unit.difference.se  # a pure cluster-level difference: DE = m = 10


def test_balance_compares_cluster_means_in_a_cluster_randomized_design():
    y, w, site, cluster = _cluster_randomized(sites=2, g=20, m=10, icc=0.2, seed=5)
    rng = np.random.default_rng(9)
    level = rng.normal(size=cluster.max() + 1)[cluster]  # a cluster-level covariate, balanced by design
    X = np.column_stack([level, rng.normal(size=y.size)])
    check = within_site_balance(X, ["leader", "age"], w, site, clusters=cluster)
    means = pd.Series(level).groupby(cluster).mean().to_numpy()
    arm = pd.Series(w).groupby(cluster).first().to_numpy()
    part = pd.Series(site).groupby(cluster).first().to_numpy() == "0"
    x, a = means[part], arm[part]
    n1, n0 = a.sum(), (1 - a).sum()
    # the randomization z over the clusters of the site (Imbens & Rubin 2015, ch. 6), written out
    z = (x[a == 1].mean() - x[a == 0].mean()) / np.sqrt(x.var(ddof=1) * (1 / n1 + 1 / n0))
    assert check.z.loc["leader", "0"] == pytest.approx(z, rel=1e-10)


# ── the unmask stage ───────────────────────────────────────────────────────────────────────────────────
def _numbers(card) -> dict:
    record = json.loads(to_json_text(card.to_dict()))
    record["study"].pop("clustering", None)
    # the clustered site table adds cluster counts and df, and its CI uses t(ν) where the unit one uses z
    extra = ("n_clusters", "clusters_treated", "clusters_control", "df", "ci_low", "ci_high")
    record["sites"] = [{k: v for k, v in row.items() if k not in extra} for row in record["sites"]]
    return record


def _same(a, b, path="card"):
    """Every number of two JSON records equal to 1e-9 relative (floating-point summation order), the rest equal."""
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for key in a:
            _same(a[key], b[key], f"{path}.{key}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-12), path
    else:
        assert a == b, path


@pytest.fixture(scope="module")
def small():
    from siteproof.blind.analysis import run_blind
    from siteproof.intake.study import StudySpec, load_study

    frame = small_trial(n=600, seed=7)
    study = load_study(StudySpec(**dict(SPEC, rates=SMALL_RATES)), frame=frame)
    claims = run_blind(study, linear_config())
    return frame, study, claims


def test_unclustered_run_equals_singleton_clusters_and_reads_as_unclustered(small):
    _, study, claims = small
    assert study.cluster is None
    base = run_unmask(study, claims, site_learner=site_learner())
    assert "clustering" not in base.study and base.clustering["clustered"] is False
    singles = dataclasses.replace(study, cluster=np.arange(study.blind.y.size).astype(str))
    single = run_unmask(singles, claims, site_learner=site_learner())
    # one unit per cluster: every cluster-sum SE is s/√n and CR2 is HC2 = Neyman, so all numbers agree
    # (rank-metric bootstraps are unit-level in both runs)
    _same(_numbers(base), _numbers(single))
    assert single.clustering["clustered"] is True and single.clustering["n_clusters"] == study.blind.y.size


def test_clustered_run_uses_cluster_sums_and_records_it(small):
    _, study, claims = small
    rng = np.random.default_rng(2)
    # clusters of ≈ 10 units within site and arm: a cluster-randomized pattern on the same units
    site, w = np.asarray(study.site).astype(str), study.blind.w
    labels = np.empty(w.size, dtype=object)
    for s in np.unique(site):
        for a in (0, 1):
            idx = rng.permutation(np.flatnonzero((site == s) & (w == a)))
            labels[idx] = [f"{s}-{a}-{i // 10}" for i in range(idx.size)]
    clustered = dataclasses.replace(study, cluster=labels)
    card = run_unmask(clustered, claims, site_learner=site_learner())
    assert card.clustering["clustered"] is True and card.clustering["n_clusters"] == len(set(labels))
    scored = np.asarray(labels, dtype=object)[card.design.included]
    psi = card.design.estimate.scores
    for ate in card.ate:
        d = ate.comparison.difference
        dev = d.scores - d.scores.mean()
        totals = pd.Series(dev).groupby(scored).sum().to_numpy()
        g = totals.size
        # every paired D's SE is the cluster-sum SE (Liang & Zeger 1986) of its per-unit differences
        assert d.se == pytest.approx(np.sqrt(g / (g - 1) * np.sum(totals ** 2)) / dev.size, rel=1e-10)
    assert psi.size == scored.size
    assert {"df", "n_clusters", "clusters_treated", "clusters_control"} <= set(card.sites.columns)


def test_gates_contrast_se_is_the_cluster_sum_se_of_its_linearisation():
    from siteproof.unmask.correspondence import group_contrast_se

    rng = np.random.default_rng(11)
    n = 400
    d = rng.normal(size=n)
    high, low = np.arange(n) < 120, np.arange(n) >= 300
    # singletons: the unit formula of evaluation.gates, sd²_H/n_H + sd²_L/n_L (n − 1 divisors), by hand
    by_hand = np.sqrt(d[high].var(ddof=1) / high.sum() + d[low].var(ddof=1) / low.sum())
    assert group_contrast_se(d, high, low, np.arange(n)) == pytest.approx(by_hand, rel=1e-12)
    # a cluster shift shared by both groups cancels in the contrast: with a shift of SD 3 in 40 clusters
    # spanning both groups, the contrast's SE stays near the no-shift one (√(1/120 + 1/100) ≈ 0.135) while
    # the high group's own SE carries the shift (≈ 3/√40 ≈ 0.47); 0.25 separates the two by > 3 SEs
    cluster = np.arange(n) % 40
    shifted = d + 3.0 * rng.normal(size=40)[cluster]
    assert group_contrast_se(shifted, high, low, cluster) < 0.25 < group_contrast_se(shifted, high, None, cluster)
