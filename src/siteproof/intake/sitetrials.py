"""Design-based estimates of a multi-site randomized trial: what each site's randomization alone identifies.

Within a site (or a site × stratum cell) units were randomized with a known probability, so the
difference in means there is unbiased for the cell's average effect, with the conservative Neyman variance
(Neyman 1923)

    DiM_c = ȳ₁_c − ȳ₀_c,        V_c = s²₁_c / n₁_c + s²₀_c / n₀_c.

The pooled design-based ATE weights the cells by their size among the included units (cells with at
least two units in each arm; the others are excluded and listed):

    τ̂_design = Σ_c (n_c / n)·DiM_c,      Var = Σ_c (n_c / n)²·V_c,      n = Σ_c n_c over included cells.

Its per-unit scores ψ_i = W_i (Y_i − ȳ₁_c)/p̂_c − (1 − W_i)(Y_i − ȳ₀_c)/(1 − p̂_c) + DiM_c, with the
realized share p̂_c = n₁_c / n_c, average exactly to τ̂_design over the included units.  The SE of τ̂_design
itself is the formula above; the scores exist for paired comparisons with blind estimates on the same units
(the pairing keeps their correlation), where SE = sd(ψ_blind − ψ_design)/√n.

The Neyman variance equals the square of the HC2 standard error of the OLS coefficient of Y on W
(Samii & Aronow 2012; Imbens & Kolesár 2016).  With a known assignment rate e the site table also reports
the Horvitz–Thompson estimate (Horvitz & Thompson 1952), the mean of Γ*_i = W_i Y_i / e_i −
(1 − W_i) Y_i / (1 − e_i), and its Hájek (ratio) version.

Clustered units (``clusters``, one label per unit, nested in sites): each cell's variance V_c is the CR2
cluster-robust variance of its difference in means with Satterthwaite degrees of freedom ν_c (Bell &
McCaffrey 2002; Pustejovsky & Tipton 2018; ``core.clusters.cr2_difference_in_means``), the per-site CI is
τ̂ ± t_{ν, 0.975}·SE, and the HT/Hájek SEs use the cluster sums of their per-unit scores (Liang & Zeger 1986).
A site with several cells combines the cells' df by Welch–Satterthwaite, ν = (Σ w_c²V_c)² / Σ (w_c²V_c)²/ν_c.
Without ``clusters`` every figure is the unit-level one above.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any, Iterable

import numpy as np
import pandas as pd
from scipy import stats

from ..core.clusters import cr2_difference_in_means
from ..core.errors import SiteproofError
from ..core.estimates import Estimate, mean_and_se, normal_ci
from ..core.scores import ipw_scores


MIN_PER_ARM = 2
SITE_TABLE_COLUMNS = (
    "site", "n", "n_treated", "n_control", "n_included", "rate_declared", "rate_realized", "binom_p",
    "difference_in_means", "se", "ci_low", "ci_high", "ht", "ht_se", "hajek", "hajek_se", "included",
)
CLUSTER_COLUMNS = ("n_clusters", "clusters_treated", "clusters_control", "df")


# ----------------------------------------------------------------------------------------------------------
# ordering and exact tests of the realized treated count
# ----------------------------------------------------------------------------------------------------------
def natural_key(label: Any) -> tuple[int, float, tuple[Any, ...], str]:
    """Sort key for labels: numbers first in numeric order ("2" before "10"), then text with its digit runs
    compared as numbers ("s2" before "s10")."""
    text = str(label)
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if math.isfinite(value):
        return (0, value, (), text)
    chunks = tuple(int(part) if i % 2 else part for i, part in enumerate(re.split(r"(\d+)", text)))
    return (1, 0.0, chunks, text)


def site_order(labels: Iterable[Any]) -> list[str]:
    """The distinct labels in natural order (the order of every per-site table)."""
    return sorted({str(v) for v in labels}, key=natural_key)


def rate_test(n_treated: int, n: int, rate: float) -> float:
    """Two-sided exact binomial test of ``n_treated`` treated among ``n`` against the declared ``rate``.

    The p-value of scipy.stats.binomtest (the sum of the probabilities of all counts no more likely than
    the observed one), which treats assignment as n independent draws with probability ``rate``.
    """
    return float(stats.binomtest(int(n_treated), int(n), float(rate)).pvalue)


def count_test(n_treated: int, sizes: np.ndarray, rates: np.ndarray) -> float:
    """Exact two-sided test of a treated count that is a sum of independent Binomial(n_c, e_c) counts.

    A site with strata whose declared rates differ has a Poisson-binomial treated count; its distribution
    is the convolution of the cell binomials.  The p-value sums the probabilities of all counts no more
    likely than the observed one (the same rule as :func:`rate_test`, to which it reduces when all the
    rates are equal).
    """
    sizes = np.asarray(sizes, dtype=int)
    rates = np.asarray(rates, dtype=float)
    if np.all(rates == rates[0]):
        return rate_test(n_treated, int(sizes.sum()), float(rates[0]))
    pmf = np.array([1.0])
    for size, rate in zip(sizes, rates):
        pmf = np.convolve(pmf, stats.binom.pmf(np.arange(size + 1), size, rate))
    observed = pmf[int(n_treated)]
    return float(min(1.0, pmf[pmf <= observed * (1 + 1e-7)].sum()))


# ----------------------------------------------------------------------------------------------------------
# difference in means
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Arms:
    """Arm sizes, means and sample variances (NaN below two units) of one group of units."""

    n1: int
    n0: int
    mean1: float
    mean0: float
    var1: float
    var0: float

    @classmethod
    def of(cls, y: np.ndarray, w: np.ndarray) -> "_Arms":
        y1, y0 = y[w == 1], y[w == 0]
        return cls(
            y1.size, y0.size,
            float(y1.mean()) if y1.size else math.nan,
            float(y0.mean()) if y0.size else math.nan,
            float(y1.var(ddof=1)) if y1.size >= 2 else math.nan,
            float(y0.var(ddof=1)) if y0.size >= 2 else math.nan,
        )

    @property
    def n(self) -> int:
        return self.n1 + self.n0

    @property
    def dim(self) -> float:
        return self.mean1 - self.mean0

    @property
    def neyman_var(self) -> float:
        """s²₁/n₁ + s²₀/n₀ (Neyman 1923)."""
        return self.var1 / self.n1 + self.var0 / self.n0 if self.n1 and self.n0 else math.nan

    @property
    def usable(self) -> bool:
        return self.n1 >= MIN_PER_ARM and self.n0 >= MIN_PER_ARM


def _as_arrays(y: Any, w: Any) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y, dtype=float)
    w = np.asarray(w).astype(np.int8)
    if y.shape != w.shape or y.ndim != 1:
        raise ValueError("y and w must be 1-d arrays of the same length")
    return y, w


def _dim_scores(y: np.ndarray, w: np.ndarray, arms: _Arms) -> np.ndarray:
    """ψ_i = W(Y − ȳ₁)/p̂ − (1 − W)(Y − ȳ₀)/(1 − p̂) + τ̂ with p̂ = n₁/n; mean(ψ) = τ̂ exactly."""
    share = arms.n1 / arms.n
    return np.where(w == 1, (y - arms.mean1) / share, -(y - arms.mean0) / (1.0 - share)) + arms.dim


def difference_in_means(y: Any, w: Any, name: str = "difference_in_means") -> Estimate:
    """ȳ₁ − ȳ₀ with the Neyman SE √(s²₁/n₁ + s²₀/n₀) (Neyman 1923) and its per-unit influence scores.

    The scores ψ_i = W(Y − ȳ₁)/p̂ − (1 − W)(Y − ȳ₀)/(1 − p̂) + τ̂ average to τ̂; the SE is the formula, which
    equals the HC2 standard error of OLS of Y on W (Imbens & Kolesár 2016).
    """
    y, w = _as_arrays(y, w)
    arms = _Arms.of(y, w)
    if arms.n1 == 0 or arms.n0 == 0:
        raise ValueError("the difference in means needs units in both arms")
    return Estimate.from_value(name, arms.dim, math.sqrt(arms.neyman_var), scores=_dim_scores(y, w, arms))


def naive_ate(y: Any, w: Any) -> Estimate:
    """The naive pooled difference in means over all units, ignoring sites (name ``"naive"``)."""
    return difference_in_means(y, w, name="naive")


# ----------------------------------------------------------------------------------------------------------
# cells (site, or site × stratum)
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Cell:
    site: str
    stratum: str | None
    index: np.ndarray
    arms: _Arms

    @property
    def label(self) -> str:
        """"SITE", or "SITE:STRATUM" with strata."""
        return self.site if self.stratum is None else f"{self.site}:{self.stratum}"


def _cells(y: np.ndarray, w: np.ndarray, site: np.ndarray, stratum: np.ndarray | None) -> list[_Cell]:
    """The randomization cells (sites, or site × stratum) in natural order."""
    keys = [site] if stratum is None else [site, stratum]
    groups = pd.DataFrame(dict(enumerate(keys))).groupby(list(range(len(keys))), sort=False).indices
    out = []
    for key in sorted(groups, key=lambda k: tuple(map(natural_key, k if isinstance(k, tuple) else (k,)))):
        parts = key if isinstance(key, tuple) else (key,)
        index = np.asarray(groups[key])
        stratum_label = str(parts[1]) if len(parts) > 1 else None
        out.append(_Cell(str(parts[0]), stratum_label, index, _Arms.of(y[index], w[index])))
    return out


def _site_dim(cells: list[_Cell]) -> tuple[float, float, int]:
    """Cell-size-weighted DiM of a site over its included cells, its variance and the included count."""
    used = [c for c in cells if c.arms.usable]
    n_inc = sum(c.arms.n for c in used)
    if not n_inc:
        return math.nan, math.nan, 0
    est = sum(c.arms.n / n_inc * c.arms.dim for c in used)
    var = sum((c.arms.n / n_inc) ** 2 * c.arms.neyman_var for c in used)
    return est, var, n_inc


def _cell_cr2(y: np.ndarray, w: np.ndarray, clusters: np.ndarray, cell: _Cell) -> tuple[float, float]:
    """CR2 variance and Satterthwaite df of one cell's DiM (Bell & McCaffrey 2002); NaN when CR2 is undefined
    (an arm held by a single cluster)."""
    try:
        fit = cr2_difference_in_means(y[cell.index], w[cell.index], clusters[cell.index])
    except SiteproofError:
        return math.nan, math.nan
    return fit.se ** 2, fit.df


def _site_dim_clustered(
    y: np.ndarray, w: np.ndarray, clusters: np.ndarray, cells: list[_Cell]
) -> tuple[float, float, float, int]:
    """Like :func:`_site_dim` with each cell's CR2 variance, plus the Welch–Satterthwaite combined df
    ν = (Σ w_c²V_c)² / Σ (w_c²V_c)²/ν_c (one cell: its own ν)."""
    est, _, n_inc = _site_dim(cells)
    if not n_inc:
        return math.nan, math.nan, math.nan, 0
    parts = [((c.arms.n / n_inc) ** 2, *_cell_cr2(y, w, clusters, c)) for c in cells if c.arms.usable]
    var = sum(wt * v for wt, v, _ in parts)
    denominator = sum((wt * v) ** 2 / df for wt, v, df in parts)
    df = var ** 2 / denominator if denominator > 0 else math.nan
    return est, var, df, n_inc


def _cluster_counts(w: np.ndarray, clusters: np.ndarray) -> dict[str, int]:
    """Clusters in all, and those with a treated / a control unit (a mixed cluster counts in both)."""
    labels = pd.Series(clusters)
    return {"n_clusters": int(labels.nunique()), "clusters_treated": int(labels[w == 1].nunique()),
            "clusters_control": int(labels[w == 0].nunique())}


def _hajek(y: np.ndarray, w: np.ndarray, e: np.ndarray, clusters: Any = None) -> tuple[float, float]:
    """Hájek estimate Σ(WY/e)/Σ(W/e) − Σ((1−W)Y/(1−e))/Σ((1−W)/(1−e)) and SE sd(ψ)/√n of its linearization
    ψ_i = (W/e)(Y − μ̂₁)/mean(W/e) − ((1−W)/(1−e))(Y − μ̂₀)/mean((1−W)/(1−e)) + τ̂ (mean(ψ) = τ̂)."""
    a1, a0 = w / e, (1 - w) / (1 - e)
    mu1, mu0 = (a1 * y).sum() / a1.sum(), (a0 * y).sum() / a0.sum()
    psi = a1 * (y - mu1) / a1.mean() - a0 * (y - mu0) / a0.mean() + (mu1 - mu0)
    return mean_and_se(psi, clusters)


def _weighted_estimates(y: np.ndarray, w: np.ndarray, e: np.ndarray | None, clusters: Any = None
                        ) -> dict[str, float]:
    """Horvitz–Thompson and Hájek estimates of one site with known rates (NaN if not computable); with
    ``clusters`` their SEs are the cluster-sum SEs of the per-unit scores (Liang & Zeger 1986)."""
    nan = {"ht": math.nan, "ht_se": math.nan, "hajek": math.nan, "hajek_se": math.nan}
    if e is None or not w.size or not np.all((e > 0) & (e < 1)) or w.min() == w.max():
        return nan
    ht, ht_se = mean_and_se(ipw_scores(y, w, e), clusters)
    hajek, hajek_se = _hajek(y, w.astype(float), e, clusters)
    return {"ht": ht, "ht_se": ht_se, "hajek": hajek, "hajek_se": hajek_se}


def _included_index(cells: list[_Cell]) -> np.ndarray:
    """Indices of the units in the cells with ≥ 2 units per arm (the units the difference in means uses)."""
    used = [c.index for c in cells if c.arms.usable]
    return np.concatenate(used) if used else np.empty(0, dtype=int)


def _declared_columns(
    w: np.ndarray, index: np.ndarray, cells: list[_Cell], declared: np.ndarray | None
) -> tuple[float, float]:
    """Declared rate of a site (its expected treated share) and the exact p-value of its treated count."""
    if declared is None or not np.all(np.isfinite(declared[index])):
        return math.nan, math.nan
    sizes = np.array([c.arms.n for c in cells])
    rates = np.array([float(declared[c.index[0]]) for c in cells])
    n_treated = int(w[index].sum())
    return float((sizes * rates).sum() / sizes.sum()), count_test(n_treated, sizes, rates)


def site_table(
    y: Any, w: Any, site: Any, known_rate: Any = None, declared: Any = None, stratum: Any = None,
    clusters: Any = None,
) -> pd.DataFrame:
    """Per-site design table: sizes, declared vs realized rate, DiM with Neyman SE and 95% CI, HT and Hájek.

    ``known_rate`` and ``declared`` are per-unit arrays (``declared`` NaN where no rate was declared,
    constant within a cell).  With
    a stratum, the site's DiM is the cell-size-weighted DiM over its cells with ≥ 2 units per arm and its
    variance Σ (n_c/n_s)² V_c; ``binom_p`` is the exact test of the site's treated count (a sum of cell
    binomials, :func:`count_test`).  A site is ``included`` when at least one of its cells has ≥ 2 units in
    each arm; HT/Hájek (with the known rate, SE from the per-unit scores) are reported for those sites and
    use the same units as the difference in means (those of the included cells, ``n_included`` of them).

    With ``clusters`` (one label per unit) the SE is CR2, the CI uses the t quantile at the Satterthwaite df
    (column ``df``), HT/Hájek SEs are cluster-robust, and the columns ``n_clusters``, ``clusters_treated``,
    ``clusters_control`` count the site's clusters per arm.  Without it the table is the unit-level one.
    """
    y, w = _as_arrays(y, w)
    site = np.asarray(site).astype(str).astype(object)
    cl = None if clusters is None else np.asarray(clusters, dtype=object)
    strata = None if stratum is None else np.asarray(stratum).astype(str).astype(object)
    e = None if known_rate is None else np.asarray(known_rate, dtype=float)
    dec = None if declared is None else np.asarray(declared, dtype=float)
    cells = _cells(y, w, site, strata)
    rows = []
    for label in site_order(site):
        mine = [c for c in cells if c.site == label]
        index = np.concatenate([c.index for c in mine])
        arms = _Arms.of(y[index], w[index])
        extra: dict[str, Any] = {}
        if cl is None:
            est, var, n_inc = _site_dim(mine)
            se = math.sqrt(var) if np.isfinite(var) else math.nan
            low, high = normal_ci(est, se) if np.isfinite(se) else (math.nan, math.nan)
        else:
            est, var, df, n_inc = _site_dim_clustered(y, w, cl, mine)
            se = math.sqrt(var) if np.isfinite(var) else math.nan
            low, high = _t_ci(est, se, df)
            extra = {**_cluster_counts(w[index], cl[index]), "df": df}
        rate_declared, binom_p = _declared_columns(w, index, mine, dec)
        used = _included_index(mine)
        weighted = _weighted_estimates(y[used], w[used], None if e is None else e[used],
                                       None if cl is None else cl[used])
        rows.append({
            "site": label, "n": arms.n, "n_treated": arms.n1, "n_control": arms.n0, "n_included": n_inc,
            "rate_declared": rate_declared, "rate_realized": arms.n1 / arms.n, "binom_p": binom_p,
            "difference_in_means": est, "se": se, "ci_low": low, "ci_high": high, **weighted,
            "included": bool(n_inc), **extra,
        })
    columns = list(SITE_TABLE_COLUMNS) + ([] if cl is None else list(CLUSTER_COLUMNS))
    return pd.DataFrame(rows, columns=columns)


def _t_ci(est: float, se: float, df: float, level: float = 0.95) -> tuple[float, float]:
    """est ± t_{df, (1+level)/2}·se (NaN when se or df is not finite)."""
    if not (np.isfinite(se) and np.isfinite(df) and df > 0):
        return math.nan, math.nan
    half = float(stats.t.ppf(0.5 + level / 2.0, df)) * se
    return est - half, est + half


# ----------------------------------------------------------------------------------------------------------
# pooled design-based ATE
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class DesignATE:
    """The pooled design-based ATE over the included units.

    ``estimate.scores`` holds ψ_i for the included units only, in data order (so mean(scores) equals the
    estimate); ``included`` is the length-n mask that selects those units.  ``excluded_sites`` lists the
    excluded cells: site labels, or "SITE:STRATUM" when a stratum was given.
    """

    estimate: Estimate
    included: np.ndarray
    excluded_sites: tuple[str, ...]
    by_site: pd.DataFrame

    @property
    def n_included(self) -> int:
        return int(self.included.sum())

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: estimate, se, ci, estimand, n_included, excluded_sites."""
        return {**self.estimate.to_dict(), "n_included": self.n_included,
                "excluded_sites": list(self.excluded_sites)}


