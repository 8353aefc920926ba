"""CATE and rule comparisons: each heterogeneity and policy claim re-scored with the design-based scores.

For a CATE model: the GATES groups, high − low and top − bottom (D from GATES of Γ_blind − Γ_design), the BLP
β₂ with ê and with the known rate e_S (paired through its WLS influence scores), AUTOC and Qini on shared
half-samples, the cost curve and the R-loss difference, plus the "finds heterogeneity" status.  For a rule:
its value and gain with blind and oracle-AIPW arm scores, and per site.  Formulas and references in
docs/methods-unmask.md; ``u`` is the included-unit bundle ``scoring._Units``.  With ``u.clusters`` every
paired SE is the cluster-sum SE (Liang & Zeger 1986) except the AUTOC/Qini half-samples (unit-level, from
``blind.evaluation.rank_metric``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats

from ..blind.claims import rule_column, tau_column
from ..blind.costcurve import cost_curve
from ..blind.evaluation import BlpResult, blp, gates, r_loss_units, rank_metric
from ..blind.plan import cate_claim, rule_claim
from ..blind.rules import rule_value, rule_value_by_group
from ..core.estimates import Estimate
from ..core.interpret import HETEROGENEITY_ALPHA, heterogeneity_status
from .correspondence import Comparison, clustered_gates_ses, compare, compare_scores, paired_difference, unscorable
from .lockedplan import UsedPlan
from .scorecard import CateComparison, RuleComparison

if TYPE_CHECKING:
    from .scoring import _Units


# --------------------------------------------------------------------------------------------------------
# heterogeneity claims
# --------------------------------------------------------------------------------------------------------
def _gates_comparisons(
    tau: np.ndarray, blind: np.ndarray, design: np.ndarray, k: int, model: str, plan: UsedPlan,
    clusters: np.ndarray | None = None,
) -> tuple[Comparison, list[Comparison], Comparison]:
    """High/low split, GATES groups and top − bottom; D from GATES of Γ_blind − Γ_design (linear in Γ); with
    ``clusters`` SE(D) is cluster-robust (``correspondence.group_contrast_se``)."""
    gb, gd, gdiff = gates(tau, blind, k), gates(tau, design, k), gates(tau, blind - design, k)
    ses = None if clusters is None else clustered_gates_ses(tau, blind - design, k, clusters)

    def pair(b: Estimate, d: Estimate, diff: Estimate, part: str, se: float | None) -> Comparison:
        margin = plan.margin(cate_claim(model, part))
        se = diff.se if se is None else se
        if not np.isfinite(se):  # a group of < 2 units (heavy ties in τ̂ keep tied units together)
            return unscorable(b.estimate, d.estimate, margin, plan.alpha)
        return compare(b.estimate, d.estimate, se, margin, plan.alpha)

    groups = [pair(b.estimate, d.estimate, x.estimate, f"gate{g + 1}", None if ses is None else ses[1][g])
              for g, (b, d, x) in enumerate(zip(gb.groups, gd.groups, gdiff.groups))]
    return (
        pair(gb.high_low, gd.high_low, gdiff.high_low, "high_low", None if ses is None else ses[0]),
        groups,
        pair(gb.high_minus_low, gd.high_minus_low, gdiff.high_minus_low, "top_bottom",
             None if ses is None else ses[2]),
    )


def blp_beta2_scores(y: np.ndarray, w: np.ndarray, e: np.ndarray, tau: np.ndarray, baseline: np.ndarray,
                     fit: BlpResult) -> np.ndarray:
    """Per-unit scores of β̂₂ from the BLP weighted regression (mean = β̂₂), for paired comparisons.

    With regressors z_i (the columns ``fit.names`` of ``evaluation.blp``), weights v_i = 1/(e_i(1 − e_i)) and
    residuals û_i, the influence function of WLS is φ_i = (Σ_j v_j z_j z_jᵀ / n)⁻¹ z_i v_i û_i; the normal
    equations make mean(φ) = 0, so β̂₂ + φ_i,β₂ has mean β̂₂ and sd/√n equal to the HC0 standard error.
    """
    resid_w = w - e
    columns = {"intercept": np.ones_like(y), "baseline": baseline, "beta1": resid_w,
               "beta2": resid_w * (tau - tau.mean())}
    z = np.column_stack([columns[name] for name in fit.names])
    v = 1.0 / (e * (1.0 - e))
    u = y - z @ np.asarray(fit.coef)
    bread = np.linalg.inv((z * v[:, None]).T @ z / y.size)
    phi = (z * (v * u)[:, None]) @ bread.T
    j = fit.names.index("beta2")
    return fit.beta2.estimate + phi[:, j]


def _blp_comparison(u: _Units, tau: np.ndarray, margin: float, alpha: float
                    ) -> tuple[BlpResult, BlpResult, Comparison | None]:
    """BLP with ê (blind) and with e_S (design), baseline μ̂₀ as in the blind run; β₂ (a calibration slope,
    ideal 1) compared on its own scale with the plan's β₂ margin."""
    fit_b = blp(u.y, u.w, u.e_hat, tau, u.mu0)
    fit_d = blp(u.y, u.w, u.rate, tau, u.mu0)
    sd = float(np.std(tau, ddof=1))
    if "beta2" not in fit_b.names or "beta2" not in fit_d.names or not sd > 0:
        return fit_b, fit_d, None
    sb = blp_beta2_scores(u.y, u.w, u.e_hat, tau, u.mu0, fit_b)
    sd_scores = blp_beta2_scores(u.y, u.w, u.rate, tau, u.mu0, fit_d)
    return fit_b, fit_d, compare_scores(sb, sd_scores, margin, alpha, u.clusters)


