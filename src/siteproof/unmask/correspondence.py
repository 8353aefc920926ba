"""Scoring a blind claim against its design-based counterpart: paired differences, TOST and verdicts.

A blind estimate and the design-based estimate of the same number are computed on the same units, so their
errors are correlated.  Both are means of per-unit scores, so the SE of their difference comes from the
per-unit differences of the scores

    D = mean(Γ_blind − Γ_design),   SE(D) = sd(Γ_blind − Γ_design)/√n,

never √(SE_blind² + SE_design²).  Given D, its SE and an equivalence margin δ > 0:

* difference test: two-sided z = D/SE, p = 2·Φ(−|z|); "different" when the (1 − α) CI of D excludes 0.
* equivalence test, two one-sided tests (Schuirmann 1987):
      p_lower = 1 − Φ((D + δ)/SE)  for H₀: D ≤ −δ,
      p_upper = Φ((D − δ)/SE)      for H₀: D ≥ +δ,
  p_TOST = max(p_lower, p_upper); "equivalent" when p_TOST < α, i.e. the (1 − 2α) CI D ± z_{1−α}·SE lies
  inside (−δ, δ).
* four classes (Tryon & Lewis 2008): equivalent and not different → "equivalent"; different and not
  equivalent → "different"; both → "trivially different"; neither → "indeterminate".

The equivalence bound is the smallest margin at which D would be called equivalent:
max(|lower|, |upper|) of the (1 − 2α) CI of D.

Percent bias reduction (Shadish, Clark & Steiner 2008) compares the bias left by an adjusted estimate with the
bias of the naive one: PBR = 100·(1 − |adjusted bias| / |naive bias|), with a delta-method CI from the joint
per-unit scores of the two paired differences (:func:`percent_bias_reduction_ci`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from ..core.checks import alpha_level, at_least, finite_vector, same_length, standard_error
from ..core.errors import SiteproofError
from ..blind.evaluation import quantile_groups
from ..core.estimates import Estimate, mean_and_se, normal_ci
from ..core.interpret import DIFFERENT, EQUIVALENT, INDETERMINATE, TRIVIALLY_DIFFERENT


@dataclass(frozen=True)
class Comparison:
    """A blind estimate scored against its design-based counterpart.

    ``difference`` is D = blind − design with its SE and (1 − α) CI (95% at the default α = 0.05);
    ``z``/``p_value`` test D = 0; ``p_equivalence`` is the TOST p-value for |D| ≥ ``margin`` and
    ``equivalence_ci`` the (1 − 2α) CI it corresponds to (90% at α = 0.05).  When SE(D) = 0 (identical
    scores) ``z`` is NaN and both tests take their limits (see :func:`difference_p_value`, :func:`tost_p_value`).
    """

    blind: float
    design: float
    difference: Estimate
    z: float
    p_value: float
    margin: float
    p_equivalence: float
    equivalence_ci: tuple[float, float]
    verdict: str
    alpha: float = 0.05

    @property
    def equivalence_bound(self) -> float:
        """Smallest margin at which D would be equivalent: max(|lo|, |hi|) of its (1 − 2α) CI."""
        return float(max(abs(self.equivalence_ci[0]), abs(self.equivalence_ci[1])))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (non-finite values stay NaN; ``outputs`` writes them as null)."""
        return {
            "blind": float(self.blind),
            "design": float(self.design),
            "difference": self.difference.to_dict(),
            "z": float(self.z),
            "p_value": float(self.p_value),
            "margin": float(self.margin),
            "p_equivalence": float(self.p_equivalence),
            "equivalence_ci": [float(self.equivalence_ci[0]), float(self.equivalence_ci[1])],
            "equivalence_bound": self.equivalence_bound,
            "verdict": self.verdict,
            "alpha": float(self.alpha),
        }


