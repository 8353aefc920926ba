"""Monte Carlo design studies: replicate rows, summary formulas, resume, determinism, a killed Dask worker.

The real studies use tiny settings (n = 400, three effect models, no tree, 20 bootstrap draws, a small site
forest) so that a replicate takes a few seconds; every real replicate runs in a worker process (Dask or local),
never in the test process.  Logic that needs no estimation (resume bookkeeping, refusals, summary formulas) is
tested with a stand-in replicate function.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
from contextlib import contextmanager

import numpy as np
import pandas as pd
import pytest
from conftest import fast_config
from sklearn.ensemble import RandomForestClassifier

from siteproof.core.errors import SiteproofError
from siteproof.simulation import montecarlo
from siteproof.simulation.montecarlo import (
    COLUMNS,
    ReplicateResult,
    finished_replicates,
    read_replicates,
    replicate_seeds,
    run_study,
    true_rank_metric,
)
from siteproof.simulation.studysummary import summarize

DESIGN, N, SEED = "covariate_allocation", 400, 5
ROWS_PER_REPLICATE = 6 + 3 + 4  # 5 ATE estimators + design; constant, t, dr; t/dr × (threshold, top50)


def tiny_config():
    return fast_config(seed=1, models=("constant", "t", "dr"), tree=False, n_boot=20, budgets=(0.5,))


def site_forest():
    return RandomForestClassifier(n_estimators=20, min_samples_leaf=20, random_state=0)


def study_kwargs(**extra):
    return dict(n=N, seed=SEED, config=tiny_config(), site_learner=site_forest(), **extra)


@pytest.fixture(scope="module")
def cluster_study(tmp_path_factory):
    """6 replicates on a LocalCluster with 2 single-threaded workers."""
    out = tmp_path_factory.mktemp("montecarlo") / "cluster"
    result = run_study(DESIGN, 6, out, workers=2, scheduler="local", **study_kwargs())
    return out, result


# --------------------------------------------------------------------------------------------------------
# real studies
# --------------------------------------------------------------------------------------------------------
def test_cluster_study_writes_consistent_rows(cluster_study):
    out, result = cluster_study
    assert result.ran == 6 and result.reused == 0
    for name in ("study.json", "replicates.csv", "summary.csv", "summary.html", "timings.csv"):
        assert (out / name).is_file(), name
    frame = read_replicates(out / "replicates.csv")
    assert list(frame.columns) == list(COLUMNS)
    assert sorted(frame["replicate"].unique()) == list(range(6))
    assert (frame.groupby("replicate").size() == ROWS_PER_REPLICATE).all()

    study = json.loads((out / "study.json").read_text())
    ate = frame[frame["kind"] == "ate"]
    assert np.all(ate["truth"] == study["population_ate"])  # coverage uses the population truth
    # the sample truth is one number per replicate, shared by its ATE rows
    assert (ate.groupby("replicate")["truth_sample"].nunique() == 1).all()
    has_ci = frame["ci_low"].notna()
    assert np.allclose(frame.loc[has_ci, "error"], frame.loc[has_ci, "estimate"] - frame.loc[has_ci, "truth"], rtol=0, atol=0)
    inside = (frame["ci_low"] <= frame["truth"]) & (frame["truth"] <= frame["ci_high"])
    assert (frame.loc[has_ci, "covered"].astype(bool) == inside[has_ci]).all()
    cate = frame[frame["kind"] == "cate"]
    assert (cate["pehe"] >= 0).all() and cate["pehe"].notna().all()
    assert cate.loc[cate["name"] == "constant", "estimate"].isna().all()  # no AUTOC for a constant ranking
    assert set(frame.loc[frame["verdict"] != "", "verdict"]) <= {
        "equivalent", "different", "trivially different", "indeterminate"}

    summary = pd.read_csv(out / "summary.csv")
    aipw = summary[(summary["kind"] == "ate") & (summary["name"] == "aipw")].iloc[0]
    flags = ate.loc[ate["name"] == "aipw", "covered"].astype(float)
    p = flags.mean()
    assert aipw["coverage"] == pytest.approx(p, abs=1e-12)
    assert aipw["coverage_mcse"] == pytest.approx(math.sqrt(p * (1 - p) / 6), abs=1e-12)
    html = (out / "summary.html").read_text()
    assert html.count("<svg") == 2 and "different" in html


def test_resume_in_local_processes_gives_the_same_rows(cluster_study, tmp_path):
    """A copy of the Dask study interrupted after replicates 0–2 (later parts gone) is resumed in local
    processes: only 3 replicates run, and the outputs equal the uninterrupted Dask run byte for byte."""
    cluster_out, _ = cluster_study
    out = tmp_path / "local"
    shutil.copytree(cluster_out, out)
    for r in (3, 4, 5):
        (out / "parts" / f"rep-{r:05d}.csv").unlink()
    (out / "replicates.csv").unlink()
    result = run_study(DESIGN, 6, out, workers=2, **study_kwargs())
    assert (result.ran, result.reused) == (3, 3)
    for name in ("replicates.csv", "summary.csv"):
        assert (out / name).read_bytes() == (cluster_out / name).read_bytes(), name


def test_killed_worker_loses_no_finished_replicate(cluster_study, tmp_path):
    """Kill one LocalCluster worker process after two of four replicates landed (both workers busy with the
    other two); the study still completes and its rows equal the undisturbed run's."""
    from dask.distributed import Client, LocalCluster

    cluster_out, _ = cluster_study
    out = tmp_path / "killed"
    killed: list[int] = []
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0") as cluster, \
            Client(cluster) as client:
        pids = sorted(client.run(os.getpid).values())

        @contextmanager
        def killer(description, total):
            landed = []

            def tick(label=""):
                landed.append(label)
                if len(landed) == 2 and not killed:
                    os.kill(pids[0], signal.SIGKILL)
                    killed.append(pids[0])

            yield tick

        result = run_study(DESIGN, 4, out, scheduler=cluster.scheduler_address, progress=killer, **study_kwargs())
    assert killed and result.ran == 4
    assert finished_replicates(out) == set(range(4))
    done = pd.read_csv(out / "replicates.csv", keep_default_na=False)
    reference = pd.read_csv(cluster_out / "replicates.csv", keep_default_na=False)
    pd.testing.assert_frame_equal(done, reference[reference["replicate"] < 4].reset_index(drop=True))


