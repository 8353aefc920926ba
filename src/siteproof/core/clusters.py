"""Clustered units: standard errors, resampling and design checks when units come in clusters within sites.

Many multi-site trials assign whole clusters inside each site (classrooms within schools) or carry several rows
per person.  Units of one cluster share a cluster effect, so the unit-level formulas (sd(ψ)/√n, the Neyman
s²₁/n₁ + s²₀/n₀) understate the variance by roughly the design effect 1 + (m − 1)·ICC (Kish 1965).  This module
holds the cluster-level counterparts, to be used wherever a unit-level SE is computed:

* :func:`cluster_mean_se` — SE of a mean of per-unit scores from cluster sums (Liang & Zeger 1986);
* :func:`cr2_difference_in_means` — a site's difference in means with the CR2 bias-reduced cluster-robust
  variance and its Satterthwaite degrees of freedom (Bell & McCaffrey 2002; Pustejovsky & Tipton 2018);
* :func:`cluster_bootstrap_indices`, :func:`cluster_half_samples` — resampling whole clusters;
* :func:`check_nested`, :func:`cluster_design`, :func:`cluster_level_columns` — checks on the cluster labels,
  the assignment pattern and the covariates.

Cluster labels may be any hashable values (numbers or text); they must be unique across sites.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterator, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from .checks import finite_matrix, unit_vector
from .errors import SiteproofError

_LABEL_FIX = "give every row a cluster label (a classroom, a person id, ...)"


def cluster_codes(clusters: Any, n: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Integer codes 0..G−1 (in order of first appearance) and the G labels; missing labels are refused."""
    values = np.asarray(clusters, dtype=object)
    if values.ndim != 1:
        raise SiteproofError(f"the cluster labels must be one-dimensional, got shape {values.shape}", _LABEL_FIX)
    if n is not None and values.size != n:
        raise SiteproofError(f"{values.size} cluster labels for {n} units", "pass one cluster label per unit")
    codes, labels = pd.factorize(values, sort=False)
    if np.any(codes < 0):
        raise SiteproofError(f"{int(np.sum(codes < 0))} unit(s) have no cluster label", _LABEL_FIX)
    return codes.astype(np.int64), np.asarray(labels, dtype=object)


def cluster_mean_se(scores: Any, clusters: Any) -> float:
    """SE of mean(ψ) when units are correlated within clusters, from the cluster sums of the deviations.

    V = G/(G − 1) · Σ_g (Σ_{i∈g} (ψ_i − ψ̄))² / n²  (Liang & Zeger 1986, the sandwich for a mean).  The factor
    G/(G − 1) is the common small-sample correction: for G clusters of equal size with i.i.d. totals T_g,
    E Σ_g (T_g − T̄)² = (G − 1)·Var(T), so the factor makes V unbiased; with one unit per cluster V is exactly
    s²/n with the n − 1 divisor, the unit-level formula.  NaN with fewer than two clusters.
    """
    psi = unit_vector("scores", scores)
    codes, labels = cluster_codes(clusters, psi.size)
    g = labels.size
    if g < 2:
        return float("nan")
    totals = np.bincount(codes, weights=psi - psi.mean(), minlength=g)
    return float(np.sqrt(g / (g - 1) * np.sum(totals ** 2)) / psi.size)


