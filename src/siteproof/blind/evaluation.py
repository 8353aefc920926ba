"""Evaluation of heterogeneous-effect models: R-loss, GATES, BLP calibration, TOC/AUTOC/Qini (the cost-aware
gain curve is in :mod:`siteproof.blind.costcurve`).

Every function here is pure: arrays in, a result dataclass (with ``to_dict()``) out.  None of them fits a
model or computes a score from a model: the per-unit scores Γ (AIPW with the learned ê in the blind
analysis; design-based or oracle AIPW with the known site rates after unmasking, unbiased for τ(X, s) with
the known rates — docs/methods-unmask.md) and the propensity e are arguments.  The same call therefore gives the blind claim with (ê, blind Γ) and the design
value with (e_S, design Γ).  Every figure comes with a standard error and a 95% Wald interval.

The group, rank and cost statistics are linear in Γ for a fixed τ̂, so a paired blind − design difference
(docs/methods-sites-and-verdicts.md) is obtained by passing Γ_blind − Γ_design; :func:`rank_metric` also
accepts a 2-D Γ and keeps its bootstrap replicates, drawn once for all columns.

Formulas and references: docs/methods-heterogeneity.md.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterator

import numpy as np
from scipy import stats

from ..core.clusters import cluster_codes, cluster_half_samples
from ..core.checks import finite_vector, in_unit_interval, unit_vector, unit_vector_or_scalar
from ..core.errors import SiteproofError
from ..core.estimates import Estimate

RANK_KINDS = ("autoc", "qini")
_CHUNK_ELEMENTS = 1 << 22  # units × draws held in memory at once by the half-sample bootstrap


# --------------------------------------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------------------------------------
def _trial_arrays(y: Any, w: Any, e: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Outcome y and treatment w as per-unit vectors of one length, and the propensity e (a scalar is
    broadcast) strictly inside (0, 1)."""
    y = unit_vector("y", y)
    w = unit_vector("w", w, y.size)
    e = unit_vector_or_scalar("e", e, y.size)
    in_unit_interval("the propensity e", e, "clip e away from 0 and 1", strict=True)
    return y, w, e


def _score_matrix(gamma: Any, n: int) -> tuple[np.ndarray, bool]:
    """Γ as an (n, c) matrix, and whether it was given as a vector."""
    arr = np.asarray(gamma, dtype=float)
    if arr.ndim not in (1, 2) or arr.shape[0] != n:
        raise SiteproofError(f"gamma has shape {arr.shape}, expected ({n},) or ({n}, c)", "pass one score row per unit")
    finite_vector("gamma", arr, "drop those units or fix the scores")
    return (arr[:, None], True) if arr.ndim == 1 else (arr, False)


# --------------------------------------------------------------------------------------------------------
# R-loss
# --------------------------------------------------------------------------------------------------------
def r_loss_units(y: Any, w: Any, e: Any, m: Any, tau: Any) -> np.ndarray:
    """Per-unit R-loss ℓ_i = [(Y_i − m_i) − (W_i − e_i)·τ_i]² (Nie & Wager 2021).

    ``e``, ``m`` and ``tau`` may be scalars (broadcast to every unit).
    """
    y, w, e = _trial_arrays(y, w, e)
    n = y.size
    m = unit_vector_or_scalar("m", m, n)
    tau = unit_vector_or_scalar("tau", tau, n)
    return ((y - m) - (w - e) * tau) ** 2


@dataclass(frozen=True)
class RLossResult:
    """Mean R-loss of τ̂ and of a reference τ̂_ref, and their paired difference.

    ``difference`` = mean(ℓ_i − ℓ_ref,i) with SE sd(ℓ − ℓ_ref)/√n; ``t`` = difference / SE; ``p_below_zero``
    is the one-sided normal p-value for "τ̂ has lower R-loss than the reference" (Φ(t)).
    """

    loss: Estimate
    loss_ref: Estimate
    difference: Estimate
    t: float
    p_below_zero: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "loss": self.loss.to_dict(),
            "loss_ref": self.loss_ref.to_dict(),
            "difference": self.difference.to_dict(),
            "t": self.t,
            "p_below_zero": self.p_below_zero,
        }


