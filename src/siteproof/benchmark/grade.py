"""Grading: design-based metrics of every submission against the sealed key → a ranked :class:`Leaderboard`.

The scores are design-based: with the known rate e_S and outcome models μ̂₀, μ̂₁ cross-fitted on the key side
from X only, the oracle doubly robust arm scores (Robins, Rotnitzky & Zhao 1994)

    Γ₁ = μ̂₁(X) + W (Y − μ̂₁(X)) / e_S,    Γ₀ = μ̂₀(X) + (1 − W)(Y − μ̂₀(X)) / (1 − e_S),    Γ = Γ₁ − Γ₀

are unbiased for the unit's effect given (X, S) whatever μ̂ is, so every metric of a submission made from X
alone is honest:

* **AUTOC** and **Qini coefficient** of the τ̂ ranking scored with Γ (Yadlowsky, Fleming, Shah, Brunskill &
  Wager, rank-weighted average treatment effects), half-sample bootstrap SE (``evaluation.rank_metric``);
* **BLP β₂**: the heterogeneity loading of τ̂ in the weighted regression of Y on [1, μ̂₀, W − e_S,
  (W − e_S)(τ̂ − τ̄)] with weights 1/(e_S(1 − e_S)), HC2 SE (Chernozhukov, Demirer, Duflo & Fernández-Val);
* **rule gain** of the submitted ``treat`` over random allocation with the same treated share q̂,
  mean[(π − q̂)(D − D̄)] with D = Γ₁ − Γ₀ − cost (Imai & Li 2023), SE from its influence function;
* **ATE error**: submitted ATE − the design-based ATE of the graded units, Γ̄ (the known-rate AIPW mean). Its SE
  is that of the submission's own error, from the per-unit differences d_i = â − Γ_i + (τ̂_i − mean τ̂) paired
  with the design scores (the τ̂ term, zero on average, is present when the submission has ``tau_hat``):
  sd(d)/√n. Since E[(Γ_i − τ̂_i)²] = Var(Γ_i) + (τ_i − τ̂_i)² ≥ Var(Γ_i), it is conservative for the sample
  ATE's error, as Neyman's (1923) variance is, and tighter the better τ̂ tracks the unit effects. Whether the
  submitted 95 % CI covers Γ̄ is reported beside it.

**Clusters.** When the key records clusters (a clustered study; the holdout then holds out whole clusters),
units of one cluster are correlated and every SE is cluster-robust: the means (design ATE, ATE error, rule
gain) use cluster sums of the per-unit scores, V = G/(G − 1)·Σ_g (Σ_{i∈g}(ψ_i − ψ̄))²/n² (Liang & Zeger 1986);
AUTOC, Qini and BLP β₂ take the SD of their replicates on half-samples of whole clusters
(``core.clusters.cluster_half_samples``), and the tie comparisons use the same cluster half-samples. With one
unit per cluster the cluster sum formula is the unit formula sd(ψ)/√n.

Only the graded units count: with a holdout share (the default) the held-out ones, whose outcome and treatment
were never published, so a prediction built from published outcomes gains nothing; without one every unit is
graded and the leaderboard says the grading is in-sample. An invalid submission is listed without a rank, with
the reason, and the others are graded. The ranking and its ties are in :mod:`siteproof.benchmark.standings`.
Nothing that names a site leaves the grader unless ``reveal=True``; the design-based answers (the design ATE,
ATE errors, CI coverage) are withheld from the outputs unless ``withhold_answers=False``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from ..blind.evaluation import blp, half_samples, rank_metric
from ..blind.rules import rule_value
from ..core.clusters import cluster_half_samples, cluster_mean_se
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..core.scores import arm_scores
from ..intake.sitetrials import site_table
from .key import BenchmarkKey, public_check, read_key
from .standings import ANSWER_METRICS, METRICS, GradedSubmission, Leaderboard, rank_entries
from .submissions import Submission, read_submission, submission_files


@dataclass(frozen=True, eq=False)
class _Grader:
    """Design-based ingredients shared by every submission: graded units, scores, half-samples, design ATE."""

    graded: np.ndarray
    y: np.ndarray
    w: np.ndarray
    e: np.ndarray
    mu0: np.ndarray
    gamma0: np.ndarray
    gamma1: np.ndarray
    cost: np.ndarray | None
    site: np.ndarray
    halves: list[np.ndarray]
    design: Estimate
    n_boot: int
    seed: int
    clusters: np.ndarray | None = None

    @classmethod
    def from_key(cls, key: BenchmarkKey, n_boot: int, seed: int) -> "_Grader":
        """Scores of the graded units and their design-based ATE Γ̄ with SE sd(Γ)/√n."""
        u, g = key.units, key.graded
        y, w, e, mu0, mu1 = (u[c].to_numpy(dtype=float)[g] for c in ("y", "w", "rate", "mu0", "mu1"))
        gamma0, gamma1 = arm_scores(y, w, e, mu0, mu1)
        clusters = None if key.clusters is None else key.clusters[g]
        design = Estimate.from_scores("design_ate", gamma1 - gamma0, clusters=clusters,
                                      estimand="ATE of the graded units (AIPW with the known rates)")
        cost = u["cost"].to_numpy(dtype=float)[g] if u["cost"].notna().all() else None
        halves = (_halves(int(g.sum()), n_boot, seed) if clusters is None
                  else list(cluster_half_samples(clusters, n_boot, seed)))
        return cls(graded=g, y=y, w=w, e=e, mu0=mu0, gamma0=gamma0, gamma1=gamma1, cost=cost,
                   site=u["site"].to_numpy(dtype=object)[g], halves=halves,
                   design=design, n_boot=n_boot, seed=seed, clusters=clusters)

    @property
    def gamma(self) -> np.ndarray:
        """Γ = Γ₁ − Γ₀ of the graded units."""
        return self.gamma1 - self.gamma0


def _stratum(units: pd.DataFrame) -> np.ndarray | None:
    """The key's stratum column, or None when the benchmark has no strata."""
    return units["stratum"].to_numpy(dtype=object) if units["stratum"].notna().any() else None


