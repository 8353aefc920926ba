"""Unmasking: every blind claim scored against the sites' randomization → :class:`Scorecard`.

The blind analysis never saw the site.  Here the site labels and the known assignment rates e_S come back,
and each claim is compared with a design-based counterpart computed **on the same units** (design.md points
1–5; formulas and references in docs/methods-unmask.md):

* **Average effect.**  Truth: the pooled design-based ATE Σ_s (n_s/n)·DiM_s over the included units (sites
  with ≥ 2 units per arm), with per-unit scores ψ_design (``design.design_ate``).  Each blind estimator has
  per-unit scores Γ_blind in the sidecar; the paired difference is D = mean(Γ_blind − ψ_design) with
  SE = sd(Γ_blind − ψ_design)/√n, then a difference test, two one-sided equivalence tests with margin δ and
  the four verdict classes of Tryon & Lewis (2008) (``correspondence``).
* **Design scores for everything that is a function of x.**  Oracle AIPW with the known rate and the blind
  side's cross-fitted outcome models from the sidecar,
      Γ_design,i = μ̂₁(x_i) − μ̂₀(x_i) + W_i(Y_i − μ̂₁(x_i))/e_{S_i} − (1 − W_i)(Y_i − μ̂₀(x_i))/(1 − e_{S_i}).
  μ̂₀, μ̂₁ are functions of x only and out-of-fold, so with the known e_S the score is unbiased for τ(X, S)
  (design.md point 3) and no model is refit.  CATE rankings, groups, BLP, AUTOC/Qini, R-loss and rules are
  re-scored with it (or with the known-rate IPW arm scores), beside the blind value, with paired SEs.
* **Propensity recovery** (``recovery``), **between-site meta-analysis** (``heterogeneity``) and optional
  **leave-one-site-out transport** (``transport``).

Everything is computed on the included units; excluded sites are listed in the warnings.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd
from scipy import stats

from .. import __version__
from ..blind.analysis import BlindConfig
from .correspondence import (
    DIFFERENT,
    EQUIVALENT,
    TRIVIALLY_DIFFERENT,
    Comparison,
    compare,
    compare_scores,
    default_margin,
    paired_difference,
    percent_bias_reduction,
)
from ..intake.sitetrials import DesignATE, design_ate, naive_ate, site_table
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..blind.evaluation import BlpResult, blp, cost_curve, gates, r_loss_units, rank_metric
from .heterogeneity import RandomEffectsResult, random_effects
from .recovery import PropensityRecovery, recover_propensity
from ..blind.rules import RuleValue, rule_value, rule_value_by_group
from ..core.scores import arm_scores
from ..intake.study import Study
from .transport import TransportResult, leave_one_site_out

SCHEMA = "siteproof/scorecard"
VERSION = 1
ALPHA = 0.05
PRIMARY_ESTIMATOR = "aipw"
CROSS_ESTIMAND = "overlap"
Tick = Callable[[str], None]

MISMATCH_WHAT = "claims were made on another dataset"
MISMATCH_FIX = "rerun blind on this file or point unmask at the right data"


# --------------------------------------------------------------------------------------------------------
# result objects
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class AteComparison:
    """One blind ATE estimator scored against the pooled design-based ATE (paired on the included units).

    ``same_estimand`` is set for the overlap-weighted estimator only: its comparison with the design-based
    estimate of the *same* overlap-weighted effect (see :func:`overlap_design_scores`).
    """

    estimator: str
    estimand: str
    claimed: dict[str, Any]
    blind: Estimate
    design: Estimate
    comparison: Comparison
    percent_bias_reduction: float
    note: str = ""
    same_estimand: Comparison | None = None

    @property
    def verdict(self) -> str:
        return self.comparison.verdict

    def to_dict(self) -> dict[str, Any]:
        c = self.comparison
        out: dict[str, Any] = {
            "estimator": self.estimator,
            "estimand": self.estimand,
            "claimed": self.claimed,
            "blind": _estimate_dict(self.blind),
            "design": _estimate_dict(self.design),
            "difference": c.difference.to_dict(),
            "z": c.z,
            "p_value": c.p_value,
            "p_equivalence": c.p_equivalence,
            "equivalence_ci": list(c.equivalence_ci),
            "verdict": c.verdict,
            "percent_bias_reduction": self.percent_bias_reduction,
        }
        if self.note:
            out["note"] = self.note
        if self.same_estimand is not None:
            out["same_estimand"] = self.same_estimand.to_dict()
        return out


@dataclass(frozen=True)
class CateComparison:
    """Every heterogeneity figure of one CATE model, blind (ê, blind AIPW scores) beside design (e_S, oracle
    AIPW scores), each with its paired difference and (where a margin applies) a verdict."""

    model: str
    n: int
    tau_sd: float
    high_low: Comparison
    gates: list[Comparison]
    top_minus_bottom: Comparison
    blp_blind: BlpResult | None
    blp_design: BlpResult | None
    beta2: Comparison | None
    autoc: Comparison
    qini: Comparison
    toc_curve: dict[str, Any]
    cost_curve: dict[str, Any] | None
    r_loss_blind: Estimate
    r_loss_design: Estimate
    r_loss_difference: Estimate
    heterogeneity: dict[str, Any]

    @property
    def verdict(self) -> str:
        """The model's headline verdict: its AUTOC (the ranking claim) against the design-based AUTOC."""
        return self.autoc.verdict

    def comparisons(self) -> list[Comparison]:
        """Every comparison of this model that carries a verdict."""
        out = [self.high_low, self.top_minus_bottom, self.autoc, self.qini, *self.gates]
        return out + ([self.beta2] if self.beta2 is not None else [])

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "n": self.n,
            "tau_sd": self.tau_sd,
            "verdict": self.verdict,
            "high_low": self.high_low.to_dict(),
            "gates": [{"group": g + 1, **c.to_dict()} for g, c in enumerate(self.gates)],
            "top_minus_bottom": self.top_minus_bottom.to_dict(),
            "blp": {
                "blind": None if self.blp_blind is None else self.blp_blind.to_dict(),
                "design": None if self.blp_design is None else self.blp_design.to_dict(),
                "beta2": None if self.beta2 is None else self.beta2.to_dict(),
                "beta2_margin_note": "margin δ/sd(τ̂): β₂·sd(τ̂) is the SD of the best linear predictor "
                "of the effect, in outcome units",
            },
            "autoc": {**self.autoc.to_dict(), "curve": self.toc_curve},
            "qini": self.qini.to_dict(),
            "cost_curve": self.cost_curve,
            "r_loss": {
                "blind": self.r_loss_blind.to_dict(),
                "design": self.r_loss_design.to_dict(),
                "difference": self.r_loss_difference.to_dict(),
                "note": "R-loss difference from the constant model (negative: τ̂ beats a constant effect); "
                "squared outcome units, so no margin and no verdict — difference test only",
            },
            "heterogeneity": self.heterogeneity,
        }


