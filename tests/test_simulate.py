"""Tests of the synthetic-trial simulator and the shipped synthetic_sites designs.

Tolerances are Monte Carlo ones: a share p estimated from n independent units is within 4·√(p(1−p)/n) of p
(failure probability ≈ 6e-5 per check); a difference in means under complete randomization is unbiased for
the mean unit effect of its site (Neyman 1923) and within 4 Neyman SEs of it; sample means are within
4·sd/√n of their expectation.  Closed-form moments come from scipy.stats (named beside each assertion).
"""

from __future__ import annotations

import dataclasses
import json
import math
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from siteproof.core.clusters import cluster_design, cluster_level_columns
from siteproof.core.errors import SiteproofError
from siteproof.simulation.montecarlo import design_fingerprint
from siteproof.simulation.scenario import Scenario
from siteproof.simulation.simulate import list_designs, load_design, population_ate, simulate, write_simulation

UNCLUSTERED = {"demo", "hidden_branch", "null", "covariate_allocation", "extreme_rates", "many_small"}
SHIPPED = UNCLUSTERED | {"clustered"}
BIG = 20_000


def _binomial_tol(p: float, n: int) -> float:
    return 4.0 * math.sqrt(p * (1.0 - p) / n)


@pytest.fixture(scope="module")
def demo_big():
    return simulate("demo", n=BIG, seed=11)


@pytest.fixture(scope="module")
def hidden_big():
    return simulate("hidden_branch", n=BIG, seed=11)


# ── loading ──────────────────────────────────────────────────────────────────────────────────────────────


def test_all_shipped_designs_are_package_resources_and_simulate():
    assert set(list_designs()) == SHIPPED
    root = resources.files("siteproof.synthetic_sites")
    for name in SHIPPED:
        assert root.joinpath(f"{name}.toml").is_file()
        design = load_design(name)
        assert isinstance(design, Scenario) and design.name == name
        trial = simulate(design, n=300, seed=1)
        roles = design.roles
        assert list(trial.data.columns[:4]) == [roles.id, roles.site, roles.treatment, roles.outcome]
        assert set(roles.covariates) <= set(trial.data.columns)
        assert list(trial.truth["id"]) == list(trial.data[roles.id])
        assert trial.rates == design.rates
        assert 15 <= len(roles.covariates) <= 25 or name == "clustered"


def test_default_sizes_and_declared_features_of_the_shipped_designs():
    assert load_design("demo").default_n == 3000
    demo_rates = load_design("demo").rates
    assert len(demo_rates) == 6 and min(demo_rates.values()) < 0.34 and max(demo_rates.values()) > 0.83
    many = load_design("many_small")
    assert len(many.sites) == 50 and many.default_n == 2000
    assert {0.05, 0.95} <= set(load_design("extreme_rates").rates.values())
    null = simulate("null", n=500, seed=2)
    assert set(null.rates.values()) == {0.5}
    assert np.all(null.truth["tau"] == 4.0)


def test_design_summary_is_json_ready():
    summary = json.loads(json.dumps(load_design("hidden_branch").to_dict()))
    assert summary["name"] == "hidden_branch" and len(summary["sites"]) == 6
    assert sum(site["share"] for site in summary["sites"]) == pytest.approx(1.0)
    assert summary["hidden"] == {"strength": 10.0, "tracks": "rate", "arm": "both"}


def test_load_by_path_equals_load_by_name():
    path = Path(str(resources.files("siteproof.synthetic_sites").joinpath("null.toml")))
    assert load_design(path) == dataclasses.replace(load_design("null"), source=str(path))


def test_unknown_design_lists_the_shipped_names():
    with pytest.raises(SiteproofError) as err:
        load_design("no_such_design")
    for name in SHIPPED:
        assert name in str(err.value)


