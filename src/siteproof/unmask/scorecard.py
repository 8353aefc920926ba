"""The scorecard objects: each blind claim beside its design-based counterpart, and the whole :class:`Scorecard`.

:meth:`Scorecard.to_dict` is the content of ``scorecard.json`` (docs/scorecard-format.md);
:meth:`Scorecard.from_dict` reads it back (schema and version checked) as a :class:`ScorecardRecord`, which has
the same notebook face — compact repr, ``summary()``, ``_repr_html_()`` and ``to_frame()`` with one row per
scored claim — built from the record, so a scorecard and its file show the same table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from .. import __version__
from ..blind.evaluation import BlpResult
from ..blind.rules import RuleValue
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..core.outputs import json_records
from ..core.results import ResultsMixin
from ..intake.sitetrials import DesignATE
from .correspondence import Comparison
from .heterogeneity import RandomEffectsResult
from .recovery import PropensityRecovery
from .transport import TransportResult
from .verdicts import FRAME_COLUMNS as VERDICT_COLUMNS
from .verdicts import frame_rows

SCHEMA = "siteproof/scorecard"
VERSION = 2  # 2: the locked plan (``plan``) and the verdicts table (``verdicts``) with adjusted verdicts
FRAME_COLUMNS = ("claim", "family", "blind", "design", "difference", "se", "ci_low", "ci_high",
                 "statistic", "p_value", "verdict")


# --------------------------------------------------------------------------------------------------------
# result objects
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, repr=False)
class AteComparison(ResultsMixin):
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
    percent_bias_reduction: Estimate | None
    note: str = ""
    same_estimand: Comparison | None = None

    @property
    def verdict(self) -> str:
        return self.comparison.verdict

    def _key_numbers(self) -> dict[str, Any]:
        c = self.comparison
        return {"estimator": self.estimator, "blind": c.blind, "design": c.design, "verdict": c.verdict}

    def to_frame(self) -> pd.DataFrame:
        """The comparison row(s) of this estimator (see :meth:`Scorecard.to_frame`)."""
        return pd.DataFrame(_ate_rows(self.to_dict()), columns=list(FRAME_COLUMNS))

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
            "percent_bias_reduction": None if self.percent_bias_reduction is None
            else _estimate_dict(self.percent_bias_reduction),
        }
        if self.note:
            out["note"] = self.note
        if self.same_estimand is not None:
            out["same_estimand"] = self.same_estimand.to_dict()
        return out


@dataclass(frozen=True, repr=False)
class CateComparison(ResultsMixin):
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

    def _key_numbers(self) -> dict[str, Any]:
        return {"model": self.model, "n": self.n, "tau_sd": self.tau_sd, "verdict": self.verdict}

    def to_frame(self) -> pd.DataFrame:
        """The comparison rows of this model (see :meth:`Scorecard.to_frame`)."""
        return pd.DataFrame(_cate_rows(self.to_dict()), columns=list(FRAME_COLUMNS))

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
                "beta2_margin_note": "β₂ is a calibration slope (ideal 1): its margin is on that scale "
                "(the locked plan's β₂ margin), whatever the spread of τ̂",
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


@dataclass(frozen=True, repr=False)
class RuleComparison(ResultsMixin):
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

    def _key_numbers(self) -> dict[str, Any]:
        return {"rule": self.rule, "treated_share": self.treated_share, "verdict": self.verdict}

    def to_frame(self) -> pd.DataFrame:
        """The value and gain rows of this rule (see :meth:`Scorecard.to_frame`)."""
        return pd.DataFrame(_rule_rows(self.to_dict()), columns=list(FRAME_COLUMNS))

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
            "by_site": json_records(self.by_site),
        }


class _ScorecardView(ResultsMixin):
    """The notebook face of a scorecard, computed from its :meth:`to_dict` record."""

    def to_dict(self) -> dict[str, Any]:
        raise NotImplementedError

    def __eq__(self, other: object) -> bool:
        return isinstance(other, _ScorecardView) and _same(self.to_dict(), other.to_dict())

    def _key_numbers(self) -> dict[str, Any]:
        d = self.to_dict()
        primary = next((a for a in d["ate"] if a["estimator"] == "aipw"), None)
        verdicts = pd.Series([v for v in self.to_frame()["verdict_adjusted"] if v]).value_counts()
        return {
            "n": d["study"]["n"], "sites": d["study"]["n_sites"], "margin": d["study"]["margin"],
            "aipw_blind": None if primary is None else primary["blind"]["estimate"],
            "design": d["design_ate"]["estimate"], **{str(k): int(v) for k, v in verdicts.items()},
        }

    def to_frame(self) -> pd.DataFrame:
        """The verdicts table: one row per scored claim (``verdicts`` of scorecard.json, flattened) with
        columns claim, family, primary, blind, design, difference, se, ci_low, ci_high, margin,
        equivalence_bound, p_difference(_adjusted), p_equivalence(_adjusted), verdict, verdict_adjusted and
        the percent bias reduction of ATE rows (pbr, pbr_ci_low, pbr_ci_high; NaN elsewhere)."""
        frame = pd.DataFrame(frame_rows(self.to_dict()["verdicts"]), columns=list(VERDICT_COLUMNS))
        numeric = [c for c in VERDICT_COLUMNS if c not in ("claim", "family", "primary", "verdict", "verdict_adjusted")]
        frame[numeric] = frame[numeric].astype(float)
        return frame


@dataclass(eq=False, repr=False)
class ScorecardRecord(_ScorecardView):
    """A scorecard read back from its ``scorecard.json`` record (the fitted objects are not stored)."""

    record: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """The scorecard.json content, as read."""
        return self.record

    @property
    def verdicts(self) -> list[dict[str, Any]]:
        """The verdicts table as read (one dict per scored claim)."""
        return self.record["verdicts"]


@dataclass(eq=False, repr=False)
class Scorecard(_ScorecardView):
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
    plan: dict[str, Any] = field(default_factory=dict)
    verdicts: list[dict[str, Any]] = field(default_factory=list)
    site_verdicts: dict[str, Any] | None = None
    within_site_balance: dict[str, Any] | None = None
    reference_agreement: dict[str, Any] | None = None
    headline_notes: list[str] = field(default_factory=list)
    sensitivity: dict[str, Any] | None = None

    @property
    def margin(self) -> float:
        """The ATE-family margin δ (outcome units); every claim's own margin is in :attr:`verdicts`."""
        return float(self.study["margin"])

    @property
    def clustering(self) -> dict[str, Any]:
        """How the scoring treated clusters, from ``study["clustering"]`` in scorecard.json: ``clustered``,
        ``n_clusters`` (among the scored units), ``cluster_randomized``.  A record without the field (an
        unclustered study, or one scored before clusters were supported) reads as unclustered."""
        return dict(self.study.get("clustering") or {"clustered": False, "n_clusters": None,
                                                     "cluster_randomized": False})

    def to_dict(self) -> dict[str, Any]:
        """The scorecard.json content (schema ``siteproof/scorecard`` version 2)."""
        return {
            "schema": SCHEMA,
            "version": VERSION,
            "siteproof_version": __version__,
            "headline": self.headline,
            "rates_source": self.rates_source,
            "plan": self.plan,
            "verdicts": self.verdicts,
            "study": self.study,
            "sites": json_records(self.sites),
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
            "site_verdicts": self.site_verdicts,
            "within_site_balance": None if self.within_site_balance is None else self.within_site_balance["rows"],
            "within_site_checks": None if self.within_site_balance is None else {
                k: v for k, v in self.within_site_balance.items() if k != "rows"},
            "reference_agreement": self.reference_agreement,
            "sensitivity": self.sensitivity,
            "transport": None if self.transport is None else self.transport.to_dict(),
            "warnings": list(self.warnings),
        }

    @staticmethod
    def from_dict(record: dict[str, Any], where: str = "this record") -> ScorecardRecord:
        """A scorecard from its ``scorecard.json`` record; refuses another schema or version (``where`` names
        the record in messages, e.g. the file it was read from)."""
        if not isinstance(record, dict) or record.get("schema") != SCHEMA:
            raise SiteproofError(f"{where} is not a siteproof scorecard",
                                 "point at the scorecard.json `siteproof unmask` wrote")
        if record.get("version") != VERSION:
            raise SiteproofError(
                f"{where} has scorecard format version {record.get('version')!r}; this siteproof reads version {VERSION}",
                "rerun `siteproof unmask` with this version of siteproof",
            )
        return ScorecardRecord(record)


