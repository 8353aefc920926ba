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
    DIFFERENT: "differs from the design estimate by more than the margin allows",
    TRIVIALLY_DIFFERENT: "differs from the design estimate, but by less than δ = {margin}",
    INDETERMINATE: "is too wide to tell whether it lies within ±δ = ±{margin} of the design estimate",
}

# ---------------------------------------------------------------------------------------------- thresholds
ALPHA = 0.05  # level of the difference test; the equivalence test uses the (1 − 2α) = 90 % CI
Z_95 = 1.959963984540054  # Φ⁻¹(0.975): half-width of a 95 % Wald interval in SEs
Z_90 = 1.6448536269514722  # Φ⁻¹(0.95): half-width of the 90 % interval of the equivalence test in SEs
RATE_P = 0.001  # exact binomial p below which a site's realized treated share contradicts its declared rate
SLOPE_TOLERANCE = 0.1  # |calibration slope − 1| up to which ê counts as calibrated even if the CI excludes 1
OVERLAP_BAND = (0.05, 0.95)  # propensities outside this band signal limited overlap (Crump et al. 2009)
HETEROGENEITY_ALPHA = 0.05  # one-sided level of the tests β₂ > 0 and AUTOC > 0
Q_ALPHA = 0.05  # level of Cochran's Q test of equal site effects

# ---------------------------------------------------------------------------------------------- recovery
RECOVERED = "recovered"
NOT_RECOVERED = "not recovered"
RECOVERY_CLASSES = (RECOVERED, NOT_RECOVERED, INDETERMINATE)


def claim_recovery(verdict: str) -> str:
    """Whether the blind analysis recovered a claim, from its verdict.

    ``equivalent`` and ``trivially different`` → recovered (any difference is smaller than δ); ``different`` →
    not recovered; ``indeterminate`` (or no verdict) → indeterminate: the data cannot tell.
    """
    if verdict in (EQUIVALENT, TRIVIALLY_DIFFERENT):
        return RECOVERED
    if verdict == DIFFERENT:
        return NOT_RECOVERED
    return INDETERMINATE


def headline_ate_verdict(verdict: str, same_estimand_verdict: str | None = None) -> str:
    """The verdict that counts for an average-effect estimator in every summary.

    An estimator that targets another estimand (the overlap-weighted effect) is judged by its comparison with
    the design-based effect of that same estimand when there is one, not by its comparison with the ATE.
    """
    return same_estimand_verdict if same_estimand_verdict is not None else verdict


def propensity_recovered(slope: float, ci: Sequence[float]) -> bool:
    """Whether the learned propensity ê is calibrated to the known rates.

    The slope b of the known rate regressed on ê is 1 for a calibrated ê.  Recovered when its 95 % CI includes
    1, or when |b − 1| ≤ :data:`SLOPE_TOLERANCE` (a precisely estimated slope close to 1 is still good enough).
    """
    lo, hi = float(ci[0]), float(ci[1])
    return (lo <= 1.0 <= hi) or abs(float(slope) - 1.0) <= SLOPE_TOLERANCE


def calibration_judgement(slope: float, ci: Sequence[float]) -> str:
    """Plain-language reading of the calibration slope b (ideal 1), by the rule of :func:`propensity_recovered`.

    b < 1: ê spreads further than the known rates (over-confident); b > 1: ê is compressed toward its mean.
    """
    if not all(math.isfinite(float(v)) for v in (slope, ci[0], ci[1])):
        return "the calibration slope could not be estimated"
    if float(ci[0]) <= 1.0 <= float(ci[1]):
        return "consistent with a calibrated ê (the 95 % CI includes 1)"
    if propensity_recovered(slope, ci):
        return f"within {SLOPE_TOLERANCE:g} of 1, so ê counts as calibrated although the 95 % CI excludes 1"
    if slope < 1:
        return "below 1: ê is too spread out (over-confident) relative to the known rates"
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