def _halves(n: int, n_boot: int, seed: int) -> list[np.ndarray]:
    """Unit indices of the n_boot half-samples of n//2 units: the draws of ``evaluation.half_samples``."""
    return list(np.concatenate(list(half_samples(n, n_boot, seed)), axis=0))


def _half_means(halves: list[np.ndarray], scores: np.ndarray) -> np.ndarray:
    """Replicate of a mean of per-unit scores on each half-sample."""
    return np.array([scores[half].mean() for half in halves])


def _cluster_se(estimate: Estimate, scores: np.ndarray, clusters: np.ndarray | None) -> Estimate:
    """``estimate`` with the cluster-robust SE of the mean of ``scores`` (unchanged without clusters)."""
    if clusters is None:
        return estimate
    return Estimate.from_value(estimate.name, estimate.estimate, cluster_mean_se(scores, clusters),
                               estimand=estimate.estimand, scores=scores, note=estimate.note)


def grade_submissions(
    key_dir: Path | str,
    submissions: Sequence[Path | str],
    *,
    rank_by: str = "autoc",
    reveal: bool = False,
    withhold_answers: bool = True,
    n_boot: int = 200,
    seed: int | None = None,
    public_data: Path | str | None = None,
) -> Leaderboard:
    """Grade submission CSVs (files or folders) against a sealed key → :class:`Leaderboard` (rank order).

    The public data file (``public_data``, default ``key/../public/data.csv``) is checked against the sealed
    SHA-256 when present. ``seed`` (default: the key's) fixes the half-samples, so grading is reproducible and
    every submission is scored on the same draws. A submission that cannot be graded is listed last with its
    ``problem``. ``reveal`` adds per-site details (site labels, design estimates by site, mean τ̂ by site);
    without it no output names a site. ``withhold_answers`` keeps the design-based values (design ATE, ATE
    errors, CI coverage, per-site estimates) out of the written and printed leaderboard.
    """
    if rank_by not in METRICS:
        raise SiteproofError(f"unknown ranking metric {rank_by!r}", f"use one of {', '.join(METRICS)}")
    if isinstance(n_boot, bool) or not isinstance(n_boot, int) or n_boot < 2:
        raise SiteproofError(f"n_boot is {n_boot!r}", "use a whole number of at least 2 half-samples (default 200)")
    key = read_key(key_dir)
    check = public_check(key, public_data)
    seed = int(key.meta["seed"] if seed is None else seed)
    files = submission_files(submissions)
    grader = _Grader.from_key(key, n_boot, seed)
    taken: dict[str, Path] = {}
    graded = [_grade_file(path, key, grader, reveal, rank_by, taken) for path in files]
    entries = rank_entries(graded, rank_by, show_gaps=not (withhold_answers and rank_by in ANSWER_METRICS))
    benchmark = {"name": key.meta["name"], "benchmark_id": key.benchmark_id, "n": key.meta["n"],
                 "n_graded": int(key.graded.sum()), "holdout_share": key.meta["holdout_share"]}
    sites = _site_details(key) if reveal else None
    return Leaderboard(entries, rank_by, benchmark, grader.design, int(key.graded.sum()), n_boot, seed,
                       check, reveal, sites, withhold_answers=bool(withhold_answers))