# --------------------------------------------------------------------------------------------------------
# bookkeeping with a stand-in replicate (no estimation)
# --------------------------------------------------------------------------------------------------------
def fake_replicate(task):
    """Two rows per replicate, a pure function of the replicate's seeds."""
    rng = np.random.default_rng(task.seeds[0])
    rows = []
    for name in ("aipw", "naive"):
        est = task.truth + rng.normal()
        rows.append({"replicate": task.replicate, "kind": "ate", "name": name, "estimate": est, "se": 1.0,
                     "ci_low": est - 1.96, "ci_high": est + 1.96, "truth": task.truth, "truth_sample": task.truth,
                     "error": est - task.truth, "covered": abs(est - task.truth) <= 1.96,
                     "covered_sample": abs(est - task.truth) <= 1.96, "design_based": task.truth,
                     "verdict": "equivalent", "pehe": math.nan})
    return ReplicateResult(task.replicate, pd.DataFrame(rows, columns=list(COLUMNS)), 0.0, "test")


@pytest.fixture
def stand_in(monkeypatch):
    calls: list[int] = []

    def counted(task):
        calls.append(task.replicate)
        return fake_replicate(task)

    monkeypatch.setattr(montecarlo, "run_replicate", counted)
    monkeypatch.setattr(montecarlo, "population_ate", lambda design: 3.5)
    return calls


def test_resume_runs_only_the_missing_replicates(stand_in, tmp_path):
    out = tmp_path / "s"
    run_study(DESIGN, 3, out, n=N, seed=2, config=tiny_config(), report=False)
    assert stand_in == [0, 1, 2]
    result = run_study(DESIGN, 5, out, n=N, seed=2, config=tiny_config(), report=False)
    assert stand_in == [0, 1, 2, 3, 4] and (result.ran, result.reused) == (2, 3)
    frame = read_replicates(out / "replicates.csv")
    assert frame["replicate"].tolist() == [0, 0, 1, 1, 2, 2, 3, 3, 4, 4]
    # asking for fewer replicates summarises the first R only and runs nothing
    fewer = run_study(DESIGN, 2, out, n=N, seed=2, config=tiny_config(), report=False)
    assert fewer.ran == 0 and read_replicates(out / "replicates.csv")["replicate"].max() == 1


def test_half_written_files_are_not_finished_replicates(stand_in, tmp_path):
    out = tmp_path / "s"
    run_study(DESIGN, 2, out, n=N, seed=2, config=tiny_config(), report=False)
    (out / "parts" / ".rep-00002.csv.x1y2.tmp").write_text("replicate,kind\n2,a")  # an interrupted write
    assert finished_replicates(out) == {0, 1}
    run_study(DESIGN, 3, out, n=N, seed=2, config=tiny_config(), report=False)
    assert stand_in == [0, 1, 2]


