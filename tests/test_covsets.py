"""Covariate-set comparisons: the same folds for every set, one unmasking, Holm, PBR with a delta-method CI."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from siteproof.blind.analysis import BlindConfig
from siteproof.blind.average import aipw
from siteproof.blind.nuisance import cross_fit_nuisances, default_learners, make_folds
from siteproof.cli import main
from siteproof.core.errors import SiteproofError, SiteproofWarning
from siteproof.core.interpret import DIFFERENT, EQUIVALENT, INDETERMINATE
from siteproof.covsets import (
    SETS_FILE,
    compare_covariate_sets,
    adjusted_verdicts,
    resolve_sets,
    write_sets,
)
from siteproof.intake.sitetrials import design_ate
from siteproof.intake.study import StudySpec, load_study
from siteproof.simulation.simulate import simulate
from siteproof.unmask.correspondence import compare, percent_bias_reduction_ci
from siteproof.unmask.sensitivity import covariate_groups

COVARIATES = ["spring_wcpm", "grade", "home_language", "age"]


@pytest.fixture(scope="module")
def trial():
    return simulate("covariate_allocation", n=600, seed=11)


def _spec(trial, **extra) -> StudySpec:
    roles = trial.design.roles
    return StudySpec(data=trial.data, outcome=roles.outcome, treatment=roles.treatment, site=roles.site,
                     id=roles.id, covariates=COVARIATES, rates=dict(trial.rates), seed=4, **extra)


def _config() -> BlindConfig:
    linear = {k: v["linear"] for k, v in default_learners(False, 4).items()}
    return BlindConfig(seed=4, folds=3, nuisance_learners=linear)


@pytest.fixture(scope="module")
def study(trial):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        return load_study(_spec(trial))


def test_pbr_delta_method_matches_the_bootstrap():
    rng = np.random.default_rng(3)
    n = 400
    common = rng.normal(size=n)
    d_naive = 1.0 + common + rng.normal(size=n)
    d_adj = 0.4 + 0.5 * common + rng.normal(size=n)
    est = percent_bias_reduction_ci(d_adj, d_naive)
    assert est.estimate == pytest.approx(100 * (1 - abs(d_adj.mean()) / abs(d_naive.mean())), rel=1e-12)
    idx = rng.integers(0, n, size=(4000, n))
    boot = 100 * (1 - np.abs(d_adj[idx].mean(axis=1)) / np.abs(d_naive[idx].mean(axis=1)))
    # nonparametric bootstrap SE (Efron & Tibshirani 1993) as reference: its Monte Carlo error with B = 4000 is
    # ≈ 1/√(2B) ≈ 1 %, and the delta method is first-order accurate (error O(1/√n) relative ≈ 5 % at n = 400)
    assert est.se == pytest.approx(boot.std(ddof=1), rel=0.1)


def test_adjusted_verdicts_follow_the_step_down_rule():
    # Holm (1979): sorted p_(i) × (m − i + 1), made monotone; here difference p = (0.01, 0.04, 0.03) →
    # adjusted (0.03, 0.06, 0.06); TOST p = (0.5, 0.001, 0.02) → adjusted (0.5, 0.003, 0.04)
    rows = [compare(1.0, 0.0, 1.0, 5.0) for _ in range(3)]
    rows = [r.__class__(**{**r.__dict__, "p_value": p, "p_equivalence": q})
            for r, p, q in zip(rows, (0.01, 0.04, 0.03), (0.5, 0.001, 0.02))]
    assert adjusted_verdicts(rows) == [DIFFERENT, EQUIVALENT, EQUIVALENT]
    rows[0] = rows[0].__class__(**{**rows[0].__dict__, "p_value": 0.2})
    assert adjusted_verdicts(rows)[0] == INDETERMINATE


def test_sets_share_folds_and_one_design_truth(study, tmp_path):
    config = _config()
    sets = {"fluency": ["spring_wcpm", "grade", "home_language"], "age": ["age"]}
    result = compare_covariate_sets(study, sets, config)
    data = study.blind
    truth = design_ate(data.y, data.w, study.site)
    assert result.design.estimate == pytest.approx(truth.estimate.estimate, rel=1e-12)
    # each set's AIPW equals a direct cross-fit on the same folds (make_folds depends on w and the seed only)
    folds = make_folds(data.w, config.folds, config.seed)
    groups = covariate_groups(data.feature_names, sets["fluency"])
    cols = sorted(i for g in groups.values() for i in g)
    nuis = cross_fit_nuisances(data.X[:, cols], data.y, data.w, folds, learners=config.nuisance_learners,
                               seed=config.seed)
    direct = aipw(data.y, data.w, nuis.e_hat, nuis.mu0, nuis.mu1)
    first = result.sets[0]
    assert first.blind.estimate == pytest.approx(direct.estimate, rel=1e-12)
    # the paired difference of two sets is the difference of their means (closed form)
    pair = result.pairwise[0]
    assert pair["estimate"] == pytest.approx(result.sets[0].blind.estimate - result.sets[1].blind.estimate, rel=1e-9)
    record = result.to_dict()
    assert {"name", "covariates", "blind", "difference", "verdict", "verdict_adjusted",
            "percent_bias_reduction"} <= set(record["sets"][0])
    # same seed → identical output
    again = compare_covariate_sets(study, sets, config).to_dict()
    assert json.dumps(again, sort_keys=True, default=str) == json.dumps(record, sort_keys=True, default=str)
    path = write_sets(result, tmp_path / "out")
    assert json.loads(path.read_text())["sets"][1]["name"] == "age"
    assert (tmp_path / "out" / "sets.html").exists() and (tmp_path / "out" / "figures" / "sets-bias.svg").exists()


def test_drop_each_and_set_errors(study):
    named = resolve_sets(study.blind.covariates, None, drop_each=True)
    assert list(named) == ["all"] + [f"without {c}" for c in COVARIATES]
    assert named["without grade"] == ("spring_wcpm", "home_language", "age")
    with pytest.raises(SiteproofError, match="unknown covariate"):
        resolve_sets(study.blind.covariates, {"x": ["nope"]})
    with pytest.raises(SiteproofError, match="no covariate set"):
        resolve_sets(study.blind.covariates, {})


def test_cli_sets(trial, tmp_path, capsys):
    data = tmp_path / "d.csv"
    trial.data.to_csv(data, index=False)
    roles = trial.design.roles
    rates = ",".join(f"{k}={v}" for k, v in trial.rates.items())
    base = [str(data), "--outcome", roles.outcome, "--treatment", roles.treatment, "--site", roles.site,
            "--id", roles.id, "--covariates", "spring_wcpm,grade", "--rates", rates, "--folds", "2"]
    assert main(["sets", *base, "--set", "fluency=spring_wcpm", "--out", str(tmp_path / "o")]) == 0
    record = json.loads((tmp_path / "o" / SETS_FILE).read_text())
    assert [s["name"] for s in record["sets"]] == ["fluency"]
    assert "fluency" in capsys.readouterr().out
    assert main(["sets", *base, "--set", "broken", "--out", str(tmp_path / "p")]) == 2
    assert "error: --set 'broken'" in capsys.readouterr().err


def test_sets_with_sensitivity_page(study, tmp_path):
    result = compare_covariate_sets(study, {"fluency": ["spring_wcpm", "grade"]}, _config(), sensitivity=True)
    sens = result.to_dict()["sets"][0]["sensitivity"]
    # the realized bias of the sensitivity record is the set's paired difference blind − design
    assert sens["realized_bias"]["estimate"] == pytest.approx(result.sets[0].comparison.difference.estimate, rel=1e-12)
    assert [b["covariate"] for b in sens["benchmarks"]] == ["spring_wcpm", "grade"]
    assert sens["warned"] == (abs(sens["realized_bias"]["estimate"]) <= sens["bound_at_strongest"])
    write_sets(result, tmp_path / "o")
    page = (tmp_path / "o" / "sets.html").read_text()
    assert "Would a sensitivity analysis have warned?" in page and 'id="fig-sensitivity"' in page


def test_the_study_file_names_the_sets(trial, tmp_path):
    """[covariate_sets] in the study file gives the same sets as the --set flags (and as the Python mapping)."""
    from siteproof.intake.spec import load_spec_toml

    data = tmp_path / "trial.csv"
    trial.data.to_csv(data, index=False)
    roles = trial.design.roles
    rates = ", ".join(f'"{site}" = {rate}' for site, rate in trial.rates.items())
    (tmp_path / "study.toml").write_text(
        f'data = "trial.csv"\noutcome = "{roles.outcome}"\ntreatment = "{roles.treatment}"\nsite = "{roles.site}"\n'
        f'id = "{roles.id}"\ncovariates = {json.dumps(COVARIATES)}\nseed = 4\nrates = {{ {rates} }}\n'
        '[covariate_sets]\nage = ["age"]\nfluency = "spring_wcpm, grade"\n')
    spec = load_spec_toml(tmp_path / "study.toml")
    assert spec.covariate_sets == {"age": ["age"], "fluency": ["spring_wcpm", "grade"]}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        study = load_study(spec)
        from_file = compare_covariate_sets(study, None, _config())
        from_flags = compare_covariate_sets(study, {"age": ["age"], "fluency": ["spring_wcpm", "grade"]}, _config())
    assert json.dumps(from_file.to_dict(), sort_keys=True, default=str) == \
        json.dumps(from_flags.to_dict(), sort_keys=True, default=str)
