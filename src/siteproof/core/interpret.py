"""How siteproof reads its numbers: verdict names and their wording, labels, thresholds and recovery rules.

Every screen, report and headline takes its words and cut-offs from here, so that no two outputs can call the
same number by different names or judge it by different rules.  This is the bottom layer: it imports nothing
from the rest of the package.

Verdicts (Tryon & Lewis 2008) classify the paired difference D = blind − design against the equivalence margin
δ with two tests at level α: the difference test (the (1 − α) CI of D excludes 0) and the two one-sided tests
of equivalence (Schuirmann 1987; the (1 − 2α) CI of D lies inside ±δ).
"""

from __future__ import annotations

import math
from typing import Iterable, Sequence

# ---------------------------------------------------------------------------------------------- verdicts
EQUIVALENT = "equivalent"
DIFFERENT = "different"
TRIVIALLY_DIFFERENT = "trivially different"
INDETERMINATE = "indeterminate"
VERDICTS = (EQUIVALENT, DIFFERENT, TRIVIALLY_DIFFERENT, INDETERMINATE)
VERDICT_ORDER = (EQUIVALENT, TRIVIALLY_DIFFERENT, INDETERMINATE, DIFFERENT)  # display order: best to worst

VERDICT_MEANING = {
    EQUIVALENT: "not different and equivalent: the 95 % CI of D includes 0 and its 90 % CI lies inside ±δ",
    DIFFERENT: "different and not equivalent: the 95 % CI of D excludes 0 and its 90 % CI is not inside ±δ",
    TRIVIALLY_DIFFERENT: "different but equivalent: the 95 % CI of D excludes 0, yet its 90 % CI lies inside "
    "±δ — a real but unimportant difference",
    INDETERMINATE: "neither: the 95 % CI of D includes 0 but its 90 % CI reaches beyond ±δ — the data cannot "
    "tell",
}

# How a blind estimate relates to the design estimate under each verdict; ``{margin}`` is δ as text.
VERDICT_READING = {
    EQUIVALENT: "lies within ±δ = ±{margin} of the design estimate",
    DIFFERENT: "differs from the design estimate (the 95 % CI of D excludes 0) and equivalence within "
    "±δ = ±{margin} is not shown",
    TRIVIALLY_DIFFERENT: "differs from the design estimate, but by less than δ = {margin}",
    INDETERMINATE: "is too wide to tell whether it lies within ±δ = ±{margin} of the design estimate",
}

# ---------------------------------------------------------------------------------------------- thresholds
ALPHA = 0.05  # level of the difference test; the equivalence test uses the (1 − 2α) = 90 % CI
Z_95 = 1.959963984540054  # Φ⁻¹(0.975): half-width of a 95 % Wald interval in SEs
Z_90 = 1.6448536269514722  # Φ⁻¹(0.95): half-width of the 90 % interval of the equivalence test in SEs
RATE_P = 0.001  # exact binomial p below which a site's realized treated share contradicts its declared rate
CALIBRATION_MARGIN = 0.05  # largest tolerated integrated calibration error of ê (probability units)
RELIABILITY_MIN = 0.5  # smallest tolerated lower 95 % bound of the calibration slope (signal share of ê)
OVERLAP_BAND = (0.05, 0.95)  # propensities outside this band signal limited overlap (Crump et al. 2009)
HETEROGENEITY_ALPHA = 0.05  # one-sided level of the tests β₂ > 0 and AUTOC > 0
Q_ALPHA = 0.05  # level of Cochran's Q test of equal site effects

# ---------------------------------------------------------------------------------------------- locked plan
# Defaults of the analysis plan written at the blind stage (docs/methods-sites-and-verdicts.md justifies them).
MULTIPLICITY_METHODS = {"holm": "Holm (1979) step-down, family-wise error rate",
                        "bh": "Benjamini & Hochberg (1995) step-up, false discovery rate"}
DEFAULT_MULTIPLICITY = "holm"
ATE_MARGIN_SD_SHARE = 0.1  # ATE-family δ = 0.1 × pooled within-arm residual SD of the outcome
CLAIM_SHARE = 0.5  # rule gains and ranking contrasts: δ = min(ATE δ, 0.5 × |blind claim|)
MARGIN_FLOOR_SHARE = 0.01  # margin of a capped claim whose blind value is exactly 0: 1 % of the ATE-family δ
BETA2_MARGIN = 0.25  # BLP β₂ (a calibration slope, ideal 1): |β₂ blind − β₂ design| within 0.25
DEFAULT_PRIMARY = ("ate.aipw",)
REFERENCE_CLAIMS = ("ate.naive",)  # the negative control: never primary, never in a family adjustment
REFERENCE_FAMILY = "reference"

# ---------------------------------------------------------------------------------------------- recovery
RECOVERED = "recovered"
NOT_RECOVERED = "not recovered"
BIASED_WITHIN_MARGIN = "inside the margin but detectably biased"
RECOVERY_CLASSES = (RECOVERED, BIASED_WITHIN_MARGIN, NOT_RECOVERED, INDETERMINATE)