def r_loss_comparison(y: Any, w: Any, e: Any, m: Any, tau: Any, tau_ref: Any, clusters: Any = None) -> RLossResult:
    """Compare the R-loss of ``tau`` with that of ``tau_ref`` (e.g. the constant model) on the same units.

    Per-unit differences d_i = ℓ_i(τ) − ℓ_i(τ_ref) = (W_i − e_i)(τ_i − τ_ref,i)·[(W_i − e_i)(τ_i + τ_ref,i)
    − 2(Y_i − m_i)]: the common term (Y − m)² cancels, so the paired SE sd(d)/√n is far smaller than
    either loss's own SE.  With the true propensity, E[d_i | X, S] = e(1−e)[(τ_i − τ(X,S))² −
    (τ_ref,i − τ(X,S))²] for any m that is a function of x only, so a negative mean difference means τ̂ is
    closer to the true effect than the reference, weighted by e(1−e) (Nie & Wager 2021).  With ``clusters``
    every SE is the cluster-robust SE of a mean (Liang & Zeger 1986).
    """
    loss = r_loss_units(y, w, e, m, tau)
    loss_ref = r_loss_units(y, w, e, m, tau_ref)
    diff = Estimate.from_scores("r_loss_difference", loss - loss_ref, estimand="R-loss difference", clusters=clusters)
    t = diff.z if diff.se > 0 else float("nan")
    return RLossResult(
        loss=Estimate.from_scores("r_loss", loss, estimand="R-loss", clusters=clusters),
        loss_ref=Estimate.from_scores("r_loss_ref", loss_ref, estimand="R-loss", clusters=clusters),
        difference=diff,
        t=t,
        p_below_zero=float(stats.norm.cdf(t)) if np.isfinite(t) else float("nan"),
    )


# --------------------------------------------------------------------------------------------------------
# quantile groups and GATES
# --------------------------------------------------------------------------------------------------------
def quantile_groups(tau: Any, k: int = 5) -> np.ndarray:
    """Group id 0..k−1 by quantiles of τ̂ (0 = lowest).

    With 0-based mid-ranks r_i (ties get the average of their ranks), group_i = ⌊k·r_i / n⌋.  Without ties
    the groups have sizes ⌊n/k⌋ or ⌈n/k⌉; tied units always share a group (so heavy ties can leave some
    groups empty).  The result does not depend on the order of the units.  k = 2 is the median split.
    """
    tau = unit_vector("tau", tau)
    n = tau.size
    if not (isinstance(k, (int, np.integer)) and 2 <= k <= n):
        raise SiteproofError(f"k = {k} quantile groups is not possible with {n} units", "use 2 ≤ k ≤ number of units")
    twice_rank = np.rint(2.0 * stats.rankdata(tau, method="average")).astype(np.int64) - 2  # 2·(0-based mid-rank)
    return (int(k) * twice_rank) // (2 * n)


@dataclass(frozen=True)
class GroupEstimate:
    """Mean score in one τ̂ group: ``estimate`` = mean Γ over its units (the group's average effect)."""

    group: int
    n: int
    tau_range: tuple[float, float]
    tau_mean: float
    estimate: Estimate

    def to_dict(self) -> dict[str, Any]:
        return {
            "group": self.group,
            "n": self.n,
            "tau_range": [self.tau_range[0], self.tau_range[1]],
            "tau_mean": self.tau_mean,
            **self.estimate.to_dict(),
        }


@dataclass(frozen=True)
class GatesResult:
    """GATES over k quantile groups, the top − bottom difference, and the median split (high − low)."""

    k: int
    groups: list[GroupEstimate]
    high_minus_low: Estimate
    halves: list[GroupEstimate]
    high_low: Estimate

    def to_dict(self) -> dict[str, Any]:
        return {
            "k": self.k,
            "groups": [g.to_dict() for g in self.groups],
            "high_minus_low": self.high_minus_low.to_dict(),
            "halves": [g.to_dict() for g in self.halves],
            "high_low": self.high_low.to_dict(),
        }


