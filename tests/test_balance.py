"""Within-site randomization check: the randomization z and the χ² combination against scipy, the omnibus
Mahalanobis distance against statsmodels and its definition, calibration under within-site randomization,
and the covariates it must flag."""

from __future__ import annotations

import json

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.multitest import multipletests

from siteproof.core.errors import SiteproofError
from siteproof.unmask.balance import (
    FEW_UNITS,
    NO_VARIATION,
    combined_p_value,
    mahalanobis_balance,
    randomization_z,
    within_site_balance,
)

RATES = np.array([0.25, 0.5, 0.75])


def _trial(rng: np.random.Generator, per_site: int = 40, rates: np.ndarray = RATES):
    """Complete randomization within each site (round(rate·n) treated); covariate means differ by site, so the
    pooled arms are imbalanced while each site is balanced."""
    site = np.repeat(np.arange(rates.size), per_site)
    w = np.zeros(site.size)
    for s, rate in enumerate(rates):
        index = np.flatnonzero(site == s)
        w[rng.choice(index, int(round(rate * per_site)), replace=False)] = 1.0
    X = np.column_stack([
        rng.normal(site, 1.0),                      # continuous, site-dependent mean
        (rng.random(site.size) < 0.2 + 0.2 * site),  # binary, site-dependent share
        rng.exponential(1.0, site.size),            # skewed
    ]).astype(float)
    return X, ["age", "member", "visits"], w, site.astype(str)


def test_randomization_z_matches_pearson_chi2_for_a_binary_covariate():
    rng = np.random.default_rng(1)
    X, _, w, site = _trial(rng)
    cell = site == "1"
    x, t = X[cell, 1], w[cell]
    n = x.size
    table = np.array([[np.sum((x == a) & (t == b)) for b in (0, 1)] for a in (0, 1)])
    # source: scipy.stats.chi2_contingency without continuity correction (Pearson's X² = n·r²); z² = (n − 1)·r²
    pearson = stats.chi2_contingency(table, correction=False).statistic
    assert randomization_z(X[cell], t)[1] ** 2 == pytest.approx((n - 1) / n * pearson)


def test_randomization_z_has_the_randomization_variance():
    """Exact randomization distribution by enumeration: all C(8, 3) splits of a fixed cell; z has mean 0, var 1."""
    from itertools import combinations

    x = np.array([[0.3], [1.2], [-0.7], [2.5], [0.0], [0.9], [-1.1], [4.0]])
    zs = []
    for treated in combinations(range(8), 3):
        t = np.zeros(8)
        t[list(treated)] = 1.0
        zs.append(randomization_z(x, t)[0])
    # closed form: E[x̄₁ − x̄₀] = 0 and Var = S²(1/n₁ + 1/n₀) under complete randomization (Imbens & Rubin 2015)
    assert np.mean(zs) == pytest.approx(0.0, abs=1e-12) and np.var(zs) == pytest.approx(1.0)


def test_combined_p_value_closed_form_and_scipy():
    z = np.array([1.3, -0.4])
    t, k, p = combined_p_value(z)
    # closed form: the χ²₂ survival function is exp(−t/2)
    assert (t, k) == (pytest.approx(1.69 + 0.16), 2) and p == pytest.approx(np.exp(-t / 2))
    z5 = np.array([0.5, -2.0, 1.1, np.nan, 0.3, -0.9])
    t5, k5, p5 = combined_p_value(z5)
    # source: scipy.stats.chi2.sf with 5 df (the NaN cell has no variation and is not counted)
    assert k5 == 5 and p5 == pytest.approx(stats.chi2.sf(np.nansum(z5 ** 2), 5))


def test_mahalanobis_balance_matches_statsmodels_and_its_definition():
    rng = np.random.default_rng(2)
    X, _, w, _ = _trial(rng)
    stat, r = mahalanobis_balance(X, w)
    n1, n0 = w.sum(), w.size - w.sum()
    d = X[w == 1].mean(axis=0) - X[w == 0].mean(axis=0)
    # definition (Morgan & Rubin 2012): dᵀ[cov(X)·(1/n₁ + 1/n₀)]⁻¹d, cov with the n − 1 divisor
    assert stat == pytest.approx(d @ np.linalg.solve(np.cov(X.T) * (1 / n1 + 1 / n0), d))
    # source: statsmodels OLS of W on [1, X]; M = (n − 1)·R²
    fit = sm.OLS(w, sm.add_constant(X)).fit()
    assert r == 3 and stat == pytest.approx((w.size - 1) * fit.rsquared)


@pytest.mark.parametrize("draws", [200, pytest.param(2000, marks=pytest.mark.slow)])
def test_balanced_trial_is_rarely_flagged(draws):
    """Under within-site randomization each covariate's T is χ²_k, so Holm keeps 'any flag' at ≤ α."""
    rng = np.random.default_rng(3)
    alpha = 0.05
    any_flag = any_omnibus = pooled_flag = raw = 0
    for _ in range(draws):
        X, names, w, site = _trial(rng)
        res = within_site_balance(X, names, w, site, alpha)
        raw += sum(r["p_value"] < alpha for r in res.rows)
        any_flag += bool(res.flagged)
        any_omnibus += any(r["flagged"] for r in res.omnibus)
        pooled_flag += "age" in within_site_balance(X, names, w, np.zeros(w.size), alpha).flagged
    # theory: Holm controls the family-wise error at α; tolerance 3 binomial SEs of a rate α over the draws
    bound = alpha + 3 * np.sqrt(alpha * (1 - alpha) / draws)
    assert any_flag / draws <= bound
    assert any_omnibus / draws <= bound
    # each covariate's χ² test has size α (not merely ≤ α): 3 binomial SEs over 3 tests per draw
    tests = 3 * draws
    assert abs(raw / tests - alpha) <= 3 * np.sqrt(alpha * (1 - alpha) / tests)
    # the same check with the site ignored sees the confounding (site-dependent mean and rate): it must flag
    assert pooled_flag / draws > 0.5


