"""Unmasking: every blind claim scored against the sites' randomization → :class:`Scorecard`.

The blind analysis never saw the site.  Here the site labels and the known assignment rates e_S come back,
and each claim is compared with a design-based counterpart computed **on the same units** (formulas and
references in docs/methods-unmask.md):

* **Average effect.**  Truth: the pooled design-based ATE Σ_s (n_s/n)·DiM_s over the included units (sites
  with ≥ 2 units per arm), with per-unit scores ψ_design (``design.design_ate``).  Each blind estimator has
  per-unit scores Γ_blind in the sidecar; the paired difference is D = mean(Γ_blind − ψ_design) with
  SE = sd(Γ_blind − ψ_design)/√n, then a difference test, two one-sided equivalence tests with margin δ and
  the four verdict classes of Tryon & Lewis (2008) (``correspondence``).
* **Design scores for everything that is a function of x.**  Oracle AIPW with the known rate and the blind
  side's cross-fitted outcome models from the sidecar,
      Γ_design,i = μ̂₁(x_i) − μ̂₀(x_i) + W_i(Y_i − μ̂₁(x_i))/e_{S_i} − (1 − W_i)(Y_i − μ̂₀(x_i))/(1 − e_{S_i}).
  μ̂₀, μ̂₁ are functions of x only and out-of-fold, so with the known e_S the score is unbiased for τ(X, S)
  and no model is refit.  CATE rankings, groups, BLP, AUTOC/Qini, R-loss and rules are
  re-scored with it (or with the known-rate IPW arm scores), beside the blind value, with paired SEs.
* **Propensity recovery** (``recovery``), **between-site meta-analysis** (``heterogeneity``) and optional
  **leave-one-site-out transport** (``transport``).

Everything is computed on the included units; excluded sites are listed in the warnings.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..blind.analysis import BlindConfig
from ..blind.claims import Claims, rule_column, score_column, tau_column
from ..blind.plan import check_plan
from .comparisons import (  # noqa: F401  (blp_beta2_scores, _gates_comparisons re-exported for callers)
    _blp_comparison,
    _cate_comparison,
    _claim_summary,
    _gates_comparisons,
    _rule_comparison,
    blp_beta2_scores,
)
from .correspondence import compare_scores, percent_bias_reduction_ci
from ..intake.sitetrials import DesignATE, design_ate, naive_ate, site_table
from ..core.errors import SiteproofError
from ..core.estimates import Estimate, mean_and_se
from .lockedplan import UsedPlan, use_plan
from .balance import within_site_balance
from .designscores import ipw_paired_scores, overlap_paired_scores
from .siteverdicts import reference_agreement, site_verdicts
from .verdicts import headline, site_notes, table_rows
from .heterogeneity import RandomEffectsResult, random_effects
from .recovery import recover_propensity
from .sensitivity import sensitivity_for_claims
from ..core.scores import arm_scores
from ..intake.study import Study
from .scorecard import AteComparison, Scorecard
from .transport import leave_one_site_out

PRIMARY_ESTIMATOR = "aipw"
META_CI = "hksj"  # Hartung–Knapp–Sidik–Jonkman CI of the random-effects mean (t, k − 1 df)
CROSS_ESTIMAND = "overlap"
# weighting estimators are paired through their scores with ê estimated (``designscores``): the stored
# ê-known scores miss the propensity-estimation term and mis-state SE(D)
PAIRED_SCORES = {"ipw": ipw_paired_scores, CROSS_ESTIMAND: overlap_paired_scores}
Tick = Callable[[str], None]

MISMATCH_WHAT = "claims were made on another dataset"
MISMATCH_FIX = "rerun blind on this file or point unmask at the right data"


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
    required = ["e_hat", "mu0", "mu1", "m_hat", score_column("aipw")]
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
    clusters: np.ndarray | None = None

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
        return self.sidecar[score_column(estimator)].to_numpy(dtype=float)

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
        clusters=None if study.cluster is None else np.asarray(study.cluster, dtype=object)[included],
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
def _ate_comparisons(claims: dict[str, Any], u: _Units, truth: DesignATE, plan: UsedPlan) -> list[AteComparison]:
    """Every blind ATE estimator against the pooled design-based ATE, paired on the included units.

    The percent bias reduction of each adjusted estimator comes with its delta-method CI from the joint
    per-unit scores of its paired difference and the naive one (``percent_bias_reduction_ci``)."""
    design_psi = truth.estimate.scores
    delta, alpha = plan.delta, plan.alpha
    naive_d = u.blind_scores("naive") - design_psi if score_column("naive") in u.sidecar else None
    out = []
    for claim in claims.get("ate", []):
        name = claim["estimator"]
        if score_column(name) not in u.sidecar:
            continue
        scores = u.blind_scores(name)
        if name in PAIRED_SCORES:
            scores = PAIRED_SCORES[name](u.y, u.w, u.e_hat, u.mu0, u.mu1)
        comp = compare_scores(scores, design_psi, delta, alpha, u.clusters)
        pbr = None if naive_d is None or name == "naive" else percent_bias_reduction_ci(scores - design_psi, naive_d)
        same, note, estimand = None, "", claim.get("estimand", "ATE")
        if name == CROSS_ESTIMAND:
            same = compare_scores(scores, overlap_design_scores(u.e_hat, u.oracle_scores()), delta, alpha, u.clusters)
            note = (
                "targets the overlap-weighted effect (ATO), a different estimand: its verdict against the pooled "
                "ATE mixes estimand and bias; 'same_estimand' compares it with the design-based ATO"
            )
        out.append(AteComparison(
            estimator=name, estimand=estimand, claimed=_claim_summary(claim),
            blind=Estimate.from_scores(name, u.blind_scores(name), estimand=estimand, clusters=u.clusters),
            design=truth.estimate,
            comparison=comp,
            percent_bias_reduction=pbr, note=note, same_estimand=same,
        ))
    return out


# --------------------------------------------------------------------------------------------------------
# sites and meta-analysis
# --------------------------------------------------------------------------------------------------------
def _sites(study: Study, u: _Units, design: np.ndarray) -> pd.DataFrame:
    """The design site table plus each site's oracle-AIPW estimate (mean of the design scores in the site);
    with clusters the site table's SEs are CR2 and the oracle SE is the cluster-sum SE within the site."""
    data = study.blind
    declared = study.known_rate if study.rates_source == "declared" else None
    table = site_table(data.y, data.w, study.site, study.known_rate, declared, study.stratum, clusters=study.cluster)
    oracle = pd.DataFrame({"site": u.site, "score": design}).groupby("site")["score"]
    means, ses = oracle.mean(), oracle.std(ddof=1) / np.sqrt(oracle.count())
    if u.clusters is not None:
        ses = pd.Series({site: mean_and_se(design[u.site == site], u.clusters[u.site == site])[1]
                         for site in means.index})
    table["oracle_aipw"] = table["site"].map(means)
    table["oracle_aipw_se"] = table["site"].map(ses)
    return table