def _write(tmp_path: Path, text: str, name: str = "custom.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize(
    ("body", "key"),
    [
        ("[[sites]]\nname = 'A'\nshare = 1\nrate = 1.5\n", "sites[A].rate"),
        ("[[sites]]\nname = 'A'\nshare = 1\nrat = 0.5\n", "sites[A].rat"),
        ("[effect]\ntau = 'agee + 1'\n", "effect.tau"),
        ("[effect]\ntau = '__import__(\"os\").getcwd()'\n", "effect.tau"),
        ("[effect]\ntau = 'age.real'\n", "effect.tau"),
        ("[effect]\ntau = 'home_language == \"Other\"'\n", "effect.tau"),
        ("[effect]\ntau = 'home_language + 1'\n", "effect.tau"),
        ("[outcome]\nnoise_sd = -1\n", "outcome.noise_sd"),
        ("[hidden]\nstrength = 2\narm = 'control'\n", "hidden.arm"),
        ("[rates]\nNowhere = 0.5\n", "rates.Nowhere"),
        ("default_n = 5\n", "default_n"),
    ],
)
def test_design_mistakes_name_the_key(tmp_path, body, key):
    path = _write(tmp_path, f'extends = "demo"\n{body}')
    with pytest.raises(SiteproofError) as err:
        load_design(path)
    assert key in str(err.value)


def test_invalid_toml_and_extends_cycle_are_user_errors(tmp_path):
    with pytest.raises(SiteproofError, match="not valid TOML"):
        load_design(_write(tmp_path, "description = \n"))
    _write(tmp_path, 'extends = "b.toml"\n', "a.toml")
    _write(tmp_path, 'extends = "a.toml"\n', "b.toml")
    with pytest.raises(SiteproofError, match="cycle"):
        load_design(tmp_path / "a.toml")


@pytest.mark.parametrize("n", [10, 19, 2.5, "100", True, None])
def test_bad_n_is_rejected(n):
    if n is None:
        assert len(simulate("null", n=n, seed=0).data) == 3000
        return
    with pytest.raises(SiteproofError):
        simulate("null", n=n, seed=0)


def test_bad_seed_is_rejected():
    with pytest.raises(SiteproofError):
        simulate("null", n=100, seed=-1)


# ── determinism and assignment ───────────────────────────────────────────────────────────────────────────


def test_same_seed_identical_frames_different_seed_differs():
    a, b, c = (simulate("demo", n=500, seed=s) for s in (4, 4, 5))
    pd.testing.assert_frame_equal(a.data, b.data)
    pd.testing.assert_frame_equal(a.truth, b.truth)
    assert not a.data["fluency_gain"].equals(c.data["fluency_gain"])
    assert not a.data["branch"].equals(c.data["branch"])


def test_site_shares_match_declared_size_shares(demo_big):
    realized = demo_big.data["branch"].value_counts(normalize=True)
    for site in demo_big.design.sites:
        assert abs(realized[site.name] - site.share) <= _binomial_tol(site.share, BIG)


@pytest.mark.parametrize("name", sorted(UNCLUSTERED))
def test_realized_rate_is_the_rounded_declared_rate(name):
    trial = simulate(name, n=3000, seed=8)
    data, roles = trial.data, trial.design.roles
    for site, group in data.groupby(roles.site):
        n_s = len(group)
        assert int(group[roles.treatment].sum()) == int(round(trial.rates[site] * n_s))
    assert np.allclose(trial.truth["e_true"], data[roles.site].map(trial.rates))


@pytest.mark.parametrize("fixture", ["demo_big", "hidden_big"])
def test_difference_in_means_recovers_mean_tau_in_every_site(fixture, request):
    trial = request.getfixturevalue(fixture)
    data, roles = trial.data, trial.design.roles
    for site, group in data.groupby(roles.site):
        y, w = group[roles.outcome], group[roles.treatment]
        dim = y[w == 1].mean() - y[w == 0].mean()
        se = math.sqrt(y[w == 1].var() / (w == 1).sum() + y[w == 0].var() / (w == 0).sum())  # Neyman SE
        target = trial.truth.loc[group.index, "tau"].mean()
        assert abs(dim - target) <= 4 * se, site


# ── the hidden branch effect ─────────────────────────────────────────────────────────────────────────────


