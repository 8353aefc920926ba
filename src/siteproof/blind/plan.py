"""The locked analysis plan: alpha, multiplicity method, margins and primary claims, fixed before unmasking.

The blind stage writes the plan into ``claims.json`` together with the SHA-256 of its canonical JSON, so the
margins that later decide every verdict were chosen without any knowledge of the sites (a pre-registered
equivalence margin, as equivalence-testing practice requires: Wellek 2010, ch. 1; Lakens 2017).  Unmasking
reads the plan and refuses another margin, alpha or method unless the deviation is declared
(``unmask.lockedplan``).

Margins, each on its claim family's own scale (docs/methods-sites-and-verdicts.md):

* **ATE family** (and per-site ATEs, GATES groups): δ = 0.1 × s_w, where s_w is the pooled within-arm residual SD
  of the outcome after removing the cross-fitted arm means,
      r_i = Y_i − μ̂_{W_i}(X_i),   s_w² = [Σ_{W=1}(r_i − r̄₁)² + Σ_{W=0}(r_i − r̄₀)²] / (n − 2).
  Unlike SD(Y) it contains neither the treatment effect nor the confounded arm difference (each arm is
  centred), nor the part of a site shift that the covariates explain.  0.1 SD is the usual equivalence
  threshold of within-study comparisons (Steiner & Wong 2018; Cook, Shadish & Wong 2008).
* **Rule gains and ranking contrasts** (AUTOC, Qini, high−low, top−bottom): δ_c = min(δ, 0.5·|ĉ|) with ĉ the
  blind claim (0.01·δ if ĉ is exactly 0, to keep the margin positive).  Equivalence then certifies that the design value keeps at least half the
  claimed value — the share a non-inferiority margin preserves by convention (FDA 2016, M₂ = 50 % of M₁) — so
  a blind claim that misses its whole value can never be called equivalent.
* **BLP β₂** (a calibration slope, ideal 1): δ = 0.25, whatever the spread of τ̂.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any, Sequence

import numpy as np

from ..core.checks import alpha_level
from ..core.errors import SiteproofError
from ..core.interpret import (
    ALPHA,
    ATE_MARGIN_SD_SHARE,
    BETA2_MARGIN,
    CLAIM_SHARE,
    DEFAULT_MULTIPLICITY,
    DEFAULT_PRIMARY,
    MARGIN_FLOOR_SHARE,
    MULTIPLICITY_METHODS,
    REFERENCE_CLAIMS,
)

MARGIN_RULES = {
    "ate": f"{ATE_MARGIN_SD_SHARE:g} × pooled within-arm residual SD of the outcome (Y − μ̂_W(X), cross-fitted)",
    "site_ate": "the ATE-family δ",
    "cate": f"GATES groups: the ATE-family δ; AUTOC, Qini, high−low, top−bottom: min(δ, {CLAIM_SHARE:g} × |blind "
            f"value|) ({MARGIN_FLOOR_SHARE:g} × δ if the blind value is 0)",
    "beta2": f"{BETA2_MARGIN:g} on the slope scale (ideal β₂ = 1)",
    "rule": f"gain: min(δ, {CLAIM_SHARE:g} × |blind gain|) ({MARGIN_FLOOR_SHARE:g} × δ if the blind gain is 0); "
            "value (rule that treats everyone or no one): δ",
}
CAPPED_PARTS = ("high_low", "top_bottom", "autoc", "qini")


# ------------------------------------------------------------------------------------------------ claim ids
def ate_claim(estimator: str) -> str:
    """Stable id of an ATE estimator's claim, e.g. ``ate.aipw``."""
    return f"ate.{estimator}"


def cate_claim(model: str, part: str) -> str:
    """Stable id of a CATE model's claim, e.g. ``cate.dr.autoc`` or ``cate.t.gate3``."""
    return f"cate.{model}.{part}"


def rule_claim(rule: str) -> str:
    """Stable id of a rule's claim, e.g. ``rule.t.top20`` or ``rule.tree``."""
    return f"rule.{rule}"