# --------------------------------------------------------------------------------------------------------
# tidy rows
# --------------------------------------------------------------------------------------------------------
def _comparison_row(claim: str, family: str, c: dict[str, Any]) -> dict[str, Any]:
    """One tidy row from a comparison record (blind, design, difference {estimate, se, ci}, z, p_value)."""
    diff = c["difference"]
    return {"claim": claim, "family": family, "blind": c["blind"], "design": c["design"],
            "difference": diff["estimate"], "se": diff["se"], "ci_low": diff["ci"][0], "ci_high": diff["ci"][1],
            "statistic": c["z"], "p_value": c["p_value"], "verdict": c.get("verdict")}


def _ate_rows(a: dict[str, Any]) -> list[dict[str, Any]]:
    """The row of one ATE estimator, plus its same-estimand row (overlap-weighted estimator)."""
    rows = [_comparison_row(f"ATE {a['estimator']}", "ATE", {
        **a, "blind": a["blind"]["estimate"], "design": a["design"]["estimate"]})]
    if "same_estimand" in a:
        rows.append(_comparison_row(f"ATE {a['estimator']} (same estimand)", "ATE", a["same_estimand"]))
    return rows


def _rule_rows(r: dict[str, Any]) -> list[dict[str, Any]]:
    """The value and gain rows of one rule."""
    return [_comparison_row(f"rule {r['rule']} {part}", "rule", r[part]) for part in ("value", "gain")]