@dataclass(frozen=True)
class ClusterDifference:
    """A site's difference in means ȳ₁ − ȳ₀ with its CR2 cluster-robust SE, degrees of freedom and t interval.

    ``n_clusters`` counts all clusters, ``clusters_treated``/``clusters_control`` those with at least one
    treated / control unit (a cluster with both arms counts in both).
    """

    estimate: float
    se: float
    df: float
    ci: tuple[float, float]
    n: int
    n_clusters: int
    clusters_treated: int
    clusters_control: int

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready numbers."""
        return {"estimate": self.estimate, "se": self.se, "df": self.df, "ci": list(self.ci), "n": self.n,
                "n_clusters": self.n_clusters, "clusters_treated": self.clusters_treated,
                "clusters_control": self.clusters_control}


def cr2_difference_in_means(y: Any, w: Any, clusters: Any, level: float = 0.95) -> ClusterDifference:
    """ȳ₁ − ȳ₀ with the CR2 variance (Bell & McCaffrey 2002) and Satterthwaite df, for one site.

    The difference in means is the OLS slope of Y on (1, W).  CR2 (Pustejovsky & Tipton 2018, eq. 5, working
    model Φ = I) is V = Σ_g (a_g' A_g e_g)² with a_i = W_i/n₁ − (1 − W_i)/n₀ the OLS weights of the slope,
    e_i = Y_i − ȳ_{W_i}, A_g = (I − H_gg)^(−1/2) and H the hat matrix.  For (1, W) the hat matrix is
    H_ij = [W_i = W_j]/n_{W_i}, so inside cluster g (t_g treated, c_g control units) I − H_gg has eigenvalue
    1 − t_g/n₁ on the treated indicator, 1 − c_g/n₀ on the control indicator and 1 elsewhere, which gives

        V = Σ_g ( E_g1 / (n₁ √(1 − t_g/n₁)) − E_g0 / (n₀ √(1 − c_g/n₀)) )²,   E_ga = Σ_{i∈g, W_i=a} e_i.

    With one unit per cluster this is HC2 = s²₁/n₁ + s²₀/n₀ (Imbens & Kolesár 2016).  Degrees of freedom:
    V = ε'(Σ_g q_g q_g')ε with q_g = (I − H)_{·g} A_g a_g; under the working model ε ~ N(0, σ²I) Satterthwaite's
    approximation gives ν = (Σ_g q_g'q_g)² / Σ_{g,h} (q_g'q_h)² (Bell & McCaffrey 2002, section 3), computed
    here from q_g'q_h = δ_gh u_g'u_g − β_g'β_h with u_g = A_g a_g and β_g = (t_g α_g1/n₁^1.5, c_g α_g0/n₀^1.5),
    α_ga = (1 − n_ga/n_a)^(−1/2).  The interval is estimate ± t_{ν, 1−α/2}·SE.  For a cluster-randomized site
    with equal cluster sizes and G/2 clusters per arm, ν = G − 2.
    """
    y = unit_vector("outcome", y)
    w = unit_vector("treatment", w, y.size)
    if not np.all((w == 0) | (w == 1)):
        raise SiteproofError("the treatment must be coded 0/1", "code treated as 1 and control as 0")
    codes, labels = cluster_codes(clusters, y.size)
    g = labels.size
    treated = w == 1
    n1, n0 = int(treated.sum()), int((~treated).sum())
    if n1 == 0 or n0 == 0:
        raise SiteproofError("the difference in means needs units in both arms", "check the treatment column")
    e = y - np.where(treated, y[treated].mean(), y[~treated].mean())
    t_g = np.bincount(codes, weights=treated.astype(float), minlength=g)
    c_g = np.bincount(codes, weights=(~treated).astype(float), minlength=g)
    if np.any(t_g >= n1) or np.any(c_g >= n0):
        raise SiteproofError("one cluster holds every unit of an arm, so the CR2 variance is undefined",
                             "the cluster-robust SE needs at least two clusters with units in each arm")
    alpha1, alpha0 = 1.0 / np.sqrt(1.0 - t_g / n1), 1.0 / np.sqrt(1.0 - c_g / n0)
    e1 = np.bincount(codes, weights=np.where(treated, e, 0.0), minlength=g)
    e0 = np.bincount(codes, weights=np.where(treated, 0.0, e), minlength=g)
    variance = float(np.sum((alpha1 * e1 / n1 - alpha0 * e0 / n0) ** 2))
    uu = t_g * alpha1 ** 2 / n1 ** 2 + c_g * alpha0 ** 2 / n0 ** 2
    beta = np.column_stack([t_g * alpha1 / n1 ** 1.5, c_g * alpha0 / n0 ** 1.5])
    bb = np.sum(beta ** 2, axis=1)
    trace = float(np.sum(uu - bb))
    frobenius = float(np.sum(uu ** 2) - 2.0 * np.sum(uu * bb) + np.sum((beta.T @ beta) ** 2))
    df = trace ** 2 / frobenius
    estimate = float(y[treated].mean() - y[~treated].mean())
    se = float(np.sqrt(variance))
    half = float(stats.t.ppf(0.5 + level / 2.0, df)) * se
    return ClusterDifference(estimate, se, float(df), (estimate - half, estimate + half), int(y.size), g,
                             int(np.sum(t_g > 0)), int(np.sum(c_g > 0)))


def _members(codes: np.ndarray, g: int) -> list[np.ndarray]:
    """Unit indices of each cluster 0..g−1, ascending."""
    order = np.argsort(codes, kind="stable")
    return np.split(order, np.cumsum(np.bincount(codes, minlength=g))[:-1])


def cluster_bootstrap_indices(clusters: Any, n_boot: int, seed: int) -> Iterator[np.ndarray]:
    """Yield ``n_boot`` cluster-bootstrap samples: unit indices of G clusters drawn with replacement.

    Each replicate draws G cluster labels uniformly with replacement (seeded ``numpy.random.default_rng``) and
    returns the indices of all their units, cluster after cluster, so whole clusters are resampled (Field &
    Welsh 2007, the "cluster bootstrap"); a cluster drawn twice appears twice.  For G equal-sized clusters the
    bootstrap variance of a mean is (G − 1)/G times the square of :func:`cluster_mean_se`.
    """
    codes, labels = cluster_codes(clusters)
    _check_replicates(n_boot, labels.size, 2)
    members = _members(codes, labels.size)
    rng = np.random.default_rng(seed)
    for _ in range(int(n_boot)):
        yield np.concatenate([members[c] for c in rng.integers(0, labels.size, labels.size)])


def cluster_half_samples(clusters: Any, n_boot: int, seed: int) -> Iterator[np.ndarray]:
    """Yield ``n_boot`` half-samples by cluster: the units of ⌊G/2⌋ clusters drawn without replacement, sorted.

    The cluster analogue of the unit half-sample bootstrap: with h = G/2 of G equal-sized clusters drawn
    without replacement, a mean over the half-sample varies around the full-sample mean with variance
    S²_c (1/h − 1/G) = S²_c/G (finite-population correction; S²_c the variance of the cluster means), which is
    the square of :func:`cluster_mean_se`, so the SD of the replicates estimates the full-sample SE.
    """
    codes, labels = cluster_codes(clusters)
    _check_replicates(n_boot, labels.size, 4)
    members = _members(codes, labels.size)
    rng = np.random.default_rng(seed)
    for _ in range(int(n_boot)):
        chosen = rng.choice(labels.size, labels.size // 2, replace=False)
        yield np.sort(np.concatenate([members[c] for c in chosen]))


def _check_replicates(n_boot: Any, n_clusters: int, minimum: int) -> None:
    """n_boot ≥ 2 and at least ``minimum`` clusters to resample."""
    if isinstance(n_boot, bool) or not isinstance(n_boot, (int, np.integer)) or n_boot < 2:
        raise SiteproofError(f"n_boot must be an integer ≥ 2, got {n_boot!r}", "use e.g. n_boot=200")
    if n_clusters < minimum:
        raise SiteproofError(f"resampling clusters needs at least {minimum} clusters, got {n_clusters}",
                             "use the unit-level SE, or data with more clusters")


def check_nested(clusters: Any, site: Any) -> None:
    """Raise SiteproofError unless every cluster lies in one site (naming the first offending cluster)."""
    codes, labels = cluster_codes(clusters)
    site_codes, site_labels = cluster_codes(site, codes.size)
    pairs = np.unique(np.column_stack([codes, site_codes]), axis=0)
    per_cluster = np.bincount(pairs[:, 0], minlength=labels.size)
    bad = np.flatnonzero(per_cluster > 1)
    if bad.size:
        first = int(bad[0])
        names = ", ".join(str(site_labels[s]) for s in pairs[pairs[:, 0] == first, 1][:3])
        raise SiteproofError(
            f"cluster {labels[first]!r} has units in {int(per_cluster[first])} sites ({names}); "
            f"{bad.size} cluster(s) span several sites",
            "clusters must be nested in sites: make the labels unique across sites, e.g. combine site and cluster",
        )


@dataclass(frozen=True)
class ClusterDesign:
    """How treatment relates to the clusters, per site.

    ``cluster_randomized``: every cluster has a single arm and some cluster has more than one unit (whole
    clusters were assigned); otherwise treatment varies within clusters and the clusters only describe the
    correlation of the outcomes.  ``per_site`` maps site → (clusters all treated, clusters all control,
    clusters with both arms); ``sizes`` is (smallest, median, largest) cluster size.
    """

    cluster_randomized: bool
    n_clusters: int
    per_site: dict[str, tuple[int, int, int]]
    sizes: tuple[int, float, int]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary."""
        return {"cluster_randomized": self.cluster_randomized, "n_clusters": self.n_clusters,
                "per_site": {s: list(v) for s, v in self.per_site.items()}, "sizes": list(self.sizes)}