def design_ate(y: Any, w: Any, site: Any, stratum: Any = None, clusters: Any = None) -> DesignATE:
    """τ̂ = Σ_c (n_c/n)·DiM_c over cells with ≥ 2 units per arm, SE = √(Σ_c (n_c/n)²·V_c) (Neyman 1923).

    Cells are sites, or site × stratum with a stratum (then each site's estimate is the cell-size-weighted
    DiM).  n counts the included units only.  With ``clusters`` V_c is the cell's CR2 variance (Bell &
    McCaffrey 2002); a cell whose CR2 is undefined (an arm in one cluster) falls back to the cluster-sum
    variance of its per-unit scores, which is then, like the unit one, only approximate.  Raises
    SiteproofError when no cell qualifies.
    """
    y, w = _as_arrays(y, w)
    site = np.asarray(site).astype(str).astype(object)
    strata = None if stratum is None else np.asarray(stratum).astype(str).astype(object)
    cells = _cells(y, w, site, strata)
    used = [c for c in cells if c.arms.usable]
    excluded = tuple(c.label for c in cells if not c.arms.usable)
    if not used:
        raise SiteproofError(
            "no site has at least 2 units in each arm, so the design-based estimate is undefined",
            "check that --site and --treatment name the right columns",
        )
    included = np.zeros(y.size, dtype=bool)
    scores = np.empty(y.size)
    n = sum(c.arms.n for c in used)
    est = sum(c.arms.n / n * c.arms.dim for c in used)
    for c in used:
        included[c.index] = True
        scores[c.index] = _dim_scores(y[c.index], w[c.index], c.arms)
    if clusters is None:
        var = sum((c.arms.n / n) ** 2 * c.arms.neyman_var for c in used)
    else:
        cl = np.asarray(clusters, dtype=object)
        var = sum((c.arms.n / n) ** 2 * _cell_variance(y, w, cl, c, scores) for c in used)
    note = ""
    if excluded:
        note = f"excludes {', '.join(excluded)} (fewer than {MIN_PER_ARM} units in an arm)"
    estimate = Estimate.from_value("design", est, math.sqrt(var), scores=scores[included], note=note)
    return DesignATE(estimate, included, excluded, site_table(y, w, site, stratum=strata, clusters=clusters))


def _cell_variance(y: np.ndarray, w: np.ndarray, clusters: np.ndarray, cell: _Cell, scores: np.ndarray) -> float:
    """The cell's CR2 variance, or (CR2 undefined) the squared cluster-sum SE of its DiM scores."""
    var, _ = _cell_cr2(y, w, clusters, cell)
    if np.isfinite(var):
        return var
    return mean_and_se(scores[cell.index], clusters[cell.index])[1] ** 2
