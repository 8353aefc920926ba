"""Random-effects meta-analysis of per-site estimates: how much do the sites' effects differ?

Model (normal–normal random effects): y_i = θ_i + ε_i, θ_i ~ N(μ, τ²), ε_i ~ N(0, v_i) with the within-site
variances v_i treated as known, i = 1..k.  Weights w_i = 1/v_i (fixed effect) and w*_i = 1/(v_i + τ̂²)
(random effects).

* Fixed-effect mean μ̂_FE = Σw_i y_i / Σw_i, SE = 1/√Σw_i.
* Cochran's Q = Σ w_i (y_i − μ̂_FE)², df = k − 1, p-value from χ²_{k−1}.
* τ² by DerSimonian & Laird (1986), the method of moments on Q:
      τ̂²_DL = max(0, (Q − (k − 1)) / (S₁ − S₂/S₁)),  S_r = Σ w_iʳ,
  with SE from the exact variance of the quadratic form Q under the model evaluated at τ̂²
  (Biggerstaff & Tweedie 1997): Var(Q) = 2·tr((PΣ)²), Σ = diag(v_i + τ̂²), P = W − w wᵀ/S₁,
  SE(τ̂²_DL) = √Var(Q) / (S₁ − S₂/S₁).
* τ² by restricted maximum likelihood (Viechtbauer 2005; 2010): τ̂² ≥ 0 maximises the restricted
  log-likelihood; in the interior it solves the score equation, with P* = W* − w* w*ᵀ/Σw*,
      yᵀP*P*y = tr(P*),
  equivalently τ² = Σ w*_i²((y_i − μ̂)² − v_i)/Σ w*_i² + 1/Σ w*_i.  We solve it by a bracketed 1-D root
  search (Brent's method) on [0, U]; if the score is ≤ 0 at τ² = 0 the maximum is on the boundary, τ̂² = 0.
  SE(τ̂²_REML) = √(2 / tr(P*²)) from the expected restricted information.
* Random-effects mean μ̂ = Σw*_i y_i / Σw*_i, SE = 1/√Σw*_i, 95% Wald CI μ̂ ± 1.96·SE (``ci="z"``), or the
  Hartung–Knapp–Sidik–Jonkman interval (``ci="hksj"``; Hartung & Knapp 2001, Sidik & Jonkman 2002):
      q_HK = Σ w*_i (y_i − μ̂)² / (k − 1),   SE_HK = √(q_HK / Σw*_i),   μ̂ ± t_{k−1, 0.975}·SE_HK,
  which keeps close to nominal coverage with few sites where the Wald interval is too short
  (IntHout, Ioannidis & Borm 2014).
* Sites whose SE is zero or not finite, or whose estimate is not finite, carry no usable weight; they are
  left out and listed in ``dropped`` as (site, reason).
* I² (Higgins & Thompson 2002) = 100·τ̂²/(τ̂² + s²) % with the "typical" within-study variance
  s² = (k − 1)·S₁ / (S₁² − S₂), and H² = (τ̂² + s²)/s².  For DL this is exactly max(0, (Q − df)/Q)·100;
  for REML it uses the REML τ̂², so the two methods report different I².
* 95% prediction interval for the effect in a new site (Higgins, Thompson & Spiegelhalter 2009):
      μ̂ ± t_{k−2, 0.975} · √(τ̂² + SE(μ̂)²).
  With k = 2 there are no degrees of freedom left; the interval is (NaN, NaN) and the result's ``note`` says so.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import optimize, stats

from ..core.checks import same_length
from ..core.errors import SiteproofError
from ..core.estimates import normal_ci
from ..core.results import ResultsMixin

METHODS = ("reml", "dl")
CI_METHODS = ("z", "hksj")


@dataclass(frozen=True, repr=False)
class RandomEffectsResult(ResultsMixin):
    """A random-effects meta-analysis: pooled mean, between-site variance and heterogeneity statistics.

    ``i2`` is in percent (Higgins & Thompson 2002) and computed from this method's τ̂² (see module docstring);
    ``prediction_interval`` is the 95% interval of Higgins, Thompson & Spiegelhalter (2009) (with the
    model-based SE 1/√Σw*).  ``se`` and ``ci`` follow ``ci_method``: ``"z"`` (Wald, normal quantile) or
    ``"hksj"`` (q-scaled SE, t with ``ci_df`` = k − 1 degrees of freedom).  ``dropped`` lists the sites left
    out as (site, reason); ``k`` counts the sites used.
    """

    method: str
    k: int
    estimate: float
    se: float
    ci: tuple[float, float]
    tau2: float
    tau2_se: float
    q: float
    q_df: int
    q_pvalue: float
    i2: float
    h2: float
    prediction_interval: tuple[float, float]
    fixed_estimate: float
    fixed_se: float
    ci_method: str = "z"
    ci_df: float = float("inf")
    dropped: tuple[tuple[str, str], ...] = ()
    note: str = ""

    def _key_numbers(self) -> dict[str, Any]:
        return {"method": self.method, "k": self.k, "estimate": self.estimate, "se": self.se,
                "ci_method": self.ci_method, "tau2": self.tau2, "i2": self.i2, "q_pvalue": self.q_pvalue,
                "dropped": len(self.dropped)}

    def to_frame(self) -> pd.DataFrame:
        """One row per quantity: pooled mean, τ², Cochran's Q (``statistic``, ``p_value``), I² (%), the 95 %
        prediction interval and the fixed-effect mean."""
        nan = float("nan")
        rows = [
            ("pooled mean", self.estimate, self.se, *self.ci, nan, nan),
            ("tau2", self.tau2, self.tau2_se, nan, nan, nan, nan),
            ("Q", nan, nan, nan, nan, self.q, self.q_pvalue),
            ("I2 (%)", self.i2, nan, nan, nan, nan, nan),
            ("prediction interval", nan, nan, *self.prediction_interval, nan, nan),
            ("fixed-effect mean", self.fixed_estimate, self.fixed_se, nan, nan, nan, nan),
        ]
        return pd.DataFrame(rows, columns=["quantity", "estimate", "se", "ci_low", "ci_high", "statistic", "p_value"])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (non-finite values stay NaN; ``outputs`` writes them as null)."""
        out: dict[str, Any] = {
            "method": self.method,
            "k": self.k,
            "estimate": self.estimate,
            "se": self.se,
            "ci": [self.ci[0], self.ci[1]],
            "tau2": self.tau2,
            "tau2_se": self.tau2_se,
            "q": self.q,
            "q_df": self.q_df,
            "q_pvalue": self.q_pvalue,
            "i2": self.i2,
            "h2": self.h2,
            "prediction_interval": [self.prediction_interval[0], self.prediction_interval[1]],
            "fixed_estimate": self.fixed_estimate,
            "fixed_se": self.fixed_se,
            "ci_method": self.ci_method,
            "ci_df": self.ci_df if np.isfinite(self.ci_df) else None,
            "dropped": [{"site": site, "reason": reason} for site, reason in self.dropped],
        }
        if self.note:
            out["note"] = self.note
        return out