def paired_difference(
    scores_blind: Sequence[float] | np.ndarray, scores_design: Sequence[float] | np.ndarray,
    clusters: Any = None,
) -> Estimate:
    """D = mean(Γ_b − Γ_d), SE = sd(Γ_b − Γ_d)/√n (n − 1 divisor), 95% Wald CI; scores are Γ_b − Γ_d.

    With ``clusters`` (one label per unit) SE = √(G/(G − 1)·Σ_g (Σ_{i∈g} (d_i − d̄))²)/n, the cluster sums of
    the paired differences d_i = Γ_b,i − Γ_d,i (Liang & Zeger 1986; ``core.clusters.cluster_mean_se``).
    """
    blind = _score_array(scores_blind, "blind")
    design = _score_array(scores_design, "design")
    same_length("blind scores", blind, "design scores", design,
                "pass per-unit scores of the same units, in the same order, for both estimates")
    at_least("a paired difference", blind, 2, "score more units")
    return Estimate.from_scores("blind − design", blind - design, estimand="difference", clusters=clusters)


def compare(blind: float, design: float, se_difference: float, margin: float, alpha: float = 0.05) -> Comparison:
    """Score a blind estimate against the design-based one when SE(D) comes from elsewhere (e.g. bootstrap).

    D = blind − design; tests and verdict as in the module docstring (Schuirmann 1987; Tryon & Lewis 2008).
    """
    _check_margin_alpha(margin, alpha)
    _check_se(se_difference)
    blind, design = float(blind), float(design)
    estimate = _difference_estimate(blind - design, float(se_difference), alpha)
    return _comparison(blind, design, estimate, margin, alpha)


def unscorable(blind: float, design: float, margin: float, alpha: float = 0.05) -> Comparison:
    """A claim that cannot be tested (e.g. a GATES group of fewer than 2 units, whose SE does not exist):
    D and both p-values are NaN, the verdict ``indeterminate``; multiplicity adjustments skip NaN p-values."""
    _check_margin_alpha(margin, alpha)
    nan = float("nan")
    blind, design = float(blind), float(design)
    estimate = Estimate("blind − design", blind - design, nan, (nan, nan), "difference")
    return Comparison(blind, design, estimate, nan, nan, float(margin), nan, (nan, nan), INDETERMINATE, float(alpha))


def compare_scores(
    scores_blind: Sequence[float] | np.ndarray,
    scores_design: Sequence[float] | np.ndarray,
    margin: float,
    alpha: float = 0.05,
    clusters: Any = None,
) -> Comparison:
    """Score a blind estimate against the design-based one from their per-unit scores on the same units
    (SE of D from cluster sums of the paired differences when ``clusters`` is given)."""
    _check_margin_alpha(margin, alpha)
    paired = paired_difference(scores_blind, scores_design, clusters)
    blind = float(np.mean(np.asarray(scores_blind, dtype=float)))
    design = float(np.mean(np.asarray(scores_design, dtype=float)))
    estimate = _difference_estimate(paired.estimate, paired.se, alpha, paired.scores)
    return _comparison(blind, design, estimate, margin, alpha)


def verdict(difference: float, se: float, margin: float, alpha: float = 0.05) -> str:
    """One of the four classes of Tryon & Lewis (2008) for D with SE and margin δ.

    different  ⇔ two-sided p < α ⇔ the (1 − α) CI of D excludes 0;
    equivalent ⇔ TOST p < α ⇔ the (1 − 2α) CI of D lies inside (−δ, δ) (Schuirmann 1987).
    """
    _check_margin_alpha(margin, alpha)
    _check_se(se)
    return verdict_from_p(difference_p_value(difference, se), tost_p_value(difference, se, margin), alpha)


