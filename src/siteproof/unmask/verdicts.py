"""The one verdicts table of a scorecard, its multiplicity adjustment, the headline and ``--fail-on``.

Each scored claim becomes one row (docs/scorecard-format.md, ``verdicts``): its stable id and family, whether
the locked plan names it primary, blind and design values, D = blind − design with SE and 95 % CI, the margin,
the equivalence bound (smallest margin at which D would be equivalent), the raw and adjusted p-values of the
difference test and of the TOST, and the verdict from each pair (Tryon & Lewis 2008).

Adjustment: the primary claims of the locked plan form one family of their own (a single primary claim, the
default ate.aipw, is tested at the full α: the usual primary/secondary separation of confirmatory analyses,
e.g. EMA CPMP/EWP/908/99, 2002); every other claim is adjusted within its family (``blind.plan.family_of``:
``ate``, ``cate.<model>``, ``rule``, ``site_ate.<model>``) by Holm (1979) or Benjamini & Hochberg (1995),
separately for the difference p-values and for the TOST p-values (``multiplicity``).  The naive estimate is the benchmark's negative control: its family
``reference`` holds it alone, so its adjusted p-values equal its raw ones and it never enters the adjustment
of the estimators it is the reference for; it is never primary and never counted in the headline.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Any, Iterable

import numpy as np

from ..blind.plan import ate_claim, cate_claim, family_of, rule_claim
from ..core.interpret import (
    BIASED_WITHIN_MARGIN,
    DIFFERENT,
    NOT_RECOVERED,
    RECOVERED,
    RECOVERY_CLASSES,
    REFERENCE_FAMILY,
    claim_recovery,
    estimator_label,
    propensity_recovered,
)
from .correspondence import Comparison, verdict_from_p
from .multiplicity import adjust

ROW_KEYS = ("claim", "family", "primary", "blind", "design", "difference", "margin", "equivalence_bound",
            "p_difference", "p_difference_adjusted", "p_equivalence", "p_equivalence_adjusted", "verdict",
            "verdict_adjusted")
FRAME_COLUMNS = ("claim", "family", "primary", "blind", "design", "difference", "se", "ci_low", "ci_high",
                 "margin", "equivalence_bound", "p_difference", "p_difference_adjusted", "p_equivalence",
                 "p_equivalence_adjusted", "verdict", "verdict_adjusted", "pbr", "pbr_ci_low", "pbr_ci_high")
PRIMARY_CLAIM = "ate.aipw"
PRIMARY_FAMILY = "primary"


def verdict_row(claim: str, comparison: Comparison, primary: Iterable[str]) -> dict[str, Any]:
    """The unadjusted row of one claim (its adjusted columns are filled by :func:`adjust_rows`)."""
    c = comparison
    return {"claim": claim, "family": family_of(claim), "primary": claim in set(primary), "blind": float(c.blind),
            "design": float(c.design), "difference": _difference(c.difference.estimate, c.difference.se,
                                                                 c.difference.ci),
            "margin": float(c.margin), "equivalence_bound": c.equivalence_bound, "p_difference": float(c.p_value),
            "p_difference_adjusted": float("nan"), "p_equivalence": float(c.p_equivalence),
            "p_equivalence_adjusted": float("nan"), "verdict": c.verdict, "verdict_adjusted": ""}


def site_row(record: dict[str, Any], primary: Iterable[str]) -> dict[str, Any]:
    """A per-site row of ``unmask.siteverdicts`` in the verdicts-table form (family ``site_ate.<model>``)."""
    diff = record["difference"]
    claim = record["claim"]
    lo, hi = record["equivalence_ci"]
    return {"claim": claim, "family": family_of(claim), "primary": claim in set(primary),
            "blind": float(record["blind"]["estimate"]), "design": float(record["design"]["estimate"]),
            "difference": _difference(diff["estimate"], diff["se"], diff["ci"]), "margin": float(record["margin"]),
            "equivalence_bound": float(max(abs(lo), abs(hi))), "p_difference": float(record["p_difference"]),
            "p_difference_adjusted": float("nan"), "p_equivalence": float(record["p_equivalence"]),
            "p_equivalence_adjusted": float("nan"), "verdict": record.get("verdict_unadjusted", ""),
            "verdict_adjusted": ""}


def adjustment_family(row: dict[str, Any]) -> str:
    """The set a row's p-values are adjusted in: ``primary`` for the plan's primary claims, else its family."""
    return PRIMARY_FAMILY if row["primary"] else row["family"]


def adjust_rows(rows: list[dict[str, Any]], method: str, alpha: float) -> list[dict[str, Any]]:
    """Fill the adjusted p-values and verdicts, family by family (module docstring); returns ``rows``."""
    families: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for row in rows:
        families[adjustment_family(row)].append(row)
    for family, members in families.items():
        for key in ("p_difference", "p_equivalence"):
            raw = np.array([m[key] for m in members], dtype=float)
            adjusted = raw if family == REFERENCE_FAMILY else adjust(raw, method)
            for m, p in zip(members, adjusted):
                m[f"{key}_adjusted"] = float(p)
        for m in members:
            m["verdict_adjusted"] = verdict_from_p(m["p_difference_adjusted"], m["p_equivalence_adjusted"], alpha)
    return rows


def frame_rows(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The verdict rows flattened for :meth:`Scorecard.to_frame` (:data:`FRAME_COLUMNS`)."""
    out = []
    for row in rows:
        diff, pbr = row["difference"], row.get("percent_bias_reduction") or {}
        pbr_ci = pbr.get("ci") or [float("nan"), float("nan")]
        flat = {k: row[k] for k in ROW_KEYS if k != "difference"}
        out.append({**flat, "difference": diff["estimate"], "se": diff["se"], "ci_low": diff["ci"][0],
                    "ci_high": diff["ci"][1], "pbr": pbr.get("estimate", float("nan")),
                    "pbr_ci_low": pbr_ci[0], "pbr_ci_high": pbr_ci[1]})
    return out