def test_hidden_branch_effect_tracks_the_rate_as_declared(demo_big, hidden_big):
    design = hidden_big.design
    rates = np.array(list(design.rates.values()))
    expected = 10.0 * (rates - rates.mean()) / rates.std()  # strength × standardized rate (population SD)
    assert np.allclose(list(design.hidden_effects().values()), expected)
    assert np.corrcoef(expected, rates)[0, 1] == pytest.approx(1.0)
    # same seed, same streams: hidden_branch = demo + h_S on both arms, nothing else changes
    pd.testing.assert_frame_equal(demo_big.data.drop(columns="fluency_gain"),
                                  hidden_big.data.drop(columns="fluency_gain"))
    h = hidden_big.data["branch"].map(design.hidden_effects()).to_numpy()
    assert np.allclose(hidden_big.data["fluency_gain"] - demo_big.data["fluency_gain"], h)
    assert np.allclose(hidden_big.truth["mu0"] - demo_big.truth["mu0"], h)
    assert np.allclose(hidden_big.truth["tau"], demo_big.truth["tau"])
    assert hidden_big.true_ate == pytest.approx(demo_big.true_ate)


def test_hidden_effect_on_treated_arm_enters_tau(tmp_path):
    path = _write(tmp_path, 'extends = "demo"\n[hidden]\nstrength = 3.0\ntracks = "rate"\narm = "treated"\n')
    treated = simulate(path, n=2000, seed=3)
    plain = simulate("demo", n=2000, seed=3)
    h = treated.data["branch"].map(treated.design.hidden_effects()).to_numpy()
    assert np.allclose(treated.truth["tau"] - plain.truth["tau"], h)
    assert np.allclose(treated.truth["mu0"], plain.truth["mu0"])
    w = treated.data["coached"].to_numpy()
    assert np.allclose(treated.data["fluency_gain"] - plain.data["fluency_gain"], w * h)


def test_declared_hidden_values(tmp_path):
    sites = "".join(f'[[sites]]\nname = "{s}"\nshare = 1\nrate = 0.5\nhidden = {v}\n' for s, v in
                    (("A", 1.0), ("B", -1.0)))
    path = _write(tmp_path, f'extends = "demo"\n[hidden]\nstrength = 2.0\ntracks = "declared"\n{sites}')
    assert load_design(path).hidden_effects() == {"A": 2.0, "B": -2.0}


# ── covariates ───────────────────────────────────────────────────────────────────────────────────────────


def test_missing_shares_are_as_advertised(demo_big):
    data = demo_big.data
    for cov in demo_big.design.covariates:
        share = data[cov.name].isna().mean()
        if cov.missing == 0:
            assert share == 0, cov.name
        else:
            assert abs(share - cov.missing) <= _binomial_tol(cov.missing, BIG), cov.name
    assert sum(c.missing > 0 for c in demo_big.design.covariates) in (2, 3)
    for role in ("child_id", "branch", "coached", "fluency_gain", "coaching_cost"):
        assert not data[role].isna().any()


def test_covariates_respect_bounds_and_the_benchmark_enrollment_rule(demo_big):
    data = demo_big.data
    for cov in demo_big.design.covariates:
        values = data[cov.name].dropna()
        if cov.lower is not None:
            assert values.min() >= cov.lower, cov.name
        if cov.upper is not None:
            assert values.max() <= cov.upper, cov.name
        if cov.kind == "categorical":
            assert set(values) <= set(cov.levels), cov.name
    quill = data[data["branch"] == "Quillmere"]
    assert np.all(quill["spring_wcpm"] < 89.5 + 15 * (quill["grade"] - 2))
    # a branch without rules keeps the declared category probabilities (0.8 same / 0.2 other)
    lantern = data.loc[data["branch"] == "Lanternfield", "home_language"]
    assert abs((lantern == "other").mean() - 0.2) <= _binomial_tol(0.2, len(lantern))
    story = data.loc[data["branch"] == "Storywick", "home_language"]
    assert abs((story == "other").mean() - 0.7) <= _binomial_tol(0.7, len(story))