def random_effects(
    estimates: Sequence[float] | np.ndarray,
    variances: Sequence[float] | np.ndarray,
    method: str = "reml",
    ci: str = "z",
    sites: Sequence[Any] | None = None,
) -> RandomEffectsResult:
    """Random-effects meta-analysis of k ≥ 2 estimates with known within-site variances.

    ``method`` is ``"reml"`` (Viechtbauer 2005) or ``"dl"`` (DerSimonian & Laird 1986); ``ci`` is ``"z"``
    (Wald) or ``"hksj"`` (Hartung & Knapp 2001; Sidik & Jonkman 2002).  ``sites`` labels the estimates
    (default "0", "1", …) for ``dropped``.  Formulas for every reported quantity are in the module docstring
    and docs/methods-sites-and-verdicts.md.
    """
    y, v, dropped = _usable_sites(estimates, variances, method, ci, sites)
    k = y.size
    w = 1.0 / v
    fixed_estimate = float(np.sum(w * y) / np.sum(w))
    fixed_se = float(1.0 / np.sqrt(np.sum(w)))
    q = float(np.sum(w * (y - fixed_estimate) ** 2))
    if method == "dl":
        tau2 = dersimonian_laird_tau2(q, v)
        tau2_se = _dl_tau2_se(v, tau2)
    else:
        tau2 = reml_tau2(y, v)
        tau2_se = _reml_tau2_se(v, tau2)
    w_star = 1.0 / (v + tau2)
    estimate = float(np.sum(w_star * y) / np.sum(w_star))
    model_se = float(1.0 / np.sqrt(np.sum(w_star)))
    s2 = typical_within_variance(v)
    pi, note = prediction_interval(estimate, model_se, tau2, k)
    if ci == "hksj":
        se, ci_df, interval = hksj_interval(y, w_star, estimate)
    else:
        se, ci_df, interval = model_se, float("inf"), normal_ci(estimate, model_se)
    return RandomEffectsResult(
        method=method,
        k=k,
        estimate=estimate,
        se=se,
        ci=interval,
        tau2=tau2,
        tau2_se=tau2_se,
        q=q,
        q_df=k - 1,
        q_pvalue=float(stats.chi2.sf(q, k - 1)),
        i2=float(100.0 * tau2 / (tau2 + s2)),
        h2=float((tau2 + s2) / s2),
        prediction_interval=pi,
        fixed_estimate=fixed_estimate,
        fixed_se=fixed_se,
        ci_method=ci,
        ci_df=ci_df,
        dropped=dropped,
        note=note,
    )