@dataclass(frozen=True)
class RuleComparison:
    """A learned treatment rule: its blind value and gain against the design-based ones (known rates)."""

    rule: str
    model: str | None
    kind: str
    budget: float | None
    treated_share: float
    claimed: dict[str, Any]
    value: Comparison
    gain: Comparison
    oracle: RuleValue
    ipw: RuleValue
    by_site: pd.DataFrame

    @property
    def has_contrast(self) -> bool:
        """False when the rule treats everyone or no one: its gain is then 0 by construction."""
        return 0.0 < self.treated_share < 1.0

    @property
    def verdict(self) -> str:
        """The rule's verdict: blind gain over random allocation against the oracle-AIPW gain — or, for a
        rule that treats everyone or no one (gain ≡ 0 on both sides), its value."""
        return self.gain.verdict if self.has_contrast else self.value.verdict

    @property
    def sites_agreeing(self) -> tuple[int, int]:
        """(sites whose design gain has the sign of the blind gain, sites with a contrast)."""
        rows = self.by_site[self.by_site["sign_agrees"].notna()]
        return int(rows["sign_agrees"].astype(bool).sum()), int(len(rows))

    def to_dict(self) -> dict[str, Any]:
        agree, total = self.sites_agreeing
        return {
            "rule": self.rule,
            "model": self.model,
            "kind": self.kind,
            "budget": self.budget,
            "treated_share": self.treated_share,
            "claimed": self.claimed,
            "verdict": self.verdict,
            "verdict_on": "gain" if self.has_contrast else "value (the rule treats everyone or no one)",
            "value": self.value.to_dict(),
            "gain": self.gain.to_dict(),
            "design_oracle_aipw": self.oracle.to_dict(),
            "design_ipw_known_rate": self.ipw.to_dict(),
            "sites_agreeing": agree,
            "sites_with_contrast": total,
            "by_site": _records(self.by_site),
        }


