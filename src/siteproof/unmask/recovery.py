"""How well did the blind analysis recover the assignment mechanism? The learned ê judged against the known rates.

With the site hidden, the blind propensity targets the *mixture* e(x) = P(W = 1 | X = x) = E[e_S | X = x]
(averaged over the sites a unit with covariates x can come from), not the site rate e_S.  Three facts follow and drive every figure here:

* **Calibration is the right yardstick.**  For a correct ê (a function of x only),
      E[e_S | ê(X)] = E[ E[e_S | X] | ê(X) ] = E[e(X) | ê(X)] = ê(X),
  so the mean known rate within bins of ê equals the bin's mean ê, and the least-squares line of e_S on ê has
  slope 1 and intercept 0.  Since E[W | X, S] = e_S, the same holds with W in place of e_S; the known rate is
  the lower-variance target (it removes the Bernoulli noise of W).
* **RMSE has a floor.**  For any ê that is a function of x,
      E[(ê(X) − e_S)²] = E[(ê(X) − e(X))²] + E[Var(e_S | X)],
  so even the perfect ê has RMSE √E[Var(e_S | X)] > 0 unless the covariates reveal the site.  We estimate the
  floor from a cross-validated classifier of the site: with p̂_s(x) its out-of-fold class probabilities and
  r_s the site rates, ẽ(x) = Σ_s p̂_s(x)·r_s and floor² ≈ mean_i Σ_s p̂_s(x_i)(r_s − ẽ(x_i))².
* **The verdict: calibrated and informative.**  The old slope criterion (slope of e_S on ê within 0.1 of
  1) cannot be met by a good learner: the slope of a noisy but unbiased ê = e(X) + u is diluted to the
  reliability Var(e)/(Var(e) + Var(u)) < 1 however large n is, while its SE shrinks.  Calibration alone
  cannot tell a good learner from a useless one either (a constant ê = mean rate is calibrated and has no
  discrimination; Van Calster et al. 2016, 2019).  So ê is *recovered* when both hold:
  1. calibration within δ = :data:`CALIBRATION_MARGIN`: the integrated calibration error over the decile
     bins b of ê, ECE = Σ_b (n_b/n)·|d_b| with d_b = mean e_S − mean ê in b (the binned form of the
     integrated calibration index of Austin & Steyerberg 2019), has its one-sided 95 % upper bound
     ECE + z_{0.95}·√(Σ_b (n_b/n)² SE_b²) ≤ δ (an equivalence-style test, Schuirmann 1987; SE_b =
     sd(e_S in b)/√n_b, the signs of d_b held fixed);
  2. information: the lower end of the calibration slope's 95 % CI is ≥ :data:`RELIABILITY_MIN`.  The slope
     is the share of the spread of ê that is real (the reliability above), so ≥ 0.5 says ê has more signal
     than noise; an ê fit on noise has slope ≈ 0, a constant ê none.
  The blind target e(X) = E[e_S | X] meets both whenever the covariates carry information on the site.  The
  verdict certifies a calibrated, informative ê, not the sharpest possible one: read the RMSE beside its floor
  for that.
* **How much of the site could the blind side see?**  Cross-validated accuracy of predicting the site from
  the covariates, against the majority share (the accuracy of always guessing the largest site).

References: calibration of propensity models in the sense of a reliability diagram (e.g. Niculescu-Mizil &
Caruana 2005); the calibration hierarchy (Van Calster et al. 2016, J. Clin. Epidemiol. 74:167–176) and
"calibration: the Achilles heel" (Van Calster et al. 2019, BMC Medicine 17:230); the integrated calibration
index (Austin & Steyerberg 2019, Stat. Med. 38:4051–4065); Schuirmann (1987) equivalence tests; random forests (Breiman 2001) for the site classifier; Kish (1965) effective sample size
n_eff = (Σw)²/Σw²; HC2 standard errors (MacKinnon & White 1985; Imbens & Kolesár 2016); McFadden (1974)
pseudo-R² for the site classifier.

Clustered units (``clusters=``, one label per unit, default None = unit-level figures unchanged): every SE is
cluster-robust.  Bin, site and accuracy SEs are ``core.clusters.cluster_mean_se`` of the per-unit values (the
sandwich for a mean, Liang & Zeger 1986); the calibration line's SEs are the CR2 cluster sandwich of OLS,
V = (X'X)⁻¹ Σ_g X_g'A_g e_g e_g'A_g X_g (X'X)⁻¹ with A_g = (I − H_gg)^(−1/2) (Bell & McCaffrey 2002; Cameron
& Miller 2015), the cluster counterpart of the HC2 used without clusters (equal to it with one unit per
cluster).  The RMSE and its floor are point figures and carry no SE.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import stats
from sklearn.base import ClassifierMixin, clone
from sklearn.ensemble import RandomForestClassifier
from sklearn.model_selection import KFold, StratifiedKFold, cross_val_predict

from ..core.checks import at_least, in_unit_interval, same_length
from ..core.clusters import cluster_codes, cluster_mean_se
from ..core.errors import SiteproofError
from ..blind.average import kish_ess
from ..core.estimates import Estimate, normal_ci
from ..core.outputs import json_records
from ..core.interpret import CALIBRATION_MARGIN, RELIABILITY_MIN, propensity_recovered

RMSE_CAVEAT = (
    "ê targets the mixture e(x) = E[e_S | X = x], not the site rate e_S: even a perfect ê keeps an RMSE of "
    "√E[Var(e_S | X)] > 0 unless the covariates reveal the site. Judge ê by its calibration (integrated "
    "calibration error over the deciles of ê, and a calibration slope well above 0) and read the RMSE beside its "
    "estimated floor."
)
WEIGHT_RATIO_QUANTILES = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
SITE_MODEL_MAX_UNITS = 10_000


@dataclass(frozen=True)
class SitePrediction:
    """How well the covariates predict the (hidden) site: cross-validated accuracy vs the majority share.

    ``accuracy`` is an Estimate with the binomial SE √(a(1 − a)/n); ``excess`` = (a − m)/(1 − m) is the share of
    the errors of the majority guess m that the covariates remove (0: no better than guessing the largest site,
    1: the site is fully visible); ``pseudo_r2`` = 1 − LL_model/LL_null (McFadden 1974) with out-of-fold
    probabilities.  ``proba`` holds the out-of-fold class probabilities (columns in ``classes`` order) of the
    units ``index`` (all units, or a seeded random subsample of at most ``SITE_MODEL_MAX_UNITS``).
    """

    accuracy: Estimate
    majority_share: float
    majority_site: str
    excess: float
    pseudo_r2: float
    n_sites: int
    folds: int
    learner: str
    classes: tuple[str, ...]
    proba: np.ndarray
    index: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (the per-unit probabilities are left out)."""
        return {
            "n": int(self.index.size),
            "accuracy": self.accuracy.to_dict(),
            "majority_share": self.majority_share,
            "majority_site": self.majority_site,
            "excess_accuracy": self.excess,
            "pseudo_r2": self.pseudo_r2,
            "n_sites": self.n_sites,
            "folds": self.folds,
            "learner": self.learner,
        }