def claim_recovery(verdict: str) -> str:
    """Whether the blind analysis recovered a claim, from its verdict.

    ``equivalent`` → recovered; ``trivially different`` → inside the margin but detectably biased (counted
    apart: the difference is real though smaller than δ); ``different`` → not recovered; ``indeterminate`` (or
    no verdict) → indeterminate: the data cannot tell.
    """
    if verdict == EQUIVALENT:
        return RECOVERED
    if verdict == TRIVIALLY_DIFFERENT:
        return BIASED_WITHIN_MARGIN
    if verdict == DIFFERENT:
        return NOT_RECOVERED
    return INDETERMINATE


def propensity_recovered(bound: float, slope_ci: Sequence[float], margin: float = CALIBRATION_MARGIN,
                         reliability: float = RELIABILITY_MIN) -> bool:
    """Whether the learned propensity ê is recovered against the known rates: calibrated and informative.

    Calibrated: ``bound`` (the upper 95 % bound of the integrated calibration error of ê over its deciles,
    ``unmask.recovery.calibration_bound``) ≤ :data:`CALIBRATION_MARGIN`.  Informative: the lower end of the 95 %
    CI of the calibration slope (known rate regressed on ê) ≥ :data:`RELIABILITY_MIN` — a slope below 1 is the
    reliability of a noisy but unbiased ê, so the slope is not required to reach 1.
    """
    lo = float(slope_ci[0])
    return bool(math.isfinite(bound) and bound <= margin and math.isfinite(lo) and lo >= reliability)


def calibration_judgement(slope: float, ci: Sequence[float]) -> str:
    """Plain-language reading of the calibration slope b (ideal 1) of the known rate on ê.

    b < 1: ê spreads further than the known rates (noise in ê dilutes the slope to its reliability);
    b > 1: ê is compressed toward its mean.  The verdict itself is :func:`propensity_recovered`.
    """
    if not all(math.isfinite(float(v)) for v in (slope, ci[0], ci[1])):
        return "the calibration slope could not be estimated"
    if float(ci[0]) <= 1.0 <= float(ci[1]):
        return "consistent with a calibrated ê (the 95 % CI includes 1)"
    if slope < 1 and float(ci[0]) >= RELIABILITY_MIN:
        return (f"below 1 by dilution: the slope of a noisy but unbiased ê is its reliability (< 1); the verdict "
                f"uses the integrated calibration error and a slope of at least {RELIABILITY_MIN:g}")
    if slope < 1:
        return "below 1: ê is too spread out (over-confident) or carries little information about the known rates"
    return "above 1: ê is too compressed relative to the known rates"


def rate_contradicted(binom_p: float) -> bool:
    """True when a site's exact binomial p is below :data:`RATE_P`: its assignment does not match its rate."""
    return math.isfinite(binom_p) and binom_p < RATE_P


# ---------------------------------------------------------------------------------------------- heterogeneity
CONFIRMED = "confirmed"
NOT_CONFIRMED = "not confirmed"
MISSED = "missed"
NONE_FOUND = "none claimed, none found"
HETEROGENEITY_SHORT = {CONFIRMED: "yes", NOT_CONFIRMED: "no", MISSED: "missed", NONE_FOUND: "none"}
HETEROGENEITY_MEANING = {
    CONFIRMED: "claimed blind and confirmed with the design-based scores",
    NOT_CONFIRMED: "claimed blind, not confirmed",
    MISSED: "not claimed blind but found with the design-based scores",
    NONE_FOUND: "neither claimed nor found",
}


def heterogeneity_status(claimed: bool, found: bool) -> str:
    """The status of a heterogeneity claim: was it claimed blind, and do the design-based scores find it?

    Each side "finds" heterogeneity when β₂ > 0 or AUTOC > 0 at one-sided level :data:`HETEROGENEITY_ALPHA`.
    """
    return {(True, True): CONFIRMED, (True, False): NOT_CONFIRMED, (False, True): MISSED,
            (False, False): NONE_FOUND}[(bool(claimed), bool(found))]


# ---------------------------------------------------------------------------------------------- labels
ESTIMATOR_LABELS = {
    "naive": "naive difference in means",
    "regression": "regression adjustment",
    "ipw": "IPW (Hájek)",
    "aipw": "AIPW",
    "overlap": "overlap weights",
}
MODEL_LABELS = {
    "constant": "constant effect",
    "s": "S-learner",
    "t": "T-learner",
    "x": "X-learner",
    "r": "R-learner",
    "dr": "DR-learner",
}


def estimator_label(key: str) -> str:
    """The human label of an average-effect estimator key (the key itself when unknown)."""
    return ESTIMATOR_LABELS.get(key, str(key))


def model_label(key: str) -> str:
    """The human label of a CATE model key (the key itself when unknown)."""
    return MODEL_LABELS.get(key, str(key))


# ---------------------------------------------------------------------------------------------- wording
def verdict_counts(words: Iterable[str]) -> dict[str, int]:
    """Number of each verdict among ``words``, in :data:`VERDICT_ORDER`, verdicts that occur only."""
    words = list(words)
    return {w: words.count(w) for w in VERDICT_ORDER if w in words}


def count_words(words: Iterable[str]) -> str:
    """Verdict counts as text, e.g. '3 equivalent, 1 different' ('none scored' when there are none)."""
    counts = verdict_counts(words)
    return ", ".join(f"{c} {w}" for w, c in counts.items()) if counts else "none scored"


def verdict_note() -> str:
    """The footnote that defines the four verdicts."""
    return "Verdicts (Tryon & Lewis 2008): " + "; ".join(f"{w} = {m}" for w, m in VERDICT_MEANING.items()) + "."