@dataclass
class Scorecard:
    """Everything unmasking found; :meth:`to_dict` is the content of ``scorecard.json`` (docs/scorecard-format.md)."""

    study: dict[str, Any]
    rates_source: str
    sites: pd.DataFrame
    design: DesignATE
    oracle: Estimate
    naive: Estimate
    ate: list[AteComparison]
    propensity: PropensityRecovery
    meta_dl: RandomEffectsResult | None
    meta_reml: RandomEffectsResult | None
    cate: list[CateComparison]
    rules: list[RuleComparison]
    headline: str
    warnings: list[str] = field(default_factory=list)
    transport: TransportResult | None = None

    @property
    def margin(self) -> float:
        return float(self.study["margin"])

    def to_dict(self) -> dict[str, Any]:
        """The scorecard.json content (schema ``siteproof/scorecard`` version 1)."""
        return {
            "schema": SCHEMA,
            "version": VERSION,
            "siteproof_version": __version__,
            "headline": self.headline,
            "rates_source": self.rates_source,
            "study": self.study,
            "sites": _records(self.sites),
            "design_ate": {**self.design.to_dict(), "estimator": "pooled difference in means by site"},
            "design_oracle_aipw": {
                **self.oracle.to_dict(),
                "note": "known rates with the blind side's cross-fitted outcome models (efficient design-based)",
            },
            "naive_ate": self.naive.to_dict(),
            "ate": [row.to_dict() for row in self.ate],
            "propensity": self.propensity.to_dict(),
            "heterogeneity": _meta_dict(self.meta_dl, self.meta_reml),
            "cate": [row.to_dict() for row in self.cate],
            "rules": [row.to_dict() for row in self.rules],
            "transport": None if self.transport is None else self.transport.to_dict(),
            "warnings": list(self.warnings),
        }


# --------------------------------------------------------------------------------------------------------
# checks
# --------------------------------------------------------------------------------------------------------
def check_claims_match(study: Study, claims: dict[str, Any], units: pd.DataFrame) -> None:
    """Refuse claims made on other data: fingerprint mismatch, or a sidecar whose row keys differ."""
    if claims.get("fingerprint") != study.blind.fingerprint:
        raise SiteproofError(MISMATCH_WHAT, MISMATCH_FIX)
    keys = units["row_key"].astype(str).to_numpy() if "row_key" in units else None
    expected = study.blind.row_key.astype(str)
    if keys is None or keys.size != expected.size or not np.array_equal(keys, expected):
        raise SiteproofError(
            "the per-unit sidecar lists other units, or the same units in another order, than the data",
            "rerun blind on this file so that claims.json and units.parquet come from the same run",
        )
    required = ["e_hat", "mu0", "mu1", "m_hat", "score_aipw"]
    missing = [c for c in required if c not in units]
    if missing:
        raise SiteproofError(
            f"the per-unit sidecar lacks column(s) {', '.join(missing)}", "rerun blind with this siteproof version"
        )


def config_from_settings(settings: dict[str, Any]) -> BlindConfig:
    """The blind settings recorded in claims.json as a :class:`BlindConfig` (default learners)."""
    base = BlindConfig()
    return BlindConfig(
        folds=int(settings.get("folds", base.folds)),
        seed=int(settings.get("seed", base.seed)),
        clip=tuple(settings.get("clip", base.clip)),
        models=tuple(settings.get("models", base.models)),
        gates_groups=int(settings.get("gates_groups", base.gates_groups)),
        n_boot=int(settings.get("n_boot", base.n_boot)),
        budgets=tuple(settings.get("budgets", base.budgets)),
        tree=bool(settings.get("tree", base.tree)),
        tree_bins=int(settings.get("tree_bins", base.tree_bins)),
    )