def _group_estimates(tau: np.ndarray, gamma: np.ndarray, k: int, clusters: np.ndarray | None = None) -> list[GroupEstimate]:
    ids = quantile_groups(tau, k)
    out = []
    for g in range(k):
        sel = ids == g
        t = tau[sel]
        rng = (float(t.min()), float(t.max())) if t.size else (float("nan"), float("nan"))
        est = Estimate.from_scores(f"group_{g}", gamma[sel], estimand="GATE",
                                   clusters=None if clusters is None else clusters[sel])
        out.append(GroupEstimate(g, int(sel.sum()), rng, float(t.mean()) if t.size else float("nan"), est))
    return out


def _difference_of_groups(name: str, high: GroupEstimate, low: GroupEstimate, ids: np.ndarray | None = None,
                          gamma: np.ndarray | None = None, clusters: np.ndarray | None = None) -> Estimate:
    """high − low with SE √(se_high² + se_low²) (disjoint units, independent scores).

    With ``clusters`` the two groups may share clusters, so their means are correlated: the SE is then the
    cluster-robust SE of Γ̄_h − Γ̄_l written as a mean of φ_i = n·(1[i∈h]/n_h − 1[i∈l]/n_l)·(Γ_i − Γ̄_{g(i)})
    over all units, i.e. from cluster sums of the two groups' deviations (Liang & Zeger 1986).
    """
    est = high.estimate.estimate - low.estimate.estimate
    if clusters is None:
        se = float(np.hypot(high.estimate.se, low.estimate.se))
    else:
        se = _paired_group_se(ids, gamma, clusters, high, low)
    return Estimate.from_value(name, est, se, estimand="GATE difference")


def _paired_group_se(ids: np.ndarray, gamma: np.ndarray, clusters: np.ndarray, high: GroupEstimate,
                     low: GroupEstimate) -> float:
    """Cluster-robust SE of Γ̄_h − Γ̄_l: V = G/(G − 1) Σ_g (Σ_{i∈g} a_i (Γ_i − Γ̄_{g(i)}))², a = ±1/n_group."""
    n = gamma.size
    phi = np.zeros(n)
    for grp, sign in ((high, 1.0), (low, -1.0)):
        sel = ids == grp.group
        phi[sel] = sign * n * (gamma[sel] - grp.estimate.estimate) / max(int(sel.sum()), 1)
    codes, labels = cluster_codes(clusters, n)
    g = labels.size
    if g < 2:
        return float("nan")
    totals = np.bincount(codes, weights=phi, minlength=g)
    return float(np.sqrt(g / (g - 1) * np.sum(totals ** 2)) / n)


def gates(tau: Any, gamma: Any, k: int = 5, clusters: Any = None) -> GatesResult:
    """Sorted group average treatment effects (Chernozhukov, Demirer, Duflo & Fernández-Val).

    Units are split into k groups by quantiles of τ̂ (:func:`quantile_groups`); the effect in group g is
    estimated by the mean score Γ̄_g with SE sd_g(Γ)/√n_g.  ``high_minus_low`` = Γ̄_{k−1} − Γ̄_0 and
    ``high_low`` = the same for the median split (k = 2), each with SE √(se_high² + se_low²).  Because τ̂
    is out-of-fold and Γ is built from nuisances not fit on the unit, Γ̄_g is unbiased for the group's
    average effect given the groups.  Pass Γ_a − Γ_b to get paired differences of two scorings.
    With ``clusters`` each group SE is cluster-robust over the group's units and the differences use the
    cluster sums of both groups together (see :func:`_difference_of_groups`).
    """
    tau = unit_vector("tau", tau)
    gamma = unit_vector("gamma", gamma, tau.size)
    codes = None if clusters is None else cluster_codes(clusters, tau.size)[0]
    groups = _group_estimates(tau, gamma, k, codes)
    halves = _group_estimates(tau, gamma, 2, codes)
    ids_k = quantile_groups(tau, k) if codes is not None else None
    ids_2 = quantile_groups(tau, 2) if codes is not None else None
    return GatesResult(
        k=k,
        groups=groups,
        high_minus_low=_difference_of_groups("high_minus_low", groups[-1], groups[0], ids_k, gamma, codes),
        halves=halves,
        high_low=_difference_of_groups("high_low", halves[1], halves[0], ids_2, gamma, codes),
    )