def hksj_interval(
    y: np.ndarray, w_star: np.ndarray, estimate: float, level: float = 0.95
) -> tuple[float, float, tuple[float, float]]:
    """Hartung–Knapp–Sidik–Jonkman SE, df and interval of the random-effects mean.

    q_HK = Σ w*_i (y_i − μ̂)² / (k − 1), SE_HK = √(q_HK / Σ w*_i), CI μ̂ ± t_{k−1, (1+level)/2}·SE_HK
    (Hartung & Knapp 2001; Sidik & Jonkman 2002; IntHout, Ioannidis & Borm 2014).
    """
    df = y.size - 1
    q_hk = float(np.sum(w_star * (y - estimate) ** 2) / df)
    se = float(np.sqrt(q_hk / np.sum(w_star)))
    half = float(stats.t.ppf(0.5 + level / 2, df) * se)
    return se, float(df), (estimate - half, estimate + half)


def dersimonian_laird_tau2(q: float, variances: np.ndarray) -> float:
    """τ̂²_DL = max(0, (Q − (k − 1)) / (S₁ − S₂/S₁)) with S_r = Σ(1/v_i)ʳ (DerSimonian & Laird 1986)."""
    w = 1.0 / np.asarray(variances, dtype=float)
    s1, s2 = np.sum(w), np.sum(w**2)
    return float(max(0.0, (q - (w.size - 1)) / (s1 - s2 / s1)))


def reml_tau2(y: np.ndarray, v: np.ndarray) -> float:
    """REML τ̂² ≥ 0 (Viechtbauer 2005): root of the restricted score ½(yᵀP²y − tr P), or 0 at the boundary.

    The score is positive near 0 when there is excess dispersion and negative for large τ² (it behaves like
    (SS/τ² − (k − 1))/τ²), so the root is bracketed by doubling an upper bound and found with Brent's method.
    """
    if _reml_score(0.0, y, v) <= 0.0:
        return 0.0
    upper = float(np.var(y, ddof=1) + np.max(v))
    while _reml_score(upper, y, v) > 0.0:
        upper *= 2.0
    return float(optimize.brentq(_reml_score, 0.0, upper, args=(y, v), xtol=1e-14 * upper, rtol=1e-12))


def typical_within_variance(variances: np.ndarray) -> float:
    """s² = (k − 1)·Σw / ((Σw)² − Σw²), w = 1/v (Higgins & Thompson 2002)."""
    w = 1.0 / np.asarray(variances, dtype=float)
    s1, s2 = np.sum(w), np.sum(w**2)
    return float((w.size - 1) * s1 / (s1**2 - s2))


def prediction_interval(estimate: float, se: float, tau2: float, k: int) -> tuple[tuple[float, float], str]:
    """μ̂ ± t_{k−2, 0.975}·√(τ̂² + SE²) (Higgins, Thompson & Spiegelhalter 2009); NaN with a note when k = 2."""
    if k < 3:
        note = "prediction interval undefined with k = 2 sites (t distribution with k − 2 = 0 degrees of freedom)"
        return (float("nan"), float("nan")), note
    half = float(stats.t.ppf(0.975, k - 2) * np.sqrt(tau2 + se**2))
    return (estimate - half, estimate + half), ""


