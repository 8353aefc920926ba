"""The blind analysis with clustered units: grouped folds, cluster-robust SEs, half-samples of whole clusters."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from sklearn.neighbors import KNeighborsClassifier

from conftest import fast_config, small_trial
from siteproof.blind.analysis import run_blind
from siteproof.blind.average import aipw
from siteproof.blind.evaluation import gates, half_sample_batches
from siteproof.blind.nuisance import cross_fit_nuisances, make_folds
from siteproof.blind.rules import rule_value
from siteproof.intake.study import StudySpec, load_study

SPEC = dict(data="trial.csv", outcome="score", treatment="treated", site="site", id="uid", cost="cost")


def _cluster_trial(seed: int = 0, sites: int = 4, per_site: int = 20, m: int = 25, icc: float = 0.2):
    """Whole clusters assigned at site rates 0.35–0.8; a cluster-level covariate z unique per cluster."""
    rng = np.random.default_rng(seed)
    rates = np.linspace(0.35, 0.8, sites)
    g = sites * per_site
    w_c = np.concatenate([rng.permutation(np.arange(per_site) < round(r * per_site)) for r in rates]).astype(int)
    z_c = rng.normal(size=g)
    clusters = np.repeat(np.arange(g), m)
    y = np.repeat(rng.normal(0, np.sqrt(icc), g), m) + rng.normal(0, np.sqrt(1 - icc), g * m) + np.repeat(w_c, m)
    return np.repeat(z_c, m)[:, None], y, np.repeat(w_c, m), clusters


def test_grouped_folds_stop_cluster_mates_from_revealing_the_arm():
    X, y, w, clusters = _cluster_trial()
    folds = make_folds(w, 5, 1, groups=clusters)
    assert all(np.unique(folds[clusters == c]).size == 1 for c in np.unique(clusters))
    knn = {"propensity": KNeighborsClassifier(n_neighbors=1)}
    grouped = cross_fit_nuisances(X, y, w, folds, learners=knn, clip=(1e-6, 1 - 1e-6))
    units = cross_fit_nuisances(X, y, w, make_folds(w, 5, 1), learners=knn, clip=(1e-6, 1 - 1e-6))
    # Theory: with unit folds the 1-nearest neighbour in z is a cluster-mate (same z, same arm), so ê = W
    # exactly and corr = 1; with whole clusters per fold it is another cluster, whose arm is independent
    # of this one's given the site rates (known rates alone give corr ≈ 0.2 here, see methods-clusters.md §5).
    assert np.corrcoef(units.e_raw, w)[0, 1] > 0.99
    assert np.corrcoef(grouped.e_raw, w)[0, 1] < 0.5


def test_aipw_cluster_se_follows_the_design_effect():
    X, y, w, clusters = _cluster_trial(seed=3, sites=1, per_site=80, icc=0.2)
    e = np.full(y.size, 0.5)
    mu1, mu0 = np.full(y.size, y[w == 1].mean()), np.full(y.size, y[w == 0].mean())
    unit, clus = aipw(y, w, e, mu0, mu1), aipw(y, w, e, mu0, mu1, clusters)
    assert unit.estimate == clus.estimate
    # Kish (1965): Var ratio 1 + (m − 1)·ICC = 5.8, SE ratio 2.41.  The cluster variance estimate has 79
    # degrees of freedom, relative SD √(2/79) ≈ 16 % in variance, 8 % in SE; ± 25 % is about 3 SDs.
    ratio = clus.se / unit.se
    assert clus.se >= unit.se
    assert abs(ratio / np.sqrt(1 + 24 * 0.2) - 1) < 0.25


def test_singleton_clusters_give_the_unit_level_figures():
    # cluster_mean_se with one unit per cluster is s²/n exactly (docs/methods-clusters.md §1).
    rng = np.random.default_rng(5)
    n = 300
    g0, g1, tau = rng.normal(size=n), rng.normal(1, 2, n), rng.normal(size=n)
    single = np.arange(n)
    a, b = rule_value(tau > 0, g0, g1), rule_value(tau > 0, g0, g1, clusters=single)
    assert np.isclose(a.value.se, b.value.se, rtol=1e-12) and np.isclose(a.gain.se, b.gain.se, rtol=1e-12)
    ga, gb = gates(tau, g1 - g0, 4), gates(tau, g1 - g0, 4, clusters=single)
    # The paired cluster form uses one factor G/(G − 1) = 300/299 where the unit form uses n_g/(n_g − 1) =
    # 75/74 per group: the variances differ by that ratio (≈ 1 %), the SEs by ≈ 0.5 %.
    assert np.isclose(gb.high_minus_low.se, ga.high_minus_low.se * np.sqrt((300 / 299) / (75 / 74)), rtol=1e-3)
    assert np.isclose(ga.groups[0].estimate.se, gb.groups[0].estimate.se, rtol=1e-12)


def test_half_samples_keep_clusters_whole():
    clusters = np.repeat(np.arange(30), 7)
    for units in half_sample_batches(clusters.size, 20, 4, clusters):
        chosen = clusters[units[0]]
        assert np.array_equal(np.bincount(chosen, minlength=30)[np.unique(chosen)], np.full(15, 7))


def test_run_blind_with_and_without_clusters():
    study = load_study(StudySpec(**SPEC), frame=small_trial(n=800))
    plain = run_blind(study.blind, fast_config(tree=False))
    assert plain.record["data"]["clustered"] is False and plain.record["data"]["n_clusters"] is None
    scores = plain.units["score_aipw"].to_numpy()
    ate = {r["estimator"]: r for r in plain.record["ate"]}
    # The None path keeps the unit-level SE sd(ψ)/√n (n − 1 divisor), to rounding.
    assert np.isclose(ate["aipw"]["se"], np.std(scores, ddof=1) / np.sqrt(scores.size), rtol=1e-12)
    codes = np.random.default_rng(0).permutation(np.arange(study.blind.y.size) % 80)
    clustered = run_blind(dataclasses.replace(study.blind, clusters=codes), fast_config(tree=False))
    folds = clustered.units["fold"].to_numpy()
    assert all(np.unique(folds[codes == c]).size == 1 for c in range(80))
    assert clustered.record["data"]["clustered"] is True and clustered.record["data"]["n_clusters"] == 80
    assert clustered.record["cate"][1]["blp"]["covariance"] == "cluster"


def test_rule_value_by_group_takes_cluster_robust_ses_within_each_group():
    """Per group, the value SE is the cluster-sum SE of that group's value scores (Liang & Zeger 1986),
    written out here; without clusters it is sd/√n."""
    from siteproof.blind.rules import rule_value_by_group
    from siteproof.core.clusters import cluster_mean_se

    rng = np.random.default_rng(7)
    n = 240
    group = np.repeat(["a", "b"], n // 2)
    cluster = np.repeat(np.arange(24), 10)
    shared = rng.normal(size=24)[cluster]
    g0, g1 = shared + rng.normal(size=n), shared + 1 + rng.normal(size=n)
    pi = (rng.random(n) < 0.5).astype(float)
    plain = rule_value_by_group(pi, g0, g1, group)
    clustered = rule_value_by_group(pi, g0, g1, group, clusters=cluster)
    for label in ("a", "b"):
        sel = group == label
        psi = pi[sel] * g1[sel] + (1 - pi[sel]) * g0[sel]
        assert plain[label].value.se == pytest.approx(psi.std(ddof=1) / np.sqrt(sel.sum()), rel=1e-10)
        assert clustered[label].value.se == pytest.approx(cluster_mean_se(psi, cluster[sel]), rel=1e-10)
        assert clustered[label].value.estimate == pytest.approx(plain[label].value.estimate, rel=1e-12)