def verdict_from_p(p_difference: float, p_equivalence: float, alpha: float = 0.05) -> str:
    """The four classes from the difference p-value and the TOST p-value (raw or multiplicity-adjusted):
    different ⇔ p_difference < α, equivalent ⇔ p_equivalence < α (Tryon & Lewis 2008)."""
    is_different = bool(p_difference < alpha)
    is_equivalent = bool(p_equivalence < alpha)
    if is_equivalent and is_different:
        return TRIVIALLY_DIFFERENT
    if is_equivalent:
        return EQUIVALENT
    if is_different:
        return DIFFERENT
    return INDETERMINATE


def difference_p_value(difference: float, se: float) -> float:
    """Two-sided normal p-value 2·Φ(−|D|/SE) for D = 0; with SE = 0 it is 0 if D ≠ 0 and 1 if D = 0."""
    if se == 0.0:
        return 0.0 if difference != 0.0 else 1.0
    return float(2.0 * stats.norm.sf(abs(difference) / se))


def tost_p_value(difference: float, se: float, margin: float) -> float:
    """max(1 − Φ((D + δ)/SE), Φ((D − δ)/SE)) — the larger of the two one-sided p-values (Schuirmann 1987).

    With SE = 0 it is 0 when |D| < δ and 1 otherwise.
    """
    if se == 0.0:
        return 0.0 if abs(difference) < margin else 1.0
    p_lower = stats.norm.sf((difference + margin) / se)
    p_upper = stats.norm.cdf((difference - margin) / se)
    return float(max(p_lower, p_upper))


def percent_bias_reduction(naive_bias: float, adjusted_bias: float) -> float:
    """PBR = 100·(1 − |adjusted bias| / |naive bias|) (Shadish, Clark & Steiner 2008).

    Biases are estimate − truth (here: blind − design).  100 means all the naive bias was removed, 0 none,
    negative values mean the adjustment made things worse.  Undefined (NaN) when the naive bias is 0.
    """
    naive_bias, adjusted_bias = float(naive_bias), float(adjusted_bias)
    if naive_bias == 0.0:
        return float("nan")
    return 100.0 * (1.0 - abs(adjusted_bias) / abs(naive_bias))


def percent_bias_reduction_ci(
    adjusted: Sequence[float] | np.ndarray, naive: Sequence[float] | np.ndarray, level: float = 0.95
) -> Estimate:
    """PBR = 100·(1 − |b_a|/|b_n|) with b_a = mean(d_a), b_n = mean(d_n) and its delta-method SE and CI.

    ``adjusted`` and ``naive`` are the per-unit scores d_i = Γ_blind,i − ψ_design,i of the two paired
    differences (same units).  With gradient g_a = −100·sign(b_a)/|b_n|, g_n = 100·|b_a|·sign(b_n)/b_n², the
    linearised scores φ_i = PBR + g_a(d_a,i − b_a) + g_n(d_n,i − b_n) have SE sd(φ)/√n (delta method, e.g. van
    der Vaart 1998, ch. 3).  The approximation needs b_n well away from 0 (and is rough when b_a ≈ 0, where |·|
    has a kink); NaN when b_n = 0.
    """
    d_a = _score_array(adjusted, "adjusted difference")
    d_n = _score_array(naive, "naive difference")
    same_length("adjusted scores", d_a, "naive scores", d_n, "pass the paired scores of the same units")
    b_a, b_n = float(d_a.mean()), float(d_n.mean())
    pbr = percent_bias_reduction(b_n, b_a)
    if not np.isfinite(pbr):
        return Estimate("percent_bias_reduction", pbr, float("nan"), (float("nan"), float("nan")), "PBR (%)")
    g_a = -100.0 * np.sign(b_a) / abs(b_n)
    g_n = 100.0 * abs(b_a) * np.sign(b_n) / b_n**2
    phi = pbr + g_a * (d_a - b_a) + g_n * (d_n - b_n)
    se = float(np.std(phi, ddof=1) / np.sqrt(phi.size))
    return Estimate("percent_bias_reduction", pbr, se, normal_ci(pbr, se, level), "PBR (%)", phi)


