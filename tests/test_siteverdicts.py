"""Per-site verdicts and the agreement of the two design references: multiplicity against statsmodels,
calibration by simulation with a known truth, a shift in one site found there only."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from siteproof.core.errors import SiteproofError
from siteproof.core.interpret import DIFFERENT, EQUIVALENT, INDETERMINATE
from siteproof.core.scores import aipw_scores, ipw_scores
from siteproof.intake.sitetrials import design_ate
from siteproof.unmask.correspondence import verdict
from siteproof.unmask.siteverdicts import (
    SKIP_REASON,
    reference_agreement,
    site_verdicts,
)

RATES = np.array([0.2, 0.4, 0.5, 0.7])


def _trial(rng: np.random.Generator, per_site: int = 150, rates: np.ndarray = RATES):
    """Sites with different covariate means and rates; Bernoulli assignment at the site's rate.

    Y = X + τ(X)·W + ε with τ(x) = 1 + 0.5x, so a τ̂ equal to τ(X) has no error in any site.
    """
    k = rates.size
    site = np.repeat(np.arange(k), per_site)
    x = rng.normal(0.5 * site, 1.0)
    e = rates[site]
    w = (rng.random(site.size) < e).astype(float)
    tau = 1.0 + 0.5 * x
    y = x + tau * w + rng.normal(size=site.size)
    return site.astype(str), x, w, y, e, tau


def _oracle(x, w, y, e):
    """Oracle AIPW scores with fixed (not fitted) outcome functions μ₀ = x, μ₁ = x + 1 — any function of x works."""
    return aipw_scores(y, w, e, x, x + 1.0)


# ---------------------------------------------------------------------------------------------- site verdicts
def test_one_site_reduces_to_the_unadjusted_verdict():
    rng = np.random.default_rng(2)
    site, x, w, y, e, tau = _trial(rng, rates=np.array([0.4]))
    res = site_verdicts({"t": tau + 0.1}, _oracle(x, w, y, e), site, w, margin=0.3)
    row = res.rows[0]
    c = row.comparison
    # with one hypothesis Holm leaves p unchanged, so the verdict is correspondence.verdict of D, SE
    assert row.p_difference_adjusted == pytest.approx(c.p_value)
    assert row.verdict == verdict(c.difference.estimate, c.difference.se, 0.3) == c.verdict
    # D is the paired mean of τ̂ − Γ in the site; its SE equals the one-sample t denominator (scipy)
    d = tau + 0.1 - _oracle(x, w, y, e)
    assert c.difference.estimate == pytest.approx(d.mean())
    assert c.difference.estimate / c.difference.se == pytest.approx(stats.ttest_1samp(d, 0.0).statistic)


def test_rows_ids_frame_and_json():
    rng = np.random.default_rng(3)
    site, x, w, y, e, tau = _trial(rng)
    res = site_verdicts({"t": tau, "constant": np.full(tau.size, tau.mean())}, _oracle(x, w, y, e), site, w, 0.5)
    assert [r.claim for r in res.rows[:2]] == ["site_ate.t.0", "site_ate.t.1"]
    assert {r["family"] for r in res.records()} == {"site_ate.t", "site_ate.constant"}
    assert len(res.to_frame()) == 8 and set(res.by_model()) == {"t", "constant"}
    record = res.to_dict()
    json.dumps(record)  # JSON-ready
    row = record["rows"][0]
    assert row["equivalence_bound"] == pytest.approx(max(map(abs, row["equivalence_ci"])))
    assert row["blind"]["estimate"] == pytest.approx(tau[site == "0"].mean())


def test_small_site_is_skipped_with_reason():
    rng = np.random.default_rng(4)
    site, x, w, y, e, tau = _trial(rng, per_site=60)
    small = np.flatnonzero(site == "3")
    w[small] = 0.0
    w[small[0]] = 1.0  # one treated unit in site 3
    res = site_verdicts({"t": tau}, _oracle(x, w, y, e), site, w, 0.5)
    assert [s["site"] for s in res.skipped] == ["3"] and res.skipped[0]["reason"] == SKIP_REASON
    assert {r.site for r in res.rows} == {"0", "1", "2"}


@pytest.mark.parametrize("draws", [200, pytest.param(2000, marks=pytest.mark.slow)])
def test_truth_is_rarely_different(draws):
    """τ̂ = τ(X): every site's D has mean 0, so Holm keeps 'any site different' at ≤ α (family-wise)."""
    rng = np.random.default_rng(5)
    alpha = 0.05
    any_different, equivalent, raw_rejections = 0, 0, 0
    for _ in range(draws):
        site, x, w, y, e, tau = _trial(rng, per_site=100)
        res = site_verdicts({"t": tau}, _oracle(x, w, y, e), site, w, margin=1.0)
        verdicts = [r.verdict for r in res.rows]
        any_different += DIFFERENT in verdicts
        equivalent += verdicts.count(EQUIVALENT)
        raw_rejections += sum(r.comparison.p_value < alpha for r in res.rows)
    # theory: Holm controls the family-wise error at α; tolerance 3 binomial SEs of a rate α over the draws
    assert any_different / draws <= alpha + 3 * np.sqrt(alpha * (1 - alpha) / draws)
    # the unadjusted per-site test has size α (its SE is right, not just conservative): 3 binomial SEs, 4 tests per draw
    tests = 4 * draws
    assert abs(raw_rejections / tests - alpha) <= 3 * np.sqrt(alpha * (1 - alpha) / tests)
    assert equivalent > 0  # the margin is wide enough for some sites to be shown equivalent