# --------------------------------------------------------------------------------------------------------
# design-based scores
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Units:
    """The included units with everything the re-scoring needs (arrays aligned, data order)."""

    y: np.ndarray
    w: np.ndarray
    rate: np.ndarray
    site: np.ndarray
    cost: np.ndarray | None
    e_hat: np.ndarray
    mu0: np.ndarray
    mu1: np.ndarray
    m_hat: np.ndarray
    sidecar: pd.DataFrame

    @property
    def n(self) -> int:
        return int(self.y.size)

    def blind_arms(self) -> tuple[np.ndarray, np.ndarray]:
        """Blind doubly robust arm scores with ê (as the blind side computed them)."""
        return arm_scores(self.y, self.w, self.e_hat, self.mu0, self.mu1)

    def oracle_arms(self) -> tuple[np.ndarray, np.ndarray]:
        """Oracle AIPW arm scores: known rate e_S, cross-fitted μ̂₀, μ̂₁ (unbiased for the arm means given X, S)."""
        return arm_scores(self.y, self.w, self.rate, self.mu0, self.mu1)

    def ipw_arms(self) -> tuple[np.ndarray, np.ndarray]:
        """Known-rate IPW arm scores W·Y/e_S and (1 − W)·Y/(1 − e_S) (Horvitz & Thompson 1952)."""
        zero = np.zeros(self.n)
        return arm_scores(self.y, self.w, self.rate, zero, zero)

    def oracle_scores(self) -> np.ndarray:
        g0, g1 = self.oracle_arms()
        return g1 - g0

    def blind_scores(self, estimator: str = PRIMARY_ESTIMATOR) -> np.ndarray:
        return self.sidecar[f"score_{estimator}"].to_numpy(dtype=float)

    def m_star(self) -> np.ndarray:
        """m*(x, S) = μ̂₀ + e_S(μ̂₁ − μ̂₀): the known-rate analogue of m̂ = E[Y | X] for the R-loss."""
        return self.mu0 + self.rate * (self.mu1 - self.mu0)


def _included_units(study: Study, units: pd.DataFrame, included: np.ndarray) -> _Units:
    data = study.blind
    side = units.loc[included].reset_index(drop=True)
    return _Units(
        y=data.y[included],
        w=data.w[included].astype(float),
        rate=np.asarray(study.known_rate, dtype=float)[included],
        site=np.asarray(study.site).astype(str)[included],
        cost=None if data.cost is None else data.cost[included],
        e_hat=side["e_hat"].to_numpy(dtype=float),
        mu0=side["mu0"].to_numpy(dtype=float),
        mu1=side["mu1"].to_numpy(dtype=float),
        m_hat=side["m_hat"].to_numpy(dtype=float),
        sidecar=side,
    )


def overlap_design_scores(e_hat: np.ndarray, design_scores: np.ndarray) -> np.ndarray:
    """Design-based scores of the overlap-weighted effect the blind side targets.

    With h(x) = ê(x)(1 − ê(x)) (a function of x, fit out-of-fold) and unbiased scores Γ_design,
    θ̂_h = Σ h_i Γ_i / Σ h_i estimates E[h(X)τ(X, S)]/E[h(X)], the overlap-weighted effect of Li, Morgan &
    Zaslavsky (2018).  Linearised scores ψ_i = θ̂_h + h_i(Γ_i − θ̂_h)/mean(h) have mean θ̂_h.
    """
    h = e_hat * (1.0 - e_hat)
    theta = float(np.sum(h * design_scores) / np.sum(h))
    return theta + h * (design_scores - theta) / h.mean()


# --------------------------------------------------------------------------------------------------------
# average effects
# --------------------------------------------------------------------------------------------------------
def _ate_comparisons(claims: dict[str, Any], u: _Units, truth: DesignATE, margin: float) -> list[AteComparison]:
    """Every blind ATE estimator against the pooled design-based ATE, paired on the included units."""
    design_psi = truth.estimate.scores
    rows = []
    naive_bias = None
    for claim in claims.get("ate", []):
        name = claim["estimator"]
        if f"score_{name}" not in u.sidecar:
            continue
        scores = u.blind_scores(name)
        comp = compare_scores(scores, design_psi, margin, ALPHA)
        if name == "naive":
            naive_bias = comp.difference.estimate
        rows.append((name, claim, scores, comp))
    out = []
    for name, claim, scores, comp in rows:
        pbr = float("nan") if naive_bias is None or name == "naive" else percent_bias_reduction(
            naive_bias, comp.difference.estimate
        )
        same, note, estimand = None, "", claim.get("estimand", "ATE")
        if name == CROSS_ESTIMAND:
            same = compare_scores(scores, overlap_design_scores(u.e_hat, u.oracle_scores()), margin, ALPHA)
            note = (
                "targets the overlap-weighted effect (ATO), a different estimand: its verdict against the pooled "
                "ATE mixes estimand and bias; 'same_estimand' compares it with the design-based ATO"
            )
        out.append(AteComparison(
            estimator=name, estimand=estimand, claimed=_claim_summary(claim),
            blind=Estimate.from_scores(name, scores, estimand=estimand), design=truth.estimate, comparison=comp,
            percent_bias_reduction=pbr, note=note, same_estimand=same,
        ))
    return out