KINDS_DESIGN = """
description = "one covariate of every kind; site B has enrollment rules"
default_n = 100
[roles]
outcome = "y"
treatment = "w"
site = "s"
id = "id"
[[covariates]]
name = "a"
kind = "normal"
mean = 0
sd = 1
lower = 0.5
[[covariates]]
name = "b"
kind = "poisson"
mean = 3
upper = 4
[[covariates]]
name = "c"
kind = "beta"
mean = 0.8
concentration = 10
[[covariates]]
name = "d"
kind = "bernoulli"
p = 0.3
[[covariates]]
name = "e"
kind = "categorical"
levels = ["x", "y", "z"]
probs = [0.2, 0.3, 0.5]
[[covariates]]
name = "f"
kind = "lognormal"
meanlog = 1
sdlog = 0.5
[[covariates]]
name = "g"
kind = "uniform"
low = 0
high = 2
[outcome]
baseline = "a + b"
noise_sd = 1
[effect]
tau = "1"
[[sites]]
name = "A"
share = 1
rate = 0.5
[[sites]]
name = "B"
share = 1
rate = 0.5
[sites.enroll.a]
shift = 1
upper = 2
[sites.enroll.b]
shift = 0.6931471805599453
[sites.enroll.d]
shift = 1.0
[sites.enroll.e]
tilt = { z = 0.6931471805599453 }
"""


def _assert_mean(values: pd.Series, expected: float, sd: float) -> None:
    assert abs(values.mean() - expected) <= 4 * sd / math.sqrt(len(values)), (values.name, expected)


def test_every_kind_draws_its_declared_distribution(tmp_path):
    trial = simulate(_write(tmp_path, KINDS_DESIGN), n=BIG, seed=5)
    a_site = trial.data[trial.data["s"] == "A"]
    b_site = trial.data[trial.data["s"] == "B"]
    tn = stats.truncnorm(0.5, np.inf)  # scipy.stats.truncnorm: N(0,1) truncated to [0.5, ∞)
    _assert_mean(a_site["a"], tn.mean(), tn.std())
    tn_b = stats.truncnorm(0.5 - 1, 2 - 1, loc=1)  # site B: mean shifted by 1, truncated to [0.5, 2]
    _assert_mean(b_site["a"], tn_b.mean(), tn_b.std())
    for frame, lam in ((a_site, 3.0), (b_site, 6.0)):  # Poisson truncated to {0..4}; scipy.stats.poisson pmf
        k = np.arange(5)
        pmf = stats.poisson.pmf(k, lam) / stats.poisson.cdf(4, lam)
        mean = float((k * pmf).sum())
        _assert_mean(frame["b"], mean, math.sqrt(float((k**2 * pmf).sum()) - mean**2))
        assert frame["b"].max() <= 4
    _assert_mean(a_site["c"], 0.8, math.sqrt(0.8 * 0.2 / 11))  # beta: variance m(1−m)/(κ+1)
    _assert_mean(a_site["d"], 0.3, math.sqrt(0.21))
    p_b = 1 / (1 + math.exp(-(math.log(0.3 / 0.7) + 1.0)))  # logit shift of 1
    _assert_mean(b_site["d"], p_b, math.sqrt(p_b * (1 - p_b)))
    for level, p in zip("xyz", (0.2, 0.3, 0.5)):
        assert abs((a_site["e"] == level).mean() - p) <= _binomial_tol(p, len(a_site))
    for level, p in zip("xyz", (0.2 / 1.5, 0.3 / 1.5, 1.0 / 1.5)):  # tilt z by ×2, renormalized
        assert abs((b_site["e"] == level).mean() - p) <= _binomial_tol(p, len(b_site))
    _assert_mean(np.log(a_site["f"]), 1.0, 0.5)
    _assert_mean(a_site["g"], 1.0, math.sqrt(4 / 12))


def test_covariate_allocation_site_is_a_function_of_observed_covariates():
    trial = simulate("covariate_allocation", n=5000, seed=6)
    data = trial.data
    bench = 89.5 + 15 * (data["grade"] - 2)
    band = np.where(data["spring_wcpm"] < bench,
                    np.where(data["home_language"] == "other", "Quillmere", "Storywick"),
                    np.where(data["spring_wcpm"] < bench + 30, "Lanternfield", "Papermill Cross"))
    assert data[["spring_wcpm", "grade", "home_language"]].notna().all().all()
    assert np.array_equal(band, data["branch"].to_numpy())
    assert np.allclose(trial.truth["e_true"], pd.Series(band).map(trial.rates))


