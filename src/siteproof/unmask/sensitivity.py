"""Omitted-variable-bias bounds for the blind AIPW estimate, held against the bias the unmasking revealed.

The bound is the debiased-machine-learning version of Chernozhukov, Cinelli, Newey, Sharma & Syrgkanis (2022),
"Long story short: omitted variable bias in causal machine learning" (the exact form below is written from
memory of that paper).  The target θ = E[m(W; g)] with g(D, X) = E[Y | D, X] has the Riesz representer α, for
the ATE

    α(D, X) = D/e(X) − (1 − D)/(1 − e(X)),        m(W; α) = α(1, X) − α(0, X) = 1/e(X) + 1/(1 − e(X)).

If a latent confounder A was omitted, the "short" estimate θ_s (built on X) and the "long" one θ (built on X, A)
differ by θ_s − θ = E[(g_s − g)(α_s − α)], and Cauchy–Schwarz gives

    |θ_s − θ|² ≤ S²·C_Y²·C_D²,   S² = E[(Y − g_s)²]·E[α_s²],
    C_Y² = R²_{Y∼A|D,X}          (share of the residual outcome variance the confounder explains),
    C_D² = (1 − R²_{α∼α_s}) / R²_{α∼α_s} = r_D/(1 − r_D),   r_D = 1 − E[α_s²]/E[α²]
                                 (share of the Riesz representer's variance due to the confounder).

So the bound is B(r_D, r_Y) = S·√(r_Y·r_D/(1 − r_D)) (|ρ| = 1, the worst-case correlation of the two
errors).  S is estimated from the cross-fitted nuisances: σ² = mean((Y − ĝ)²) with ĝ = D·μ̂₁ + (1 − D)·μ̂₀, and
ν² = mean(m(W; α̂)) = mean(1/ê + 1/(1 − ê)), by the Riesz identity E[m(W; α)] = E[α·α] = E[α²].  (The paper's
debiased form mean(2·m(W; α̂) − α̂²) has the same limit but turns negative when some ê sit near the clipping
bounds, which happened in the validation runs; the form used here is always positive.)  With linear
nuisances and α = D̃/E[D̃²] (the partially linear model) S equals se(τ̂_OLS)·√df and B is the OLS
omitted-variable-bias formula of Cinelli & Hazlett (2020).

Robustness value (Cinelli & Hazlett 2020): the common strength r_Y = r_D = RV at which the bound reaches
|θ̂|.  With f = |θ̂|/S, S·RV/√(1 − RV) = |θ̂| gives RV = ½(√(f⁴ + 4f²) − f²).  At level α the bound must reach
the CI limit instead: f_α = (|θ̂| − z_{1−α/2}·SE)/S (normal approximation; SE and S kept at their estimates —
with an OLS degree-of-freedom count it is Cinelli & Hazlett's f_q − t*_{α,df−1}/√(df − 1)).  The value
"to design" uses f = |θ̂ − θ_design|/S: how strong a confounder had to be to produce the realized bias.

Benchmarks ("a confounder k× as strong as covariate j", the simple-multiple form of the paper, from memory):
drop covariate j (all of its encoded features) from the nuisances, recompute σ²_{−j} and ν²_{−j} and take
r_Y(j) = 1 − σ²/σ²_{−j} and r_D(j) = 1 − ν²_{−j}/ν², scaled by k.  Two ways to get the short nuisances:
``"refit"`` cross-fits ê, μ̂₀, μ̂₁ again without j on the same folds (expensive); ``"project"`` (cheap)
regresses the existing cross-fitted predictions on the remaining covariates with a small learner, each half of
the units (fold parity) predicted from the other (E[e(X) | X₋ⱼ] = P(D = 1 | X₋ⱼ) and
E[μ_d(X) | D = d, X₋ⱼ] = E[Y | D = d, X₋ⱼ]; ê on the logit scale), uses σ²_P = σ² + mean((ĝ − ĝ_P)²) (the
residual Y − ĝ is orthogonal to functions of D, X), and compares the projection without j with the same learner's projection
on all covariates, so that the small learner's own approximation error cancels (an approximation of ours).

The sensitivity analysis **warned** the analyst when the realized bias |θ̂ − θ_design| lies inside the bound
at the strongest benchmark (k× the covariate whose benchmark bound is largest).

Clustered units (``clusters=``, default None): the SE of the AIPW estimate, and so the level-α robustness
value, is the cluster-sum SE of its per-unit scores (Liang & Zeger 1986; ``core.clusters.cluster_mean_se``).
The bound itself (σ², ν², partial R²) is a population moment and does not change with the clustering.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import special, stats
from sklearn.ensemble import HistGradientBoostingRegressor

from threadpoolctl import threadpool_limits

from ..blind.analysis import SMALL_DATA
from ..core.checks import finite_vector
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..core.interpret import ALPHA
from ..core.learners import fit_model, predict_model
from ..core.results import ResultsMixin
from ..intake.study import Study

BENCHMARK_MODES = ("project", "refit")
R2_CAP = 0.999  # partial R² values are kept below 1 so that r_D/(1 − r_D) stays finite


# --------------------------------------------------------------------------------------------------------
# the bound and the robustness value
# --------------------------------------------------------------------------------------------------------
def ate_riesz(w: np.ndarray, e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """α = D/e − (1 − D)/(1 − e) and m(W; α) = 1/e + 1/(1 − e), the ATE's Riesz representer and its functional."""
    return w / e - (1.0 - w) / (1.0 - e), 1.0 / e + 1.0 / (1.0 - e)