def site_claim(model: str, site: str) -> str:
    """Stable id of a per-site ATE claim, e.g. ``site_ate.dr.Storywick``."""
    return f"site_ate.{model}.{site}"


def family_of(claim: str) -> str:
    """The multiplicity family of a claim id: ``ate``, ``cate.<model>``, ``rule``, ``site_ate.<model>``, or
    ``reference`` for the negative control (the naive estimate), which no family adjustment includes."""
    if claim in REFERENCE_CLAIMS:
        return "reference"
    head, _, rest = claim.partition(".")
    if head in ("cate", "site_ate"):
        return f"{head}.{rest.partition('.')[0]}"
    return head


# ------------------------------------------------------------------------------------------------ margins
def residual_sd(y: np.ndarray, w: np.ndarray, mu0: np.ndarray, mu1: np.ndarray) -> float:
    """Pooled within-arm SD of r = Y − μ̂_W(X), each arm centred, divisor n − 2 (module docstring)."""
    y, w = np.asarray(y, dtype=float), np.asarray(w).astype(bool)
    r = y - np.where(w, np.asarray(mu1, dtype=float), np.asarray(mu0, dtype=float))
    ss = sum(float(np.sum((r[arm] - r[arm].mean()) ** 2)) for arm in (w, ~w) if arm.any())
    if y.size < 3:
        raise SiteproofError("the margin needs at least 3 units", "analyse more units or set the margin explicitly")
    return float(np.sqrt(ss / (y.size - 2)))


def capped_margin(delta: float, claimed: float) -> float:
    """δ_c = min(δ, 0.5·|claimed|), or 0.01·δ when the claim is exactly 0 (module docstring).

    Never above half the claimed value, so |D| = |claimed| (the design value is 0) fails the TOST for any SE.
    """
    capped = min(delta, CLAIM_SHARE * abs(claimed))
    return float(capped if capped > 0 else MARGIN_FLOOR_SHARE * delta)


def claim_caps(record: dict[str, Any]) -> dict[str, float]:
    """|blind value| of every claim whose margin is capped by its own size (rule gains, ranking contrasts).

    Rules that treat everyone or no one are judged on their value with the plain δ, so they carry no cap.
    """
    caps: dict[str, float] = {}
    for model in record.get("cate", []):
        if "gates" not in model:
            continue
        figures = {"high_low": model["gates"]["high_low"], "top_bottom": model["gates"]["high_minus_low"],
                   "autoc": model["autoc"], "qini": model["qini"]}
        caps.update({cate_claim(model["model"], part): abs(float(figures[part]["estimate"])) for part in CAPPED_PARTS})
    for rule in record.get("rules", []):
        if 0.0 < float(rule["treated_share"]) < 1.0:
            caps[rule_claim(rule["rule"])] = abs(float(rule["gain"]["estimate"]))
    return caps


def margin_for(claim: str, margins: dict[str, float], caps: dict[str, float]) -> float:
    """The margin of one claim under a plan's family margins and caps."""
    if claim.endswith(".beta2") and claim.startswith("cate."):
        return float(margins["beta2"])
    delta = float(margins["ate"])
    return capped_margin(delta, caps[claim]) if claim in caps else delta


def family_margins(delta: float) -> dict[str, float]:
    """{family: base margin}: δ for the outcome-scale families (the cap of the capped ones), 0.25 for β₂."""
    return {"ate": delta, "site_ate": delta, "cate": delta, "rule": delta, "beta2": BETA2_MARGIN}