def _grade_file(
    path: Path, key: BenchmarkKey, grader: _Grader, reveal: bool, rank_by: str, taken: dict[str, Path],
) -> GradedSubmission:
    """One submission graded, or listed with the one-line reason it cannot be (``taken``: names so far)."""
    try:
        sub = read_submission(path, key)
        if sub.name in taken:
            raise SiteproofError(f"another submission ({taken[sub.name].name}) is also called {sub.name!r}",
                                 "give each a distinct file name or name = \"...\" in its TOML")
        taken[sub.name] = path
        return _grade(sub, grader, reveal, rank_by)
    except SiteproofError as exc:
        return GradedSubmission(path.stem, path.name, {}, None, None, None, problem=" ".join(str(exc).split()))


def _grade(sub: Submission, grader: _Grader, reveal: bool, rank_by: str) -> GradedSubmission:
    """Every metric the submission allows, with half-sample replicates for the tie comparisons."""
    metrics: dict[str, Estimate] = {}
    replicates: dict[str, np.ndarray] = {}
    tau = None if sub.tau_hat is None else sub.tau_hat[grader.graded]
    if tau is not None:
        _tau_metrics(tau, grader, rank_by == "blp_beta2", metrics, replicates)
    treated_share = None
    if sub.treat is not None:
        value = rule_value(sub.treat[grader.graded], grader.gamma0, grader.gamma1, grader.cost)
        metrics["rule_gain"] = _cluster_se(replace(value.gain, name="rule_gain"), np.asarray(value.gain.scores),
                                           grader.clusters)
        replicates["rule_gain"] = _half_means(grader.halves, np.asarray(value.gain.scores))
        treated_share = value.treated_share
    covers = None
    if sub.ate is not None:
        metrics["ate_error"], replicates["ate_error"] = _ate_error(sub.ate.estimate, tau, grader)
        covers = bool(sub.ate.ci[0] <= grader.design.estimate <= sub.ate.ci[1])
    site_means = None
    if reveal and tau is not None:
        site_means = {str(k): float(v) for k, v in pd.Series(tau).groupby(grader.site).mean().items()}
    return GradedSubmission(sub.name, sub.path.name, metrics, treated_share, sub.ate, covers,
                            site_means=site_means, replicates=replicates)


def _ate_error(ate: float, tau: np.ndarray | None, grader: _Grader) -> tuple[Estimate, np.ndarray]:
    """â − Γ̄ from the paired per-unit differences d_i = â − Γ_i (+ τ̂_i − mean τ̂); SE sd(d)/√n."""
    d = ate - grader.gamma
    if tau is not None:
        d = d + (tau - tau.mean())
    error = Estimate.from_scores("ate_error", d, clusters=grader.clusters,
                                 estimand="submitted ATE − design ATE of the graded units")
    return error, _half_means(grader.halves, d)


