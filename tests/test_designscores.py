"""Paired-comparison scores of the weighting estimators with an estimated propensity.

Closed forms: the means of the scores equal the Hájek IPW and overlap-weighted estimates of blind.average.
Monte Carlo in a saturated world (a discrete covariate with K levels; ê and μ̂_w are the level's treated share
and arm means, i.e. nonparametric estimates): there the influence function of the Hájek IPW with ê estimated is
the augmented one (Hirano, Imbens & Ridder 2003), so sd(ψ)/√n must match the replicate SD of τ̂; and the paired
difference of the overlap estimate with the design-based ATO at the same fitted tilt ĥ = ê(1 − ê) (known
rates in the design scores, as in unmask) must have SE sd(ψ_blind − ψ_design)/√n no smaller than its
replicate SD (it is a few per cent conservative).
The scores that treat ê as known overstate both (Lunceford & Davidian 2004, §3.2).
"""

from __future__ import annotations

import numpy as np
import pytest

from siteproof.blind.average import ipw_hajek, overlap_weighted
from siteproof.core.scores import aipw_scores
from siteproof.unmask.designscores import ipw_paired_scores, overlap_paired_scores
from siteproof.unmask.scoring import overlap_design_scores

RATES = np.array([0.2, 0.3, 0.45, 0.55, 0.7, 0.8])
LEVEL = np.linspace(-2.0, 2.0, RATES.size)
EFFECT = np.linspace(0.0, 3.0, RATES.size)


def _world(n: int, rng: np.random.Generator):
    """Discrete x; two hidden sites per level with rates e(x) ± 0.1 (so e(x) is their mixture); saturated
    ê, μ̂₀, μ̂₁ in x (level shares and arm means).  Returns y, w, the known site rate, ê, μ̂₀, μ̂₁."""
    x = rng.integers(0, RATES.size, n)
    rate = RATES[x] + np.where(rng.random(n) < 0.5, -0.1, 0.1)
    w = rng.binomial(1, rate).astype(float)
    y = LEVEL[x] + w * EFFECT[x] + rng.normal(size=n)
    levels = range(RATES.size)
    e_hat = np.array([w[x == k].mean() for k in levels])[x]
    mu1 = np.array([y[(x == k) & (w == 1)].mean() for k in levels])[x]
    mu0 = np.array([y[(x == k) & (w == 0)].mean() for k in levels])[x]
    return y, w, rate, e_hat, mu0, mu1


def test_score_means_are_the_blind_estimates():
    y, w, _, e_hat, mu0, mu1 = _world(800, np.random.default_rng(1))
    assert ipw_paired_scores(y, w, e_hat, mu0, mu1).mean() == pytest.approx(ipw_hajek(y, w, e_hat).estimate, rel=1e-12)
    assert overlap_paired_scores(y, w, e_hat, mu0, mu1).mean() == pytest.approx(
        overlap_weighted(y, w, e_hat).estimate, rel=1e-12)
    with pytest.raises(ValueError):
        ipw_paired_scores(y, w, e_hat[:-1], mu0, mu1)


@pytest.mark.parametrize("reps", [pytest.param(200, id="small"), pytest.param(2000, marks=pytest.mark.slow, id="slow")])
def test_se_from_the_scores_matches_the_replicate_sd(reps):
    rng = np.random.default_rng(20261202)
    n = 1500
    rows = []
    for _ in range(reps):
        y, w, rate, e_hat, mu0, mu1 = _world(n, rng)
        ipw = ipw_paired_scores(y, w, e_hat, mu0, mu1)
        design_ato = overlap_design_scores(e_hat, aipw_scores(y, w, rate, mu0, mu1))
        pair_new = overlap_paired_scores(y, w, e_hat, mu0, mu1) - design_ato
        pair_old = overlap_weighted(y, w, e_hat).scores - design_ato
        rows.append((ipw.mean(), ipw.std(ddof=1), ipw_hajek(y, w, e_hat).se * np.sqrt(n),
                     pair_new.mean(), pair_new.std(ddof=1), pair_old.std(ddof=1)))
    ipw_est, ipw_sd, ipw_old, d, d_sd, d_old = (np.array(c) for c in zip(*rows))
    # the SD of a normal sample of size R has relative SE ≈ 1/√(2(R − 1)); allow 4 of them
    tol = 4 / np.sqrt(2 * (reps - 1))
    assert np.mean(ipw_sd) / np.sqrt(n) / np.std(ipw_est, ddof=1) == pytest.approx(1.0, abs=tol)
    assert np.mean(ipw_old) / np.sqrt(n) / np.std(ipw_est, ddof=1) > 1.0 + tol
    # overlap D: the new SE must not understate, and it is slightly conservative (ratio 1.08 measured with
    # R = 2000 here, 1.11–1.15 in the design studies of docs/validation.md: an observed value, not a theoretical
    # one, so the upper bound is loose); the ê-known scores overstate it far more
    new_ratio = np.mean(d_sd) / np.sqrt(n) / np.std(d, ddof=1)
    old_ratio = np.mean(d_old) / np.sqrt(n) / np.std(d, ddof=1)
    assert 1.0 - tol <= new_ratio <= 1.15 + tol
    assert old_ratio > new_ratio + 2 * tol
