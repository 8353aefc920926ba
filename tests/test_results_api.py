"""The notebook face of the results: a DataFrame in, typed Claims and Scorecard out, each with a compact repr,
a printable summary, an HTML table and a tidy frame, and a lossless round trip through the file records."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import LogisticRegression, Ridge, RidgeCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.blind.claims import Claims, read_claims, write_claims
from siteproof.core.errors import SiteproofError
from siteproof.core.estimates import Estimate
from siteproof.core.outputs import to_json_text
from siteproof.intake.study import StudySpec, load_study
from siteproof.pipeline import run_pipeline
from siteproof.simulation.simulate import simulate
from siteproof.unmask.scorecard import Scorecard
from siteproof.unmask.heterogeneity import random_effects
from siteproof.unmask.scoring import run_unmask

REPR_LIMIT = 1000
SCORECARD_COLUMNS = {"claim", "family", "primary", "blind", "design", "difference", "se", "ci_low", "ci_high",
                     "margin", "equivalence_bound", "p_difference", "p_difference_adjusted", "p_equivalence",
                     "p_equivalence_adjusted", "verdict", "verdict_adjusted", "pbr", "pbr_ci_low", "pbr_ci_high"}
# the per-component frames (one ATE estimator, one CATE model, one rule) keep the comparison columns
COMPONENT_COLUMNS = {"claim", "family", "blind", "design", "difference", "se", "ci_low", "ci_high", "statistic",
                     "p_value", "verdict"}
# the top-level keys of claims.json and scorecard.json (docs/claims-format.md, docs/scorecard-format.md)
CLAIMS_KEYS = {"schema", "version", "siteproof_version", "fingerprint", "settings", "data", "nuisance", "overlap",
               "balance", "warnings", "ate", "cate", "rules", "timings", "plan"}
SCORECARD_KEYS = {"schema", "version", "siteproof_version", "headline", "rates_source", "study", "sites",
                  "design_ate", "design_oracle_aipw", "naive_ate", "ate", "propensity", "heterogeneity", "cate",
                  "rules", "transport", "warnings", "plan", "verdicts", "site_verdicts", "within_site_balance",
                  "within_site_checks", "reference_agreement", "sensitivity"}


def quick_config() -> BlindConfig:
    """Logistic / ridge nuisances and a ridge CATE learner: a fast, deterministic blind run."""
    ridge = {"ridge": make_pipeline(StandardScaler(), RidgeCV(alphas=np.logspace(-3, 3, 7)))}
    logit = {"logit": make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))}
    return BlindConfig(
        folds=3, seed=5, n_boot=20, models=("constant", "t"), budgets=(0.5,),
        nuisance_learners={"propensity": logit, "mu0": ridge, "mu1": ridge, "m": ridge}, cate_learner=Ridge(),
    )


@pytest.fixture(scope="module")
def trial():
    return simulate("demo", n=800, seed=4)


def spec_for(trial, data) -> StudySpec:
    roles = trial.design.roles
    return StudySpec(data=data, outcome=roles.outcome, treatment=roles.treatment, site=roles.site, id=roles.id,
                     cost=roles.cost, rates=dict(trial.rates), seed=5)


@pytest.fixture(scope="module")
def notebook(trial, tmp_path_factory):
    """The notebook session: DataFrame → CSV → study → claims → scorecard."""
    path = tmp_path_factory.mktemp("nb") / "trial.csv"
    trial.data.to_csv(path, index=False)
    study = load_study(spec_for(trial, path))
    claims = run_blind(study, quick_config())
    return study, claims, run_unmask(study, claims, seed=5)


def _check_face(result, columns: set[str]) -> pd.DataFrame:
    """repr short and array-free, summary printable, HTML a table, frame tidy with the given columns."""
    text = repr(result)
    assert len(text) < REPR_LIMIT and "array" not in text and "\n" not in text
    summary = result.summary()
    assert isinstance(str(summary), str) and repr(summary) == str(summary)
    html = result._repr_html_()
    assert html.count("<table") == 1 and "<script" not in html
    frame = result.to_frame()
    assert isinstance(frame, pd.DataFrame) and columns <= set(frame.columns)
    return frame


def test_claims_face_and_round_trip(notebook, tmp_path):
    _, claims, _ = notebook
    frame = _check_face(claims, {"claim", "family", "estimate", "se", "ci_low", "ci_high"})
    # one row per ATE estimator (five), the CATE models' metrics, value + gain of each rule
    assert (frame["family"] == "ATE").sum() == 5
    assert {"ATE", "R-loss", "CATE", "GATES", "BLP", "rank", "rule"} <= set(frame["family"])
    assert (frame["family"] == "rule").sum() == 2 * len(claims.to_dict()["rules"])
    card_claims = set(notebook[2].to_frame()["claim"])
    assert {"cate.t.autoc", "cate.t.qini", "cate.t.beta2", "cate.t.high_low", "cate.t.top_bottom"} <= card_claims
    assert {c for c in card_claims if c.startswith("cate.t.gate")} == {f"cate.t.gate{g}" for g in range(1, 6)}
    assert (frame["ci_low"] <= frame["estimate"]).all() and (frame["estimate"] <= frame["ci_high"]).all()
    again = Claims.from_dict(claims.to_dict(), claims.units)
    assert again == claims and again.to_dict() == claims.to_dict()
    write_claims(claims, tmp_path)
    assert read_claims(tmp_path) == Claims.from_dict(json.loads((tmp_path / "claims.json").read_text()), claims.units)


@pytest.mark.parametrize("change", [{"version": 99}, {"version": None}, {"schema": "other"}])
def test_claims_of_another_format_are_refused(notebook, change):
    _, claims, _ = notebook
    record = {**claims.to_dict(), **change}
    with pytest.raises(SiteproofError):
        Claims.from_dict(record, claims.units)
    with pytest.raises(SiteproofError):
        Claims.from_dict({k: v for k, v in claims.to_dict().items() if k != "version"}, claims.units)


def test_scorecard_face_and_round_trip(notebook):
    _, claims, card = notebook
    frame = _check_face(card, SCORECARD_COLUMNS)
    n_rules = len(claims.to_dict()["rules"])
    assert (frame["family"] == "rule").sum() == n_rules  # one verdict per rule (its gain, or its value)
    assert frame["claim"].str.startswith("ate.").sum() == 5
    assert frame.loc[frame["claim"] == "ate.naive", "family"].item() == "reference"
    assert frame["primary"].sum() == 1 and frame.loc[frame["primary"], "claim"].item() == "ate.aipw"
    assert len(frame) == len(frame["claim"].unique())
    # equivalence bound = max |end| of the 90 % CI of D = |D| + z_0.95·SE (Wald; z_0.95 = 1.6449, normal table)
    finite = frame["se"] > 0
    assert np.allclose(frame.loc[finite, "equivalence_bound"],
                       frame.loc[finite, "difference"].abs() + 1.6448536 * frame.loc[finite, "se"], rtol=1e-6)
    loaded = Scorecard.from_dict(card.to_dict())
    assert loaded == card and loaded.to_dict() == card.to_dict()
    assert loaded.to_frame().equals(frame)
    # through the JSON text of scorecard.json (NaN written as null) and back: the same verdicts table
    from_file = Scorecard.from_dict(json.loads(to_json_text(card.to_dict())))
    pd.testing.assert_frame_equal(from_file.to_frame(), frame)
    for row in (*card.ate, *card.cate, *card.rules):
        _check_face(row, COMPONENT_COLUMNS)
    with pytest.raises(SiteproofError):
        Scorecard.from_dict({**card.to_dict(), "version": 1})


def test_estimate_conf_int_and_face():
    """conf_int(α) is the Wald interval estimate ± z_{1−α/2}·se (z_{0.95} = 1.6449, z_{0.975} = 1.95996:
    standard normal table)."""
    est = Estimate.from_scores("demo", np.random.default_rng(0).normal(1.0, 2.0, 400))
    lo, hi = est.conf_int(0.10)
    assert math.isclose(hi - est.estimate, 1.644854 * est.se, rel_tol=1e-6)
    assert math.isclose(est.estimate - lo, 1.644854 * est.se, rel_tol=1e-6)
    assert np.allclose(est.conf_int(), est.ci)
    assert math.isclose(est.ci[1] - est.estimate, 1.959964 * est.se, rel_tol=1e-6)
    _check_face(est, {"estimate", "se", "ci_low", "ci_high", "p_value"})


def test_files_hold_exactly_the_dict_forms(trial, tmp_path):
    """run_pipeline without a folder writes nothing; with one, the files are the to_dict() records."""
    path = tmp_path / "trial.csv"
    trial.data.to_csv(path, index=False)
    bare = run_pipeline(spec_for(trial, path), None, quick_config())
    assert bare.out_dir is None and sorted(p.name for p in tmp_path.iterdir()) == ["trial.csv"]
    assert isinstance(bare.claims, Claims)
    result = run_pipeline(spec_for(trial, path), tmp_path / "out", quick_config(), report=False)
    on_disk = json.loads((tmp_path / "out" / "claims.json").read_text())
    assert set(on_disk) == CLAIMS_KEYS == set(result.claims.to_dict())
    assert on_disk["version"] == 2
    card = json.loads((tmp_path / "out" / "scorecard.json").read_text())
    assert set(card) == SCORECARD_KEYS == set(result.scorecard.to_dict())
    assert Scorecard.from_dict(card).to_frame()["claim"].tolist() == result.scorecard.to_frame()["claim"].tolist()
    assert read_claims(tmp_path / "out").to_dict() == on_disk


def test_a_dataframe_goes_straight_in(trial, notebook):
    """StudySpec(data=<DataFrame>) gives the same claims as the CSV path."""
    study = load_study(spec_for(trial, trial.data))
    claims = run_blind(study, quick_config())
    _, reference, _ = notebook
    strip = lambda d: {k: v for k, v in d.items() if k not in ("timings",)}  # noqa: E731
    assert strip(claims.to_dict())["ate"] == strip(reference.to_dict())["ate"]


def test_study_pipeline_and_meta_analysis_have_the_same_face(trial, notebook):
    study, _, _ = notebook
    spec_text = repr(spec_for(trial, trial.data))
    assert spec_text.startswith(f"StudySpec(data=<DataFrame {len(trial.data)}×") and len(spec_text) < REPR_LIMIT
    cells = _check_face(study, {"site", "n", "n_treated", "rate_declared", "rate_realized"})
    assert cells["n"].sum() == study.n
    features = _check_face(study.blind, {"feature", "mean_treated", "mean_control", "smd"})
    assert len(features) == len(study.blind.feature_names)
    result = run_pipeline(spec_for(trial, trial.data), None, quick_config(), report=False)
    _check_face(result, SCORECARD_COLUMNS)
    # BCG vaccine trials, log risk ratios (Colditz et al. 1994, as tabulated by Viechtbauer 2010), first four
    # trials only: any valid inputs serve to check the face; the values are checked in test_heterogeneity.py
    meta = random_effects([-0.8893, -1.5854, -1.3481, -1.4416], [0.3256, 0.1946, 0.4154, 0.0200])
    frame = _check_face(meta, {"quantity", "estimate", "se", "ci_low", "ci_high", "statistic", "p_value"})
    assert frame.loc[frame["quantity"] == "Q", "statistic"].item() == pytest.approx(meta.q)