def _r_loss_row(model: str, r: dict[str, Any]) -> dict[str, Any]:
    """The R-loss row: paired difference with its normal z = D/SE and two-sided p = erfc(|z|/√2), no verdict."""
    diff = r["difference"]
    z = diff["estimate"] / diff["se"] if diff["se"] and diff["se"] > 0 else float("nan")
    p = math.erfc(abs(z) / math.sqrt(2.0)) if math.isfinite(z) else float("nan")
    return _comparison_row(f"CATE {model} R-loss", "R-loss", {
        "blind": r["blind"]["estimate"], "design": r["design"]["estimate"], "difference": diff,
        "z": z, "p_value": p, "verdict": None})


def _cate_rows(c: dict[str, Any]) -> list[dict[str, Any]]:
    """The rows of one CATE model: high−low, GATES, top−bottom, BLP β₂, AUTOC, Qini, R-loss."""
    m = c["model"]
    rows = [_comparison_row(f"CATE {m} high−low", "CATE", c["high_low"])]
    rows += [_comparison_row(f"CATE {m} GATE {g['group']}", "GATES", g) for g in c["gates"]]
    rows.append(_comparison_row(f"CATE {m} top−bottom", "GATES", c["top_minus_bottom"]))
    if c["blp"]["beta2"] is not None:
        rows.append(_comparison_row(f"CATE {m} BLP β₂", "BLP", c["blp"]["beta2"]))
    rows += [_comparison_row(f"CATE {m} {kind}", "rank", c[kind]) for kind in ("autoc", "qini")]
    return rows + [_r_loss_row(m, c["r_loss"])]


def _same(a: Any, b: Any) -> bool:
    """Deep equality of JSON-like records in which NaN equals NaN."""
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return bool(a == b)


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
        "dropped": [{"site": site, "reason": reason} for site, reason in reml.dropped],
        "ci_method": reml.ci_method,
    }


def _estimate_dict(est: Estimate) -> dict[str, Any]:
    return {"estimate": est.estimate, "se": est.se, "ci": [est.ci[0], est.ci[1]]}
