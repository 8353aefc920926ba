"""The cost-aware gain curve of a CATE ranking: cumulative gain against cumulative cost share.

Pure like :mod:`siteproof.blind.evaluation`: τ̂, the per-unit scores Γ and the costs in, a result with
pointwise standard errors out; passing Γ_blind − Γ_design gives paired differences (the curve is linear in Γ).
Formulas and references: docs/methods-heterogeneity.md.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core.checks import unit_vector
from ..core.clusters import cluster_codes
from ..core.errors import SiteproofError
from ..core.estimates import Z95


def _cluster_curve_variance(g1: np.ndarray, codes: np.ndarray, share: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Cluster-robust variance of gain_k = mean(1[i among top k]·Γ_i) at the boundaries k bracketing the grid
    (other boundaries are not read by the interpolation and are left at 0)."""
    n, g = g1.size, int(codes.max()) + 1
    var = np.zeros(n + 1)
    hi = np.clip(np.searchsorted(share, x, side="left"), 0, n)
    for k in np.unique(np.concatenate([hi, np.maximum(hi - 1, 0)])):
        z = np.zeros(n)
        z[:k] = g1[:k]
        totals = np.bincount(codes, weights=z - z.mean(), minlength=g)
        var[k] = g / (g - 1) * np.sum(totals ** 2) / n ** 2 if g > 1 else float("nan")
    return var


@dataclass(frozen=True, eq=False)
class CostCurveResult:
    """Cumulative gain against cumulative cost share when units are treated in order of τ̂/cost.

    ``gain[g]`` = (1/n) Σ_{treated} Γ_i at cost share ``x[g]`` (x from 0 to 1), with pointwise ``se``;
    ``gain[-1]`` is mean Γ (everyone treated).
    """

    x: np.ndarray
    gain: np.ndarray
    se: np.ndarray
    n: int
    total_cost: float

    def to_dict(self) -> dict[str, Any]:
        return {"n": self.n, "total_cost": self.total_cost, "x": self.x.tolist(), "gain": self.gain.tolist(),
                "se": self.se.tolist(), "ci_low": (self.gain - Z95 * self.se).tolist(),
                "ci_high": (self.gain + Z95 * self.se).tolist()}


def _block_mean(values: np.ndarray, first: np.ndarray) -> np.ndarray:
    """Replace sorted values by their mean within blocks starting at indices ``first``."""
    sizes = np.diff(np.append(first, values.size))
    return np.repeat(np.add.reduceat(values, first) / sizes, sizes)


def cost_curve(tau: Any, gamma: Any, cost: Any, grid: int = 100, clusters: Any = None) -> CostCurveResult:
    """Cost-aware gain curve: treat units in decreasing order of benefit per unit cost τ̂_i / c_i.

    After k units, x_k = Σ_{j≤k} c_(j) / Σ_j c_j and gain_k = (1/n) Σ_{j≤k} Γ_(j) = mean of Z_i = 1[i among
    the k]·Γ_i, with SE sd(Z)/√n = √[(Σ_{j≤k} Γ²_(j)/n − gain_k²)/(n − 1)].  The curve is read at
    x = 0, 1/grid, ..., 1 by linear interpolation between unit boundaries (the marginal unit funded in
    part).  Ties in τ̂/c are handled like
    :func:`siteproof.blind.evaluation.rank_metric`: Γ, Γ² and c are averaged within tied blocks.
    Costs must be positive.  The curve is linear in Γ, so Γ_a − Γ_b gives paired differences.
    With ``clusters`` the variance at each unit boundary next to a grid point is the cluster-robust
    G/(G − 1) Σ_g (Σ_{i∈g} (Z_i − gain_k))²/n² (Liang & Zeger 1986), interpolated the same way.
    """
    tau = unit_vector("tau", tau)
    n = tau.size
    gamma = unit_vector("gamma", gamma, n)
    cost = unit_vector("cost", cost, n)
    if np.any(cost <= 0):
        raise SiteproofError("the cost column has zero or negative values", "give every unit a positive cost")
    if n < 2 or grid < 1:
        raise SiteproofError("a cost curve needs at least 2 units and grid ≥ 1", "evaluate on more units")
    ratio = tau / cost
    order = np.argsort(-ratio, kind="stable")
    r = ratio[order]
    first = np.flatnonzero(np.concatenate([[True], r[1:] != r[:-1]]))
    g, c = gamma[order], cost[order]
    g1, g2, cc = _block_mean(g, first), _block_mean(g**2, first), _block_mean(c, first)
    share = np.concatenate([[0.0], np.cumsum(cc)]) / c.sum()
    gain = np.concatenate([[0.0], np.cumsum(g1)]) / n
    var = np.maximum(np.concatenate([[0.0], np.cumsum(g2)]) / n - gain**2, 0.0) / (n - 1)
    x = np.arange(grid + 1) / grid
    if clusters is not None:
        var = _cluster_curve_variance(g1, cluster_codes(clusters, n)[0][order], share, x)
    return CostCurveResult(
        x=x,
        gain=np.interp(x, share, gain),
        se=np.sqrt(np.interp(x, share, var)),
        n=n,
        total_cost=float(c.sum()),
    )
