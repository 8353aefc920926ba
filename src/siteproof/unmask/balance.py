"""Within-site randomization check: under randomization within each site, no covariate predicts treatment.

Pooled over sites, covariates may well differ between the arms (sites differ in both their covariates and
their rates — that is the confounding the blind analysis must remove).  Within a site (or a site × stratum
cell, the unit of randomization) they may not.  Conditional on the arm sizes, the treated units of cell c are
a random subset of its n_c units, so a covariate's difference in arm means has randomization mean 0 and
variance S²·(1/n₁ + 1/n₀), S² the cell's variance of the covariate (n − 1 divisor; Imbens & Rubin 2015,
ch. 6).  For covariate j and cell c with n₁, n₀ ≥ 2

    z_jc = (x̄₁ − x̄₀) / √(S²_jc·(1/n₁ + 1/n₀)) = √(n_c − 1)·r_c(x_j, W),

approximately N(0, 1) by the finite-population central limit theorem (Li & Ding 2017) and independent across
cells (independent randomizations).  The null variance is used, not the Welch variance s²₁/n₁ + s²₀/n₀: with
a binary or skewed covariate and a small arm, an arm that happens to be constant makes the Welch SE tiny and
the test far too liberal.  For a binary covariate z² is (n − 1)/n times Pearson's χ² of the 2 × 2 table.
The cells' evidence is combined as

    T_j = Σ_c z²_jc  ~  χ²_{k_j}   (k_j = cells where covariate j varies),

with p_j = P(χ²_{k_j} ≥ T_j); the p_j are adjusted across covariates (Holm 1979 by default) and a covariate
is ``flagged`` when its adjusted p is below α.  T_j is sensitive to imbalance in either direction in any
cell.  A flagged covariate is (a) measured after treatment, (b) an identifier of the unit of assignment
(a classroom or clinic randomized as a whole, so it determines W within the site: then z = √(n_c − 1)), or
(c) a sign that randomization within the site broke down.

Omnibus check per cell: the Mahalanobis distance of the vector of arm-mean differences under the same
randomization covariance, M_c = d̄ᵀ[S_X·(1/n₁ + 1/n₀)]⁻¹d̄ = (n_c − 1)·R²_c, R²_c of the regression of W on
all covariates, approximately χ²_r with r the rank of the centred covariates (Morgan & Rubin 2012).  It is
reported only where n_c ≥ ``OMNIBUS_UNITS_PER_DF`` · r (a rule of thumb for the χ² approximation, common
practice), Holm-adjusted across cells.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from ..blind.plan import check_multiplicity
from ..core.checks import alpha_level, finite_matrix, unit_vector
from ..core.errors import SiteproofError
from ..core.interpret import ALPHA, DEFAULT_MULTIPLICITY
from ..core.results import ResultsMixin
from ..intake.sitetrials import MIN_PER_ARM, site_order
from .multiplicity import adjust
from .siteverdicts import site_labels

OMNIBUS_UNITS_PER_DF = 5
PERMUTATION_CHUNK = 256
NO_VARIATION = "constant within every usable site"
FEW_UNITS = f"fewer than {MIN_PER_ARM} units in an arm"


@dataclass(frozen=True, repr=False)
class BalanceCheck(ResultsMixin):
    """Per-covariate within-site balance tests, the per-cell omnibus tests and what was skipped.

    ``rows``: one dict per tested covariate — covariate, statistic (T_j), df (k_j), p_value, p_adjusted,
    flagged, max_abs_z, worst_site (the cell with the largest |z|).  ``omnibus``: one dict per cell — site,
    n, statistic (M = (n − 1)·R²), df, p_value, p_adjusted, flagged.  ``z``: covariates × cells table of z_jc (NaN where
    not computed).  ``skipped``: covariates and cells left out, with the reason.  ``reference``: how the p_j
    were computed ("chi-square", or the permutation draws and seed).
    """

    rows: tuple[dict[str, Any], ...]
    omnibus: tuple[dict[str, Any], ...]
    skipped: tuple[dict[str, Any], ...]
    z: pd.DataFrame
    alpha: float
    method: str
    reference: str = "chi-square"

    @property
    def flagged(self) -> list[str]:
        """Names of the flagged covariates."""
        return [r["covariate"] for r in self.rows if r["flagged"]]

    def _key_numbers(self) -> dict[str, Any]:
        return {"covariates": len(self.rows), "flagged": len(self.flagged), "cells": self.z.shape[1],
                "method": self.method}

    def to_frame(self) -> pd.DataFrame:
        """One row per tested covariate (the ``within_site_balance`` rows of the scorecard)."""
        return pd.DataFrame(list(self.rows), columns=list(ROW_FIELDS))

    def to_dict(self) -> dict[str, Any]:
        return {"method": self.method, "alpha": self.alpha, "reference": self.reference,
                "rows": [dict(r) for r in self.rows], "omnibus": [dict(r) for r in self.omnibus],
                "skipped": [dict(s) for s in self.skipped], "flagged": self.flagged}


ROW_FIELDS = ("covariate", "statistic", "df", "p_value", "p_adjusted", "flagged", "max_abs_z", "worst_site")


def within_site_balance(
    X: Any,
    names: Sequence[str],
    w: Any,
    site: Any,
    alpha: float = ALPHA,
    method: str = DEFAULT_MULTIPLICITY,
    stratum: Any = None,
    permutations: int = 0,
    seed: int = 0,
    clusters: Any = None,
) -> BalanceCheck:
    """Test every covariate column of ``X`` for a within-site difference in arm means (module docstring).

    ``X`` is the (n, p) blind design matrix with column ``names``; ``w`` the 0/1 treatment; ``site`` (and
    optionally ``stratum``) the randomization cells.  ``method`` adjusts across covariates (and across cells
    for the omnibus): ``"holm"`` (Holm 1979) or ``"bh"`` (Benjamini & Hochberg 1995).  With
    ``permutations`` = B > 0 each T_j is referred to its randomization distribution instead of χ²: W is
    permuted within every cell B times (seeded by ``seed``) and p_j = (1 + #{T*_j ≥ T_j})/(1 + B), exact
    for any cell size (Phipson & Smyth 2010).

    ``clusters`` (one label per unit) is for cluster-randomized designs: there the unit of randomization is
    the cluster, so the check compares *cluster means*.  Every cluster becomes one row (its covariate means,
    its arm, its site and stratum) and the same randomization z, χ² and omnibus are computed over the clusters
    of each cell, which is the exact randomization reasoning above applied to the units actually assigned
    (Hayes & Moulton 2017, ch. 9, comparing cluster-level summaries; Imbens & Rubin 2015, ch. 6).  Unit-level
    z would treat m correlated units as m independent draws and flag cluster-level covariates spuriously.
    Pass ``clusters`` only when whole clusters were assigned; with treatment varying within clusters units
    were randomized individually and the unit-level check is the right one.
    """
    if clusters is not None:
        X_c, w_c, site_c, stratum_c = _cluster_rows(X, w, site, stratum, clusters)
        return within_site_balance(X_c, names, w_c, site_c, alpha, method, stratum_c, permutations, seed)
    alpha_level(alpha)
    check_multiplicity(method)
    w = unit_vector("the treatment", w)
    n = w.size
    X = finite_matrix("the covariate matrix", X, n)
    names = [str(v) for v in names]
    if len(names) != X.shape[1]:
        raise SiteproofError(f"{len(names)} covariate names for {X.shape[1]} columns", "pass one name per column of X")
    if not np.all((w == 0) | (w == 1)):
        raise SiteproofError("the treatment must be coded 0/1", "pass the blind treatment vector")
    cells, skipped = _cells(_cell_labels(site, stratum, n), w)
    z = np.full((X.shape[1], len(cells)), np.nan)
    for c, (_, index) in enumerate(cells):
        z[:, c] = randomization_z(X[index], w[index])
    if permutations < 0:
        raise SiteproofError(f"permutations must be ≥ 0, got {permutations}", "use 0 (χ² reference) or e.g. 999")
    exact = permutation_p_values(X, w, cells, z, permutations, seed) if permutations else None
    rows, dropped = _covariate_rows(names, z, [label for label, _ in cells], alpha, method, exact)
    omnibus = _omnibus_rows(X, w, cells, alpha, method)
    frame = pd.DataFrame(z, index=names, columns=[label for label, _ in cells])
    reference = f"permutation ({permutations} draws, seed {seed})" if permutations else "chi-square"
    return BalanceCheck(tuple(rows), tuple(omnibus), tuple(skipped + dropped), frame, float(alpha), method,
                        reference)


def _cluster_rows(X: Any, w: Any, site: Any, stratum: Any, clusters: Any
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """One row per cluster: covariate means, arm, site and stratum (the first unit's; a cluster lies in one
    site).  A cluster with both arms cannot be a unit of assignment and is refused."""
    w = unit_vector("the treatment", w)
    X = finite_matrix("the covariate matrix", X, w.size)
    codes, labels = pd.factorize(np.asarray(clusters, dtype=object), sort=False)
    frame = pd.DataFrame(X).groupby(codes, sort=True).mean()
    arm = pd.Series(w).groupby(codes, sort=True)
    if np.any(arm.min().to_numpy() != arm.max().to_numpy()):
        raise SiteproofError("a cluster holds both arms, so the clusters are not the units of assignment",
                             "check the cluster-level balance only for cluster-randomized designs")
    first = pd.Series(np.arange(w.size)).groupby(codes, sort=True).first().to_numpy()
    site_c = np.asarray(site).astype(str)[first]
    stratum_c = None if stratum is None else np.asarray(stratum).astype(str)[first]
    return frame.to_numpy(dtype=float), arm.first().to_numpy(dtype=float), site_c, stratum_c


def randomization_z(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(x̄₁ − x̄₀)/√(S²·(1/n₁ + 1/n₀)) for every column of ``x`` (one cell), S² the cell's variance (n − 1).

    Under randomization the arms are a random split of the cell, so this is the difference in means over its
    exact randomization SD.  It equals √(n − 1)·r(x, W), r the correlation; a column constant in the cell
    (range 0, judged exactly so rounding noise is not evidence) gives NaN: no variation, nothing to test.
    """
    n1 = float(w.sum())
    n0 = float(w.size - n1)
    diff = x[w == 1].mean(axis=0) - x[w == 0].mean(axis=0)
    s2 = np.where(np.ptp(x, axis=0) == 0, 0.0, x.var(axis=0, ddof=1))
    se = np.sqrt(s2 * (1.0 / n1 + 1.0 / n0))
    return np.where(se > 0, diff / np.where(se > 0, se, 1.0), np.nan)


def combined_p_value(z: np.ndarray) -> tuple[float, int, float]:
    """T = Σ z² over the non-NaN entries, k = their number, p = P(χ²_k ≥ T)."""
    z = np.asarray(z, dtype=float)
    used = z[~np.isnan(z)]
    k = int(used.size)
    if k == 0:
        return float("nan"), 0, float("nan")
    t = float(np.sum(used ** 2))
    return t, k, float(stats.chi2.sf(t, k))


def _cell_labels(site: Any, stratum: Any, n: int) -> np.ndarray:
    labels = site_labels(site, n)
    if stratum is None:
        return labels
    strata = site_labels(stratum, n, "stratum")
    return np.char.add(np.char.add(labels, ":"), strata)


def _cells(labels: np.ndarray, w: np.ndarray) -> tuple[list[tuple[str, np.ndarray]], list[dict[str, Any]]]:
    """The cells with ≥ MIN_PER_ARM units per arm (natural order) and the skipped ones."""
    cells, skipped = [], []
    groups = pd.Series(np.arange(labels.size)).groupby(labels).indices
    for label in site_order(labels):
        index = np.asarray(groups[label])
        n1 = int(w[index].sum())
        n0 = index.size - n1
        if min(n1, n0) >= MIN_PER_ARM:
            cells.append((label, index))
        else:
            skipped.append({"site": label, "n": int(index.size), "reason": FEW_UNITS})
    return cells, skipped


def permutation_p_values(
    X: np.ndarray, w: np.ndarray, cells: list[tuple[str, np.ndarray]], z: np.ndarray, permutations: int,
    seed: int,
) -> np.ndarray:
    """p_j = (1 + #{b: T*_jb ≥ T_j})/(1 + B) with W permuted within each cell (S² and n₁ are invariant)."""
    rng = np.random.default_rng(seed)
    observed = np.nansum(z ** 2, axis=1)
    null = np.zeros((permutations, X.shape[1]))
    for _, index in cells:
        x, t = X[index], w[index]
        n1, n0 = t.sum(), t.size - t.sum()
        s2 = np.where(np.ptp(x, axis=0) == 0, 0.0, x.var(axis=0, ddof=1))
        scale = np.sqrt(s2 * (1.0 / n1 + 1.0 / n0))
        total = x.sum(axis=0)
        for start in range(0, permutations, PERMUTATION_CHUNK):
            draws = rng.permuted(np.tile(t, (min(PERMUTATION_CHUNK, permutations - start), 1)), axis=1)
            treated = draws @ x
            diff = treated / n1 - (total - treated) / n0
            null[start:start + draws.shape[0]] += np.where(scale > 0, diff / np.where(scale > 0, scale, 1.0), 0.0) ** 2
    exceed = np.sum(null >= observed * (1 - 1e-12), axis=0)
    return (1.0 + exceed) / (1.0 + permutations)


def _covariate_rows(
    names: list[str], z: np.ndarray, labels: list[str], alpha: float, method: str, exact: np.ndarray | None
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    tested, dropped = [], []
    for j, name in enumerate(names):
        t, k, p = combined_p_value(z[j])
        p = float(exact[j]) if exact is not None else p
        if k == 0:
            dropped.append({"covariate": name, "reason": NO_VARIATION})
            continue
        absz = np.where(np.isnan(z[j]), -1.0, np.abs(z[j]))
        worst = int(np.argmax(absz))
        tested.append({"covariate": name, "statistic": t, "df": k, "p_value": p,
                       "max_abs_z": float(absz[worst]), "worst_site": labels[worst]})
    adjusted = adjust([r["p_value"] for r in tested], method)
    for row, p_adj in zip(tested, adjusted):
        row["p_adjusted"] = float(p_adj)
        row["flagged"] = bool(p_adj < alpha)
    return [{key: r[key] for key in ROW_FIELDS} for r in tested], dropped


def mahalanobis_balance(x: np.ndarray, w: np.ndarray) -> tuple[float, int]:
    """M = (n − 1)·R² of the least-squares regression of W on the columns of ``x`` (with intercept), r = rank.

    Equal to the Mahalanobis distance of the arm-mean differences in the covariance S_X·(1/n₁ + 1/n₀)
    (Morgan & Rubin 2012); the rank is taken from the SVD of the centred covariates, so collinear columns
    (one-hot blocks) count once.
    """
    xc = x - x.mean(axis=0)
    wc = w - w.mean()
    u, s, _ = np.linalg.svd(xc, full_matrices=False)
    tol = s.max(initial=0.0) * max(xc.shape) * np.finfo(float).eps
    basis = u[:, s > tol]
    fitted = basis @ (basis.T @ wc)
    return float((w.size - 1) * (fitted @ fitted) / (wc @ wc)), int(basis.shape[1])


def _omnibus_rows(
    X: np.ndarray, w: np.ndarray, cells: list[tuple[str, np.ndarray]], alpha: float, method: str
) -> list[dict[str, Any]]:
    rows = []
    for label, index in cells:
        stat, r = mahalanobis_balance(X[index], w[index])
        if r == 0 or index.size < OMNIBUS_UNITS_PER_DF * r:
            continue
        rows.append({"site": label, "n": int(index.size), "statistic": stat, "df": r,
                     "p_value": float(stats.chi2.sf(stat, r))})
    for row, p_adj in zip(rows, adjust([r["p_value"] for r in rows], method)):
        row["p_adjusted"] = float(p_adj)
        row["flagged"] = bool(p_adj < alpha)
    return rows