def cluster_design(w: Any, clusters: Any, site: Any) -> ClusterDesign:
    """Whether treatment is constant within clusters, and the clusters per arm in each site (nesting checked)."""
    check_nested(clusters, site)
    codes, labels = cluster_codes(clusters)
    w = unit_vector("treatment", w, codes.size)
    site_codes, site_labels = cluster_codes(site, codes.size)
    g = labels.size
    size = np.bincount(codes, minlength=g)
    treated = np.bincount(codes, weights=w, minlength=g)
    cluster_site = np.zeros(g, dtype=np.int64)
    cluster_site[codes] = site_codes
    all_treated, all_control = treated == size, treated == 0
    mixed = ~(all_treated | all_control)
    per_site = {
        str(label): (int(np.sum(all_treated & (cluster_site == s))), int(np.sum(all_control & (cluster_site == s))),
                     int(np.sum(mixed & (cluster_site == s))))
        for s, label in enumerate(site_labels)
    }
    return ClusterDesign(bool(not mixed.any() and size.max() > 1), g, per_site,
                         (int(size.min()), float(np.median(size)), int(size.max())))


@dataclass(frozen=True)
class ClusterColumns:
    """Covariates by the level they vary at: within clusters, between clusters of a site, or only between sites."""

    unit_level: tuple[str, ...]
    cluster_level: tuple[str, ...]
    site_level: tuple[str, ...]