def _rank_comparison(tau: np.ndarray, blind: np.ndarray, design: np.ndarray, kind: str, n_boot: int, seed: int,
                     margin: float, alpha: float, clusters: np.ndarray | None = None,
                     ) -> tuple[Comparison, float, dict[str, Any]]:
    """AUTOC / Qini of the τ̂ ranking with blind and design scores on the same half-samples (column 0 blind,
    column 1 design; half-samples of whole clusters when ``clusters`` is given); D's SE is the SD of the
    paired replicate differences.  Returns the comparison, the design value's own SE and the design TOC curve
    (q grid, TOC(q), pointwise SE) for the report."""
    res = rank_metric(tau, np.column_stack([blind, design]), kind=kind, n_boot=n_boot, seed=seed, clusters=clusters)
    comp = compare(float(res.estimate[0]), float(res.estimate[1]), res.difference(0, 1).se, margin, alpha)
    curve = {"q": res.q.tolist(), "design": {"toc": res.toc[:, 1].tolist(), "se": res.toc_se[:, 1].tolist()}}
    return comp, float(res.se[1]), curve


def _one_sided_significant(estimate: float, se: float) -> bool:
    """estimate/se > z_{1−α} (one-sided test of 'greater than 0', α = interpret.HETEROGENEITY_ALPHA)."""
    return bool(se > 0 and np.isfinite(estimate) and estimate / se > stats.norm.ppf(1 - HETEROGENEITY_ALPHA))


def _heterogeneity_status(
    claim: dict[str, Any], beta2: tuple[float, float], autoc: tuple[float, float]
) -> dict[str, Any]:
    """Does the model 'find real heterogeneity' (β₂ > 0 or AUTOC > 0, one-sided 5 %), blind and design?"""
    blp_claim = claim.get("blp", {}).get("beta2", {})
    autoc_claim = claim.get("autoc", {})
    claimed = _one_sided_significant(blp_claim.get("estimate", np.nan), blp_claim.get("se", np.nan)) or \
        _one_sided_significant(autoc_claim.get("estimate", np.nan), autoc_claim.get("se", np.nan))
    found = _one_sided_significant(*beta2) or _one_sided_significant(*autoc)
    return {"claimed": claimed, "design_finds": found, "status": heterogeneity_status(claimed, found),
            "rule": f"β₂ > 0 or AUTOC > 0, one-sided test at {100 * HETEROGENEITY_ALPHA:g} %"}