def test_demo_effect_is_heterogeneous_with_a_moderate_average(demo_big):
    truth, data = demo_big.truth, demo_big.data
    sd_noise = demo_big.design.noise_sd
    assert 0.3 * sd_noise <= demo_big.true_ate <= 0.5 * sd_noise
    weak = data["spring_wcpm"] < 89.5 + 15 * (data["grade"] - 2)
    assert truth["tau"][weak].mean() > truth["tau"][~weak].mean() + 2
    other = data["home_language"] == "other"
    assert truth["tau"][other].mean() > truth["tau"][~other].mean() + 2
    assert np.all(data["coaching_cost"] >= 1.33)  # the declared floor of demo.toml [cost]


def test_population_ate_is_a_monte_carlo_mean_of_tau(demo_big):
    a = population_ate("demo", n=BIG, seed=11)
    assert a == pytest.approx(demo_big.true_ate)  # same seed, same streams: the same units
    b = population_ate("demo", n=BIG, seed=2)
    sd_tau = demo_big.truth["tau"].std()
    assert abs(a - b) <= 4 * math.sqrt(2) * sd_tau / math.sqrt(BIG)  # two independent means of τ


# ── writing ──────────────────────────────────────────────────────────────────────────────────────────────


def test_write_csv_and_parquet_round_trip(tmp_path):
    trial = simulate("demo", n=300, seed=9)
    write_simulation(trial, tmp_path / "d.csv", truth=tmp_path / "t.parquet")
    back = pd.read_csv(tmp_path / "d.csv")
    assert back.shape == trial.data.shape
    assert back.isna().sum().equals(trial.data.isna().sum())
    assert np.allclose(back["fluency_gain"], trial.data["fluency_gain"])
    truth = pd.read_parquet(tmp_path / "t.parquet")
    assert np.array_equal(truth["tau"], trial.truth["tau"]) and list(truth["id"]) == list(trial.truth["id"])
    write_simulation(trial, tmp_path / "d.parquet")
    assert pd.read_parquet(tmp_path / "d.parquet")["coached"].equals(trial.data["coached"])
    with pytest.raises(SiteproofError, match="suffix"):
        write_simulation(trial, tmp_path / "d.xlsx")
    with pytest.raises(SiteproofError):
        write_simulation(trial, tmp_path / "same.csv", truth=tmp_path / "same.csv")


# ── slow: the hidden branch effect biases a covariate-adjusted AIPW estimate ─────────────────────────────


def _cross_fitted_aipw(trial, folds: int = 5, seed: int = 0) -> float:
    """AIPW with 5-fold cross-fitted gradient boosting nuisances (Chernozhukov et al. 2018)."""
    from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
    from sklearn.model_selection import KFold

    from siteproof.core.scores import aipw_scores

    roles = trial.design.roles
    x = trial.data[list(roles.covariates)]
    numeric = x.select_dtypes("number")
    features = pd.concat([numeric.fillna(numeric.median()), numeric.isna().astype(float).add_suffix("_na"),
                          pd.get_dummies(x.drop(columns=numeric.columns), dummy_na=True).astype(float)], axis=1)
    X = features.to_numpy(float)
    y = trial.data[roles.outcome].to_numpy(float)
    w = trial.data[roles.treatment].to_numpy()
    e, m0, m1 = (np.zeros(len(y)) for _ in range(3))
    for train, test in KFold(folds, shuffle=True, random_state=seed).split(X):
        kw = dict(max_iter=150, learning_rate=0.05, max_leaf_nodes=15, random_state=seed)
        clf = HistGradientBoostingClassifier(**kw).fit(X[train], w[train])
        e[test] = np.clip(clf.predict_proba(X[test])[:, 1], 0.02, 0.98)
        for arm, out in ((0, m0), (1, m1)):
            fit = train[w[train] == arm]
            out[test] = HistGradientBoostingRegressor(**kw).fit(X[fit], y[fit]).predict(X[test])
    return float(aipw_scores(y, w, e, m0, m1).mean())


@pytest.mark.slow
def test_hidden_branch_biases_covariate_adjusted_aipw():
    """At n = 3000 the AIPW error under hidden_branch exceeds the one under demo by ≥ 0.3 × SD(outcome).

    Expected bias ≈ 6 wcpm (0.38 SD) with a per-replicate SD of about 0.3 (calibration: 4 replicates).
    """
    hidden, plain = simulate("hidden_branch", seed=21), simulate("demo", seed=21)
    sd_y = hidden.data["fluency_gain"].std()
    bias_hidden = _cross_fitted_aipw(hidden) - hidden.true_ate
    bias_plain = _cross_fitted_aipw(plain) - plain.true_ate
    assert bias_hidden - bias_plain >= 0.3 * sd_y
    assert abs(bias_plain) <= 0.15 * plain.data["fluency_gain"].std()