def test_post_treatment_covariate_is_flagged():
    rng = np.random.default_rng(4)
    X, names, w, site = _trial(rng, per_site=60)
    after = 0.8 * w + rng.normal(size=w.size)  # measured after treatment: shifted by it
    res = within_site_balance(np.column_stack([X, after]), names + ["visits_after"], w, site)
    assert res.flagged == ["visits_after"]
    row = res.rows[-1]
    assert row["df"] == 3 and row["p_adjusted"] < 0.05
    # source: statsmodels.stats.multitest.multipletests(method="holm") on the covariates' p-values
    raw = [r["p_value"] for r in res.rows]
    assert [r["p_adjusted"] for r in res.rows] == pytest.approx(multipletests(raw, method="holm")[1])


def test_assignment_unit_identifier_is_flagged():
    """Two classrooms per site, one treated as a whole: the classroom dummy determines W within every site."""
    rng = np.random.default_rng(5)
    X, names, w, site = _trial(rng, per_site=40, rates=np.array([0.5, 0.5]))
    classroom_a = w.copy()  # classroom A is the treated one in each site
    res = within_site_balance(np.column_stack([X, classroom_a]), names + ["classroom_A"], w, site)
    row = next(r for r in res.rows if r["covariate"] == "classroom_A")
    # W = the dummy: z = √(n_c − 1) in each cell (module docstring), T = 2·39 on 2 df
    assert row["flagged"] and row["max_abs_z"] == pytest.approx(np.sqrt(39)) and row["statistic"] == pytest.approx(78)
    assert all(r["flagged"] for r in res.omnibus)  # W is a linear function of the covariates: R² = 1


def test_skips_constant_covariates_and_small_sites():
    rng = np.random.default_rng(6)
    X, names, w, site = _trial(rng)
    site = site.copy()
    site[:3] = "tiny"
    w[:3] = 1.0  # 'tiny': three treated units, no control
    X = np.column_stack([X, np.full(w.size, 0.1)])
    res = within_site_balance(X, names + ["const"], w, site)
    reasons = {s.get("covariate", s.get("site")): s["reason"] for s in res.skipped}
    assert reasons == {"tiny": FEW_UNITS, "const": NO_VARIATION}
    assert [r["covariate"] for r in res.rows] == names
    assert list(res.z.columns) == ["0", "1", "2"]
    json.dumps(res.to_dict())
    assert list(res.to_frame().columns)[:6] == ["covariate", "statistic", "df", "p_value", "p_adjusted", "flagged"]


def test_strata_are_cells():
    rng = np.random.default_rng(7)
    X, names, w, site = _trial(rng, per_site=80)
    stratum = np.tile(np.repeat(["a", "b"], 40), 3)
    res = within_site_balance(X, names, w, site, stratum=stratum)
    assert list(res.z.columns) == ["0:a", "0:b", "1:a", "1:b", "2:a", "2:b"]


def test_input_errors():
    rng = np.random.default_rng(8)
    X, names, w, site = _trial(rng)
    with pytest.raises(SiteproofError):
        within_site_balance(X, names[:2], w, site)
    with pytest.raises(SiteproofError):
        within_site_balance(X, names, w * 2, site)
    with pytest.raises(SiteproofError):
        within_site_balance(X[:-1], names, w, site)


def test_permutation_p_matches_full_enumeration():
    """One cell of 10 units, 4 treated: all C(10, 4) = 210 splits give the exact randomization p-value."""
    from itertools import combinations

    rng = np.random.default_rng(9)
    x = rng.normal(size=(10, 1))
    w = np.zeros(10)
    w[[0, 3, 4, 8]] = 1.0
    x[w == 1] += 0.8
    observed = randomization_z(x, w)[0] ** 2
    splits = [np.isin(np.arange(10), c).astype(float) for c in combinations(range(10), 4)]
    exact = np.mean([randomization_z(x, t)[0] ** 2 >= observed * (1 - 1e-12) for t in splits])
    b = 2000
    res = within_site_balance(x, ["x"], w, np.zeros(10), permutations=b, seed=3)
    # Monte Carlo p = (1 + hits)/(1 + B) against the enumerated exact p: tolerance 4 binomial SEs
    assert res.rows[0]["p_value"] == pytest.approx(exact, abs=4 * np.sqrt(exact * (1 - exact) / b) + 1 / b)
    assert res.reference == "permutation (2000 draws, seed 3)"


def test_permutation_is_seeded_and_calibrated_in_tiny_sites():
    rng = np.random.default_rng(10)
    X, names, w, site = _trial(rng, per_site=8, rates=np.array([0.5, 0.5, 0.5]))
    first = within_site_balance(X, names, w, site, permutations=99, seed=1).to_dict()
    assert first == within_site_balance(X, names, w, site, permutations=99, seed=1).to_dict()
    draws, alpha, rejected = 200, 0.05, 0
    for _ in range(draws):
        X, names, w, site = _trial(rng, per_site=8, rates=np.array([0.5, 0.5, 0.5]))
        rejected += within_site_balance(X, names, w, site, permutations=99, seed=2).rows[0]["p_value"] <= alpha
    # an exact test: P(p ≤ α) ≤ α; tolerance 3 binomial SEs over 200 draws
    assert rejected / draws <= alpha + 3 * np.sqrt(alpha * (1 - alpha) / draws)
