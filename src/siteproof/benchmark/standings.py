"""The standings: the grading metrics, one row per graded submission, and the ranking with ties.

Submissions are ordered by the chosen metric. Walking down the order, each submission is compared with
the best submission of the current group through their paired difference: the ranking metric is recomputed on the
same n_boot half-samples for every submission (``evaluation.half_samples``), and the SE of a difference is the SD
of the replicate differences (never add two variances of estimates made on the same units). When
the difference is within 1.96 SEs the submission joins the group (same rank, ``tied_with`` names the group's
best); otherwise it opens a new group with its own position as rank (competition ranking: 1, 1, 3).
Submissions without the ranking metric follow, unranked, and then the ones that could not be graded, each with
its ``problem``.

The design-based answers (:data:`ANSWER_METRICS`, the design ATE and the CI coverage) are kept in memory for the
teacher and left out of every output when the leaderboard withholds them: knowing one's own submitted ATE, the
ATE error would give the design ATE back.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Sequence

import numpy as np
import pandas as pd

from .. import __version__
from ..core.estimates import Z95, Estimate
from ..core.outputs import json_records
from .layout import FORMAT_VERSION, LEADERBOARD_SCHEMA
from .submissions import SubmittedATE


@dataclass(frozen=True)
class MetricInfo:
    """A grading metric: its label, what the submission needs for it, and which direction is better."""

    label: str
    needs: str
    higher_is_better: bool
    meaning: str


METRICS: dict[str, MetricInfo] = {
    "autoc": MetricInfo("AUTOC", "tau_hat", True,
                        "area under the targeting operator characteristic of the tau_hat ranking"),
    "qini": MetricInfo("Qini", "tau_hat", True, "Qini coefficient of the tau_hat ranking"),
    "blp_beta2": MetricInfo("BLP β₂", "tau_hat", True,
                            "heterogeneity loading of tau_hat (1 = calibrated, 0 = no information)"),
    "rule_gain": MetricInfo("rule gain", "treat", True,
                            "gain of the treat rule over random allocation with the same treated share"),
    "ate_error": MetricInfo("ATE error", "ate", False,
                            "submitted average effect minus the design-based pooled ATE (ranked by |error|)"),
}


ANSWER_METRICS = ("ate_error",)  # submitted value minus the design-based answer: withheld with the answers
IN_SAMPLE = "published units (in-sample)"
HELD_OUT = "held-out units"

TIE_RULE = ("a submission is tied with the best submission of its group when their paired difference in the "
            "ranking metric is within 1.96 standard errors (SD of the difference over shared half-samples); tied "
            "submissions share the group's rank")


def fmt(x: float | None, digits: int = 3) -> str:
    """Fixed decimals; "–" for a missing value; no "-0.000"."""
    if x is None or not np.isfinite(x):
        return "–"
    text = f"{x:.{digits}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


@dataclass(frozen=True, eq=False)
class GradedSubmission:
    """One leaderboard row: the metrics (each an :class:`Estimate`), rank and standing in words."""

    name: str
    file: str
    metrics: dict[str, Estimate]
    treated_share: float | None
    submitted_ate: SubmittedATE | None
    ci_covers: bool | None
    rank: int | None = None
    tied_with: str | None = None
    standing: str = ""
    site_means: dict[str, float] | None = None
    replicates: dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    problem: str | None = None

    def value(self, metric: str) -> float:
        """The estimate of ``metric``; NaN when the submission has no such metric."""
        est = self.metrics.get(metric)
        return float("nan") if est is None else float(est.estimate)

    def to_dict(self, withhold_answers: bool = False) -> dict[str, Any]:
        """One entry of leaderboard.json (per-site means only with reveal; answers left out when withheld)."""
        metrics = {k: v.to_dict() for k, v in self.metrics.items()}
        for key in ANSWER_METRICS:
            if withhold_answers and key in metrics:
                metrics[key] = {"estimate": None, "se": metrics[key]["se"], "ci": None, "withheld": True}
        out: dict[str, Any] = {
            "submission": self.name, "file": self.file, "rank": self.rank, "tied_with": self.tied_with,
            "standing": self.standing, "problem": self.problem, "metrics": metrics,
            "treated_share": self.treated_share,
            "ci_covers_design_ate": None if withhold_answers else self.ci_covers,
            "submitted_ate": self.submitted_ate.to_dict() if self.submitted_ate else None,
        }
        if self.site_means is not None:
            out["tau_hat_mean_by_site"] = dict(self.site_means)
        return out


@dataclass(frozen=True, eq=False)
class Leaderboard:
    """Every graded submission in rank order, with what the ranking and the ties mean."""

    entries: list[GradedSubmission]
    rank_by: str
    benchmark: dict[str, Any]
    design_ate: Estimate
    n_graded: int
    n_boot: int
    seed: int
    public_check: str
    reveal: bool
    sites: pd.DataFrame | None = None
    withhold_answers: bool = True

    @property
    def graded_on(self) -> str:
        """"held-out units", or "published units (in-sample)" when the benchmark holds no unit out."""
        return HELD_OUT if self.benchmark["holdout_share"] > 0 else IN_SAMPLE

    def withheld(self, metric: str) -> bool:
        """True when the outputs leave the estimate of ``metric`` out (a design-based answer, withheld)."""
        return self.withhold_answers and metric in ANSWER_METRICS

    def shown_sites(self) -> pd.DataFrame | None:
        """The per-site table (reveal only), without the design-based estimates when answers are withheld."""
        if not self.reveal or self.sites is None:
            return None
        if self.withhold_answers:
            return self.sites.drop(columns=["difference_in_means", "se"], errors="ignore")
        return self.sites

    def to_frame(self) -> pd.DataFrame:
        """leaderboard.csv: one row per submission, metrics with SEs, problem; no site information."""
        rows = []
        for entry in self.entries:
            row: dict[str, Any] = {"submission": entry.name, "rank": entry.rank, "tied_with": entry.tied_with or ""}
            for key in METRICS:
                est = entry.metrics.get(key)
                row[key] = est.estimate if est and not self.withheld(key) else np.nan
                row[f"{key}_se"] = est.se if est else np.nan
            row["treated_share"] = entry.treated_share
            row["ate"] = entry.submitted_ate.estimate if entry.submitted_ate else np.nan
            row["ate_se"] = entry.submitted_ate.se if entry.submitted_ate else np.nan
            covers = None if self.withhold_answers else entry.ci_covers
            row["ate_ci_covers"] = "" if covers is None else ("yes" if covers else "no")
            row["graded_on"] = self.graded_on if entry.problem is None else ""
            row["standing"] = entry.standing
            row["problem"] = entry.problem or ""
            row["file"] = entry.file
            rows.append(row)
        frame = pd.DataFrame(rows)
        frame["rank"] = frame["rank"].astype("Int64")
        return frame

    def to_dict(self) -> dict[str, Any]:
        """leaderboard.json: settings, the design ATE (unless withheld) and every submission; sites with reveal."""
        out: dict[str, Any] = {
            "schema": LEADERBOARD_SCHEMA, "version": FORMAT_VERSION, "siteproof_version": __version__,
            "benchmark": dict(self.benchmark), "public_check": self.public_check, "graded_on": self.graded_on,
            "settings": {"rank_by": self.rank_by, "n_boot": self.n_boot, "seed": self.seed, "reveal": self.reveal,
                         "withhold_answers": self.withhold_answers, "tie_rule": TIE_RULE},
            "n_graded": self.n_graded,
            "design_ate": None if self.withhold_answers else self.design_ate.to_dict(),
            "submissions": [e.to_dict(self.withhold_answers) for e in self.entries],
        }
        sites = self.shown_sites()
        if sites is not None:
            out["sites"] = json_records(sites)
        return out


def _ranking_value(entry: GradedSubmission, metric: str) -> float:
    """Larger is better: the metric itself, or −|ATE error|."""
    v = entry.value(metric)
    return v if METRICS[metric].higher_is_better else -abs(v)


def _ranking_replicates(entry: GradedSubmission, metric: str) -> np.ndarray:
    """Half-sample replicates of the ranking value (larger is better, as in :func:`_ranking_value`)."""
    reps = entry.replicates[metric]
    return reps if METRICS[metric].higher_is_better else -np.abs(reps)


def paired_difference(a: GradedSubmission, b: GradedSubmission, metric: str) -> tuple[float, float]:
    """(difference a − b in the ranking value of ``metric``, its SE from the shared half-sample replicates)."""
    diff = _ranking_value(a, metric) - _ranking_value(b, metric)
    d = _ranking_replicates(a, metric) - _ranking_replicates(b, metric)
    d = d[np.isfinite(d)]
    return diff, float(d.std(ddof=1)) if d.size > 1 else float("nan")


def rank_entries(entries: Sequence[GradedSubmission], metric: str, show_gaps: bool = True) -> list[GradedSubmission]:
    """Order by the ranking value (best first; name breaks exact ties), group ties, write standings in words.

    Entries without the metric come next, unranked, with the reason; entries with a ``problem`` come last.
    ``show_gaps=False`` leaves the numbers out of the standings (when they would give an answer away).
    """
    label = METRICS[metric].label
    valid = [e for e in entries if e.problem is None]
    ranked = [e for e in valid if np.isfinite(_ranking_value(e, metric))]
    unranked = [e for e in valid if not np.isfinite(_ranking_value(e, metric))]
    ranked.sort(key=lambda e: (-_ranking_value(e, metric), e.name))
    out: list[GradedSubmission] = []
    leader: GradedSubmission | None = None
    leader_rank = 0
    for position, entry in enumerate(ranked, start=1):
        if leader is None:
            leader, leader_rank = entry, position
            out.append(replace(entry, rank=position, standing=f"best by {label}"))
            continue
        diff, se = paired_difference(leader, entry, metric)
        gap = f" by {fmt(diff)} (SE {fmt(se)})" if show_gaps else ""
        if np.isfinite(se) and diff <= Z95 * se:
            out.append(replace(entry, rank=leader_rank, tied_with=leader.name,
                               standing=f"tied with {leader.name}: behind{gap}, within its uncertainty"))
            continue
        out.append(replace(entry, rank=position, standing=f"behind {leader.name}{gap}"
                           + ("" if show_gaps else ", beyond its uncertainty")))
        leader, leader_rank = entry, position
    for entry in sorted(unranked, key=lambda e: e.name):
        out.append(replace(entry, standing=f"not ranked: {_missing_reason(entry, metric)}"))
    for entry in [e for e in entries if e.problem is not None]:
        out.append(replace(entry, standing="not graded (see problem)"))
    return out


def _missing_reason(entry: GradedSubmission, metric: str) -> str:
    """Why an entry has no finite value of ``metric``, in words."""
    needs = METRICS[metric].needs
    if metric not in entry.metrics:
        return {"tau_hat": "no tau_hat column", "treat": "no treat column", "ate": "no [ate] in a TOML file"}[needs]
    return f"{METRICS[metric].label} is undefined (e.g. a constant tau_hat)"