def cluster_level_columns(X: Any, clusters: Any, site: Any, names: Sequence[str] | None = None) -> ClusterColumns:
    """Sort the columns of X into unit-level, cluster-level (to be kept) and site-level (copies of the site).

    A column is *site-level* when it is constant within every site, *cluster-level* when it is constant within
    every cluster but differs between two clusters of some site, and *unit-level* otherwise (exact equality of
    the float values; nesting is checked first).
    """
    check_nested(clusters, site)
    codes, labels = cluster_codes(clusters)
    X = finite_matrix("covariates", X, codes.size)
    site_codes, site_labels = cluster_codes(site, codes.size)
    names = [f"x{j}" for j in range(X.shape[1])] if names is None else [str(v) for v in names]
    if len(names) != X.shape[1]:
        raise SiteproofError(f"{len(names)} names for {X.shape[1]} covariates", "pass one name per column")
    within_cluster = _constant_within(X, codes, labels.size)
    within_site = _constant_within(X, site_codes, site_labels.size)
    levels: dict[str, list[str]] = {"unit": [], "cluster": [], "site": []}
    for j, name in enumerate(names):
        key = "site" if within_site[j] else "cluster" if within_cluster[j] else "unit"
        levels[key].append(name)
    return ClusterColumns(tuple(levels["unit"]), tuple(levels["cluster"]), tuple(levels["site"]))


def _constant_within(X: np.ndarray, codes: np.ndarray, g: int) -> np.ndarray:
    """Per column: True when every group 0..g−1 has a single value (max = min)."""
    order = np.argsort(codes, kind="stable")
    starts = np.concatenate([[0], np.cumsum(np.bincount(codes, minlength=g))[:-1]])
    sorted_x = X[order]
    return np.all(np.maximum.reduceat(sorted_x, starts, axis=0) == np.minimum.reduceat(sorted_x, starts, axis=0),
                  axis=0)
