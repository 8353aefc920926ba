"""Holdout benchmarks of a clustered trial: whole clusters held out, opaque cluster tokens, cluster-robust grading,
cluster-level covariates in the leak audit. Small hand-built trials (4 sites × 12 clusters × 10 units) keep it fast."""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import RidgeCV

from dataclasses import replace

from siteproof.benchmark.grade import _grade, _Grader
from siteproof.benchmark.submissions import Submission, SubmittedATE
from siteproof.benchmark.holdout import PUBLIC_DATA, grade_submissions, read_key, seal_benchmark
from siteproof.benchmark.leakaudit import audit_columns
from siteproof.core.errors import SiteproofWarning
from siteproof.intake.study import StudySpec

LEARNERS = {"mu0": RidgeCV(), "mu1": RidgeCV()}
SECRET = hashlib.sha256(b"clustered benchmark test secret").hexdigest()
RATES = {"S0": 0.5, "S1": 0.5, "S2": 0.5, "S3": 0.5}


def _frame(m: int = 10, per_site: int = 12, seed: int = 5) -> pd.DataFrame:
    """Cluster-randomized: half the clusters of each site treated, a cluster effect (ICC ≈ 0.5), a leader score."""
    rng = np.random.default_rng(seed)
    rows = []
    for s in range(4):
        for c in range(per_site):
            arm, effect, leader = c % 2, rng.normal(scale=1.0), round(float(rng.normal()), 3)
            for _ in range(m):
                x = rng.normal()
                rows.append({"site": f"S{s}", "circle": f"S{s}-c{c:02d}", "w": arm, "leader": leader, "x": x,
                             "y": effect + x + arm * (1 + 0.5 * x) + rng.normal()})
    return pd.DataFrame(rows)


def _seal(tmp: Path, frame: pd.DataFrame, cluster: str | None = "circle"):
    frame.to_csv(tmp / "trial.csv", index=False)
    (tmp / "secret.txt").write_text(SECRET)
    spec = StudySpec(data=tmp / "trial.csv", outcome="y", treatment="w", site="site", cluster=cluster,
                     rates=dict(RATES), seed=3, name="clustered exam")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        seal_benchmark(spec, tmp / "bench", learners=LEARNERS, secret_file=tmp / "secret.txt", force=True,
                       accept_row_order=True)
    return pd.read_csv(tmp / "bench" / "public" / PUBLIC_DATA), read_key(tmp / "bench" / "key")


