"""Intake of a cluster column: nesting, the assignment pattern, cluster-level covariates, blind codes."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from siteproof import StudySpec, load_study
from siteproof.core.errors import SiteproofError


def _frame(seed: int = 3, sites: int = 3, per_site: int = 6, m: int = 8, cluster_randomized: bool = True):
    """Sites × clusters × units with a cluster-level covariate (one value per cluster) and a unit covariate."""
    rng = np.random.default_rng(seed)
    rows = []
    for s in range(sites):
        for c in range(per_site):
            arm = c % 2
            level = rng.normal()
            for _ in range(m):
                w = arm if cluster_randomized else rng.integers(0, 2)
                rows.append({"site": f"S{s}", "cluster": f"S{s}-{c}", "w": w, "leader": round(level, 3),
                             "age": rng.normal(), "y": rng.normal() + w})
    return pd.DataFrame(rows)


def _load(frame: pd.DataFrame, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_study(StudySpec(data=frame, outcome="y", treatment="w", site="site", **kw))


def test_cluster_randomized_design_is_recognized_and_counted_per_site():
    study = _load(_frame(), cluster="cluster")
    design = study.cluster_design
    assert design is not None and design.cluster_randomized
    assert design.n_clusters == 18 and design.per_site == {f"S{s}": (3, 3, 0) for s in range(3)}
    assert any("cluster-randomized" in note for note in study.warnings)


def test_treatment_varying_within_clusters_is_a_correlation_structure_only():
    study = _load(_frame(cluster_randomized=False), cluster="cluster")
    assert not study.cluster_design.cluster_randomized
    assert any("correlation structure only" in note for note in study.warnings)


def test_a_cluster_level_covariate_is_kept_only_when_the_cluster_is_declared():
    frame = _frame()
    without = _load(frame.drop(columns="cluster"))
    assert "leader" not in without.blind.covariates  # each value occurs in one site: a copy of the site
    with_cluster = _load(frame, cluster="cluster")
    assert "leader" in with_cluster.blind.covariates and with_cluster.cluster_level == ("leader",)
    assert "cluster" not in with_cluster.blind.covariates  # a role column is never a covariate


def test_a_site_level_covariate_is_still_dropped_with_clusters():
    frame = _frame()
    frame["region"] = frame["site"].map({"S0": "n", "S1": "s", "S2": "e"})
    study = _load(frame, cluster="cluster")
    assert "region" not in study.blind.covariates


def test_blind_codes_are_shuffled_integers_that_keep_the_grouping():
    frame = _frame()
    study = _load(frame, cluster="cluster")
    codes = study.blind.clusters
    assert codes.dtype == np.int64 and sorted(set(codes)) == list(range(18))
    # same code ⇔ same label
    pairs = pd.DataFrame({"code": codes, "label": study.cluster}).drop_duplicates()
    assert len(pairs) == 18
    first_seen = pd.unique(codes)
    assert not np.array_equal(first_seen, np.arange(18))  # not the order of appearance (which follows the sites)


def test_clusters_change_the_fingerprint_and_one_unit_per_cluster_is_the_unclustered_study():
    frame = _frame()
    plain = _load(frame.drop(columns="cluster"))
    frame["unit"] = [f"u{i}" for i in range(len(frame))]
    singleton = _load(frame.drop(columns="cluster"), cluster="unit")
    assert singleton.blind.covariates == plain.blind.covariates
    assert singleton.blind.fingerprint == plain.blind.fingerprint  # singletons: the unclustered analysis
    assert singleton.blind.clusters is None and singleton.cluster is None
    assert any("holds one unit" in note for note in singleton.warnings)
    clustered = _load(_frame(), cluster="cluster")
    assert clustered.blind.fingerprint != plain.blind.fingerprint


def test_clusters_spanning_sites_and_missing_labels_are_refused():
    frame = _frame()
    frame.loc[0, "cluster"] = "S1-0"
    with pytest.raises(SiteproofError, match="sites"):
        _load(frame, cluster="cluster")
    frame = _frame()
    frame.loc[3, "cluster"] = None
    with pytest.raises(SiteproofError, match="cluster column 'cluster' is empty"):
        _load(frame, cluster="cluster")
    with pytest.raises(SiteproofError, match="not a column"):
        _load(_frame(), cluster="classroom")
    with pytest.raises(SiteproofError, match="both as site and as cluster"):
        _load(_frame(), cluster="site")