def test_shift_in_one_site_is_found_there_only():
    rng = np.random.default_rng(6)
    site, x, w, y, e, tau = _trial(rng, per_site=400)
    shifted = tau + 3.0 * (site == "2")
    res = site_verdicts({"t": shifted}, _oracle(x, w, y, e), site, w, margin=0.5)
    by_site = {r.site: r.verdict for r in res.rows}
    assert by_site["2"] == DIFFERENT
    assert all(v in (EQUIVALENT, INDETERMINATE) for s, v in by_site.items() if s != "2")
    assert res.different() == ["site_ate.t.2"]


def test_site_mean_of_blind_aipw_scores_is_not_a_site_claim():
    """The module docstring's warning: with ê = the pooled propensity (not the site's rate) and outcome models
    that miss the site shift, the site mean of the blind AIPW scores is biased; the site mean of τ̂ = τ(X) is not."""
    rng = np.random.default_rng(12)
    site, x, w, y, e, tau = _trial(rng, per_site=3000, rates=np.array([0.2, 0.8]))
    y = y + 2.0 * (site == "1")  # a site shift of the outcome that x does not see
    e_hat = np.full(w.size, w.mean())  # the pooled share: x carries little information on the site here
    mu0 = mu1 = np.full(w.size, y.mean())
    blind_aipw = aipw_scores(y, w, e_hat, mu0, mu1)
    oracle = _oracle(x, w, y, e)
    by_site = {r.site: r.verdict for r in site_verdicts({"aipw": blind_aipw}, oracle, site, w, 0.3).rows}
    assert set(by_site.values()) == {DIFFERENT}
    # closed form of the bias in site s (module docstring):
    # E[Γ_blind − τ | X, s] = (e_s/ê − 1)(μ₁ − μ̂₁) − ((1 − e_s)/(1 − ê) − 1)(μ₀ − μ̂₀), ≠ 0 here
    truth = site_verdicts({"tau": tau}, oracle, site, w, 0.3)
    assert DIFFERENT not in {r.verdict for r in truth.rows}


@pytest.mark.parametrize("method, sm_method", [("holm", "holm"), ("bh", "fdr_bh")])
def test_adjustment_across_sites_matches_statsmodels(method, sm_method):
    rng = np.random.default_rng(7)
    site, x, w, y, e, tau = _trial(rng, rates=np.array([0.2, 0.3, 0.4, 0.5, 0.6, 0.7]))
    res = site_verdicts({"t": tau + 0.2, "c": np.full(tau.size, 1.5)}, _oracle(x, w, y, e), site, w, 0.5,
                        method=method)
    for model in ("t", "c"):
        rows = [r for r in res.rows if r.model == model]
        raw_d = [r.comparison.p_value for r in rows]
        raw_e = [r.comparison.p_equivalence for r in rows]
        # source: statsmodels.stats.multitest.multipletests, an independent implementation; family = one model
        assert [r.p_difference_adjusted for r in rows] == pytest.approx(multipletests(raw_d, method=sm_method)[1])
        assert [r.p_equivalence_adjusted for r in rows] == pytest.approx(multipletests(raw_e, method=sm_method)[1])


def test_input_errors():
    rng = np.random.default_rng(8)
    site, x, w, y, e, tau = _trial(rng, per_site=20)
    g = _oracle(x, w, y, e)
    with pytest.raises(SiteproofError):
        site_verdicts({"t": tau[:-1]}, g, site, w, 0.5)
    with pytest.raises(SiteproofError):
        site_verdicts({}, g, site, w, 0.5)
    with pytest.raises(SiteproofError):
        site_verdicts({"t": tau}, g, site, w, 0.5, method="none")


# ---------------------------------------------------------------------------------------------- references
def test_reference_agreement_matches_one_sample_test():
    rng = np.random.default_rng(9)
    site, x, w, y, e, tau = _trial(rng)
    dim = design_ate(y, w, site).estimate.scores
    oracle = _oracle(x, w, y, e)
    res = reference_agreement(dim, oracle, site=site)
    d = dim - oracle
    # source: scipy.stats.ttest_1samp — the same statistic mean/(sd/√n); p here is the normal version
    assert res.pooled["z"] == pytest.approx(stats.ttest_1samp(d, 0.0).statistic)
    assert res.pooled["p_value"] == pytest.approx(2 * stats.norm.sf(abs(res.pooled["z"])))
    assert [r["site"] for r in res.by_site] == ["0", "1", "2", "3"]
    json.dumps(res.to_dict())


def test_reference_agreement_flags_a_wrong_rate():
    """A rate used by the oracle that is not the assignment rate biases it; the DiM is unaffected."""
    rng = np.random.default_rng(10)
    site, x, w, y, e, tau = _trial(rng, per_site=400)
    dim = design_ate(y, w, site).estimate.scores
    wrong = np.where(site == "1", 0.7, e)  # site 1 assigned at 0.4, oracle told 0.7
    res = reference_agreement(dim, ipw_scores(y, w, wrong), site=site)
    assert res.flagged and {r["site"]: r["flagged"] for r in res.by_site}["1"]


def test_reference_agreement_is_calibrated():
    """Both references unbiased: the pooled |z| > 1.96 about 5 % of the time."""
    rng = np.random.default_rng(11)
    draws, alpha = 200, 0.05
    flagged = 0
    for _ in range(draws):
        site, x, w, y, e, tau = _trial(rng, per_site=80)
        dim = design_ate(y, w, site).estimate.scores
        flagged += reference_agreement(dim, _oracle(x, w, y, e)).pooled["flagged"]
    # tolerance: 3 binomial SEs of a rate α over 200 draws (normal approximation)
    assert flagged / draws <= alpha + 3 * np.sqrt(alpha * (1 - alpha) / draws)
