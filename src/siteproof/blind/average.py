"""Average-effect estimators with their per-unit scores, and the overlap and balance diagnostics.

Every estimator returns :class:`siteproof.core.estimates.Estimate` with ``scores`` ψ_i whose mean is the estimate
(influence-function form), so that unmasking can compare it with a design-based estimate on the same units
through mean(ψ_blind − ψ_design) (paired: the two estimates share their units, so their errors are correlated).  Standard errors:

* ``naive``       — Neyman (1923): √(s₁²/n₁ + s₀²/n₀);
* ``regression``  — HC2 sandwich of the Lin (2013) regression (Imbens & Kolesár 2016);
* ``ipw``, ``aipw``, ``overlap`` — sd(ψ)/√n.  For the Hájek IPW and overlap-weighted estimators this treats
  ê as known (the estimation of ê is ignored), the usual practice; for cross-fitted AIPW it is the
  double/debiased-ML variance (Chernozhukov et al. 2018).

All arrays are 1-d of length n; ``w`` is 0/1; ``e`` is the (clipped) propensity, strictly inside (0, 1).
The formulas and references are collected in docs/methods-average.md.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy.linalg import cho_solve, solve_triangular

from ..core.checks import finite_matrix, in_unit_interval, unit_vector
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..core.scores import aipw_scores

OVERLAP_ESTIMAND = "ATO (overlap-weighted population)"
SMD_THRESHOLD = 0.1
OVERLAP_BAND = (0.05, 0.95)
_QUANTILES = {"min": 0.0, "p01": 0.01, "p05": 0.05, "p25": 0.25, "p50": 0.5,
              "p75": 0.75, "p95": 0.95, "p99": 0.99, "max": 1.0}
_BLOCK_ELEMENTS = 1 << 20  # row blocks of the Lin design hold about 1M numbers (8 MB)
_RANK_TOL = 1e-9
_AUC_BINS = 32


# ----------------------------------------------------------------------------------------------- estimators


def naive(y: np.ndarray, w: np.ndarray, clusters: Any = None) -> Estimate:
    """Difference in means ȳ₁ − ȳ₀ with Neyman (1923) SE √(s₁²/n₁ + s₀²/n₀).

    Scores (influence-function form, p̂ = n₁/n):
    ψ_i = τ̂ + W_i (Y_i − ȳ₁)/p̂ − (1 − W_i)(Y_i − ȳ₀)/(1 − p̂), whose mean is exactly τ̂.
    With ``clusters`` the SE is the cluster-robust SE of mean(ψ) (Liang & Zeger 1986).
    """
    y, w = _check_yw(y, w)
    treated, control = y[w == 1], y[w == 0]
    m1, m0 = treated.mean(), control.mean()
    se = np.sqrt(treated.var(ddof=1) / treated.size + control.var(ddof=1) / control.size)
    p = treated.size / y.size
    scores = (m1 - m0) + w * (y - m1) / p - (1 - w) * (y - m0) / (1 - p)
    if clusters is not None:
        return Estimate.from_scores("naive", scores, clusters=clusters)
    return Estimate.from_value("naive", m1 - m0, se, scores=scores)


def regression_adjusted(X: np.ndarray, y: np.ndarray, w: np.ndarray, clusters: Any = None) -> Estimate:
    """Lin (2013) regression adjustment: OLS of Y on 1, W, X_c, W·X_c (X_c = X − x̄); τ̂ = coefficient of W.

    SE: HC2 sandwich (Imbens & Kolesár 2016), V = (Z'Z)⁻¹ Σ_i z_i z_i' r_i²/(1 − h_ii) (Z'Z)⁻¹, with the
    leverages h_ii = z_i'(Z'Z)⁻¹z_i computed row-block by row-block (no n × n hat matrix).  Constant
    covariates and columns linearly dependent on earlier ones (order: 1, W, X_c, W·X_c) are dropped; units
    with leverage 1 (zero residual) add 0 to the HC2 sum.
    Scores: ψ_i = μ̂₁(x_i) − μ̂₀(x_i) + W_i r_i/p̂ − (1 − W_i) r_i/(1 − p̂), with p̂ = n₁/n and r the OLS
    residual; the normal equations make mean(ψ) = τ̂ exactly.  With ``clusters`` the SE is the
    cluster-robust SE of mean(ψ) from cluster sums of ψ (the CR0-type sandwich of Liang & Zeger 1986 with
    the G/(G − 1) correction; Cameron & Miller 2015) in place of HC2.
    """
    y, w = _check_yw(y, w)
    X = finite_matrix("covariates", X, y.size)
    Xs, n_constant = _standardized_covariates(X)
    p = Xs.shape[1]
    gram, zy = _lin_gram(Xs, y, w)
    keep, chol = _ordered_independent(gram)
    beta = np.zeros(gram.shape[0])
    beta[keep] = cho_solve((chol, True), zy[keep])
    inverse = np.zeros_like(gram)
    inverse[np.ix_(keep, keep)] = cho_solve((chol, True), np.eye(keep.size))

    effect_x = Xs @ beta[2 + p:]
    resid = y - (beta[0] + beta[1] * w + Xs @ beta[2:2 + p] + w * effect_x)
    variance, n_leverage_one = _hc2_variance(Xs, w, resid, inverse, column=1)
    share = w.mean()
    scores = beta[1] + effect_x + w * resid / share - (1 - w) * resid / (1 - share)
    note = _regression_note(n_constant, 2 + 2 * p - keep.size, n_leverage_one)
    if clusters is not None:
        return Estimate.from_scores("regression", scores, note=note, clusters=clusters)
    return Estimate.from_value("regression", beta[1], np.sqrt(variance), scores=scores, note=note)


def ipw_hajek(y: np.ndarray, w: np.ndarray, e: np.ndarray, clusters: Any = None) -> Estimate:
    """Hájek (normalised) inverse-probability-weighted ATE (Horvitz & Thompson 1952 weights, normalised per arm).

    τ̂ = μ̂₁ − μ̂₀ with μ̂₁ = Σ W Y/e ÷ Σ W/e and μ̂₀ = Σ (1−W) Y/(1−e) ÷ Σ (1−W)/(1−e).  Scores (linearisation
    of the two ratios, ê treated as known), with a_i = W_i/e_i and b_i = (1 − W_i)/(1 − e_i):
    ψ_i = τ̂ + a_i (Y_i − μ̂₁)/mean(a) − b_i (Y_i − μ̂₀)/mean(b).
    """
    y, w = _check_yw(y, w)
    e = _check_e(e, y.size)
    return _weighted_contrast("ipw", y, w / e, (1 - w) / (1 - e), "ATE", clusters)


def aipw(y: np.ndarray, w: np.ndarray, e: np.ndarray, mu0: np.ndarray, mu1: np.ndarray,
         clusters: Any = None) -> Estimate:
    """Cross-fitted AIPW (Robins, Rotnitzky & Zhao 1994; Chernozhukov et al. 2018): τ̂ = mean(Γ), SE sd(Γ)/√n.

    Γ_i = μ̂₁(x_i) − μ̂₀(x_i) + W_i (Y_i − μ̂₁(x_i))/e_i − (1 − W_i)(Y_i − μ̂₀(x_i))/(1 − e_i),
    computed by :func:`siteproof.core.scores.aipw_scores`.  With ``clusters`` the SE is the cluster-robust
    SE of mean(Γ) (:func:`siteproof.core.clusters.cluster_mean_se`; Liang & Zeger 1986).
    """
    y, w = _check_yw(y, w)
    e = _check_e(e, y.size)
    mu0 = unit_vector("mu0", mu0, y.size)
    mu1 = unit_vector("mu1", mu1, y.size)
    return Estimate.from_scores("aipw", aipw_scores(y, w, e, mu0, mu1), clusters=clusters)


def overlap_weighted(y: np.ndarray, w: np.ndarray, e: np.ndarray, clusters: Any = None) -> Estimate:
    """Overlap-weighted effect (Li, Morgan & Zaslavsky 2018): treated weighted by 1 − e, controls by e.

    τ̂_O = Σ W(1−e)Y ÷ Σ W(1−e) − Σ (1−W)eY ÷ Σ (1−W)e estimates the average effect in the population
    weighted by e(x)(1 − e(x)) — a different estimand from the ATE (the ATO).  Scores as for the Hájek IPW
    with these weights, ê treated as known.
    """
    y, w = _check_yw(y, w)
    e = _check_e(e, y.size)
    return _weighted_contrast("overlap", y, w * (1 - e), (1 - w) * e, OVERLAP_ESTIMAND, clusters)


def _weighted_contrast(name: str, y: np.ndarray, a1: np.ndarray, a0: np.ndarray, estimand: str,
                       clusters: Any = None) -> Estimate:
    """Difference of two normalised weighted means, with linearised scores (mean(ψ) = estimate); the SE is
    cluster-robust with ``clusters``."""
    m1 = float(a1 @ y / a1.sum())
    m0 = float(a0 @ y / a0.sum())
    scores = (m1 - m0) + a1 * (y - m1) / a1.mean() - a0 * (y - m0) / a0.mean()
    return Estimate.from_scores(name, scores, estimand=estimand, clusters=clusters)


# ------------------------------------------------------------------------------------------ Lin regression


def _standardized_covariates(X: np.ndarray) -> tuple[np.ndarray, int]:
    """Centred and scaled non-constant columns of X (scaling leaves τ̂ and its HC2 SE unchanged)."""
    mean = X.mean(axis=0)
    Xs = X - mean
    sd = np.sqrt(np.einsum("ij,ij->j", Xs, Xs) / max(X.shape[0], 1))
    varying = sd > 1e-12 * np.maximum(1.0, np.abs(mean))
    if not varying.all():
        Xs = Xs[:, varying]
    Xs /= sd[varying]
    return Xs, int(np.count_nonzero(~varying))


def _lin_gram(Xs: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Z'Z and Z'y for Z = [1, W, X_s, W·X_s], built from arm sums without forming Z."""
    n, n1 = y.size, w.sum()
    s_all, s1 = Xs.sum(axis=0), w @ Xs
    full, treated = np.zeros((Xs.shape[1],) * 2), np.zeros((Xs.shape[1],) * 2)
    rows = _block_rows(Xs.shape[1])
    for start in range(0, n, rows):
        block, wb = Xs[start:start + rows], w[start:start + rows]
        full += block.T @ block
        treated += (block * wb[:, None]).T @ block
    gram = np.block([
        [np.array([[n, n1], [n1, n1]], dtype=float), np.vstack([s_all, s1]), np.vstack([s1, s1])],
        [np.column_stack([s_all, s1]), full, treated],
        [np.column_stack([s1, s1]), treated, treated],
    ])
    wy = w * y
    zy = np.concatenate([[y.sum(), wy.sum()], Xs.T @ y, Xs.T @ wy])
    return gram, zy


def _ordered_independent(gram: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Columns kept in order, each kept only if not (numerically) spanned by those kept before it.

    Incremental Cholesky of the Gram matrix: column j is kept when its squared residual norm after projection
    on the kept columns exceeds 1e−9 of its squared norm.  Returns the kept indices and the lower Cholesky
    factor of their Gram block.
    """
    size = gram.shape[0]
    factor = np.zeros((size, size))
    keep: list[int] = []
    for j in range(size):
        norm2 = gram[j, j]
        if norm2 <= 0:
            continue
        m = len(keep)
        v = solve_triangular(factor[:m, :m], gram[keep, j], lower=True) if m else np.empty(0)
        resid = norm2 - v @ v
        if resid > _RANK_TOL * norm2:
            factor[m, :m] = v
            factor[m, m] = np.sqrt(resid)
            keep.append(j)
    m = len(keep)
    return np.array(keep, dtype=int), factor[:m, :m]


def _hc2_variance(
    Xs: np.ndarray, w: np.ndarray, resid: np.ndarray, inverse: np.ndarray, column: int
) -> tuple[float, int]:
    """HC2 variance of one coefficient: Σ_i a_i² r_i²/(1 − h_ii), a = Z (Z'Z)⁻¹ e_column, h_ii = z_i'(Z'Z)⁻¹z_i.

    Z is rebuilt one row block at a time, so memory is O(block × columns).  Units with 1 − h_ii < 1e−10
    (leverage one: the residual is zero) contribute 0; their count is returned.
    """
    total, n_one = 0.0, 0
    rows = _block_rows(inverse.shape[0])
    for start in range(0, w.size, rows):
        stop = start + rows
        wb, xb = w[start:stop].astype(float), Xs[start:stop]
        z = np.column_stack([np.ones_like(wb), wb, xb, xb * wb[:, None]])
        zi = z @ inverse
        lev = np.einsum("ij,ij->i", zi, z)
        room = 1.0 - lev
        ok = room > 1e-10
        n_one += int(np.count_nonzero(~ok))
        total += float(np.sum((zi[ok, column] * resid[start:stop][ok]) ** 2 / room[ok]))
    return total, n_one


def _block_rows(width: int) -> int:
    return max(1024, _BLOCK_ELEMENTS // max(width, 1))


def _regression_note(n_constant: int, n_dependent: int, n_leverage_one: int) -> str:
    parts = []
    if n_constant:
        parts.append(f"{n_constant} constant covariate(s) dropped")
    if n_dependent:
        parts.append(f"{n_dependent} linearly dependent column(s) of the interacted design dropped")
    if n_leverage_one:
        parts.append(f"{n_leverage_one} unit(s) with leverage 1 (HC2 term set to 0)")
    return "; ".join(parts)


# ----------------------------------------------------------------------------------------------- diagnostics


def overlap_summary(e_raw: np.ndarray, w: np.ndarray, clip: tuple[float, float]) -> dict[str, Any]:
    """Overlap diagnostics of the out-of-fold propensity (JSON-ready).

    * clip bounds and the number of units whose ê lies outside them (below / above);
    * share of units with ê outside [0.05, 0.95] (a trimming band in the spirit of Crump, Hotz, Imbens &
      Mitnik 2009), overall and per arm;
    * per arm: mean and quantiles of ê, and the Kish effective sample size (Σ a_i)²/Σ a_i² of the IPW
      weights a_i = 1/ê_i (treated) or 1/(1 − ê_i) (control), ê clipped, with its share of the arm size;
    * counts of ê by arm on 40 equal-width bins of [0, 1] (the overlap histogram).
    """
    e_raw = unit_vector("e_raw", e_raw, np.asarray(w).size)
    w = _as_binary(w)
    lo, hi = float(clip[0]), float(clip[1])
    e = np.clip(e_raw, lo, hi)
    outside = (e_raw < OVERLAP_BAND[0]) | (e_raw > OVERLAP_BAND[1])
    by_arm = {}
    for label, arm in (("treated", 1), ("control", 0)):
        rows = w == arm
        weights = 1.0 / e[rows] if arm else 1.0 / (1.0 - e[rows])
        ess = kish_ess(weights)
        by_arm[label] = {
            "n": int(rows.sum()),
            "mean": float(e_raw[rows].mean()) if rows.any() else float("nan"),
            "quantiles": _quantiles(e_raw[rows]),
            "share_outside_band": float(outside[rows].mean()) if rows.any() else float("nan"),
            "kish_ess": ess,
            "kish_ess_share": ess / rows.sum() if rows.any() else float("nan"),
        }
    return {
        "clip": [lo, hi],
        "n_clipped": int(np.count_nonzero((e_raw < lo) | (e_raw > hi))),
        "n_clipped_low": int(np.count_nonzero(e_raw < lo)),
        "n_clipped_high": int(np.count_nonzero(e_raw > hi)),
        "band": list(OVERLAP_BAND),
        "share_outside_band": float(outside.mean()),
        "by_arm": by_arm,
        "histogram": _histogram_by_arm(e_raw, w),
    }


def _histogram_by_arm(e_raw: np.ndarray, w: np.ndarray, bins: int = 40) -> dict[str, list]:
    """Counts of ê by arm on ``bins`` equal-width bins of [0, 1] (for the overlap figure)."""
    edges = np.linspace(0.0, 1.0, bins + 1)
    return {
        "edges": edges.tolist(),
        "treated": np.histogram(e_raw[w == 1], bins=edges)[0].tolist(),
        "control": np.histogram(e_raw[w == 0], bins=edges)[0].tolist(),
    }


def kish_ess(weights: np.ndarray) -> float:
    """Kish effective sample size (Σ a)²/Σ a² of non-negative weights (equal weights → their count)."""
    weights = np.asarray(weights, dtype=float)
    denom = float(weights @ weights)
    return float(weights.sum() ** 2 / denom) if denom > 0 else 0.0


def _quantiles(values: np.ndarray) -> dict[str, float]:
    if values.size == 0:
        return {key: float("nan") for key in _QUANTILES}
    qs = np.quantile(values, list(_QUANTILES.values()))
    return {key: float(q) for key, q in zip(_QUANTILES, qs)}


def balance_table(X: np.ndarray, w: np.ndarray, e: np.ndarray, feature_names: Sequence[str]) -> pd.DataFrame:
    """Standardised mean difference of each covariate before and after IPW weighting (Austin 2009).

    SMD = (x̄₁ − x̄₀)/√((s₁² + s₀²)/2), s_a² the unweighted sample variance in arm a.  After weighting
    the means are IPW-weighted (weights 1/e for treated, 1/(1 − e) for controls); the denominator stays the
    unweighted pooled SD, so the change reflects only the change in the mean difference.  A covariate is
    balanced when |SMD| < 0.1.  A zero denominator gives SMD 0 (equal means) or ±inf.
    """
    w = _as_binary(w)
    X = finite_matrix("covariates", X, w.size)
    e = _check_e(e, w.size)
    if len(feature_names) != X.shape[1]:
        raise SiteproofError(
            f"{len(feature_names)} feature names for {X.shape[1]} covariates", "pass one name per column"
        )
    treated, control = X[w == 1], X[w == 0]
    pooled_sd = np.sqrt((treated.var(axis=0, ddof=1) + control.var(axis=0, ddof=1)) / 2.0)
    a1, a0 = w / e, (1 - w) / (1 - e)
    diff_before = treated.mean(axis=0) - control.mean(axis=0)
    diff_after = (a1 @ X) / a1.sum() - (a0 @ X) / a0.sum()
    smd_before, smd_after = _smd(diff_before, pooled_sd), _smd(diff_after, pooled_sd)
    return pd.DataFrame({
        "feature": list(feature_names),
        "smd_before": smd_before,
        "smd_after": smd_after,
        "balanced_before": np.abs(smd_before) < SMD_THRESHOLD,
        "balanced_after": np.abs(smd_after) < SMD_THRESHOLD,
    })


def _smd(diff: np.ndarray, sd: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = diff / sd
    return np.where(sd > 0, out, np.where(diff == 0, 0.0, np.sign(diff) * np.inf))


def covariate_aucs(X: np.ndarray, w: np.ndarray, folds: np.ndarray, n_bins: int = _AUC_BINS) -> np.ndarray:
    """Out-of-fold AUC of each single covariate as a predictor of treatment.

    Per covariate: the values are cut at (up to) ``n_bins`` quantiles (the edges use no treatment
    information); for each fold k the treated share of each bin is estimated on the other folds, shrunk
    toward their overall treated share with one pseudo-unit ((t_b + r̄)/(c_b + 1)), and is the prediction
    for fold k's units in that bin.  The AUC (Mann–Whitney, ties counted ½) of these out-of-fold predictions
    is computed from bin counts, so the cost is O(n) per covariate and any monotone or non-monotone
    dependence is detected.
    """
    w = _as_binary(w)
    X = finite_matrix("covariates", X, w.size)
    fold_ids = np.unique(np.asarray(folds), return_inverse=True)[1].reshape(-1)
    if fold_ids.size != w.size:
        raise SiteproofError("folds and treatment have different lengths", "build folds with make_folds(w)")
    return np.array([_single_covariate_auc(X[:, j], w, fold_ids, n_bins) for j in range(X.shape[1])])


def covariate_auc_warnings(
    X: np.ndarray, w: np.ndarray, folds: np.ndarray, feature_names: Sequence[str], threshold: float = 0.9
) -> list[tuple[str, float]]:
    """Covariates whose single-covariate out-of-fold AUC for treatment exceeds ``threshold`` (highest first).

    Such a covariate is likely a post-treatment or design variable; the caller reports it.
    """
    aucs = covariate_aucs(X, w, folds)
    if len(feature_names) != aucs.size:
        raise SiteproofError(
            f"{len(feature_names)} feature names for {aucs.size} covariates", "pass one name per column"
        )
    flagged = [(str(name), float(auc)) for name, auc in zip(feature_names, aucs) if auc > threshold]
    return sorted(flagged, key=lambda item: -item[1])


def _single_covariate_auc(x: np.ndarray, w: np.ndarray, fold_ids: np.ndarray, n_bins: int) -> float:
    edges = np.unique(np.quantile(x, np.linspace(0.0, 1.0, n_bins + 1)[1:-1]))
    width = edges.size + 1
    n_folds = int(fold_ids.max()) + 1
    group = fold_ids * width + np.searchsorted(edges, x, side="right")
    count = np.bincount(group, minlength=n_folds * width).reshape(n_folds, width).astype(float)
    treated = np.bincount(group, weights=w, minlength=n_folds * width).reshape(n_folds, width)
    train_count, train_treated = count.sum(axis=0) - count, treated.sum(axis=0) - treated
    prior = train_treated.sum(axis=1, keepdims=True) / train_count.sum(axis=1, keepdims=True)
    rate = (train_treated + prior) / (train_count + 1.0)
    return grouped_auc(rate.ravel(), treated.ravel(), (count - treated).ravel())


def grouped_auc(score: np.ndarray, n_pos: np.ndarray, n_neg: np.ndarray) -> float:
    """AUC from groups sharing a score: Σ_g pos_g (neg below g + ½ neg_g) ÷ (Σ pos · Σ neg) (Mann–Whitney)."""
    values, inverse = np.unique(score, return_inverse=True)
    pos = np.bincount(inverse, weights=n_pos, minlength=values.size)
    neg = np.bincount(inverse, weights=n_neg, minlength=values.size)
    below = np.cumsum(neg) - neg
    denom = pos.sum() * neg.sum()
    return float(np.sum(pos * (below + 0.5 * neg)) / denom) if denom > 0 else float("nan")


# ------------------------------------------------------------------------------------------------ checking


def _as_binary(w: np.ndarray) -> np.ndarray:
    w = np.asarray(w)
    if w.ndim != 1 or not np.all((w == 0) | (w == 1)):
        raise SiteproofError("the treatment must be a 1-d array of 0/1 values", "code treated as 1 and control as 0")
    return w.astype(float)


def _check_yw(y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    w = _as_binary(w)
    y = unit_vector("outcome", y, w.size)
    n1 = int(w.sum())
    if min(n1, w.size - n1) < 2:
        raise SiteproofError(
            f"an arm has fewer than 2 units ({n1} treated, {w.size - n1} control)", "use data with both arms"
        )
    return y, w


def _check_e(e: np.ndarray, n: int) -> np.ndarray:
    e = unit_vector("propensity", e, n)
    in_unit_interval("propensity", e, "clip them, e.g. to [0.01, 0.99]", strict=True)
    return e