# ------------------------------------------------------------------------------------------------ the plan
def canonical_json(plan: dict[str, Any]) -> str:
    """The text the plan's hash is taken over: sorted keys, no spaces, UTF-8, floats in shortest repr."""
    return json.dumps(plan, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def plan_sha256(plan: dict[str, Any]) -> str:
    """SHA-256 (hex) of :func:`canonical_json` of the plan without its own ``sha256`` field."""
    body = {k: v for k, v in plan.items() if k != "sha256"}
    return hashlib.sha256(canonical_json(body).encode("utf-8")).hexdigest()


def check_multiplicity(method: str) -> str:
    """``method`` if it is a known adjustment ("holm", "bh"), else SiteproofError."""
    if method not in MULTIPLICITY_METHODS:
        raise SiteproofError(f"unknown multiplicity method {method!r}",
                             f"choose among {', '.join(MULTIPLICITY_METHODS)}")
    return method


def build_plan(
    record: dict[str, Any], y: np.ndarray, w: np.ndarray, mu0: np.ndarray, mu1: np.ndarray, *,
    margin: float | None = None, alpha: float = ALPHA, multiplicity: str = DEFAULT_MULTIPLICITY,
    primary: Sequence[str] = DEFAULT_PRIMARY,
) -> dict[str, Any]:
    """The analysis plan of a blind run (``record`` holds its ate/cate/rules claims), with its SHA-256.

    ``margin`` (outcome units) replaces the default ATE-family δ = 0.1 × s_w; every derived margin follows it.
    """
    alpha_level(alpha, upper=0.5)
    check_multiplicity(multiplicity)
    s_w = residual_sd(y, w, mu0, mu1)
    if margin is not None and not (np.isfinite(margin) and margin > 0):
        raise SiteproofError(f"the equivalence margin is {margin}", "give a positive number in outcome units")
    delta = float(margin) if margin is not None else ATE_MARGIN_SD_SHARE * s_w
    if not delta > 0:
        raise SiteproofError("the outcome has no residual variation, so the default margin is 0",
                             "set the margin explicitly (--margin)")
    caps = claim_caps(record)
    margins = family_margins(delta)
    claims = scored_claims(record)
    bad = [c for c in primary if c not in claims or c in REFERENCE_CLAIMS]
    if bad:
        raise SiteproofError(f"primary claim(s) {', '.join(bad)} are not scored claims of this run",
                             f"choose among {', '.join(c for c in claims if c not in REFERENCE_CLAIMS)}")
    plan = {
        "alpha": float(alpha),
        "multiplicity": multiplicity,
        "margin_source": "user" if margin is not None else "default",
        "residual_sd": s_w,
        "margin_rules": dict(MARGIN_RULES),
        "margins": margins,
        "caps": caps,
        "claim_margins": {c: margin_for(c, margins, caps) for c in claims},
        "primary": list(primary),
        "reference": list(REFERENCE_CLAIMS),
    }
    plan["sha256"] = plan_sha256(plan)
    return plan


def scored_claims(record: dict[str, Any]) -> list[str]:
    """Every claim id unmasking will score (per-site claims excepted: the sites are unknown blind)."""
    out = [ate_claim(a["estimator"]) for a in record.get("ate", [])]
    for model in record.get("cate", []):
        if "gates" not in model:
            continue
        m = model["model"]
        out += [cate_claim(m, p) for p in ("high_low", "top_bottom")]
        out += [cate_claim(m, f"gate{g['group'] + 1}") for g in model["gates"]["groups"]]
        out += [cate_claim(m, p) for p in ("beta2", "autoc", "qini")]
    return out + [rule_claim(r["rule"]) for r in record.get("rules", [])]


def check_plan(record: dict[str, Any], where: str) -> dict[str, Any]:
    """The plan of a claims record, its hash verified; SiteproofError when absent or edited."""
    plan = record.get("plan")
    if not isinstance(plan, dict):
        raise SiteproofError(f"{where} has no locked analysis plan (written by an older siteproof)",
                             "rerun `siteproof blind` with this version so that the plan is fixed before unmasking")
    if plan.get("sha256") != plan_sha256(plan):
        raise SiteproofError(f"the analysis plan in {where} does not match its SHA-256: it was edited after the "
                             "blind run", "rerun `siteproof blind`, or declare the change at unmask "
                             "(--deviate-from-plan with --margin/--alpha/--multiplicity)")
    return plan
