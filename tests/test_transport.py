"""Leave-one-site-out transport: eligibility, training subsets, independent recomputation, determinism."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression, Ridge, RidgeCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from conftest import SMALL_RATES, small_trial
from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.blind.evaluation import rank_metric
from siteproof.blind.rules import budget_rule, rule_value, threshold_rule
from siteproof.core.scores import arm_scores
from siteproof.intake.study import StudySpec, fingerprint, load_study
from siteproof.unmask.transport import eligible_sites, leave_one_site_out, training_data
from siteproof.unmask.scoring import run_unmask

SPEC = dict(data="trial.csv", outcome="score", treatment="treated", site="site", id="uid", cost="cost",
            rates=SMALL_RATES)


def cheap_config() -> BlindConfig:
    ridge = {"ridge": make_pipeline(StandardScaler(), RidgeCV(alphas=np.logspace(-3, 3, 7)))}
    logit = {"logit": make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))}
    return BlindConfig(
        folds=2, seed=9, n_boot=20, models=("constant", "t"), budgets=(0.5,), tree=True,
        nuisance_learners={"propensity": logit, "mu0": ridge, "mu1": ridge, "m": ridge},
        cate_learner=Ridge(alpha=1.0),
    )


@pytest.fixture(scope="module")
def world():
    study = load_study(StudySpec(**SPEC), frame=small_trial(n=600, seed=3))
    claims = run_blind(study.blind, cheap_config())
    return study, claims


def _transport(study, claims, workers: int):
    u = claims.units
    return leave_one_site_out(
        study.blind, study.site, study.known_rate, u["mu0"].to_numpy(), u["mu1"].to_numpy(), cheap_config(),
        tau_full={"t": u["tau_t"].to_numpy()}, workers=workers,
    )


def _without_timing(result) -> dict:
    out = result.to_dict()
    for site in out["sites"]:
        site.pop("seconds")
    out.pop("workers")
    return out


def test_eligible_sites():
    site = np.array(["b"] * 60 + ["a"] * 60 + ["c"] * 49 + ["10"] * 55 + ["2"] * 70)
    w = np.zeros(site.size, dtype=int)
    w[::2] = 1
    w[site == "a"] = 1
    w[np.flatnonzero(site == "a")[0]] = 0  # one control unit only
    keep, skipped = eligible_sites(site, w)
    assert keep == ["2", "10", "b"]  # natural order: numbers first, numerically
    assert {s["site"] for s in skipped} == {"a", "c"}
    assert any("49 units" in s["reason"] for s in skipped)


def test_training_data_is_a_row_subset_with_its_own_fingerprint(world):
    study, _ = world
    data = study.blind
    keep = study.site != "north"
    sub = training_data(data, keep)
    assert sub.n == keep.sum()
    np.testing.assert_array_equal(sub.X, data.X[keep])
    np.testing.assert_array_equal(sub.row_key, data.row_key[keep])
    assert sub.fingerprint == fingerprint(sub.row_key, sub.y, sub.w, sub.X, sub.feature_names, sub.cost)
    assert sub.fingerprint != data.fingerprint
    assert len(sub.raw_covariates) == sub.n


def test_transported_figures_equal_an_independent_recomputation(world):
    study, claims = world
    result = _transport(study, claims, workers=1)
    assert [s.site for s in result.sites] == ["harbour", "north", "upland"] and not result.skipped
    held = result.sites[0]
    mask = study.site == held.site
    assert held.n + held.n_train == study.n
    # rerun the blind analysis on the other sites by hand and score the held-out site with its known rate
    trained = run_blind(training_data(study.blind, ~mask), cheap_config())
    tau = trained.cate_fits["t"].predict(study.blind.X[mask])
    u = claims.units[mask]
    g0, g1 = arm_scores(study.blind.y[mask], study.blind.w[mask], study.known_rate[mask], u["mu0"], u["mu1"])
    autoc = rank_metric(tau, g1 - g0, kind="autoc", n_boot=20, seed=9)
    assert held.autoc["t"].estimate == pytest.approx(float(autoc.estimate[0]), abs=1e-12)
    assert held.autoc["t"].se == pytest.approx(float(autoc.se[0]), abs=1e-12)
    cost = study.blind.cost[mask]
    gain = rule_value(threshold_rule(tau, cost), g0, g1, cost).gain
    assert held.rules["t.threshold"].gain.estimate == pytest.approx(gain.estimate, abs=1e-12)
    top = rule_value(budget_rule(tau, 0.5), g0, g1, cost).gain
    assert held.rules["t.top50"].gain.estimate == pytest.approx(top.estimate, abs=1e-12)
    tree = rule_value(trained.tree.predict(study.blind.X[mask]), g0, g1, cost)
    assert held.rules["tree"].value.estimate == pytest.approx(tree.value.estimate, abs=1e-12)
    # the paired "transported − in-sample" difference uses the same half-samples for both rankings
    in_sample = rank_metric(u["tau_t"].to_numpy(), g1 - g0, kind="autoc", n_boot=20, seed=9)
    d = autoc.boot[:, 0] - in_sample.boot[:, 0]
    assert held.autoc_loss["t"].se == pytest.approx(d.std(ddof=1), rel=1e-12)


def test_transport_is_deterministic_and_independent_of_workers(world):
    study, claims = world
    one = _without_timing(_transport(study, claims, workers=1))
    assert one == _without_timing(_transport(study, claims, workers=1))
    assert one == _without_timing(_transport(study, claims, workers=2))


def test_unmask_with_transport_reports_a_table_by_site(world):
    study, claims = world
    card = run_unmask(
        study, claims.to_dict(), claims.units, transport=True, blind_config=cheap_config(),
        site_learner=make_pipeline(StandardScaler(), LogisticRegression(max_iter=500)),
    )
    out = card.to_dict()["transport"]
    assert [s["site"] for s in out["sites"]] == ["harbour", "north", "upland"]
    assert card.transport is not None and set(card.transport.table()["site"]) == {"harbour", "north", "upland"}
    assert card.transport.summary_line().startswith("Transport (leave one site out, 3 sites)")