def _meta_analysis(sites: pd.DataFrame) -> tuple[RandomEffectsResult | None, RandomEffectsResult | None, str]:
    """DL and REML random-effects fits of the per-site differences in means of the included sites; sites with
    no usable SE are dropped by ``random_effects`` and listed in its ``dropped``."""
    usable = sites[sites["included"]]
    if len(usable) < 2:
        return None, None, f"between-site meta-analysis skipped: {len(usable)} site(s) with a usable estimate"
    est, var = usable["difference_in_means"].to_numpy(), usable["se"].to_numpy() ** 2
    labels = usable["site"].astype(str).tolist()
    try:
        return (random_effects(est, var, "dl", ci=META_CI, sites=labels),
                random_effects(est, var, "reml", ci=META_CI, sites=labels), "")
    except SiteproofError as err:  # fewer than 2 sites with a usable SE
        return None, None, f"between-site meta-analysis skipped: {err.what}"


# --------------------------------------------------------------------------------------------------------
# orchestration
# --------------------------------------------------------------------------------------------------------
def run_unmask(
    study: Study,
    claims: Claims | dict[str, Any],
    units: pd.DataFrame | None = None,
    *,
    margin: float | None = None,
    alpha: float | None = None,
    multiplicity: str | None = None,
    deviate_from_plan: bool = False,
    seed: int = 0,
    transport: bool = False,
    workers: int = 1,
    progress: Tick | None = None,
    blind_config: BlindConfig | None = None,
    site_learner: Any = None,
) -> Scorecard:
    """Score every blind claim against the sites' randomization (docs/methods-unmask.md).

    ``claims`` is the :class:`~siteproof.blind.claims.Claims` object of the blind run (its per-unit table is
    used), or a ``claims.json`` record together with its per-unit table ``units``.

    Margins, alpha and the multiplicity method come from the claims' locked analysis plan (``blind.plan``).
    ``margin`` (the ATE-family δ in outcome units), ``alpha`` and ``multiplicity`` ("holm", "bh") may only
    differ from the plan with ``deviate_from_plan=True``; the deviation is then recorded in ``plan.deviations``.
    ``seed`` drives the site classifier's folds; bootstrap draws reuse the blind run's seed so that the blind
    columns reproduce the claims.  ``transport`` adds leave-one-site-out transport with ``workers`` local
    processes, rerunning the blind analysis with ``blind_config`` (default: the claims' settings with the
    default learners).  ``site_learner`` is the classifier of the site for propensity recovery (default:
    ``recovery.default_site_learner``, a random forest).
    """
    tick = progress or (lambda label="": None)
    claims, units = _claims_and_units(claims, units)
    check_claims_match(study, claims, units)
    plan = use_plan(check_plan(claims, "the claims"), margin=margin, alpha=alpha, multiplicity=multiplicity,
                    deviate_from_plan=deviate_from_plan)
    data = study.blind
    settings = claims.get("settings", {})

    truth = design_ate(data.y, data.w, study.site, study.stratum, clusters=study.cluster)
    u = _included_units(study, units, truth.included)
    design_scores = u.oracle_scores()
    oracle = Estimate.from_scores("oracle_aipw", design_scores, estimand="ATE (included units)", clusters=u.clusters)
    sites = _sites(study, u, design_scores)
    tick("design")

    ate = _ate_comparisons(claims, u, truth, plan)
    tick("average effects")
    sensitivity = _sensitivity(study, units, truth.included, ate, settings, seed)
    tick("sensitivity")
    propensity = recover_propensity(
        u.e_hat, u.rate, u.site, u.w, X=data.X[truth.included], rates_source=study.rates_source,
        seed=seed, site_learner=site_learner, clusters=u.clusters,
    )
    tick("propensity")
    meta_dl, meta_reml, meta_note = _meta_analysis(sites)
    tau_const = u.sidecar["tau_constant"].to_numpy(dtype=float) if "tau_constant" in u.sidecar else np.zeros(u.n)
    cate = [
        _cate_comparison(c["model"], c, u, tau_const, settings, plan)
        for c in claims.get("cate", [])
        if c["model"] != "constant" and tau_column(c["model"]) in u.sidecar
    ]
    tick("heterogeneity")
    rules = [_rule_comparison(c, u, plan) for c in claims.get("rules", []) if rule_column(c["rule"]) in u.sidecar]
    tick("rules")
    tau_by_model = {c["model"]: u.sidecar[tau_column(c["model"])].to_numpy(dtype=float)
                    for c in claims.get("cate", []) if tau_column(c["model"]) in u.sidecar}
    per_site = site_verdicts(tau_by_model, design_scores, u.site, u.w, plan.delta, plan.alpha,
                             plan.multiplicity, clusters=u.clusters) if tau_by_model else None
    balance = within_site_balance(data.X, data.feature_names, data.w, study.site, plan.alpha, plan.multiplicity,
                                  stratum=study.stratum, clusters=_assigned_clusters(study))
    references = reference_agreement(truth.estimate.scores, design_scores, plan.alpha, site=u.site,
                                     clusters=u.clusters)
    tick("sites")

    moved = None
    if transport:
        moved = leave_one_site_out(
            data, study.site, study.known_rate, units["mu0"].to_numpy(float), units["mu1"].to_numpy(float),
            blind_config or config_from_settings(settings),
            tau_full={c.model: units[tau_column(c.model)].to_numpy(float) for c in cate},
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
    notes = site_notes(balance.flagged, references.flagged, references.to_dict())
    warnings += notes
    if plan.deviations:
        warnings.append("scored with a deviation from the locked analysis plan: " + ", ".join(
            f"{d['field']} {d['planned']} → {d['used']}" for d in plan.deviations))
    card = Scorecard(
        study={
            "name": getattr(study.spec, "name", None), "n": int(data.y.size), "n_sites": int(study.n_sites),
            "n_included": truth.n_included, "excluded_sites": list(truth.excluded_sites),
            "margin": plan.delta, "margin_source": _margin_source(plan), "alpha": plan.alpha,
            "outcome": data.outcome, "outcome_sd": float(data.outcome_sd()), "rates_source": study.rates_source,
            "fingerprint": data.fingerprint, "seed": seed, **_clustering(study, truth.included),
        },
        rates_source=study.rates_source, sites=sites, design=truth, oracle=oracle,
        naive=naive_ate(data.y, data.w), ate=ate, propensity=propensity, meta_dl=meta_dl, meta_reml=meta_reml,
        cate=cate, rules=rules, headline="", warnings=warnings, transport=moved, plan=plan.to_dict(),
        verdicts=table_rows(ate, cate, rules, [] if per_site is None else per_site.records(), plan),
        site_verdicts=None if per_site is None else {k: v for k, v in per_site.to_dict().items() if k != "rows"},
        within_site_balance=balance.to_dict(), reference_agreement=references.to_dict(), headline_notes=notes,
        sensitivity=sensitivity,
    )
    card.headline = headline(card)
    return card


def _assigned_clusters(study: Study) -> np.ndarray | None:
    """The cluster labels when whole clusters were assigned (the balance check's unit), else None."""
    design = study.cluster_design
    if study.cluster is None or design is None or not design.cluster_randomized:
        return None
    return np.asarray(study.cluster, dtype=object)


def _clustering(study: Study, included: np.ndarray) -> dict[str, Any]:
    """``{"clustering": {...}}`` for the scorecard's study record when units are clustered, else ``{}`` (a missing
    field reads as unclustered): clusters among the scored units, whether whole clusters were assigned."""
    if study.cluster is None:
        return {}
    labels = np.asarray(study.cluster, dtype=object)[included]
    design = study.cluster_design
    return {"clustering": {
        "clustered": True, "n_clusters": int(pd.Series(labels).nunique()),
        "cluster_randomized": bool(design is not None and design.cluster_randomized),
        "se": "cluster-robust: CR2 per site, cluster sums of the per-unit scores for paired differences",
    }}


def _sensitivity(study: Study, units: pd.DataFrame, included: np.ndarray, ate: list[AteComparison],
                 settings: dict[str, Any], seed: int) -> dict[str, Any] | None:
    """Omitted-variable-bias bounds of the blind AIPW (``unmask.sensitivity``), held against its realized bias
    D = blind − design; None when the claims carry no AIPW estimate."""
    primary = next((row for row in ate if row.estimator == PRIMARY_ESTIMATOR), None)
    if primary is None or "fold" not in units:
        return None
    result = sensitivity_for_claims(study, units, included, primary.comparison.difference,
                                    clip=tuple(settings.get("clip", (0.01, 0.99))), seed=seed)
    return result.to_dict()


def _margin_source(plan: UsedPlan) -> str:
    """How the ATE-family δ was set, for the report's margin note."""
    if any(d["field"] == "margin" for d in plan.deviations):
        return "set at unmask, deviating from the locked plan"
    if plan.margin_source == "user":
        return f"user-set at the blind stage, locked in the plan (sha256 {plan.sha256[:12]}…)"
    return f"default {plan.margin_rules.get('ate', '')}, locked in the plan (sha256 {plan.sha256[:12]}…)"


# --------------------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------------------
def _claims_and_units(
    claims: Claims | dict[str, Any], units: pd.DataFrame | None
) -> tuple[dict[str, Any], pd.DataFrame]:
    """The claims record and the per-unit table, from a Claims object or a (record, units) pair."""
    if isinstance(claims, Claims):
        return claims.to_dict(), claims.units if units is None else units
    if units is None:
        raise SiteproofError("the per-unit table of the claims is missing", "pass the Claims object run_blind returned")
    return claims, units