def _tau_metrics(
    tau: np.ndarray, grader: _Grader, beta2_replicates: bool,
    metrics: dict[str, Estimate], replicates: dict[str, np.ndarray],
) -> None:
    """AUTOC, Qini (replicates from ``rank_metric``) and BLP β₂ of τ̂ on the graded units, added in place.

    BLP β₂ replicates need one regression per half-sample, so they are computed only when β₂ ranks.
    """
    for kind in ("autoc", "qini"):
        result = rank_metric(tau, grader.gamma, kind=kind, n_boot=grader.n_boot, seed=grader.seed)
        metrics[kind] = replace(result.estimate_of(0), name=kind)
        replicates[kind] = result.boot[:, 0]
        if grader.clusters is not None:
            replicates[kind] = np.array([rank_metric(tau[h], grader.gamma[h], kind=kind, n_boot=2,
                                                     seed=grader.seed).estimate_of(0).estimate
                                         for h in grader.halves])
            metrics[kind] = _from_replicates(metrics[kind], replicates[kind])
    metrics["blp_beta2"], replicates["blp_beta2"] = _blp_beta2(tau, grader, beta2_replicates or
                                                               grader.clusters is not None)
    if grader.clusters is not None:
        metrics["blp_beta2"] = _from_replicates(metrics["blp_beta2"], replicates["blp_beta2"])


def _from_replicates(estimate: Estimate, reps: np.ndarray) -> Estimate:
    """``estimate`` with SE = SD of its cluster half-sample replicates: with h = G/2 of G clusters drawn without
    replacement a half-sample statistic varies with variance ≈ S²(1/h − 1/G) = S²/G, the full-sample variance
    (``core.clusters.cluster_half_samples``). NaN replicates (an undefined β₂) are left out."""
    finite = reps[np.isfinite(reps)]
    if not np.isfinite(estimate.estimate) or finite.size < 2:
        return estimate
    return Estimate.from_value(estimate.name, estimate.estimate, float(np.std(finite, ddof=1)),
                               estimand=estimate.estimand, scores=estimate.scores, note=estimate.note)


def _blp_beta2(tau: np.ndarray, grader: _Grader, with_replicates: bool) -> tuple[Estimate, np.ndarray]:
    """BLP β₂ with known rates and μ̂₀ as baseline; replicates on the shared half-samples.

    β₂ is undefined (NaN) for a τ̂ without variation, and where the regression is singular.
    """
    full = _beta2(grader.y, grader.w, grader.e, tau, grader.mu0)
    reps = np.full(len(grader.halves), np.nan)
    if with_replicates and np.isfinite(full.estimate):
        for b, half in enumerate(grader.halves):
            reps[b] = _beta2(grader.y[half], grader.w[half], grader.e[half], tau[half], grader.mu0[half]).estimate
    return full, reps


def _beta2(y: np.ndarray, w: np.ndarray, e: np.ndarray, tau: np.ndarray, baseline: np.ndarray) -> Estimate:
    """β₂ of ``evaluation.blp`` renamed ``blp_beta2``; NaN for a constant τ̂ or a singular regression."""
    undefined = Estimate.from_value("blp_beta2", math.nan, math.nan, estimand="BLP")
    if np.ptp(tau) == 0:
        return undefined
    try:
        return replace(blp(y, w, e, tau, baseline).beta2, name="blp_beta2")
    except SiteproofError:
        return undefined


def _site_details(key: BenchmarkKey) -> pd.DataFrame:
    """Per-site design table for ``reveal``: sizes, known rate, difference in means with Neyman SE."""
    u = key.units
    table = site_table(u["y"].to_numpy(dtype=float), u["w"].to_numpy(dtype=int), u["site"].to_numpy(dtype=object),
                       known_rate=u["rate"].to_numpy(dtype=float), stratum=_stratum(u))
    rate = u.groupby("site")["rate"].mean()
    table["rate_known"] = table["site"].map(rate)
    return table[["site", "n", "n_treated", "rate_known", "difference_in_means", "se"]]