@pytest.fixture(scope="module")
def sealed(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("clbench")
    public, key = _seal(tmp, _frame())
    return tmp, public, key


def test_no_cluster_is_split_between_training_file_and_holdout(sealed):
    _, public, key = sealed
    parts = key.units.assign(graded=key.graded).groupby("cluster")["graded"].nunique()
    assert (parts == 1).all()
    assert 0 < key.graded.sum() < len(key.units)
    # the public token groups exactly as the labels do, and every token lies on one side of the split
    assert public.groupby("cluster")["part"].nunique().max() == 1
    assert (public.groupby("cluster").size().sort_values().to_numpy()
            == key.units.groupby("cluster").size().sort_values().to_numpy()).all()


def test_public_cluster_token_has_no_relation_to_the_label(sealed):
    _, public, key = sealed
    labels = key.units["cluster"].to_numpy(dtype=str)
    tokens = public["cluster"].to_numpy(dtype=str)
    assert not set(tokens) & set(labels)
    pairs = pd.DataFrame({"t": tokens, "l": labels}).drop_duplicates()
    assert len(pairs) == pairs["t"].nunique() == pairs["l"].nunique() == 48  # a bijection, one per cluster
    # not order-preserving: Spearman rank correlation of token order vs label order is far from ±1
    # (48 clusters: |ρ| > 0.6 has probability < 1e-5 under a random order, from the t approximation)
    rho = pd.Series(pairs["t"].rank().to_numpy()).corr(pd.Series(pairs["l"].rank().to_numpy()))
    assert abs(rho) < 0.6
    # not a keyless hash of the label
    for name in ("sha256", "md5", "sha1"):
        digest = {hashlib.new(name, lab.encode()).hexdigest() for lab in pairs["l"]}
        assert not any(t in d for t in pairs["t"] for d in digest)
    # nothing names a site or a cluster label in the public file
    assert not public.isin(labels).any().any() and "site" not in public.columns


def test_grading_se_cluster_robust_exceeds_unit_se_on_cluster_randomized_design(sealed):
    tmp, public, key = sealed
    tau = 1 + 0.5 * public["x"].to_numpy()
    treat = (public["leader"].to_numpy() > 0).astype(float)  # a rule at the cluster level: whole clusters treated
    sub = Submission("good", tmp / "good.csv", tau_hat=tau, treat=treat, ate=SubmittedATE(1.0, 0.25, (0.5, 1.5)))
    clustered = _Grader.from_key(key, 100, 3)
    unit = _Grader.from_key(replace(key, units=key.units.drop(columns="cluster")), 100, 3)
    with_c, without = _grade(sub, clustered, False, "autoc"), _grade(sub, unit, False, "autoc")
    # ICC ≈ 0.5 with 10 units a cluster: design effect 1 + 9·0.5 ≈ 5.5 (Kish 1965), SE ratio ≈ 2.3; 1.3 leaves
    # room for the noise of an SE estimated from 14 clusters
    assert clustered.design.se > 1.3 * unit.design.se
    assert clustered.design.estimate == pytest.approx(unit.design.estimate, rel=1e-12)
    for name in ("rule_gain", "autoc", "qini", "blp_beta2", "ate_error"):
        assert with_c.metrics[name].estimate == pytest.approx(without.metrics[name].estimate, rel=1e-12)
        assert np.isfinite(with_c.metrics[name].se) and with_c.metrics[name].se > 0
    # the means whose scores carry the cluster effect in full: the ATE error, and a rule constant within clusters
    for name in ("ate_error", "rule_gain"):
        assert with_c.metrics[name].se > 1.3 * without.metrics[name].se, name


def test_singleton_clusters_grade_with_the_unit_se(tmp_path):
    frame = _frame(m=1, per_site=40)
    frame["circle"] = [f"u{i}" for i in range(len(frame))]
    _, key = _seal(tmp_path, frame)
    assert key.clusters is None  # intake: one unit per cluster is the unclustered study
    public = pd.read_csv(tmp_path / "bench" / "public" / PUBLIC_DATA)
    pd.DataFrame({"token": public["token"], "tau_hat": public["x"]}).to_csv(tmp_path / "s.csv", index=False)
    board = grade_submissions(tmp_path / "bench" / "key", [tmp_path / "s.csv"], n_boot=50)
    gamma = board.design_ate.scores
    # exactly sd(Γ)/√n, the unit formula (cluster_mean_se with one unit per cluster is identical)
    assert board.design_ate.se == pytest.approx(np.std(gamma, ddof=1) / np.sqrt(gamma.size), rel=1e-12)


def test_leak_audit_reports_a_cluster_level_covariate_not_a_site_leak():
    frame = _frame()
    frame["region"] = frame["site"].map({"S0": 1.5, "S1": 2.5, "S2": 3.5, "S3": 4.5})  # names the site
    audit = audit_columns(frame, "site", ["leader", "x", "region"], seed=1, cluster="circle")
    rows = {r.column: r for r in audit.rows}
    assert rows["leader"].level == "cluster" and not rows["leader"].flagged
    assert rows["region"].level == "site" and rows["region"].flagged
    assert rows["x"].level == "unit" and not rows["x"].flagged
    # without the cluster, the leader score (a value unique to one cluster, so to one site) looks like a leak
    plain = {r.column: r for r in audit_columns(frame, "site", ["leader"], seed=1).rows}
    assert plain["leader"].flagged


def test_cluster_token_audit_finds_nothing_in_a_sealed_file(sealed):
    _, _, key = sealed
    audit = pd.read_csv(key.path / "leak_audit.csv")
    token_rows = audit[audit["kind"] == "cluster token"]
    assert len(token_rows) == 3 and not token_rows["flagged"].any()