def _projection(v: np.ndarray, tau2: float) -> np.ndarray:
    """P = W − w wᵀ/Σw with w = 1/(v + τ²): the residual-forming matrix of the weighted mean."""
    w = 1.0 / (v + tau2)
    return np.diag(w) - np.outer(w, w) / np.sum(w)


def _reml_score(tau2: float, y: np.ndarray, v: np.ndarray) -> float:
    """Restricted score up to the factor ½: yᵀP²y − tr(P) at τ²."""
    p = _projection(v, tau2)
    py = p @ y
    return float(py @ py - np.trace(p))


def _reml_tau2_se(v: np.ndarray, tau2: float) -> float:
    """√(2 / tr(P²)) — inverse expected restricted information (Viechtbauer 2005)."""
    p = _projection(v, tau2)
    return float(np.sqrt(2.0 / np.sum(p * p)))


def _dl_tau2_se(v: np.ndarray, tau2: float) -> float:
    """√(2·tr((PΣ)²)) / (S₁ − S₂/S₁) with P from fixed-effect weights and Σ = diag(v + τ̂²).

    Q = yᵀPy is a normal quadratic form, so Var(Q) = 2·tr((PΣ)²) exactly under the model (Biggerstaff &
    Tweedie 1997); the untruncated DL estimator is (Q − (k − 1))/(S₁ − S₂/S₁), a linear function of Q.
    """
    w = 1.0 / v
    s1, s2 = np.sum(w), np.sum(w**2)
    p_sigma = _projection(v, 0.0) * (v + tau2)[np.newaxis, :]
    return float(np.sqrt(2.0 * np.sum(p_sigma * p_sigma.T)) / (s1 - s2 / s1))


def drop_reason(estimate: float, variance: float) -> str:
    """Why a site cannot enter the meta-analysis ("" when it can): a zero or non-finite SE, or a non-finite
    estimate."""
    if not np.isfinite(estimate):
        return "estimate is not finite"
    if not np.isfinite(variance):
        return "SE is not finite"
    if variance == 0:
        return "SE is zero (no within-site variation in an arm)"
    return ""


def _usable_sites(
    estimates: Any, variances: Any, method: str, ci: str, sites: Sequence[Any] | None
) -> tuple[np.ndarray, np.ndarray, tuple[tuple[str, str], ...]]:
    """The estimates and variances of the usable sites, and the (site, reason) pairs of the others."""
    if method not in METHODS:
        raise SiteproofError(f"unknown random-effects method {method!r}", f"use one of {', '.join(METHODS)}")
    if ci not in CI_METHODS:
        raise SiteproofError(f"unknown random-effects interval {ci!r}", f"use one of {', '.join(CI_METHODS)}")
    y = np.asarray(estimates, dtype=float).ravel()
    v = np.asarray(variances, dtype=float).ravel()
    same_length("estimates", y, "variances", v, "pass one within-site variance (squared SE) per site estimate")
    labels = [str(i) for i in range(y.size)] if sites is None else [str(s) for s in sites]
    same_length("estimates", y, "sites", np.asarray(labels), "pass one site label per site estimate")
    if np.any(v < 0):
        raise SiteproofError("within-site variances must not be negative",
                             "pass squared standard errors as the variances")
    reasons = [drop_reason(a, b) for a, b in zip(y, v)]
    keep = np.array([not r for r in reasons], dtype=bool)
    dropped = tuple((label, r) for label, r in zip(labels, reasons) if r)
    if keep.sum() < 2:
        listed = "; ".join(f"{label}: {reason}" for label, reason in dropped)
        left_out = f" ({len(dropped)} left out: {listed})" if dropped else ""
        raise SiteproofError(
            f"a random-effects meta-analysis needs at least 2 site estimates, got {int(keep.sum())}{left_out}",
            "include more sites (sites need at least 2 units in each arm and a positive SE to give an estimate)",
        )
    return y[keep], v[keep], dropped