def table_rows(ate: list[Any], cate: list[Any], rules: list[Any], sites: list[dict[str, Any]], plan: Any
               ) -> list[dict[str, Any]]:
    """The verdicts table of a scorecard: every ATE estimator (the overlap estimator by its same-estimand
    comparison; percent bias reduction on the adjusted ones), every CATE model's high−low, top−bottom, GATES,
    β₂, AUTOC and Qini, every rule (its gain, or its value when it treats everyone or no one) and every per-site
    row of ``unmask.siteverdicts`` — adjusted within each family by the plan's method."""
    rows = []
    naive = next((a.comparison for a in ate if a.estimator == "naive"), None)
    for a in ate:
        row = verdict_row(ate_claim(a.estimator), a.same_estimand or a.comparison, plan.primary)
        if a.percent_bias_reduction is not None:
            pbr = a.percent_bias_reduction
            row["percent_bias_reduction"] = {  # meaningful only when the naive D's 95 % CI excludes 0
                "estimate": pbr.estimate, "se": pbr.se, "ci": [pbr.ci[0], pbr.ci[1]],
                "meaningful": bool(naive is not None and naive.p_value < plan.alpha)}
        rows.append(row)
    for c in cate:
        parts = [("high_low", c.high_low), ("top_bottom", c.top_minus_bottom)]
        parts += [(f"gate{g + 1}", comp) for g, comp in enumerate(c.gates)]
        parts += [("beta2", c.beta2)] if c.beta2 is not None else []
        parts += [("autoc", c.autoc), ("qini", c.qini)]
        rows += [verdict_row(cate_claim(c.model, part), comp, plan.primary) for part, comp in parts]
    rows += [verdict_row(rule_claim(r.rule), r.gain if r.has_contrast else r.value, plan.primary) for r in rules]
    rows += [site_row(record, plan.primary) for record in sites]
    return adjust_rows(rows, plan.multiplicity, plan.alpha)


def site_notes(flagged: list[str], references_flagged: bool, references: dict[str, Any]) -> list[str]:
    """Headline and warning sentences from the within-site checks (``unmask.balance``, ``unmask.siteverdicts``)."""
    notes = []
    if flagged:
        notes.append(f"Covariate(s) {', '.join(flagged)} predict treatment within sites, where assignment was random: "
                     "the blind propensity learned the assignment itself (a variable measured after treatment, an "
                     "identifier of the unit of assignment, or broken randomization), not the sites' rates.")
    if references_flagged:
        pooled = references.get("pooled") or {}
        notes.append("The two design references disagree: the per-site difference in means and the oracle AIPW "
                     f"differ (p = {float(pooled.get('p_value', float('nan'))):.2g} pooled, or in some site), so the "
                     "known rates or the outcome models deserve a look before any verdict is trusted.")
    return notes