def ovb_scale(residual: np.ndarray, riesz_m: np.ndarray) -> tuple[float, float]:
    """(σ², ν²): σ² = mean((Y − ĝ)²), ν² = mean(m(W; α)) = E[α²] by the Riesz identity (Chernozhukov et al.
    2022); S = √(σ²ν²)."""
    sigma2 = float(np.mean(np.square(residual)))
    nu2 = float(np.mean(riesz_m))
    if not (sigma2 > 0 and nu2 > 0):
        raise SiteproofError(
            f"the sensitivity scale is undefined (σ² = {sigma2:.3g}, ν² = {nu2:.3g})",
            "check the nuisance predictions: the outcome residuals and the propensity must be non-degenerate",
        )
    return sigma2, nu2


def bias_bound(scale: float, r2_outcome: Any, r2_treatment: Any) -> np.ndarray | float:
    """B = S·√(r_Y·r_D/(1 − r_D)) (Chernozhukov et al. 2022; Cinelli & Hazlett 2020 in the linear case)."""
    r_y = np.clip(np.asarray(r2_outcome, dtype=float), 0.0, 1.0)
    r_d = np.clip(np.asarray(r2_treatment, dtype=float), 0.0, R2_CAP)
    out = scale * np.sqrt(r_y * r_d / (1.0 - r_d))
    return float(out) if out.ndim == 0 else out


def robustness_value(f: float) -> float:
    """RV = ½(√(f⁴ + 4f²) − f²), the r_Y = r_D at which S·RV/√(1 − RV) = f·S (Cinelli & Hazlett 2020); 0 if f ≤ 0."""
    if not np.isfinite(f):
        return float("nan")
    if f <= 0:
        return 0.0
    return 0.5 * (math.sqrt(f**4 + 4.0 * f**2) - f**2)


def robustness_value_alpha(estimate: float, se: float, scale: float, alpha: float = ALPHA,
                           df: int | None = None) -> float:
    """RV at level α: the strength at which the bound reaches the (1 − α) CI limit nearest 0.

    f_α = (|θ̂| − z_{1−α/2}·SE)/S; with ``df`` (an OLS fit) f_α = |θ̂|/S − t_{1−α/2, df−1}/√(df − 1), the form
    of Cinelli & Hazlett (2020).  0 when the CI already covers 0.
    """
    if df is None:
        f = (abs(estimate) - stats.norm.ppf(1 - alpha / 2) * se) / scale
    else:
        f = abs(estimate) / scale - stats.t.ppf(1 - alpha / 2, df - 1) / math.sqrt(df - 1)
    return robustness_value(f)


# --------------------------------------------------------------------------------------------------------
# benchmarks
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Benchmark:
    """A confounder k× as strong as covariate (group) j: its implied r_D, r_Y and the bias bound there."""

    covariate: str
    features: tuple[str, ...]
    r2_treatment: float
    r2_outcome: float
    bias_bound: float
    k: float = 1.0

    def to_dict(self) -> dict[str, Any]:
        return {"covariate": self.covariate, "features": list(self.features), "k": self.k,
                "r2_treatment": self.r2_treatment, "r2_outcome": self.r2_outcome, "bias_bound": self.bias_bound}


def covariate_groups(feature_names: Sequence[str], covariates: Sequence[str]) -> dict[str, list[int]]:
    """Covariate → its encoded feature columns (``c``, ``c=level``, ``c:missing``; intake/encoding.py)."""
    groups: dict[str, list[int]] = {}
    for c in covariates:
        cols = [i for i, f in enumerate(feature_names) if f == c or f.startswith(f"{c}=") or f.startswith(f"{c}:")]
        if cols:
            groups[c] = cols
    return groups