# ── clusters ────────────────────────────────────────────────────────────────────────────────────────────


def test_designs_without_clusters_keep_their_fingerprints():
    # sha256 of each design's repr, recorded before clusters existed: study folders keep resuming
    recorded = {
        "covariate_allocation": "0fa937f8c44bf81c7aaf1b60f62dd1a6e6d6b59efa268ba26309bdfe1da24b14",
        "demo": "a586fcf60500af7df5dc90b239b8685c1a3972a93c6a515e85477b082312a7c5",
        "extreme_rates": "376a7e13383a151d086d0a9678905c005765b3a69391ae1bdfdca33ff4f31a3f",
        "hidden_branch": "cd9f798a6a425202ef096de69369b35333e557157802de5c428166e41bab41b1",
        "many_small": "4bbc331e1fa91550a6656ba4bbd9d187e2bbd5103e42baef64059767fc9ab097",
        "null": "09381e5c8766751060d50c05cf072785326169629b865841917a17fd466083fb",
    }
    assert {name: design_fingerprint(load_design(name)) for name in UNCLUSTERED} == recorded
    assert "clusters=Clustering(" in repr(load_design("clustered"))


def test_the_clustered_design_assigns_whole_clusters():
    trial = simulate("clustered", seed=3)
    design, data = trial.design, trial.data
    roles, column = design.roles, design.clusters.column
    assert list(data.columns[:5]) == [roles.id, roles.site, roles.treatment, roles.outcome, column]
    assert len(data) == 2000 and list(trial.truth["cluster"]) == list(data[column])
    summary = cluster_design(data[roles.treatment], data[column], data[roles.site])  # also checks nesting
    assert summary.cluster_randomized and summary.n_clusters == 80
    for site, (treated, control, mixed) in summary.per_site.items():
        assert treated == round(design.rates[site] * 20) and treated + control == 20 and mixed == 0
    for _, part in data.groupby(roles.site):
        sizes = part.groupby(column).size()
        assert sizes.max() - sizes.min() <= 1  # round-robin deal inside the site
    X = data[["leader_years", "evening_circle", "age", "free_meal"]].to_numpy(float)
    levels = cluster_level_columns(X, data[column], data[roles.site], ["leader_years", "evening_circle", "age",
                                                                      "free_meal"])
    assert levels.cluster_level == ("leader_years", "evening_circle") and levels.unit_level == ("age", "free_meal")
    effects = trial.truth.groupby("cluster")["cluster_effect"].agg(["min", "max"])
    assert np.all(effects["min"] == effects["max"])
    assert load_design("clustered").to_dict()["clusters"]["icc"] == 0.2


CLUSTER_DESIGN = """
description = "two sites, many small clusters"
default_n = 4000
[roles]
outcome = "y"
treatment = "w"
site = "s"
id = "id"
cluster = "k"
[clusters]
per_site = {per_site}
icc = {icc}
assignment = "{assignment}"
covariates = {covariates}
[[covariates]]
name = "c"
kind = "normal"
mean = 0
sd = 1
[[covariates]]
name = "x"
kind = "normal"
mean = "{x_mean}"
sd = 1
[outcome]
baseline = "x"
noise_sd = 1
[effect]
tau = "1"
[[sites]]
name = "A"
share = 1
rate = 0.5
[[sites]]
name = "B"
share = 1
rate = 0.25
"""


def _cluster_file(tmp_path: Path, name: str = "k.toml", per_site: int = 1000, icc: float = 0.2,
                  assignment: str = "cluster", covariates: str = '["c"]', x_mean: str = "0.5*c") -> Path:
    text = CLUSTER_DESIGN.format(per_site=per_site, icc=icc, assignment=assignment, covariates=covariates,
                                 x_mean=x_mean)
    return _write(tmp_path, text, name)