@dataclass(frozen=True)
class PropensityRecovery:
    """The learned propensity ê judged against the known rates (module docstring for every formula)."""

    n: int
    calibration_slope: Estimate
    calibration_intercept: Estimate
    bins: pd.DataFrame
    by_site: pd.DataFrame
    rmse: float
    rmse_floor: float
    weights: dict[str, Any]
    site_prediction: SitePrediction | None
    rates_source: str

    @property
    def calibration_bound(self) -> float:
        """Upper 95 % bound of the integrated calibration error of ê (:func:`calibration_bound`)."""
        return calibration_bound(self.bins)

    @property
    def recovered(self) -> bool:
        """The propensity verdict of :func:`propensity_recovered`."""
        return propensity_recovered(self.calibration_bound, self.calibration_slope.ci)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary; ``calibration_slope`` and ``rmse`` are top-level keys (scorecard contract)."""
        return {
            "n": self.n,
            "rates_source": self.rates_source,
            "calibration_slope": self.calibration_slope.to_dict(),
            "calibration_intercept": self.calibration_intercept.to_dict(),
            "calibration_bins": json_records(self.bins),
            "by_site": json_records(self.by_site),
            "rmse": self.rmse,
            "rmse_floor": self.rmse_floor,
            "rmse_caveat": RMSE_CAVEAT,
            "weights": self.weights,
            "site_prediction": None if self.site_prediction is None else self.site_prediction.to_dict(),
            "calibration_bound": self.calibration_bound,
            "calibration_margin": CALIBRATION_MARGIN,
            "reliability_min": RELIABILITY_MIN,
            "recovered": self.recovered,
        }


def calibration_bins(e_hat: np.ndarray, known_rate: np.ndarray, n_bins: int = 10,
                     clusters: Any = None) -> pd.DataFrame:
    """Mean known rate within quantile bins of ê (deciles by default) beside the bin's mean ê.

    For a correct ê, E[e_S | ê] = ê, so ``known_rate_mean − e_hat_mean`` should be ≈ 0 in every bin; its SE is
    sd(e_S in bin)/√n_bin, or with ``clusters`` the cluster-sum SE of e_S over the bin's units (Liang & Zeger
    1986; NaN when the bin holds one cluster).  Ties in ê are kept in one bin (bins are ranks of ê cut into
    equal counts).
    """
    e_hat, known_rate = _pair(e_hat, known_rate)
    clusters = _labels(clusters, e_hat.size)
    ranks = pd.Series(e_hat).rank(method="first").to_numpy()
    bins = np.minimum((ranks - 1) * n_bins // e_hat.size, n_bins - 1).astype(int)
    rows = []
    for b in range(n_bins):
        inside = bins == b
        if not inside.any():
            continue
        rate = known_rate[inside]
        se = _mean_se(rate, None if clusters is None else clusters[inside])
        rows.append({
            "bin": b + 1,
            "n": int(inside.sum()),
            "e_hat_low": float(e_hat[inside].min()),
            "e_hat_high": float(e_hat[inside].max()),
            "e_hat_mean": float(e_hat[inside].mean()),
            "known_rate_mean": float(rate.mean()),
            "known_rate_se": se,
            "difference": float(rate.mean() - e_hat[inside].mean()),
        })
    return pd.DataFrame(rows)


def calibration_line(e_hat: np.ndarray, known_rate: np.ndarray,
                     clusters: Any = None) -> tuple[Estimate, Estimate]:
    """Slope and intercept of the least-squares line e_S = a + b·ê, HC2 standard errors.

    Ideal (correct ê): b = 1, a = 0.  b < 1 means ê is too spread out (over-confident), b > 1 too compressed.
    HC2 (MacKinnon & White 1985; Imbens & Kolesár 2016) because the residual variance changes with ê.  With
    ``clusters`` the SEs are the CR2 cluster sandwich of :func:`cluster_ols_se` (Bell & McCaffrey 2002;
    Cameron & Miller 2015), which is HC2 when every cluster has one unit.
    """
    e_hat, known_rate = _pair(e_hat, known_rate)
    clusters = _labels(clusters, e_hat.size)
    if np.ptp(e_hat) == 0:
        nan = float("nan")
        note = "ê is constant, so the calibration line is undefined"
        return (
            Estimate("calibration slope", nan, nan, (nan, nan), "slope of e_S on ê (ideal 1)", note=note),
            Estimate("calibration intercept", nan, nan, (nan, nan), "intercept of e_S on ê (ideal 0)", note=note),
        )
    design = sm.add_constant(e_hat)
    fit = sm.OLS(known_rate, design).fit(cov_type="HC2")
    (a, b), (se_a, se_b) = fit.params, fit.bse
    if clusters is not None:
        se_a, se_b = cluster_ols_se(design, known_rate - design @ fit.params, clusters)
    return (
        Estimate.from_value("calibration slope", b, se_b, estimand="slope of e_S on ê (ideal 1)"),
        Estimate.from_value("calibration intercept", a, se_a, estimand="intercept of e_S on ê (ideal 0)"),
    )


def cluster_ols_se(design: np.ndarray, residuals: np.ndarray, clusters: Any) -> np.ndarray:
    """CR2 cluster-robust SEs of OLS coefficients (Bell & McCaffrey 2002; Cameron & Miller 2015, §VI.B).

    V = B⁻¹ (Σ_g s_g s_gᵀ) B⁻¹ with B = X'X and s_g = X_g' A_g e_g the adjusted cluster sums of the score
    contributions x_i e_i (Liang & Zeger 1986 for A_g = I), A_g = (I − H_gg)^(−1/2), H_gg = X_g B⁻¹ X_g'.
    H_gg has rank ≤ k: with the thin SVD X_g = U S Vᵀ, H_gg = U C Uᵀ, C = S Vᵀ B⁻¹ V S = Q Λ Qᵀ, so
    A_g = I + P((1 − Λ)^(−1/2) − 1)Pᵀ with P = UQ.  With one unit per cluster A_g = (1 − h_ii)^(−1/2) and V is
    HC2 (MacKinnon & White 1985).  NaN with fewer than two clusters or a cluster of leverage 1.
    """
    codes, labels = cluster_codes(clusters, residuals.size)
    k = design.shape[1]
    if labels.size < 2:
        return np.full(k, np.nan)
    bread = np.linalg.inv(design.T @ design)
    order = np.argsort(codes, kind="stable")
    starts = np.cumsum(np.bincount(codes, minlength=labels.size))[:-1]
    meat = np.zeros((k, k))
    for rows in np.split(order, starts):
        x_g, e_g = design[rows], residuals[rows]
        u, sing, vt = np.linalg.svd(x_g, full_matrices=False)
        lam, q = np.linalg.eigh((sing[:, None] * vt) @ bread @ (vt.T * sing[None, :]))
        if np.any(lam >= 1.0 - 1e-12):
            return np.full(k, np.nan)
        p = u @ q
        adjusted = e_g + p @ ((1.0 / np.sqrt(1.0 - lam) - 1.0) * (p.T @ e_g))
        s_g = x_g.T @ adjusted
        meat += np.outer(s_g, s_g)
    return np.sqrt(np.diag(bread @ meat @ bread))


def site_means(e_hat: np.ndarray, known_rate: np.ndarray, site: np.ndarray, clusters: Any = None) -> pd.DataFrame:
    """Per site: n, known rate (mean over the site's units; constant unless strata differ), mean ê with SE.

    The mean ê of a site need not equal its rate: ê averages the rates of all sites whose units look alike.
    The gap shows how far the learned propensity was pulled toward the other sites.  The SE is sd(ê)/√n_s, or
    with ``clusters`` the cluster-sum SE over the site's units (Liang & Zeger 1986).
    """
    e_hat, known_rate = _pair(e_hat, known_rate)
    clusters = _labels(clusters, e_hat.size)
    site = np.asarray(site).astype(str)
    rows = []
    for s in pd.unique(site):
        inside = site == s
        e_s = e_hat[inside]
        se = _mean_se(e_s, None if clusters is None else clusters[inside])
        rows.append({
            "site": str(s),
            "n": int(inside.sum()),
            "known_rate": float(known_rate[inside].mean()),
            "e_hat_mean": float(e_s.mean()),
            "e_hat_se": se,
            "e_hat_q10": float(np.quantile(e_s, 0.1)),
            "e_hat_q90": float(np.quantile(e_s, 0.9)),
            "difference": float(e_s.mean() - known_rate[inside].mean()),
        })
    return pd.DataFrame(rows)


def rmse(e_hat: np.ndarray, known_rate: np.ndarray) -> float:
    """√mean((ê − e_S)²) — read only beside its floor √E[Var(e_S | X)] (module docstring)."""
    e_hat, known_rate = _pair(e_hat, known_rate)
    return float(np.sqrt(np.mean((e_hat - known_rate) ** 2)))


def rmse_floor(proba: np.ndarray, class_rates: np.ndarray) -> float:
    """Estimated floor √mean_i Σ_s p̂_s(x_i)(r_s − ẽ(x_i))², ẽ(x) = Σ_s p̂_s(x) r_s.

    ``proba`` are out-of-fold site probabilities (n, k); ``class_rates`` the rate r_s of each class.  This is
    √E[Var(e_S | X)] with the site model in place of P(S | X).
    """
    proba = np.asarray(proba, dtype=float)
    rates = np.asarray(class_rates, dtype=float)
    mixture = proba @ rates
    variance = np.sum(proba * (rates[np.newaxis, :] - mixture[:, np.newaxis]) ** 2, axis=1)
    return float(np.sqrt(np.mean(variance)))


def calibration_bound(bins: pd.DataFrame) -> float:
    """ECE + z_{0.95}·√(Σ_b (n_b/n)² SE_b²), ECE = Σ_b (n_b/n)·|d_b| (module docstring).

    d_b = mean e_S − mean ê and SE_b = sd(e_S in b)/√n_b per bin (:func:`calibration_bins`); bins of one
    unit count with SE 0.  NaN without bins.
    """
    if bins.empty:
        return float("nan")
    share = bins["n"].to_numpy(dtype=float) / float(bins["n"].sum())
    se = bins["known_rate_se"].fillna(0.0).to_numpy(dtype=float)
    ece = float(np.sum(share * np.abs(bins["difference"].to_numpy(dtype=float))))
    return ece + float(stats.norm.ppf(0.95)) * float(np.sqrt(np.sum(share**2 * se**2)))


def weight_comparison(w: np.ndarray, e_hat: np.ndarray, known_rate: np.ndarray) -> dict[str, Any]:
    """Learned vs true inverse-probability weights.

    Learned weight W/ê + (1 − W)/(1 − ê), true weight W/e_S + (1 − W)/(1 − e_S).  The ratio learned/true is
    e_S/ê for treated and (1 − e_S)/(1 − ê) for control units (1 everywhere for ê = e_S); we report its
    quantiles, its geometric mean and the share outside [0.5, 2], and Kish's effective sample size of each arm
    under both weightings.
    """
    e_hat, known_rate = _pair(e_hat, known_rate)
    treated = np.asarray(w).astype(bool)
    learned = np.where(treated, 1.0 / e_hat, 1.0 / (1.0 - e_hat))
    true = np.where(treated, 1.0 / known_rate, 1.0 / (1.0 - known_rate))
    ratio = learned / true
    quantiles = np.quantile(ratio, WEIGHT_RATIO_QUANTILES)
    arms = {}
    for name, mask in (("treated", treated), ("control", ~treated)):
        arms[name] = {
            "n": int(mask.sum()),
            "ess_learned": kish_ess(learned[mask]),
            "ess_true": kish_ess(true[mask]),
        }
    return {
        "ratio_quantiles": {f"q{round(q * 100):02d}": float(v) for q, v in zip(WEIGHT_RATIO_QUANTILES, quantiles)},
        "ratio_geometric_mean": float(np.exp(np.mean(np.log(ratio)))),
        "share_ratio_outside_half_to_double": float(np.mean((ratio < 0.5) | (ratio > 2.0))),
        "log_ratio_sd": float(np.std(np.log(ratio), ddof=1)) if ratio.size > 1 else float("nan"),
        "ess": arms,
    }


def default_site_learner(seed: int) -> ClassifierMixin:
    """Random forest of 100 trees with leaves of ≥ 20 units (seeded) for the site.

    A forest grows one tree for all sites at once, so its cost hardly grows with the number of sites (boosting
    grows one tree per site per round: with STAR's 79 schools that is 79 times the work).  Leaves of ≥ 20
    units keep the out-of-fold probabilities away from 0 and 1, which the log-likelihood needs.
    """
    return RandomForestClassifier(n_estimators=100, min_samples_leaf=20, random_state=seed)


def site_predictability(
    X: np.ndarray, site: np.ndarray, *, folds: int = 5, seed: int = 0, learner: ClassifierMixin | None = None,
    max_units: int = SITE_MODEL_MAX_UNITS, clusters: Any = None,
) -> SitePrediction:
    """Cross-validated accuracy of predicting the site from the covariates, vs the majority share.

    On all units, or on a seeded random subsample of ``max_units`` when there are more (the accuracy's SE is
    then ≈ 0.5 % at most, enough for a diagnostic).  K-fold (stratified by site when every site has ≥ K
    units, else plain shuffled K-fold), seeded; each unit's predicted site comes from a model that never saw
    it.  Accuracy a = mean(ŝ_i = s_i) with SE √(a(1−a)/n); with ``clusters`` the cluster-sum SE of the
    per-unit hits h_i, √(Σ_g (Σ_{i∈g} (h_i − a))²)/n (Liang & Zeger 1986, without the G/(G − 1) factor, so that
    with one unit per cluster it is the binomial SE exactly).  The folds stay unit-level (a diagnostic, not an estimate).
    """
    X = np.asarray(X, dtype=float)
    site = np.asarray(site).astype(str)
    clusters = _labels(clusters, site.size)
    index = np.arange(site.size)
    if site.size > max_units:
        index = np.sort(np.random.default_rng(seed).choice(site.size, size=max_units, replace=False))
        X, site = X[index], site[index]
        clusters = None if clusters is None else clusters[index]
    classes, counts = np.unique(site, return_counts=True)
    if classes.size < 2:
        raise SiteproofError("only one site in the data, so there is no site to predict", "pool at least 2 sites")
    k = int(min(folds, site.size))
    splitter = (
        StratifiedKFold(k, shuffle=True, random_state=seed)
        if counts.min() >= k
        else KFold(k, shuffle=True, random_state=seed)
    )
    model = clone(learner) if learner is not None else default_site_learner(seed)
    proba = cross_val_predict(model, X, site, cv=splitter, method="predict_proba")
    predicted = classes[np.argmax(proba, axis=1)]
    correct = (predicted == site).astype(float)
    acc = float(correct.mean())
    se = float(np.sqrt(acc * (1.0 - acc) / site.size)) if clusters is None else _cr0_mean_se(correct, clusters)
    majority = float(counts.max() / site.size)
    share = counts / site.size
    positions = np.searchsorted(classes, site)
    ll_model = float(np.mean(np.log(np.clip(proba[np.arange(site.size), positions], 1e-15, 1.0))))
    ll_null = float(np.sum(share * np.log(share)))
    return SitePrediction(
        accuracy=Estimate("site accuracy", acc, se, normal_ci(acc, se), "share of units whose site is predicted"),
        majority_share=majority,
        majority_site=str(classes[np.argmax(counts)]),
        excess=float((acc - majority) / (1.0 - majority)),
        pseudo_r2=float(1.0 - ll_model / ll_null),
        n_sites=int(classes.size),
        folds=k,
        learner=type(model).__name__,
        classes=tuple(str(c) for c in classes),
        proba=proba,
        index=index,
    )


def recover_propensity(
    e_hat: np.ndarray,
    known_rate: np.ndarray,
    site: np.ndarray,
    w: np.ndarray,
    *,
    X: np.ndarray | None = None,
    rates_source: str = "declared",
    n_bins: int = 10,
    folds: int = 5,
    seed: int = 0,
    site_learner: ClassifierMixin | None = None,
    clusters: Any = None,
) -> PropensityRecovery:
    """All propensity-recovery figures: calibration, RMSE, weights and site predictability.  Pass ``X`` to add the site-predictability check and
    the estimated RMSE floor; without it both are omitted (floor NaN).  ``clusters`` (one label per unit,
    default None) makes every SE cluster-robust (module docstring)."""
    e_hat, known_rate = _pair(e_hat, known_rate)
    site = np.asarray(site).astype(str)
    clusters = _labels(clusters, e_hat.size)
    slope, intercept = calibration_line(e_hat, known_rate, clusters)
    prediction = None
    floor = float("nan")
    if X is not None:
        prediction = site_predictability(X, site, folds=folds, seed=seed, learner=site_learner, clusters=clusters)
        rates = np.array([known_rate[site == c].mean() for c in prediction.classes])
        floor = rmse_floor(prediction.proba, rates)
    return PropensityRecovery(
        n=int(e_hat.size),
        calibration_slope=slope,
        calibration_intercept=intercept,
        bins=calibration_bins(e_hat, known_rate, n_bins, clusters),
        by_site=site_means(e_hat, known_rate, site, clusters),
        rmse=rmse(e_hat, known_rate),
        rmse_floor=floor,
        weights=weight_comparison(w, e_hat, known_rate),
        site_prediction=prediction,
        rates_source=rates_source,
    )


def _pair(e_hat: np.ndarray, known_rate: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    e_hat = np.asarray(e_hat, dtype=float).ravel()
    known_rate = np.asarray(known_rate, dtype=float).ravel()
    same_length("learned propensities", e_hat, "known rates", known_rate, "pass both for the same units in the same order")
    at_least("propensity recovery", e_hat, 2, "score more units")
    fix = "clip ê and restrict the comparison to sites whose rate is strictly between 0 and 1"
    in_unit_interval("learned propensities", e_hat, fix, strict=True)
    in_unit_interval("known rates", known_rate, fix, strict=True)
    return e_hat, known_rate


def _labels(clusters: Any, n: int) -> np.ndarray | None:
    """The cluster labels as an object array of length n (SiteproofError otherwise), or None."""
    if clusters is None:
        return None
    cluster_codes(clusters, n)
    return np.asarray(clusters, dtype=object)


def _mean_se(values: np.ndarray, clusters: np.ndarray | None) -> float:
    """sd/√n (n − 1 divisor; NaN for one unit), or the cluster-sum SE with ``clusters``."""
    if clusters is not None:
        return cluster_mean_se(values, clusters)
    return float(values.std(ddof=1) / np.sqrt(values.size)) if values.size > 1 else float("nan")


def _cr0_mean_se(values: np.ndarray, clusters: np.ndarray) -> float:
    """√(Σ_g T_g²)/n with T_g the cluster sums of values − mean (Liang & Zeger 1986, no small-sample factor)."""
    codes, labels = cluster_codes(clusters, values.size)
    totals = np.bincount(codes, weights=values - values.mean(), minlength=labels.size)
    return float(np.sqrt(np.sum(totals ** 2)) / values.size)