@pytest.mark.parametrize("change, text", [
    (dict(n=N + 1), f"n {N} → {N + 1}"),
    (dict(seed=3), "seed 2 → 3"),
    (dict(design="null"), "design covariate_allocation → null"),
])
def test_other_settings_are_refused(stand_in, tmp_path, change, text):
    out = tmp_path / "s"
    run_study(DESIGN, 1, out, n=N, seed=2, config=tiny_config(), report=False)
    args = dict(design=DESIGN, replicates=1, out=out, n=N, seed=2, config=tiny_config(), report=False)
    args.update(change)
    with pytest.raises(SiteproofError, match=text) as info:
        run_study(**args)
    assert "\n" not in info.value.one_line()


def test_non_study_folder_and_bad_arguments_are_refused(stand_in, tmp_path):
    (tmp_path / "notes.txt").write_text("mine")
    with pytest.raises(SiteproofError, match="holds no study"):
        run_study(DESIGN, 1, tmp_path, n=N, config=tiny_config())
    for bad in (dict(replicates=0), dict(n=5), dict(workers=0), dict(seed=-1), dict(scheduler="nowhere")):
        args = dict(design=DESIGN, replicates=1, out=tmp_path / "x", n=N, config=tiny_config())
        args.update(bad)
        with pytest.raises(SiteproofError):
            run_study(**args)


def test_same_seed_same_rows_with_stand_in(stand_in, tmp_path):
    for name in ("a", "b"):
        run_study(DESIGN, 4, tmp_path / name, n=N, seed=9, config=tiny_config(), report=False)
    assert (tmp_path / "a" / "replicates.csv").read_bytes() == (tmp_path / "b" / "replicates.csv").read_bytes()


# --------------------------------------------------------------------------------------------------------
# pure functions
# --------------------------------------------------------------------------------------------------------
def test_replicate_seeds_do_not_depend_on_the_number_of_replicates():
    assert replicate_seeds(7, 3) == replicate_seeds(7, 10)[:3]
    seeds = replicate_seeds(7, 50)
    assert len(set(seeds)) == 50 and replicate_seeds(8, 1) != seeds[:1]


def test_summary_formulas():
    rows = []
    covered = [True] * 9 + [False]
    for r, flag in enumerate(covered):
        rows.append({"replicate": r, "kind": "ate", "name": "aipw", "estimate": 1.0 + r, "se": 0.5,
                     "ci_low": 0.0, "ci_high": 1.0, "truth": 1.0, "truth_sample": 1.0, "error": float(r),
                     "covered": flag, "covered_sample": flag, "design_based": 1.0,
                     "verdict": "different" if r < 2 else "equivalent", "pehe": math.nan})
    frame = pd.DataFrame(rows, columns=list(COLUMNS))
    frame["covered"] = frame["covered"].astype("boolean")
    frame["covered_sample"] = frame["covered_sample"].astype("boolean")
    row = summarize(frame).iloc[0]
    errors = np.arange(10.0)
    assert row["bias"] == pytest.approx(4.5)
    assert row["bias_mcse"] == pytest.approx(errors.std(ddof=1) / math.sqrt(10))
    assert row["rmse"] == pytest.approx(math.sqrt(np.mean(errors**2)))
    assert row["coverage"] == pytest.approx(0.9)
    assert row["coverage_mcse"] == pytest.approx(math.sqrt(0.9 * 0.1 / 10))
    assert row["different"] == pytest.approx(0.2) and row["equivalent"] == pytest.approx(0.8)
    assert row["different_mcse"] == pytest.approx(math.sqrt(0.2 * 0.8 / 10))


def test_true_autoc_is_the_mean_toc_of_the_ranking():
    """θ = (1/n) Σ_j TOC(j/n), TOC(j/n) = mean τ over the top j units by τ̂ − mean τ (Yadlowsky et al.)."""
    rng = np.random.default_rng(4)
    tau = rng.normal(size=60)
    tau_hat = tau + rng.normal(size=60)
    order = np.argsort(-tau_hat)
    toc = np.cumsum(tau[order]) / np.arange(1, 61) - tau.mean()
    assert true_rank_metric(tau_hat, tau) == pytest.approx(toc.mean(), abs=1e-12)
    assert true_rank_metric(np.full(60, 2.0), tau) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.slow
def test_null_design_coverage(tmp_path):
    """Null design (τ = 4 for everyone, rate 0.5 everywhere): design-based and AIPW 95 % CIs cover the truth
    within three Monte Carlo SEs of 95 % over 100 replicates (√(0.95·0.05/100) = 0.022)."""
    result = run_study("null", 100, tmp_path / "null", n=1000, seed=3, workers=2, scheduler="local",
                       config=fast_config(seed=1, tree=False), site_learner=site_forest())
    summary = result.summary.set_index("name")
    for name in ("design", "aipw"):
        assert abs(summary.loc[name, "coverage"] - 0.95) <= 3 * math.sqrt(0.95 * 0.05 / 100)