def test_cluster_effect_has_the_declared_intraclass_correlation(tmp_path):
    trial = simulate(_cluster_file(tmp_path), seed=1)
    effects = trial.truth.groupby("cluster")["cluster_effect"].first()
    # σ_c² = icc/(1 − icc)·σ² = 0.25; a variance from G normal draws has SE σ_c²·√(2/(G − 1))
    assert abs(effects.var() - 0.25) <= 4 * 0.25 * math.sqrt(2 / (effects.size - 1))
    noise = trial.data["y"] - trial.truth["mu0"] - trial.data["w"] * trial.truth["tau"] - trial.truth["cluster_effect"]
    assert abs(noise.var() - 1.0) <= 4 * math.sqrt(2 / (len(noise) - 1))
    per_cluster = trial.data.groupby("k")["c"].nunique()
    assert per_cluster.max() == 1 and trial.data.groupby("k")["w"].nunique().max() == 1


def test_clusters_with_unit_assignment_leave_the_other_draws_unchanged(tmp_path):
    # the clusters stream is separate: with icc = 0, unit assignment and no cluster-level covariate, the data
    # are those of the same design without clusters, plus the cluster column
    with_clusters = simulate(_cluster_file(tmp_path, icc=0.0, assignment="unit", covariates="[]"), seed=4)
    plain_text = CLUSTER_DESIGN.split("[clusters]")[0].replace('cluster = "k"\n', "") + \
        "[[covariates]]" + CLUSTER_DESIGN.split("[[covariates]]", 1)[1].format(x_mean="0.5*c")
    plain = simulate(_write(tmp_path, plain_text, "plain.toml"), seed=4)
    pd.testing.assert_frame_equal(with_clusters.data.drop(columns="k"), plain.data)
    for site, part in with_clusters.data.groupby("s"):
        assert int(part["w"].sum()) == int(round(with_clusters.rates[site] * len(part)))


@pytest.mark.parametrize(
    ("change", "key"),
    [
        ({"assignment": "classroom"}, "clusters.assignment"),
        ({"covariates": '["nope"]'}, "clusters.covariates"),
        ({"icc": 1.0}, "clusters.icc"),
        ({"per_site": 0}, "clusters.per_site"),
        ({"covariates": '["x"]', "x_mean": "0.5*c"}, "covariates[x].mean"),  # cluster level sees no unit level
    ],
)
def test_cluster_mistakes_name_the_key(tmp_path, change, key):
    with pytest.raises(SiteproofError) as err:
        load_design(_cluster_file(tmp_path, **change))
    assert key in str(err.value)


def test_cluster_table_and_column_go_together_and_need_enough_units(tmp_path):
    text = CLUSTER_DESIGN.format(per_site=10, icc=0.2, assignment="cluster", covariates="[]", x_mean="0")
    with pytest.raises(SiteproofError, match="roles.cluster"):
        load_design(_write(tmp_path, text.replace('cluster = "k"\n', ""), "a.toml"))
    with pytest.raises(SiteproofError, match="roles.cluster"):
        without_table = text.split("[clusters]")[0] + "[[covariates]]" + text.split("[[covariates]]", 1)[1]
        load_design(_write(tmp_path, without_table, "b.toml"))
    with pytest.raises(SiteproofError, match="units for its"):
        simulate(_cluster_file(tmp_path, per_site=1000), n=500, seed=0)


def test_per_site_cluster_counts_and_cluster_level_missing_values(tmp_path):
    text = _cluster_file(tmp_path, per_site=30).read_text(encoding="utf-8")
    trial = simulate(_write(tmp_path, text.replace("per_site = 30\n", "per_site = 30\ncounts = { B = 7 }\n"),
                            "counts.toml"), n=400, seed=2)
    assert trial.data.groupby("s")["k"].nunique().to_dict() == {"A": 30, "B": 7}
    treated = trial.data.groupby("k").agg(s=("s", "first"), w=("w", "first")).groupby("s")["w"].sum()
    assert treated.to_dict() == {"A": 15, "B": 2}  # round(0.5·30), round(0.25·7)
    missing = text.replace('name = "c"\nkind = "normal"\n', 'name = "c"\nkind = "normal"\nmissing = 0.1\n')
    with pytest.raises(SiteproofError, match="clusters.covariates"):
        load_design(_write(tmp_path, missing, "missing.toml"))
