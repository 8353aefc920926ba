"""The analysis plan as unmasking uses it: the blind stage's locked plan, plus any declared deviation.

A margin, alpha or multiplicity method other than the plan's is refused unless the caller declares the
deviation (``deviate_from_plan=True``, CLI ``--deviate-from-plan``); a declared deviation is applied and
recorded in ``scorecard.plan.deviations`` (each {field, planned, used}), and every output shows it.  A changed
margin replaces the ATE-family δ; the capped margins (rule gains, ranking contrasts) follow it, β₂'s does not.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from ..blind.plan import check_multiplicity, family_margins, margin_for
from ..core.checks import alpha_level
from ..core.errors import SiteproofError


@dataclass(frozen=True)
class UsedPlan:
    """Alpha, multiplicity method, family margins and caps, primary claims, the plan's hash and deviations."""

    alpha: float
    multiplicity: str
    margins: dict[str, float]
    caps: dict[str, float]
    margin_rules: dict[str, str]
    primary: tuple[str, ...]
    reference: tuple[str, ...]
    sha256: str
    margin_source: str
    deviations: list[dict[str, Any]] = field(default_factory=list)

    @property
    def delta(self) -> float:
        """The ATE-family margin δ (outcome units)."""
        return float(self.margins["ate"])

    def margin(self, claim: str) -> float:
        """The margin of one claim id (``blind.plan.margin_for``)."""
        return margin_for(claim, self.margins, self.caps)

    def to_dict(self) -> dict[str, Any]:
        """scorecard.json ``plan``: alpha, multiplicity, margins{family: value}, margin rules, primary, sha256,
        deviations."""
        return {"alpha": self.alpha, "multiplicity": self.multiplicity, "margins": dict(self.margins),
                "margin_rules": dict(self.margin_rules), "margin_source": self.margin_source,
                "primary": list(self.primary), "reference": list(self.reference), "sha256": self.sha256,
                "deviations": list(self.deviations)}


def use_plan(
    plan: dict[str, Any], *, margin: float | None = None, alpha: float | None = None,
    multiplicity: str | None = None, deviate_from_plan: bool = False,
) -> UsedPlan:
    """The plan to score with; a requested value that differs from the plan needs ``deviate_from_plan``."""
    planned = {"margin": float(plan["margins"]["ate"]), "alpha": float(plan["alpha"]),
               "multiplicity": str(plan["multiplicity"])}
    asked = {"margin": None if margin is None else float(margin), "alpha": None if alpha is None else float(alpha),
             "multiplicity": multiplicity}
    if asked["alpha"] is not None:
        alpha_level(asked["alpha"], upper=0.5)
    if multiplicity is not None:
        check_multiplicity(multiplicity)
    if asked["margin"] is not None and not asked["margin"] > 0:
        raise SiteproofError(f"the equivalence margin is {margin}", "give a positive number in outcome units")
    deviations = [{"field": k, "planned": planned[k], "used": v} for k, v in asked.items()
                  if v is not None and v != planned[k]]
    if deviations and not deviate_from_plan:
        text = ", ".join(f"{d['field']} {d['planned']:g} → {d['used']:g}" if d["field"] != "multiplicity"
                         else f"multiplicity {d['planned']} → {d['used']}" for d in deviations)
        raise SiteproofError(
            f"the locked analysis plan (sha256 {plan['sha256'][:12]}…) says otherwise: {text}",
            "drop the option to score by the plan, or add --deviate-from-plan (Python: deviate_from_plan=True) "
            "to score with it and record the deviation in the scorecard",
        )
    used = {k: (v if v is not None else planned[k]) for k, v in asked.items()}
    margins = dict(plan["margins"])
    if used["margin"] != planned["margin"]:
        margins = {**family_margins(used["margin"]), "beta2": margins["beta2"]}
    return UsedPlan(
        alpha=float(used["alpha"]), multiplicity=str(used["multiplicity"]), margins=margins,
        caps=dict(plan.get("caps", {})), margin_rules=dict(plan.get("margin_rules", {})),
        primary=tuple(plan.get("primary", ())), reference=tuple(plan.get("reference", ())), sha256=plan["sha256"],
        margin_source=str(plan.get("margin_source", "default")), deviations=deviations,
    )