def default_projection_learner(seed: int = 0) -> HistGradientBoostingRegressor:
    """The small learner of the cheap benchmarks: 60 boosting rounds of depth-3 trees."""
    return HistGradientBoostingRegressor(max_iter=60, max_depth=3, learning_rate=0.15, random_state=seed)


def _out_of_fold(learner: Any, X: np.ndarray, target: np.ndarray, halves: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Predictions for every unit from a regressor fit on the ``rows`` units of the other half."""
    pred = np.empty(target.size)
    for half in (0, 1):
        train = rows & (halves != half)
        model = fit_model(learner, X[train], target[train])
        test = halves == half
        pred[test] = predict_model(model, X[test])
    return pred


@dataclass(frozen=True)
class _Fit:
    """The pieces of S: treatment, outcome, clipped ê, μ̂₀, μ̂₁ and the clip bounds."""

    y: np.ndarray
    w: np.ndarray
    e: np.ndarray
    mu0: np.ndarray
    mu1: np.ndarray
    clip: tuple[float, float]

    @property
    def g(self) -> np.ndarray:
        return self.w * self.mu1 + (1.0 - self.w) * self.mu0

    def scale_parts(self) -> tuple[float, float]:
        return ovb_scale(self.y - self.g, ate_riesz(self.w, self.e)[1])

    def nu2_with(self, e_short: np.ndarray) -> float:
        """ν² with a short propensity: mean(1/e_s + 1/(1 − e_s)) (= E[α_s²] when e_s = E[e(X) | X₋ⱼ])."""
        return float(np.mean(ate_riesz(self.w, np.clip(e_short, *self.clip))[1]))


def _projected(fit: _Fit, X_part: np.ndarray, halves: np.ndarray, learner: Any) -> tuple[float, float]:
    """(σ²_P, ν²_P) with ê and μ̂_d replaced by their out-of-half projections on the columns ``X_part``
    (ê projected on the logit scale, so that it stays a probability)."""
    every = np.ones(fit.y.size, dtype=bool)
    e_short = special.expit(_out_of_fold(learner, X_part, special.logit(fit.e), halves, every))
    mu0_s = _out_of_fold(learner, X_part, fit.mu0, halves, fit.w == 0)
    mu1_s = _out_of_fold(learner, X_part, fit.mu1, halves, fit.w == 1)
    g_short = fit.w * mu1_s + (1.0 - fit.w) * mu0_s
    sigma2, _ = fit.scale_parts()
    return sigma2 + float(np.mean((fit.g - g_short) ** 2)), fit.nu2_with(e_short)


def _short_refit(fit: _Fit, X_short: np.ndarray, folds: np.ndarray, binary_outcome: bool,
                 learners: Any, seed: int) -> tuple[float, float]:
    """(σ²₋ⱼ, ν²₋ⱼ) from ê, μ̂₀, μ̂₁ cross-fitted again without covariate j on the same folds."""
    from ..blind.nuisance import cross_fit_nuisances

    nuis = cross_fit_nuisances(X_short, fit.y, fit.w, folds, binary_outcome=binary_outcome, learners=learners,
                               clip=fit.clip, seed=seed)
    short = _Fit(fit.y, fit.w, nuis.e_hat, nuis.mu0, nuis.mu1, fit.clip)
    sigma2, _ = short.scale_parts()
    return sigma2, fit.nu2_with(nuis.e_hat)


def benchmark_strengths(fit: _Fit, X: np.ndarray, groups: dict[str, list[int]], folds: np.ndarray, *,
                        mode: str = "project", learner: Any = None, learners: Any = None,
                        binary_outcome: bool = False, seed: int = 0) -> dict[str, tuple[float, float]]:
    """Covariate → (r_D(j), r_Y(j)) = (1 − ν²₋ⱼ/ν², 1 − σ²/σ²₋ⱼ), each clipped to [0, R2_CAP].

    In "project" mode the reference (σ², ν²) is the projection on *all* covariates with the same small learner
    and halves (folds mod 2), so that the learner's own approximation error cancels between the two fits.
    """
    if mode not in BENCHMARK_MODES:
        raise SiteproofError(f"unknown benchmark mode {mode!r}", f"use one of {', '.join(BENCHMARK_MODES)}")
    learner = learner if learner is not None else default_projection_learner(seed)
    halves = np.asarray(folds) % 2
    sigma2, nu2 = _projected(fit, X, halves, learner) if mode == "project" else fit.scale_parts()
    out = {}
    for name, cols in groups.items():
        X_short = np.delete(X, cols, axis=1)
        if X_short.shape[1] == 0:
            X_short = np.zeros((X.shape[0], 1))
        if mode == "project":
            sigma2_s, nu2_s = _projected(fit, X_short, halves, learner)
        else:
            sigma2_s, nu2_s = _short_refit(fit, X_short, folds, binary_outcome, learners, seed)
        r_d = float(np.clip(1.0 - nu2_s / nu2, 0.0, R2_CAP))
        r_y = float(np.clip(1.0 - sigma2 / sigma2_s, 0.0, R2_CAP))
        out[name] = (r_d, r_y)
    return out


# --------------------------------------------------------------------------------------------------------
# the result
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, repr=False)
class SensitivityResult(ResultsMixin):
    """The omitted-variable-bias analysis of one blind estimate (see the module docstring)."""

    estimator: str
    estimate: Estimate
    sigma2: float
    nu2: float
    robustness_value: float
    robustness_value_alpha: float
    benchmarks: list[Benchmark] = field(default_factory=list)
    realized_bias: Estimate | None = None
    alpha: float = ALPHA
    mode: str = "project"

    @property
    def scale(self) -> float:
        """S = √(σ²·ν²)."""
        return math.sqrt(self.sigma2 * self.nu2)

    @property
    def strongest(self) -> Benchmark | None:
        """The benchmark with the largest bias bound."""
        return max(self.benchmarks, key=lambda b: b.bias_bound) if self.benchmarks else None

    @property
    def robustness_value_to_design(self) -> float | None:
        """RV with f = |θ̂ − θ_design|/S: the strength a confounder needed to produce the realized bias."""
        if self.realized_bias is None:
            return None
        return robustness_value(abs(self.realized_bias.estimate) / self.scale)

    @property
    def warned(self) -> bool | None:
        """|realized bias| ≤ the bound at the strongest benchmark (None before unmasking or without benchmarks)."""
        top = self.strongest
        if self.realized_bias is None or top is None:
            return None
        return bool(abs(self.realized_bias.estimate) <= top.bias_bound)

    @property
    def explained_away(self) -> bool | None:
        """The bound at the strongest benchmark reaches |θ̂|: such a confounder could move the estimate to 0."""
        top = self.strongest
        return None if top is None else bool(top.bias_bound >= abs(self.estimate.estimate))

    def bound(self, r2_outcome: Any, r2_treatment: Any) -> np.ndarray | float:
        """The bias bound at given strengths (arrays broadcast)."""
        return bias_bound(self.scale, r2_outcome, r2_treatment)

    def _key_numbers(self) -> dict[str, Any]:
        top = self.strongest
        return {"estimator": self.estimator, "estimate": self.estimate.estimate, "rv": self.robustness_value,
                "strongest": None if top is None else top.covariate, "warned": self.warned}

    def to_frame(self) -> pd.DataFrame:
        """One row per benchmark: covariate, k, r2_treatment, r2_outcome, bias_bound."""
        return pd.DataFrame([{k: v for k, v in b.to_dict().items() if k != "features"} for b in self.benchmarks],
                            columns=["covariate", "k", "r2_treatment", "r2_outcome", "bias_bound"])

    def to_dict(self) -> dict[str, Any]:
        """The ``sensitivity`` record of scorecard.json / sets.json."""
        top = self.strongest
        return {
            "estimator": self.estimator,
            "estimate": self.estimate.to_dict(),
            "scale": self.scale, "sigma2": self.sigma2, "nu2": self.nu2,
            "robustness_value": self.robustness_value,
            "robustness_value_alpha": self.robustness_value_alpha,
            "alpha": self.alpha,
            "robustness_value_to_design": self.robustness_value_to_design,
            "benchmark_mode": self.mode,
            "benchmarks": [b.to_dict() for b in self.benchmarks],
            "strongest": None if top is None else top.covariate,
            "bound_at_strongest": None if top is None else top.bias_bound,
            "realized_bias": None if self.realized_bias is None else self.realized_bias.to_dict(),
            "warned": self.warned,
            "explained_away": self.explained_away,
            "reference": "Chernozhukov, Cinelli, Newey, Sharma & Syrgkanis (2022); Cinelli & Hazlett (2020)",
        }


def sensitivity_analysis(
    y: np.ndarray, w: np.ndarray, e_hat: np.ndarray, mu0: np.ndarray, mu1: np.ndarray, *,
    X: np.ndarray | None = None, feature_names: Sequence[str] = (), covariates: Sequence[str] | None = None,
    folds: np.ndarray | None = None, realized_bias: Estimate | float | None = None, k: float = 1.0,
    mode: str = "project", learner: Any = None, learners: Any = None, clip: tuple[float, float] = (0.01, 0.99),
    binary_outcome: bool = False, alpha: float = ALPHA, seed: int = 0, estimator: str = "aipw",
    clusters: Any = None,
) -> SensitivityResult:
    """Omitted-variable-bias bounds of the cross-fitted AIPW estimate (module docstring for the formulas).

    ``y, w, e_hat, mu0, mu1``: the blind run's per-unit arrays (sidecar columns ``e_hat``, ``mu0``, ``mu1``).
    Benchmarks need ``X`` with its ``feature_names``, the raw ``covariates`` (one benchmark per covariate and
    its encoded features) and the cross-fitting ``folds``; ``mode`` "project" (cheap, ``learner`` = the small
    regressor) or "refit" (``learners`` as in ``cross_fit_nuisances``).  ``realized_bias`` = blind − design
    (after unmasking) gives ``robustness_value_to_design`` and ``warned``.  ``clusters`` (one label per unit)
    makes the estimate's SE cluster-robust.
    """
    y, e = finite_vector("y", y), finite_vector("e_hat", e_hat)
    w = finite_vector("w", w).astype(float)
    fit = _Fit(y, w, e, finite_vector("mu0", mu0), finite_vector("mu1", mu1), clip)
    alpha_r, m_r = ate_riesz(w, e)
    estimate = Estimate.from_scores(estimator, fit.mu1 - fit.mu0 + alpha_r * (y - fit.g), clusters=clusters)
    sigma2, nu2 = ovb_scale(y - fit.g, m_r)
    scale = math.sqrt(sigma2 * nu2)
    benchmarks = []
    if X is not None and covariates:
        if folds is None:
            raise SiteproofError("benchmarks need the cross-fitting folds", "pass folds (the sidecar column 'fold')")
        groups = covariate_groups(feature_names, covariates)
        with threadpool_limits(limits=1 if y.size < SMALL_DATA else None, user_api="openmp"):
            strengths = benchmark_strengths(fit, np.asarray(X, dtype=float), groups, np.asarray(folds), mode=mode,
                                            learner=learner, learners=learners, binary_outcome=binary_outcome,
                                            seed=seed)
        for name, (r_d, r_y) in strengths.items():
            kr_d, kr_y = min(k * r_d, R2_CAP), min(k * r_y, 1.0)
            benchmarks.append(Benchmark(name, tuple(feature_names[i] for i in groups[name]), kr_d, kr_y,
                                        float(bias_bound(scale, kr_y, kr_d)), float(k)))
    if realized_bias is not None and not isinstance(realized_bias, Estimate):
        realized_bias = Estimate.from_value("blind − design", float(realized_bias), float("nan"), estimand="difference")
    return SensitivityResult(
        estimator=estimator, estimate=estimate, sigma2=sigma2, nu2=nu2,
        robustness_value=robustness_value(abs(estimate.estimate) / scale),
        robustness_value_alpha=robustness_value_alpha(estimate.estimate, estimate.se, scale, alpha),
        benchmarks=benchmarks, realized_bias=realized_bias, alpha=alpha, mode=mode,
    )


def sensitivity_for_claims(
    study: Study, units: pd.DataFrame, included: np.ndarray | None = None,
    realized_bias: Estimate | float | None = None, *, clip: tuple[float, float] = (0.01, 0.99), k: float = 1.0,
    mode: str = "project", seed: int = 0,
) -> SensitivityResult:
    """:func:`sensitivity_analysis` of the blind AIPW from a study and its claims' per-unit sidecar
    (columns ``e_hat``, ``mu0``, ``mu1``, ``fold``), on the ``included`` units (default: all), benchmarked on
    every covariate of the study — the hook for ``run_unmask`` (``realized_bias`` = the AIPW comparison's D).
    With ``study.cluster`` set the SE is cluster-robust over the included units' clusters."""
    data = study.blind
    rows = np.ones(data.n, dtype=bool) if included is None else np.asarray(included, dtype=bool)
    side = units.loc[rows]
    clusters = None if study.cluster is None else np.asarray(study.cluster, dtype=object)[rows]
    return sensitivity_analysis(
        data.y[rows], data.w[rows], side["e_hat"].to_numpy(float), side["mu0"].to_numpy(float),
        side["mu1"].to_numpy(float), X=data.X[rows], feature_names=data.feature_names, covariates=data.covariates,
        folds=side["fold"].to_numpy(), realized_bias=realized_bias, k=k, mode=mode, clip=clip,
        binary_outcome=data.binary_outcome, seed=seed, clusters=clusters,
    )