def _cate_comparison(
    key: str, claim: dict[str, Any], u: _Units, tau_const: np.ndarray, settings: dict[str, Any], plan: UsedPlan
) -> CateComparison:
    tau = u.sidecar[tau_column(key)].to_numpy(dtype=float)
    blind, design = u.blind_scores(), u.oracle_scores()
    k = int(settings.get("gates_groups", 5))
    n_boot, seed = int(settings.get("n_boot", 200)), int(settings.get("seed", 0))
    high_low, groups, top_bottom = _gates_comparisons(tau, blind, design, k, key, plan, u.clusters)
    fit_b, fit_d, beta2 = _blp_comparison(u, tau, plan.margin(cate_claim(key, "beta2")), plan.alpha)
    autoc, autoc_design_se, toc_curve = _rank_comparison(tau, blind, design, "autoc", n_boot, seed,
                                                         plan.margin(cate_claim(key, "autoc")), plan.alpha,
                                                         u.clusters)
    qini, _, _ = _rank_comparison(tau, blind, design, "qini", n_boot, seed, plan.margin(cate_claim(key, "qini")),
                                  plan.alpha, u.clusters)
    costs = None
    if u.cost is not None:
        design_costs = cost_curve(tau, design, u.cost, clusters=u.clusters)
        costs = {"x": design_costs.x.tolist(), "design": {"gain": design_costs.gain.tolist(), "se": design_costs.se.tolist()}}
    loss_b = r_loss_units(u.y, u.w, u.e_hat, u.m_hat, tau) - r_loss_units(u.y, u.w, u.e_hat, u.m_hat, tau_const)
    loss_d = r_loss_units(u.y, u.w, u.rate, u.m_star(), tau) - r_loss_units(u.y, u.w, u.rate, u.m_star(), tau_const)
    status = _heterogeneity_status(
        claim,
        (fit_d.beta2.estimate, fit_d.beta2.se),
        (autoc.design, autoc_design_se),
    )
    return CateComparison(
        model=key, n=u.n, tau_sd=float(np.std(tau, ddof=1)),
        high_low=high_low, gates=groups, top_minus_bottom=top_bottom,
        blp_blind=fit_b, blp_design=fit_d, beta2=beta2, autoc=autoc, qini=qini, toc_curve=toc_curve,
        cost_curve=costs,
        r_loss_blind=Estimate.from_scores("r_loss_difference", loss_b, estimand="R-loss difference (blind: ê, m̂)",
                                          clusters=u.clusters),
        r_loss_design=Estimate.from_scores("r_loss_difference", loss_d, estimand="R-loss difference (known e_S, m*)",
                                           clusters=u.clusters),
        r_loss_difference=paired_difference(loss_b, loss_d, u.clusters),
        heterogeneity=status,
    )


# --------------------------------------------------------------------------------------------------------
# rules
# --------------------------------------------------------------------------------------------------------
def _rule_by_site(pi: np.ndarray, u: _Units, blind_gain: float) -> pd.DataFrame:
    """Per site: the rule's treated share, oracle-AIPW and known-rate IPW value and gain, sign agreement.

    ``sign_agrees`` compares the sign of the site's oracle-AIPW gain with the blind (pooled) gain; it is
    empty where the rule treats all or none of the site (gain 0 by construction).
    """
    oracle = rule_value_by_group(pi, *u.oracle_arms(), u.site, u.cost, u.clusters)
    ipw = rule_value_by_group(pi, *u.ipw_arms(), u.site, u.cost, u.clusters)
    rows = []
    for site, val in oracle.items():
        contrast = 0.0 < val.treated_share < 1.0
        gain = val.gain
        rows.append({
            "site": site, "n": val.n, "treated_share": val.treated_share,
            "value": val.value.estimate, "value_se": val.value.se,
            "gain": gain.estimate, "gain_se": gain.se, "gain_ci_low": gain.ci[0], "gain_ci_high": gain.ci[1],
            "gain_ipw": ipw[site].gain.estimate, "gain_ipw_se": ipw[site].gain.se,
            "sign_agrees": bool(np.sign(gain.estimate) == np.sign(blind_gain)) if contrast else None,
            "opposite_and_significant": bool(
                contrast and np.sign(gain.estimate) != np.sign(blind_gain) and (gain.ci[0] > 0 or gain.ci[1] < 0)
            ),
        })
    return pd.DataFrame(rows)


def _rule_comparison(claim: dict[str, Any], u: _Units, plan: UsedPlan) -> RuleComparison:
    """Value (margin δ) and gain (the rule's own capped margin) of one rule, blind against oracle AIPW."""
    pi = u.sidecar[rule_column(claim["rule"])].to_numpy(dtype=float)
    blind = rule_value(pi, *u.blind_arms(), u.cost)
    oracle = rule_value(pi, *u.oracle_arms(), u.cost)
    ipw = rule_value(pi, *u.ipw_arms(), u.cost)
    value = compare_scores(blind.value.scores, oracle.value.scores, plan.delta, plan.alpha, u.clusters)
    gain = compare_scores(blind.gain.scores, oracle.gain.scores, plan.margin(rule_claim(claim["rule"])), plan.alpha,
                          u.clusters)
    return RuleComparison(
        rule=claim["rule"], model=claim.get("model"), kind=claim.get("kind", ""), budget=claim.get("budget"),
        treated_share=blind.treated_share, claimed=_claim_summary(claim), value=value, gain=gain,
        oracle=oracle, ipw=ipw, by_site=_rule_by_site(pi, u, blind.gain.estimate),
    )


def _claim_summary(claim: dict[str, Any]) -> dict[str, Any]:
    """The figures of a claim as written in claims.json (estimate/se/ci, or value/gain for rules)."""
    keys = ("estimate", "se", "ci", "value", "gain", "treated_share")
    return {k: claim[k] for k in keys if k in claim}