def _difference_estimate(d: float, se: float, alpha: float, scores: np.ndarray | None = None) -> Estimate:
    """D with SE and its (1 − α) Wald CI, the interval the difference test uses."""
    note = "" if alpha == 0.05 else f"CI level {1.0 - alpha:g} (alpha = {alpha:g})"
    return Estimate("blind − design", d, se, normal_ci(d, se, 1.0 - alpha), "difference", scores, note)


def _comparison(blind: float, design: float, difference: Estimate, margin: float, alpha: float) -> Comparison:
    d, se = difference.estimate, difference.se
    return Comparison(
        blind=blind,
        design=design,
        difference=difference,
        z=float(d / se) if se > 0 else float("nan"),
        p_value=difference_p_value(d, se),
        margin=float(margin),
        p_equivalence=tost_p_value(d, se, margin),
        equivalence_ci=normal_ci(d, se, 1.0 - 2.0 * alpha),
        verdict=verdict(d, se, margin, alpha),
        alpha=float(alpha),
    )


def _score_array(scores: Any, which: str) -> np.ndarray:
    return finite_vector(f"the {which} scores", scores,
                         "drop the affected units from both score vectors (keep them paired) or fix the nuisance estimates")


def _check_se(se: float) -> None:
    standard_error("the SE of the difference", se)


def _check_margin_alpha(margin: float, alpha: float) -> None:
    if not np.isfinite(margin) or margin <= 0:
        raise SiteproofError(
            f"the equivalence margin must be a positive number, got {margin}",
            "set --margin to the smallest difference that matters (default: 0.1 × residual SD of the outcome)",
        )
    alpha_level(alpha, upper=0.5)


def group_contrast_se(d: np.ndarray, high: np.ndarray, low: np.ndarray | None, clusters: np.ndarray) -> float:
    """Cluster-robust SE of mean_H(d) − mean_L(d) (or of mean_H(d) alone when ``low`` is None).

    V = V_H + V_L − 2·C with V_a = cluster_mean_se(d over a)² (Liang & Zeger 1986) and, because a cluster may
    have units in both groups, C = G/(G − 1)·Σ_g T_gH·T_gL/(n_H·n_L), T_ga = Σ_{i∈g∩a} (d_i − d̄_a), G the
    clusters with units in both groups (C = 0 when none do).  With one unit per cluster V is the unit formula
    sd²_H/n_H + sd²_L/n_L of ``evaluation.gates`` exactly.
    """
    if high.sum() < 2 or (low is not None and low.sum() < 2):
        return float("nan")
    var_h = mean_and_se(d[high], clusters[high])[1] ** 2
    if low is None:
        return float(np.sqrt(var_h))
    var_l = mean_and_se(d[low], clusters[low])[1] ** 2
    t_h = pd.Series(d[high] - d[high].mean()).groupby(clusters[high]).sum()
    t_l = pd.Series(d[low] - d[low].mean()).groupby(clusters[low]).sum()
    shared = t_h.index.intersection(t_l.index)
    g = shared.size
    cov = 0.0 if g < 2 else g / (g - 1) * float(np.sum(t_h[shared] * t_l[shared])) / (high.sum() * low.sum())
    return float(np.sqrt(max(var_h + var_l - 2.0 * cov, 0.0)))


def clustered_gates_ses(tau: np.ndarray, d: np.ndarray, k: int, clusters: np.ndarray
                         ) -> tuple[float, list[float], float]:
    """Cluster-robust SEs of D for the median split, each GATES group and top − bottom (same groups as
    ``evaluation.gates``: ``quantile_groups`` of τ̂)."""
    ids, halves = quantile_groups(tau, k), quantile_groups(tau, 2)
    groups = [group_contrast_se(d, ids == g, None, clusters) for g in range(k)]
    return (group_contrast_se(d, halves == 1, halves == 0, clusters), groups,
            group_contrast_se(d, ids == k - 1, ids == 0, clusters))
