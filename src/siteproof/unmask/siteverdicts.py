"""Per-site verdicts: does each blind effect model's pooled finding hold in every member site?

The consortium analyst's question.  The blind analysis never saw the site, so its only claim about a site is
what its effect model τ̂(x) implies there: the site-restricted mean of the out-of-fold τ̂(X_i).  That number
is a function of the covariates alone, a genuine blind claim.  The design side is each site's randomization:
the oracle AIPW scores (known rate e_S, the blind run's cross-fitted μ̂₀, μ̂₁)

    Γ_design,i = μ̂₁(X_i) − μ̂₀(X_i) + W_i(Y_i − μ̂₁(X_i))/e_{S_i} − (1 − W_i)(Y_i − μ̂₀(X_i))/(1 − e_{S_i}),

whose conditional mean is E[Γ_design,i | X_i, S_i] = τ(X_i, S_i) whatever μ̂ is (Robins, Rotnitzky & Zhao
1994), because e_S is the true assignment probability within the site.  For site s with n_s units

    D_s = mean_{i∈s}(τ̂(X_i) − Γ_design,i),      SE(D_s) = sd_{i∈s}(τ̂(X_i) − Γ_design,i)/√n_s,

and E[D_s | X] = mean_{i∈s}(τ̂(X_i) − τ(X_i, s)): D_s is unbiased for the site-average error of τ̂.  Each D_s
gets the difference test and the two one-sided equivalence tests of ``correspondence`` (Schuirmann 1987); the
p-values are adjusted across the sites of each model (Holm 1979 by default, Benjamini & Hochberg 1995 on
request) and the four verdict classes (Tryon & Lewis 2008) are read off the adjusted p-values.

Why not the site-restricted mean of the blind AIPW scores Γ_blind (with ê)?  Its conditional mean is

    E[Γ_blind,i | X_i, S_i = s] = μ̂₁ − μ̂₀ + e_s(μ₁(X_i, s) − μ̂₁)/ê(X_i) − (1 − e_s)(μ₀(X_i, s) − μ̂₀)/(1 − ê(X_i)),

which equals τ(X_i, s) only when ê(X_i) = e_s or μ̂ = μ(·, s).  ê estimates E[e_S | X], not e_s, so in a site
whose rate differs from the pooled propensity at its covariates the mean is biased; and it is computed with
the site labels, so it is not something the blind analysis claimed.  Its error measures the site-calibration
of ê (which ``recovery`` scores), not whether the blind findings hold in the site.

The module also checks the two design references against each other (:func:`reference_agreement`): the
difference-in-means scores of ``sitetrials.design_ate`` and the oracle AIPW scores estimate the same
average effect on the same units, so their paired difference should be noise.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd
from scipy import stats

from ..blind.plan import check_multiplicity
from ..core.checks import alpha_level, unit_vector
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..core.interpret import ALPHA, DEFAULT_MULTIPLICITY, DIFFERENT, verdict_counts
from ..core.results import ResultsMixin
from ..intake.sitetrials import MIN_PER_ARM, site_order
from .correspondence import Comparison, compare_scores, paired_difference, verdict_from_p
from .multiplicity import adjust

SITE_ATE_FAMILY = "site_ate"
SKIP_REASON = f"fewer than {MIN_PER_ARM} units in an arm"


# --------------------------------------------------------------------------------------------------------
# per-site verdicts
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, repr=False)
class SiteVerdict(ResultsMixin):
    """One model's implied average effect in one site against the site's randomization.

    ``blind`` is mean_{i∈s} τ̂(X_i) with SE sd(τ̂)/√n_s (spread of the model's predictions over the site's
    units); ``design`` the mean of the oracle AIPW scores in the site with SE sd(Γ_design)/√n_s;
    ``comparison`` the paired, unadjusted comparison; ``verdict`` is read off the adjusted p-values.
    """

    model: str
    site: str
    n_treated: int
    n_control: int
    blind: Estimate
    design: Estimate
    comparison: Comparison
    p_difference_adjusted: float
    p_equivalence_adjusted: float
    adjustment: str
    verdict: str

    @property
    def claim(self) -> str:
        """The claim id ``site_ate.<model>.<site>``."""
        return f"{SITE_ATE_FAMILY}.{self.model}.{self.site}"

    @property
    def family(self) -> str:
        """The multiplicity family ``site_ate.<model>``: the p-values are adjusted across its sites."""
        return f"{SITE_ATE_FAMILY}.{self.model}"

    @property
    def n(self) -> int:
        return self.n_treated + self.n_control

    @property
    def equivalence_bound(self) -> float:
        """max(|lower|, |upper|) of the (1 − 2α) CI of D: the smallest margin the TOST would accept."""
        low, high = self.comparison.equivalence_ci
        return float(max(abs(low), abs(high)))

    def _key_numbers(self) -> dict[str, Any]:
        c = self.comparison
        return {"claim": self.claim, "blind": c.blind, "design": c.design, "verdict": self.verdict}

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame([self._flat()])

    def _flat(self) -> dict[str, Any]:
        c = self.comparison
        return {
            "claim": self.claim, "model": self.model, "site": self.site, "n": self.n,
            "blind": c.blind, "blind_se": self.blind.se, "design": c.design, "design_se": self.design.se,
            "difference": c.difference.estimate, "se": c.difference.se,
            "ci_low": c.difference.ci[0], "ci_high": c.difference.ci[1],
            "p_difference": c.p_value, "p_difference_adjusted": self.p_difference_adjusted,
            "p_equivalence": c.p_equivalence, "p_equivalence_adjusted": self.p_equivalence_adjusted,
            "verdict": self.verdict,
        }

    def to_dict(self) -> dict[str, Any]:
        """The verdicts-table row of this claim (JSON-ready; field list in docs/methods-per-site.md)."""
        c = self.comparison
        return {
            "claim": self.claim, "family": self.family, "model": self.model, "site": self.site,
            "n": self.n, "n_treated": self.n_treated, "n_control": self.n_control,
            "blind": self.blind.to_dict(), "design": self.design.to_dict(), "difference": c.difference.to_dict(),
            "z": c.z, "margin": c.margin, "equivalence_bound": self.equivalence_bound,
            "equivalence_ci": list(c.equivalence_ci),
            "p_difference": c.p_value, "p_equivalence": c.p_equivalence,
            "p_difference_adjusted": self.p_difference_adjusted,
            "p_equivalence_adjusted": self.p_equivalence_adjusted,
            "adjustment": self.adjustment, "alpha": c.alpha,
            "verdict": self.verdict, "verdict_unadjusted": c.verdict,
        }


@dataclass(frozen=True, repr=False)
class SiteVerdicts(ResultsMixin):
    """Every (model, site) verdict of the ``site_ate`` family, plus the sites that could not be scored."""

    rows: tuple[SiteVerdict, ...]
    skipped: tuple[dict[str, Any], ...]
    margin: float
    alpha: float
    method: str
    models: tuple[str, ...] = field(default=())

    def records(self) -> list[dict[str, Any]]:
        """The rows as JSON-ready dicts (:meth:`SiteVerdict.to_dict`)."""
        return [row.to_dict() for row in self.rows]

    def by_model(self) -> dict[str, dict[str, int]]:
        """Per model: how many sites got each verdict (display order of ``core.interpret``)."""
        return {m: verdict_counts(r.verdict for r in self.rows if r.model == m) for m in self.models}

    def different(self) -> list[str]:
        """Claim ids whose adjusted verdict is ``different``."""
        return [r.claim for r in self.rows if r.verdict == DIFFERENT]

    def _key_numbers(self) -> dict[str, Any]:
        return {"models": len(self.models), "sites": len({r.site for r in self.rows}),
                "different": len(self.different()), "skipped": len(self.skipped), "method": self.method}

    def to_frame(self) -> pd.DataFrame:
        """One row per (model, site): blind and design site means, D with SE and CI, raw and adjusted p, verdict."""
        return pd.DataFrame([r._flat() for r in self.rows])

    def to_dict(self) -> dict[str, Any]:
        return {
            "family": SITE_ATE_FAMILY, "method": self.method, "alpha": self.alpha, "margin": self.margin,
            "rows": self.records(), "skipped": [dict(s) for s in self.skipped],
            "by_model": self.by_model(),
        }


def site_verdicts(
    tau: Mapping[str, Any],
    design_scores: Any,
    site: Any,
    w: Any,
    margin: float,
    alpha: float = ALPHA,
    method: str = DEFAULT_MULTIPLICITY,
    clusters: Any = None,
) -> SiteVerdicts:
    """Each model's site-restricted mean of τ̂ against the site's oracle AIPW mean (module docstring).

    ``tau`` maps a model name to its out-of-fold τ̂(X_i) on the same units, in the same order, as
    ``design_scores`` (Γ_design), ``site`` and ``w``.  Sites with fewer than 2 units in an arm are skipped and
    listed in ``skipped``.  P-values are adjusted across the scored sites of each model with ``method``
    (``"holm"``, Holm 1979; ``"bh"``, Benjamini & Hochberg 1995); the verdict uses the adjusted p-values.
    With ``clusters`` (one label per unit, nested in sites) every per-site SE is the cluster-sum SE within the
    site (Liang & Zeger 1986; ``core.clusters.cluster_mean_se``).
    """
    alpha_level(alpha, upper=0.5)
    check_multiplicity(method)
    design = unit_vector("the design scores", design_scores)
    n = design.size
    labels = site_labels(site, n)
    arm = unit_vector("the treatment", w, n)
    if not tau:
        raise SiteproofError("no effect model was given", "pass {model name: out-of-fold τ̂} for at least one model")
    taus = {str(m): unit_vector(f"τ̂ of model {m}", t, n) for m, t in tau.items()}
    scored, skipped = _scorable_sites(labels, arm)
    groups = None if clusters is None else np.asarray(clusters, dtype=object)
    rows: list[SiteVerdict] = []
    for model, t in taus.items():
        rows += _model_rows(model, t, design, arm, scored, margin, alpha, method, groups)
    return SiteVerdicts(tuple(rows), tuple(skipped), float(margin), float(alpha), method, tuple(taus))


def site_labels(site: Any, n: int, what: str = "site") -> np.ndarray:
    """One text label per unit (length ``n``), else SiteproofError."""
    labels = np.asarray(site).astype(str).ravel()
    if labels.size != n:
        raise SiteproofError(f"{labels.size} {what} labels for {n} units",
                             f"pass one {what} label per unit, in the same order as the other inputs")
    return labels


def _scorable_sites(labels: np.ndarray, w: np.ndarray) -> tuple[dict[str, np.ndarray], list[dict[str, Any]]]:
    """{site: unit indices} for sites with ≥ MIN_PER_ARM units in each arm (natural order), and the skipped
    ones with the reason."""
    scored, skipped = {}, []
    groups = pd.Series(np.arange(labels.size)).groupby(labels).indices
    for s in site_order(labels):
        index = np.asarray(groups[s])
        n1 = int(np.sum(w[index] == 1))
        n0 = index.size - n1
        if min(n1, n0) >= MIN_PER_ARM:
            scored[s] = index
        else:
            skipped.append({"site": s, "n": n1 + n0, "n_treated": n1, "n_control": n0, "reason": SKIP_REASON})
    return scored, skipped


def _model_rows(
    model: str, tau: np.ndarray, design: np.ndarray, w: np.ndarray, sites: dict[str, np.ndarray],
    margin: float, alpha: float, method: str, clusters: np.ndarray | None = None,
) -> list[SiteVerdict]:
    """The rows of one model: paired comparison per site, then the adjustment across its sites."""
    comparisons, parts = [], []
    for s, index in sites.items():
        n1 = int(np.sum(w[index] == 1))
        mine = None if clusters is None else clusters[index]
        comparisons.append(compare_scores(tau[index], design[index], margin, alpha, mine))
        parts.append((s, n1, index.size - n1,
                      Estimate.from_scores(f"{model} τ̂ mean", tau[index], estimand=f"site ATE ({s}), blind",
                                           clusters=mine),
                      Estimate.from_scores("oracle_aipw", design[index], estimand=f"site ATE ({s}), design",
                                           clusters=mine)))
    p_diff = adjust([c.p_value for c in comparisons], method)
    p_eq = adjust([c.p_equivalence for c in comparisons], method)
    return [
        SiteVerdict(model, s, n1, n0, blind, des, c, float(pd_), float(pe), method, verdict_from_p(pd_, pe, alpha))
        for (s, n1, n0, blind, des), c, pd_, pe in zip(parts, comparisons, p_diff, p_eq)
    ]


# --------------------------------------------------------------------------------------------------------
# agreement of the two design references
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, repr=False)
class ReferenceAgreement(ResultsMixin):
    """The paired difference of the two design references, pooled and per site.

    Each row: ``site`` ("pooled" for all units), ``n``, ``difference`` (Estimate of mean(ψ_DiM − Γ_oracle)),
    ``z``, ``p_value`` and ``flagged`` (|z| > z_{1−α/2}).
    """

    pooled: dict[str, Any]
    by_site: tuple[dict[str, Any], ...]
    alpha: float

    @property
    def flagged(self) -> bool:
        """True when the pooled or any per-site difference is flagged."""
        return bool(self.pooled["flagged"] or any(r["flagged"] for r in self.by_site))

    def _key_numbers(self) -> dict[str, Any]:
        d = self.pooled["difference"]
        return {"difference": d.estimate, "se": d.se, "flagged": self.flagged}

    def to_frame(self) -> pd.DataFrame:
        """One row for the pooled difference, then one per site."""
        return pd.DataFrame([_flat_agreement(r) for r in (self.pooled, *self.by_site)])

    def to_dict(self) -> dict[str, Any]:
        def row(r: dict[str, Any]) -> dict[str, Any]:
            return {**r, "difference": r["difference"].to_dict()}

        return {"alpha": self.alpha, "pooled": row(self.pooled), "by_site": [row(r) for r in self.by_site],
                "flagged": self.flagged}


def reference_agreement(
    dim_scores: Any, oracle_scores: Any, alpha: float = ALPHA, site: Any = None, clusters: Any = None
) -> ReferenceAgreement:
    """D = mean(ψ_DiM − Γ_oracle), SE = sd(ψ_DiM − Γ_oracle)/√n, z = D/SE, two-sided normal p.

    ψ_DiM are the per-unit scores of the design-based difference in means (``sitetrials.design_ate``, mean =
    the pooled DiM) and Γ_oracle the oracle AIPW scores, on the same units.  Both are unbiased for the same
    average effect under each site's randomization, so |z| > z_{1−α/2} (``flagged``) points at a declared
    rate that is not the one used, or at a stratum the DiM respected and the rate did not.  With ``site``,
    the same comparison is made within each site (sites with at least 2 units).  With SE = 0, z is NaN and
    the row is flagged exactly when D ≠ 0.  With ``clusters`` the SEs come from cluster sums of the paired
    differences (Liang & Zeger 1986).
    """
    alpha_level(alpha)
    dim = unit_vector("the difference-in-means scores", dim_scores)
    oracle = unit_vector("the oracle AIPW scores", oracle_scores, dim.size)
    cl = None if clusters is None else np.asarray(clusters, dtype=object)
    pooled = _agreement_row("pooled", dim, oracle, alpha, cl)
    rows: list[dict[str, Any]] = []
    if site is not None:
        labels = site_labels(site, dim.size)
        groups = pd.Series(np.arange(labels.size)).groupby(labels).indices
        for s in site_order(labels):
            index = np.asarray(groups[s])
            if index.size >= 2:
                rows.append(_agreement_row(s, dim[index], oracle[index], alpha,
                                           None if cl is None else cl[index]))
    return ReferenceAgreement(pooled, tuple(rows), float(alpha))


def _agreement_row(label: str, dim: np.ndarray, oracle: np.ndarray, alpha: float,
                   clusters: np.ndarray | None = None) -> dict[str, Any]:
    diff = paired_difference(dim, oracle, clusters)
    z = diff.z
    p = diff.p_value if np.isfinite(z) else (1.0 if diff.estimate == 0.0 else 0.0)
    crit = float(stats.norm.ppf(1.0 - alpha / 2.0))
    flagged = bool(abs(z) > crit) if np.isfinite(z) else diff.estimate != 0.0
    return {"site": label, "n": int(dim.size), "difference": diff, "z": z, "p_value": float(p), "flagged": flagged}


def _flat_agreement(r: dict[str, Any]) -> dict[str, Any]:
    d: Estimate = r["difference"]
    return {"site": r["site"], "n": r["n"], "difference": d.estimate, "se": d.se, "ci_low": d.ci[0],
            "ci_high": d.ci[1], "z": r["z"], "p_value": r["p_value"], "flagged": r["flagged"]}