# --------------------------------------------------------------------------------------------------------
# BLP calibration
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class BlpResult:
    """Best linear predictor of the CATE given τ̂: β₁ (average effect), β₂ (heterogeneity loading).

    ``names``/``coef``/``cov`` hold the whole weighted regression (HC2 covariance); ``p_beta2_positive``
    is the one-sided p-value 1 − Φ(β₂/se) for H₀: β₂ ≤ 0.
    """

    beta1: Estimate
    beta2: Estimate
    p_beta2_positive: float
    names: tuple[str, ...]
    coef: tuple[float, ...]
    cov: tuple[tuple[float, ...], ...]
    covariance: str = "HC2"

    def to_dict(self) -> dict[str, Any]:
        return {
            "beta1": self.beta1.to_dict(),
            "beta2": self.beta2.to_dict(),
            "p_beta2_positive": self.p_beta2_positive,
            "coefficients": dict(zip(self.names, self.coef)),
            "covariance": self.covariance,
        }


def _hc2_wls(design: np.ndarray, y: np.ndarray, weights: np.ndarray,
             clusters: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least squares with the HC2 sandwich, computed on the whitened data √v·X, √v·Y.

    β = (X̃'X̃)⁻¹X̃'Ỹ, û = Ỹ − X̃β, h_i = x̃_i'(X̃'X̃)⁻¹x̃_i,
    V = (X̃'X̃)⁻¹ [Σ x̃_i x̃_i' û_i² / (1 − h_i)] (X̃'X̃)⁻¹ (MacKinnon & White 1985; Imbens & Kolesár 2016).

    With ``clusters`` (codes 0..G−1) the meat is built from cluster sums of the score contributions
    s_g = Σ_{i∈g} x̃_i û_i: V = G/(G − 1) (X̃'X̃)⁻¹ [Σ_g s_g s_g'] (X̃'X̃)⁻¹, the cluster-robust sandwich
    (Liang & Zeger 1986; CR1-type small-sample factor G/(G − 1), Cameron & Miller 2015).
    """
    root = np.sqrt(weights)
    xw = design * root[:, None]
    yw = y * root
    bread = np.linalg.inv(xw.T @ xw)
    beta = bread @ (xw.T @ yw)
    resid = yw - xw @ beta
    if clusters is not None:
        g = int(clusters.max()) + 1
        sums = np.stack([np.bincount(clusters, weights=xw[:, j] * resid, minlength=g) for j in range(xw.shape[1])], axis=1)
        factor = g / (g - 1) if g > 1 else float("nan")
        return beta, factor * (bread @ (sums.T @ sums) @ bread)
    leverage = np.einsum("ij,jk,ik->i", xw, bread, xw)
    meat = (xw * (resid**2 / (1.0 - leverage))[:, None]).T @ xw
    return beta, bread @ meat @ bread


def blp(y: Any, w: Any, e: Any, tau: Any, baseline: Any, clusters: Any = None) -> BlpResult:
    """BLP calibration of τ̂ (Chernozhukov, Demirer, Duflo & Fernández-Val, generic ML inference).

    Weighted least squares of Y on the regressors [1, B, (W − e), (W − e)(τ̂ − τ̄)] with weights
    v = 1/(e(1 − e)), where B is a baseline prediction (e.g. the cross-fitted μ̂₀ or m̂) and τ̄ = mean τ̂.
    The coefficient on (W − e) is β₁ (the average effect) and on (W − e)(τ̂ − τ̄) is β₂: β₂ = 1 when τ̂
    is the true CATE, 0 when it carries no information about heterogeneity.  With e the true assignment
    probability, β₁ and β₂ are identified whatever B is (W − e is v-orthogonal to any function of x).
    SEs: HC2, or with ``clusters`` the cluster-robust sandwich of :func:`_hc2_wls`.  A constant τ̂ (or B) is collinear with the intercept; its column is dropped and β₂ is NaN.
    """
    y, w, e = _trial_arrays(y, w, e)
    n = y.size
    tau = unit_vector("tau", tau, n)
    baseline = unit_vector_or_scalar("baseline", baseline, n)
    resid_w = w - e
    columns = {"intercept": np.ones(n), "baseline": baseline, "beta1": resid_w, "beta2": resid_w * (tau - tau.mean())}
    keep = [name for name, col in columns.items() if name in ("intercept", "beta1") or np.ptp(col) > 0]
    design = np.column_stack([columns[name] for name in keep])
    if n <= design.shape[1] or np.linalg.matrix_rank(design) < design.shape[1]:
        raise SiteproofError("the BLP regression is singular (too few units or collinear regressors)",
                             "use more units or check that both arms are present")
    codes = None if clusters is None else cluster_codes(clusters, n)[0]
    beta, cov = _hc2_wls(design, y, 1.0 / (e * (1.0 - e)), codes)
    se = np.sqrt(np.diag(cov))

    def coefficient(name: str) -> Estimate:
        if name not in keep:
            return Estimate.from_value(name, float("nan"), float("nan"), estimand="BLP")
        i = keep.index(name)
        return Estimate.from_value(name, float(beta[i]), float(se[i]), estimand="BLP")

    beta2 = coefficient("beta2")
    p = float(stats.norm.sf(beta2.estimate / beta2.se)) if beta2.se > 0 else float("nan")
    return BlpResult(
        beta1=coefficient("beta1"),
        beta2=beta2,
        p_beta2_positive=p,
        names=tuple(keep),
        coef=tuple(float(b) for b in beta),
        cov=tuple(tuple(float(c) for c in row) for row in cov),
        covariance="HC2" if clusters is None else "cluster",
    )


# --------------------------------------------------------------------------------------------------------
# TOC, AUTOC, Qini with the half-sample bootstrap
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RankResult:
    """Rank-weighted average treatment effect of a τ̂ ranking, per score column.

    ``estimate``/``se`` have one entry per column of Γ; ``boot`` is the (n_boot, c) array of half-sample
    replicates (the same half-samples for every column); ``q``, ``toc``, ``toc_se`` give the TOC curve on
    a grid (toc has shape (grid, c)).
    """

    kind: str
    estimate: np.ndarray
    se: np.ndarray
    boot: np.ndarray
    q: np.ndarray
    toc: np.ndarray
    toc_se: np.ndarray
    n: int
    seed: int
    one_column: bool

    def estimate_of(self, column: int = 0) -> Estimate:
        """Column ``column`` as an :class:`Estimate` (95% Wald CI from the half-sample SE)."""
        return Estimate.from_value(self.kind, float(self.estimate[column]), float(self.se[column]), estimand=self.kind.upper())

    def difference(self, a: int = 0, b: int = 1) -> Estimate:
        """Paired difference column a − column b; SE = SD of the replicate differences (shared half-samples)."""
        d = self.boot[:, a] - self.boot[:, b]
        se = float(d.std(ddof=1)) if d.size > 1 else float("nan")
        return Estimate.from_value(f"{self.kind}_difference", float(self.estimate[a] - self.estimate[b]), se,
                                   estimand=f"{self.kind.upper()} difference")

    def to_dict(self) -> dict[str, Any]:
        def column(j: int) -> dict[str, Any]:
            return {**self.estimate_of(j).to_dict(), "curve": {"toc": self.toc[:, j].tolist(), "se": self.toc_se[:, j].tolist()}}

        cols = [column(j) for j in range(self.estimate.size)]
        body: dict[str, Any] = cols[0] if self.one_column else {"columns": cols}
        return {"kind": self.kind, "n": self.n, "n_boot": int(self.boot.shape[0]), "seed": self.seed,
                "q": self.q.tolist(), **body}


def _rank_weights(m: int, kind: str) -> np.ndarray:
    """ω(p), p = 1..m, with θ = (1/m) Σ_p ω(p) Γ_(p) = (1/m) Σ_j α(j/m) TOC(j/m).

    ω(p) = Σ_{j ≥ p} α(j/m)/j − (1/m) Σ_j α(j/m); α ≡ 1 for AUTOC, α(q) = q for Qini.
    """
    j = np.arange(1, m + 1, dtype=float)
    alpha = np.ones(m) if kind == "autoc" else j / m
    return np.cumsum((alpha / j)[::-1])[::-1] - alpha.mean()


def _grid_cuts(m: int, grid: int) -> np.ndarray:
    """Number of top units ⌈q·m⌉ for q = 1/grid, 2/grid, ..., 1 (exact integer arithmetic, at least 1)."""
    g = np.arange(1, grid + 1, dtype=np.int64)
    return np.maximum((g * m + grid - 1) // grid, 1)


def _tie_average(scores: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Replace scores (c, B, m) by their mean over runs of equal block id (B, m) within each row."""
    c, b, m = scores.shape
    start = np.ones((b, m), dtype=bool)
    start[:, 1:] = blocks[:, 1:] != blocks[:, :-1]
    first = np.flatnonzero(start.ravel())
    sizes = np.diff(np.append(first, b * m))
    sums = np.add.reduceat(scores.reshape(c, b * m), first, axis=1)
    return np.repeat(sums / sizes, sizes, axis=1).reshape(c, b, m)


def _rank_stats(
    sorted_scores_t: np.ndarray, sorted_blocks: np.ndarray | None, rows: np.ndarray, omega: np.ndarray,
    cuts: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """θ (B, c) and TOC on the grid (B, grid, c) for each row of sorted-order positions ``rows`` (B, m).

    ``sorted_scores_t`` is Γ in τ̂ order, transposed to (c, n) so that every row operation is contiguous.
    """
    m = rows.shape[1]
    g = np.take(sorted_scores_t, rows, axis=1)
    if sorted_blocks is not None:
        g = _tie_average(g, np.take(sorted_blocks, rows))
    theta = (g @ omega) / m
    distinct, back = np.unique(cuts, return_inverse=True)
    segments = np.add.reduceat(g, np.concatenate([[0], distinct[:-1]]), axis=2)
    top_sums = np.cumsum(segments, axis=2)[:, :, back]
    toc = top_sums / cuts - top_sums[:, :, -1:] / m
    return theta.T, toc.transpose(1, 2, 0)


def half_samples(n: int, n_boot: int, seed: int) -> Iterator[np.ndarray]:
    """Yield arrays (B, n//2) of unit indices: each row a half-sample drawn without replacement.

    The draws depend only on (n, n_boot, seed), so two calls with the same n and seed use the same units —
    the draws are paired across calls as well as across columns.
    """
    rng = np.random.default_rng(seed)
    m = n // 2
    chunk = max(1, min(n_boot, _CHUNK_ELEMENTS // max(n, 1)))
    for start in range(0, n_boot, chunk):
        units = np.empty((min(chunk, n_boot - start), m), dtype=np.int64)
        for row in units:
            row[:] = rng.choice(n, m, replace=False, shuffle=False)
        yield units


def half_sample_batches(n: int, n_boot: int, seed: int, clusters: Any = None) -> Iterator[np.ndarray]:
    """Half-sample draws as arrays (b, m): :func:`half_samples` without clusters; with ``clusters`` one
    replicate at a time, the units of ⌊G/2⌋ whole clusters (:func:`siteproof.core.clusters.cluster_half_samples`),
    so m varies with the cluster sizes.  The SD of a mean over G/2 of G equal clusters is the cluster-robust
    SE (finite-population correction, docs/methods-clusters.md §3).  When every cluster holds one unit the
    draws are those without clusters, so singleton clusters reproduce the unclustered figures exactly."""
    if clusters is None or np.unique(np.asarray(clusters)).size == n:
        yield from half_samples(n, n_boot, seed)
        return
    for units in cluster_half_samples(clusters, n_boot, seed):
        yield units[None, :]


def _sorted_rows(units: np.ndarray, position: np.ndarray, n: int) -> np.ndarray:
    """Map half-sample unit indices (B, m) to their positions in τ̂ order, ascending within each row."""
    b, m = units.shape
    offsets = (np.arange(b) * n)[:, None]
    flat = np.zeros(b * n, dtype=bool)
    flat[(np.take(position, units) + offsets).ravel()] = True
    return np.flatnonzero(flat).reshape(b, m) - offsets


def rank_metric(tau: Any, gamma: Any, *, kind: str = "autoc", n_boot: int = 200, seed: int = 0, grid: int = 100,
                clusters: Any = None) -> RankResult:
    """AUTOC or Qini coefficient of the ranking by τ̂, with half-sample bootstrap SEs
    (Yadlowsky, Fleming, Shah, Brunskill & Wager, rank-weighted average treatment effects).

    Sort units by τ̂, largest first.  TOC(q) = mean of Γ over the top ⌈q·n⌉ units − mean of Γ over all;
    the estimate is θ = (1/n) Σ_{j=1..n} α(j/n)·TOC(j/n), the discrete form of ∫₀¹ α(q) TOC(q) dq, with
    α ≡ 1 (AUTOC) or α(q) = q (Qini coefficient).  θ = (1/n) Σ_p ω(p)Γ_(p) with rank weights ω that sum to
    zero (see :func:`_rank_weights`).  Ties in τ̂: Γ is averaged within each tied block, which equals the
    average of the statistic over all orderings of the block; a constant τ̂ gives θ = 0 and TOC ≡ 0.

    SE: n_boot half-samples of n//2 units drawn without replacement (no refits: τ̂ and Γ are kept; units
    are re-ranked within the half-sample).  For an asymptotically linear statistic with per-unit variance
    σ², the half-sample statistic varies around the full-sample one with variance σ²(1/m − 1/n) = σ²/n at
    m = n/2 (finite-population correction of sampling without replacement), which is the full-sample
    variance; so SD(replicates) is the SE.  ``gamma`` of shape (n, c) gives one result per column from the
    same half-samples; ``boot`` keeps the replicates for paired differences (:meth:`RankResult.difference`).
    With ``clusters`` the half-samples keep clusters whole (:func:`half_sample_batches`).
    Columns built from different propensities (ê vs a known rate) with the μ̂ that also produced τ̂ differ by
    a product of nuisance errors that the ranking selects on, so their paired difference is biased even though
    θ is computed identically for both (docs/methods-heterogeneity.md, "Blind vs design AUTOC").
    """
    if kind not in RANK_KINDS:
        raise SiteproofError(f"unknown rank metric kind {kind!r}", f"use one of {', '.join(RANK_KINDS)}")
    tau = unit_vector("tau", tau)
    n = tau.size
    if n < 4:
        raise SiteproofError(f"rank metrics need at least 4 units, got {n}", "evaluate on more units")
    if n_boot < 2 or grid < 1:
        raise SiteproofError("n_boot must be ≥ 2 and grid ≥ 1", "increase n_boot (default 200) or grid (default 100)")
    scores, one_column = _score_matrix(gamma, n)
    order = np.argsort(-tau, kind="stable")
    sorted_tau = tau[order]
    blocks = np.concatenate([[0], np.cumsum(sorted_tau[1:] != sorted_tau[:-1])])
    sorted_blocks = blocks if blocks[-1] + 1 < n else None
    sorted_scores_t = np.ascontiguousarray(scores[order].T)
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)

    theta, toc = _rank_stats(sorted_scores_t, sorted_blocks, np.arange(n)[None, :], _rank_weights(n, kind), _grid_cuts(n, grid))
    weights: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    boot_theta, boot_toc = [], []
    for units in half_sample_batches(n, n_boot, seed, clusters):
        m = units.shape[1]
        if m not in weights:
            weights[m] = (_rank_weights(m, kind), _grid_cuts(m, grid))
        th, tc = _rank_stats(sorted_scores_t, sorted_blocks, _sorted_rows(units, position, n), *weights[m])
        boot_theta.append(th)
        boot_toc.append(tc)
    boot = np.concatenate(boot_theta, axis=0)
    return RankResult(
        kind=kind,
        estimate=theta[0],
        se=boot.std(axis=0, ddof=1),
        boot=boot,
        q=np.arange(1, grid + 1) / grid,
        toc=toc[0],
        toc_se=np.concatenate(boot_toc, axis=0).std(axis=0, ddof=1),
        n=n,
        seed=seed,
        one_column=one_column,
    )