# ----------------------------------------------------------------------------------------------- summaries
def claim_verdicts(scorecard: Any) -> list[tuple[str, str]]:
    """(label, adjusted verdict) of every headline claim: each ATE estimator (the overlap estimator by its
    same-estimand comparison), each CATE model (its AUTOC) and each rule — the naive reference included."""
    out = []
    for row in scorecard.verdicts:
        head, _, rest = row["claim"].partition(".")
        if head == "ate":
            out.append((f"ATE {rest}", row["verdict_adjusted"]))
        elif head == "cate" and rest.endswith(".autoc"):
            out.append((f"CATE {rest.removesuffix('.autoc')}", row["verdict_adjusted"]))
        elif head == "rule":
            out.append((f"rule {rest}", row["verdict_adjusted"]))
    return out


def failing_claims(scorecard: Any) -> list[str]:
    """Ids of the primary claims whose adjusted verdict is ``different`` (what ``--fail-on different`` acts on)."""
    return [r["claim"] for r in scorecard.verdicts if r["primary"] and r["verdict_adjusted"] == DIFFERENT]


def headline(scorecard: Any) -> str:
    """One sentence: what the blind analysis recovered by the adjusted verdicts, and what the benchmark can tell.

    Classes: :func:`~siteproof.core.interpret.claim_recovery` ("trivially different" is counted apart as
    inside the margin but detectably biased); the naive reference is never counted, but its comparison says
    whether the benchmark can discriminate at all; deviations from the locked plan are named first.
    """
    rows = {r["claim"]: r for r in scorecard.verdicts}
    parts: dict[str, list[str]] = {key: [] for key in RECOVERY_CLASSES}
    primary = rows.get(PRIMARY_CLAIM)
    if primary is not None:
        parts[claim_recovery(primary["verdict_adjusted"])].append(
            f"the average effect (blind {estimator_label('aipw')} {primary['blind']:.3g} vs design "
            f"{primary['design']:.3g})")
    prop = scorecard.propensity
    slope, bound = prop.calibration_slope, prop.calibration_bound
    ok = propensity_recovered(bound, slope.ci)
    parts[RECOVERED if ok else NOT_RECOVERED].append(
        f"the propensity (calibration error ≤ {bound:.3f}, slope {slope.estimate:.2f})")
    groups = (("effect rankings", lambda c: c.startswith("cate.") and c.endswith(".autoc")),
              ("rule gains", lambda c: c.startswith("rule.")), ("site effects", lambda c: c.startswith("site_ate.")))
    for label, member in groups:
        chosen = [r for c, r in rows.items() if member(c)]
        counts: dict[str, int] = defaultdict(int)
        for r in chosen:
            counts[claim_recovery(r["verdict_adjusted"])] += 1
        for key in RECOVERY_CLASSES:
            if counts.get(key):
                parts[key].append(f"{counts[key]} of {len(chosen)} {label}")
    said = [f"{key}: {', '.join(items)}" for key, items in parts.items() if items]
    text = ("Unmasked against the sites' randomization — " + "; ".join(said) + ".") if said else \
        "Unmasked against the sites' randomization — no claim could be scored."
    extra = [_discrimination(rows.get("ate.naive"))] + list(getattr(scorecard, "headline_notes", []))
    deviations = (getattr(scorecard, "plan", None) or {}).get("deviations", [])
    if deviations:
        extra.insert(0, "Scored with a deviation from the locked plan (" + ", ".join(
            f"{d['field']} {d['planned']} → {d['used']}" for d in deviations) + ").")
    return " ".join([text] + [e for e in extra if e])


def _discrimination(naive: dict[str, Any] | None) -> str:
    """What the negative control says: can this benchmark tell a biased estimate from the design one?"""
    if naive is None:
        return ""
    lo, hi = naive["difference"]["ci"]
    if lo <= 0.0 <= hi:
        return ("The benchmark cannot discriminate here: the naive difference in means is not distinguishable "
                "from the design estimate (95 % CI of its D includes 0).")
    if naive["verdict_adjusted"] != DIFFERENT:
        return (f"The naive difference in means is {BIASED_WITHIN_MARGIN} (D = {naive['difference']['estimate']:.3g}, "
                f"±δ = {naive['margin']:.3g}): at this margin the benchmark cannot show an adjusted estimator "
                "beating it.")
    return f"The naive difference in means is {DIFFERENT} (D = {naive['difference']['estimate']:.3g}), so the " \
           "benchmark can discriminate."


def _difference(estimate: float, se: float, ci: Iterable[float]) -> dict[str, Any]:
    lo, hi = ci
    return {"estimate": float(estimate), "se": float(se), "ci": [float(lo), float(hi)]}