# --------------------------------------------------------------------------------------------------------
# heterogeneity claims
# --------------------------------------------------------------------------------------------------------
def _gates_comparisons(
    tau: np.ndarray, blind: np.ndarray, design: np.ndarray, k: int, margin: float
) -> tuple[Comparison, list[Comparison], Comparison]:
    """High/low split, GATES groups and top − bottom; D from GATES of Γ_blind − Γ_design (linear in Γ)."""
    gb, gd, gdiff = gates(tau, blind, k), gates(tau, design, k), gates(tau, blind - design, k)

    def pair(b: Estimate, d: Estimate, diff: Estimate) -> Comparison:
        return compare(b.estimate, d.estimate, diff.se, margin, ALPHA)

    groups = [pair(b.estimate, d.estimate, x.estimate) for b, d, x in zip(gb.groups, gd.groups, gdiff.groups)]
    return (
        pair(gb.high_low, gd.high_low, gdiff.high_low),
        groups,
        pair(gb.high_minus_low, gd.high_minus_low, gdiff.high_minus_low),
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


def _blp_comparison(u: _Units, tau: np.ndarray, margin: float) -> tuple[BlpResult, BlpResult, Comparison | None]:
    """BLP with ê (blind) and with e_S (design), baseline μ̂₀ as in the blind run; β₂ compared with the margin
    δ/sd(τ̂) (β₂·sd(τ̂) is the SD of the best linear predictor of the effect, in outcome units)."""
    fit_b = blp(u.y, u.w, u.e_hat, tau, u.mu0)
    fit_d = blp(u.y, u.w, u.rate, tau, u.mu0)
    sd = float(np.std(tau, ddof=1))
    if "beta2" not in fit_b.names or "beta2" not in fit_d.names or not sd > 0:
        return fit_b, fit_d, None
    sb = blp_beta2_scores(u.y, u.w, u.e_hat, tau, u.mu0, fit_b)
    sd_scores = blp_beta2_scores(u.y, u.w, u.rate, tau, u.mu0, fit_d)
    return fit_b, fit_d, compare_scores(sb, sd_scores, margin / sd, ALPHA)


def _rank_comparison(tau: np.ndarray, blind: np.ndarray, design: np.ndarray, kind: str, n_boot: int, seed: int,
                     margin: float) -> tuple[Comparison, float, dict[str, Any]]:
    """AUTOC / Qini of the τ̂ ranking with blind and design scores on the same half-samples (column 0 blind,
    column 1 design); D's SE is the SD of the paired replicate differences.  Returns the comparison, the
    design value's own SE and the design TOC curve (q grid, TOC(q), pointwise SE) for the report."""
    res = rank_metric(tau, np.column_stack([blind, design]), kind=kind, n_boot=n_boot, seed=seed)
    comp = compare(float(res.estimate[0]), float(res.estimate[1]), res.difference(0, 1).se, margin, ALPHA)
    curve = {"q": res.q.tolist(), "design": {"toc": res.toc[:, 1].tolist(), "se": res.toc_se[:, 1].tolist()}}
    return comp, float(res.se[1]), curve


def _one_sided_significant(estimate: float, se: float) -> bool:
    """estimate/se > z_{1−α} (one-sided test of 'greater than 0')."""
    return bool(se > 0 and np.isfinite(estimate) and estimate / se > stats.norm.ppf(1 - ALPHA))


def _heterogeneity_status(
    claim: dict[str, Any], beta2: tuple[float, float], autoc: tuple[float, float]
) -> dict[str, Any]:
    """Does the model 'find real heterogeneity' (β₂ > 0 or AUTOC > 0, one-sided 5 %), blind and design?"""
    blp_claim = claim.get("blp", {}).get("beta2", {})
    autoc_claim = claim.get("autoc", {})
    claimed = _one_sided_significant(blp_claim.get("estimate", np.nan), blp_claim.get("se", np.nan)) or \
        _one_sided_significant(autoc_claim.get("estimate", np.nan), autoc_claim.get("se", np.nan))
    found = _one_sided_significant(*beta2) or _one_sided_significant(*autoc)
    status = {
        (True, True): "confirmed",
        (True, False): "not confirmed",
        (False, True): "missed",
        (False, False): "none claimed, none found",
    }[(claimed, found)]
    return {"claimed": claimed, "design_finds": found, "status": status,
            "rule": "β₂ > 0 or AUTOC > 0, one-sided test at 5 %"}


def _cate_comparison(
    key: str, claim: dict[str, Any], u: _Units, tau_const: np.ndarray, settings: dict[str, Any], margin: float
) -> CateComparison:
    tau = u.sidecar[f"tau_{key}"].to_numpy(dtype=float)
    blind, design = u.blind_scores(), u.oracle_scores()
    k = int(settings.get("gates_groups", 5))
    n_boot, seed = int(settings.get("n_boot", 200)), int(settings.get("seed", 0))
    high_low, groups, top_bottom = _gates_comparisons(tau, blind, design, k, margin)
    fit_b, fit_d, beta2 = _blp_comparison(u, tau, margin)
    autoc, autoc_design_se, toc_curve = _rank_comparison(tau, blind, design, "autoc", n_boot, seed, margin)
    qini, _, _ = _rank_comparison(tau, blind, design, "qini", n_boot, seed, margin)
    costs = None
    if u.cost is not None:
        design_costs = cost_curve(tau, design, u.cost)
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
        cost_curve=costs, r_loss_blind=Estimate.from_scores("r_loss_difference", loss_b, estimand="R-loss difference (blind: ê, m̂)"),
        r_loss_design=Estimate.from_scores("r_loss_difference", loss_d, estimand="R-loss difference (known e_S, m*)"),
        r_loss_difference=paired_difference(loss_b, loss_d),
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
    oracle = rule_value_by_group(pi, *u.oracle_arms(), u.site, u.cost)
    ipw = rule_value_by_group(pi, *u.ipw_arms(), u.site, u.cost)
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


def _rule_comparison(claim: dict[str, Any], u: _Units, margin: float) -> RuleComparison:
    pi = u.sidecar[f"rule_{claim['rule']}"].to_numpy(dtype=float)
    blind = rule_value(pi, *u.blind_arms(), u.cost)
    oracle = rule_value(pi, *u.oracle_arms(), u.cost)
    ipw = rule_value(pi, *u.ipw_arms(), u.cost)
    value = compare_scores(blind.value.scores, oracle.value.scores, margin, ALPHA)
    gain = compare_scores(blind.gain.scores, oracle.gain.scores, margin, ALPHA)
    return RuleComparison(
        rule=claim["rule"], model=claim.get("model"), kind=claim.get("kind", ""), budget=claim.get("budget"),
        treated_share=blind.treated_share, claimed=_claim_summary(claim), value=value, gain=gain,
        oracle=oracle, ipw=ipw, by_site=_rule_by_site(pi, u, blind.gain.estimate),
    )


# --------------------------------------------------------------------------------------------------------
# sites and meta-analysis
# --------------------------------------------------------------------------------------------------------
def _sites(study: Study, u: _Units, design: np.ndarray) -> pd.DataFrame:
    """The design site table plus each site's oracle-AIPW estimate (mean of the design scores in the site)."""
    data = study.blind
    declared = study.known_rate if study.rates_source == "declared" else None
    table = site_table(data.y, data.w, study.site, study.known_rate, declared, study.stratum)
    oracle = pd.DataFrame({"site": u.site, "score": design}).groupby("site")["score"]
    means, ses = oracle.mean(), oracle.std(ddof=1) / np.sqrt(oracle.count())
    table["oracle_aipw"] = table["site"].map(means)
    table["oracle_aipw_se"] = table["site"].map(ses)
    return table


def _meta_analysis(sites: pd.DataFrame) -> tuple[RandomEffectsResult | None, RandomEffectsResult | None, str]:
    """DL and REML random-effects fits of the per-site differences in means (included sites with SE > 0)."""
    usable = sites[sites["included"] & np.isfinite(sites["se"]) & (sites["se"] > 0)]
    if len(usable) < 2:
        return None, None, f"between-site meta-analysis skipped: {len(usable)} site(s) with a usable estimate"
    est, var = usable["difference_in_means"].to_numpy(), usable["se"].to_numpy() ** 2
    return random_effects(est, var, "dl"), random_effects(est, var, "reml"), ""


def _meta_dict(dl: RandomEffectsResult | None, reml: RandomEffectsResult | None) -> dict[str, Any] | None:
    """Contract keys (q, q_pvalue, i2, tau2_dl, tau2_reml, estimate, prediction_interval) from the REML fit
    (I² and the mean) plus both full fits."""
    if dl is None or reml is None:
        return None
    return {
        "k": reml.k, "q": reml.q, "q_df": reml.q_df, "q_pvalue": reml.q_pvalue,
        "i2": reml.i2, "i2_dl": dl.i2, "tau2_dl": dl.tau2, "tau2_reml": reml.tau2,
        "estimate": reml.estimate, "se": reml.se, "ci": list(reml.ci),
        "prediction_interval": list(reml.prediction_interval),
        "note": "random-effects mean, I² and prediction interval from REML; inputs are the per-site differences "
        "in means and their Neyman variances" + (f"; {reml.note}" if reml.note else ""),
        "dl": dl.to_dict(), "reml": reml.to_dict(),
    }


# --------------------------------------------------------------------------------------------------------
# orchestration
# --------------------------------------------------------------------------------------------------------
def run_unmask(
    study: Study,
    claims: dict[str, Any],
    units: pd.DataFrame,
    *,
    margin: float | None = None,
    seed: int = 0,
    transport: bool = False,
    workers: int = 1,
    progress: Tick | None = None,
    blind_config: BlindConfig | None = None,
    site_learner: Any = None,
) -> Scorecard:
    """Score every blind claim against the sites' randomization (issue 4; docs/methods-unmask.md).

    ``margin`` is the equivalence margin δ in outcome units (default 0.1 × SD of the outcome, a common
    practice).  ``seed`` drives the site classifier's folds; bootstrap draws reuse the blind run's seed so
    that the blind columns reproduce the claims.  ``transport`` adds leave-one-site-out transport with
    ``workers`` local processes, rerunning the blind analysis with ``blind_config`` (default: the claims'
    settings with the default learners).  ``site_learner`` is the classifier of the site for propensity
    recovery (default: ``recovery.default_site_learner``, a random forest).
    """
    tick = progress or (lambda label="": None)
    check_claims_match(study, claims, units)
    data = study.blind
    margin_source = "user" if margin is not None else "default: 0.1 × SD of the outcome (common practice)"
    margin = float(margin) if margin is not None else default_margin(data.y)
    settings = claims.get("settings", {})

    truth = design_ate(data.y, data.w, study.site, study.stratum)
    u = _included_units(study, units, truth.included)
    design_scores = u.oracle_scores()
    oracle = Estimate.from_scores("oracle_aipw", design_scores, estimand="ATE (included units)")
    sites = _sites(study, u, design_scores)
    tick("design")

    ate = _ate_comparisons(claims, u, truth, margin)
    tick("average effects")
    propensity = recover_propensity(
        u.e_hat, u.rate, u.site, u.w, X=data.X[truth.included], rates_source=study.rates_source,
        seed=seed, site_learner=site_learner,
    )
    tick("propensity")
    meta_dl, meta_reml, meta_note = _meta_analysis(sites)
    tau_const = u.sidecar["tau_constant"].to_numpy(dtype=float) if "tau_constant" in u.sidecar else np.zeros(u.n)
    cate = [
        _cate_comparison(c["model"], c, u, tau_const, settings, margin)
        for c in claims.get("cate", [])
        if c["model"] != "constant" and f"tau_{c['model']}" in u.sidecar
    ]
    tick("heterogeneity")
    rules = [_rule_comparison(c, u, margin) for c in claims.get("rules", []) if f"rule_{c['rule']}" in u.sidecar]
    tick("rules")

    moved = None
    if transport:
        moved = leave_one_site_out(
            data, study.site, study.known_rate, units["mu0"].to_numpy(float), units["mu1"].to_numpy(float),
            blind_config or config_from_settings(settings),
            tau_full={c.model: units[f"tau_{c.model}"].to_numpy(float) for c in cate},
            workers=workers, progress=tick,
        )

    warnings = list(study.warnings) + list(claims.get("warnings", []))
    if truth.excluded_sites:
        warnings.append(
            f"excluded from every comparison (fewer than 2 units in an arm): {', '.join(truth.excluded_sites)}; "
            f"the scorecard covers the other {truth.n_included} units"
        )
    if meta_note:
        warnings.append(meta_note)
    if study.rates_source != "declared":
        warnings.append(
            f"known rates: {study.rates_source} — no rate was declared for some sites, so the realized treated "
            "share stands in for the known rate there"
        )
    card = Scorecard(
        study={
            "name": getattr(study.spec, "name", None), "n": int(data.y.size), "n_sites": int(study.n_sites),
            "n_included": truth.n_included, "excluded_sites": list(truth.excluded_sites),
            "margin": margin, "margin_source": margin_source, "alpha": ALPHA,
            "outcome": data.outcome, "outcome_sd": float(data.outcome_sd()), "rates_source": study.rates_source,
            "fingerprint": data.fingerprint, "seed": seed,
        },
        rates_source=study.rates_source, sites=sites, design=truth, oracle=oracle,
        naive=naive_ate(data.y, data.w), ate=ate, propensity=propensity, meta_dl=meta_dl, meta_reml=meta_reml,
        cate=cate, rules=rules, headline="", warnings=warnings, transport=moved,
    )
    card.headline = headline(card)
    return card


# --------------------------------------------------------------------------------------------------------
# verdict summaries
# --------------------------------------------------------------------------------------------------------
def claim_verdicts(scorecard: Scorecard) -> list[tuple[str, str]]:
    """(claim label, verdict) for every headline claim: each ATE estimator (the overlap estimator by its
    same-estimand comparison), each CATE model (AUTOC) and each rule (gain)."""
    out = []
    for row in scorecard.ate:
        comp = row.same_estimand if row.same_estimand is not None else row.comparison
        out.append((f"ATE {row.estimator}", comp.verdict))
    out += [(f"CATE {row.model}", row.verdict) for row in scorecard.cate]
    out += [(f"rule {row.rule}", row.verdict) for row in scorecard.rules]
    return out


def any_different(scorecard: Scorecard) -> bool:
    """True when any headline claim (:func:`claim_verdicts`) is ``different`` — for ``--fail-on different``."""
    return any(v == DIFFERENT for _, v in claim_verdicts(scorecard))


def _recovered(verdict: str) -> str:
    return {EQUIVALENT: "recovered", TRIVIALLY_DIFFERENT: "recovered", DIFFERENT: "not recovered"}.get(
        verdict, "undetermined"
    )


def headline(scorecard: Scorecard) -> str:
    """One sentence: what the blind analysis recovered, what it did not, and what stays undetermined."""
    parts: dict[str, list[str]] = {"recovered": [], "not recovered": [], "undetermined": []}
    primary = next((r for r in scorecard.ate if r.estimator == PRIMARY_ESTIMATOR), None)
    if primary is not None:
        c = primary.comparison
        parts[_recovered(c.verdict)].append(
            f"the average effect (blind AIPW {c.blind:.3g} vs design {c.design:.3g})"
        )
    slope = scorecard.propensity.calibration_slope
    if np.isfinite(slope.estimate):
        ok = slope.ci[0] <= 1.0 <= slope.ci[1] or abs(slope.estimate - 1.0) <= 0.1
        parts["recovered" if ok else "not recovered"].append(f"the propensity calibration (slope {slope.estimate:.2f})")
    for label, rows in (("effect rankings", scorecard.cate), ("rule gains", scorecard.rules)):
        by_class: dict[str, int] = {}
        for row in rows:
            key = _recovered(row.verdict)
            by_class[key] = by_class.get(key, 0) + 1
        for key, count in by_class.items():
            parts[key].append(f"{count} of {len(rows)} {label}")
    said = [f"{key}: {', '.join(items)}" for key, items in parts.items() if items]
    return ("Unmasked against the sites' randomization — " + "; ".join(said) + ".") if said else \
        "Unmasked against the sites' randomization — no claim could be scored."


# --------------------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------------------
def _estimate_dict(est: Estimate) -> dict[str, Any]:
    return {"estimate": est.estimate, "se": est.se, "ci": [est.ci[0], est.ci[1]]}


def _claim_summary(claim: dict[str, Any]) -> dict[str, Any]:
    """The figures of a claim as written in claims.json (estimate/se/ci, or value/gain for rules)."""
    keys = ("estimate", "se", "ci", "value", "gain", "treated_share")
    return {k: claim[k] for k in keys if k in claim}


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    def plain(v: Any) -> Any:
        if isinstance(v, np.generic):
            v = v.item()
        if isinstance(v, float) and not np.isfinite(v):
            return None
        return v

    return [{k: plain(v) for k, v in row.items()} for row in frame.to_dict("records")]
