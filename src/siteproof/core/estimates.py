"""The plain result object every estimator returns, and the normal-theory helpers behind it.

An :class:`Estimate` carries the point estimate, its standard error, a 95% confidence interval and, where
the estimator is (asymptotically) a mean of per-unit scores, those scores ψ_i with mean(ψ) = estimate.  The
scores are what makes paired comparisons possible: two estimates computed on the same
units are compared through mean(ψ_a − ψ_b) with SE sd(ψ_a − ψ_b)/√n.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Any

import numpy as np
import pandas as pd

from .clusters import cluster_mean_se
from .results import ResultsMixin

_NORMAL = NormalDist()
Z95 = _NORMAL.inv_cdf(0.975)


def normal_ci(estimate: float, se: float, level: float = 0.95) -> tuple[float, float]:
    """Wald interval estimate ± z_{1−α/2}·se."""
    z = _NORMAL.inv_cdf(0.5 + level / 2.0)
    return (float(estimate - z * se), float(estimate + z * se))


def mean_and_se(scores: np.ndarray, clusters: Any = None) -> tuple[float, float]:
    """Mean of per-unit scores and its SE, sd(ψ)/√n with the n−1 divisor.

    With ``clusters`` (one label per unit) the SE is the cluster-robust one of
    :func:`siteproof.core.clusters.cluster_mean_se` (Liang & Zeger 1986), which equals sd(ψ)/√n when every
    cluster has one unit.
    """
    scores = np.asarray(scores, dtype=float)
    n = scores.size
    if clusters is not None and n:
        return float(scores.mean()), cluster_mean_se(scores, clusters)
    if n < 2:
        return float(np.mean(scores)) if n else float("nan"), float("nan")
    return float(scores.mean()), float(scores.std(ddof=1) / np.sqrt(n))


@dataclass(frozen=True, repr=False)
class Estimate(ResultsMixin):
    """A point estimate with SE, 95% CI and (optionally) the per-unit scores it is the mean of."""

    name: str
    estimate: float
    se: float
    ci: tuple[float, float]
    estimand: str = "ATE"
    scores: np.ndarray | None = field(default=None, repr=False, compare=False)
    note: str = ""

    @classmethod
    def from_scores(cls, name: str, scores: np.ndarray, estimand: str = "ATE", note: str = "",
                    clusters: Any = None) -> "Estimate":
        """Estimate = mean(ψ), SE = sd(ψ)/√n (cluster-robust with ``clusters``), CI = Wald 95%."""
        est, se = mean_and_se(scores, clusters)
        return cls(name, est, se, normal_ci(est, se), estimand, np.asarray(scores, dtype=float), note)

    @classmethod
    def from_value(
        cls, name: str, estimate: float, se: float, estimand: str = "ATE",
        scores: np.ndarray | None = None, note: str = "",
    ) -> "Estimate":
        """Wrap a point estimate and SE computed elsewhere (e.g. HC2) with its Wald 95% CI."""
        return cls(name, float(estimate), float(se), normal_ci(estimate, se), estimand, scores, note)

    @property
    def z(self) -> float:
        """estimate / se."""
        return float(self.estimate / self.se) if self.se > 0 else float("nan")

    @property
    def p_value(self) -> float:
        """Two-sided normal p-value for estimate = 0."""
        return math.erfc(abs(self.z) / math.sqrt(2.0)) if np.isfinite(self.z) else float("nan")

    def conf_int(self, alpha: float = 0.05) -> tuple[float, float]:
        """Wald interval estimate ± z_{1−α/2}·se at level 1 − α (normal approximation)."""
        return normal_ci(self.estimate, self.se, 1.0 - alpha)

    def _key_numbers(self) -> dict[str, Any]:
        return {"name": self.name, "estimand": self.estimand, "estimate": self.estimate, "se": self.se}

    def to_frame(self) -> pd.DataFrame:
        """One row: name, estimand, estimate, se, ci_low, ci_high, p_value (no per-unit scores)."""
        return pd.DataFrame([{
            "name": self.name, "estimand": self.estimand, "estimate": self.estimate, "se": self.se,
            "ci_low": self.ci[0], "ci_high": self.ci[1], "p_value": self.p_value,
        }])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (scores are kept out; they go to the per-unit sidecar)."""
        out: dict[str, Any] = {
            "estimate": float(self.estimate),
            "se": float(self.se),
            "ci": [float(self.ci[0]), float(self.ci[1])],
            "estimand": self.estimand,
        }
        if self.note:
            out["note"] = self.note
        return out
