"""The blind analysis: what a careful observational analyst concludes without ever seeing the site labels.

:func:`run_blind` takes a :class:`~siteproof.intake.study.BlindData` (which has no site field, so blindness holds by
construction) and runs, in order:

1. K-fold cross-fitting of the nuisances ê(x), μ̂₀(x), μ̂₁(x), m̂(x) (``nuisance``);
2. overlap and balance diagnostics and the average-effect estimators, each with per-unit scores (``average``);
3. the CATE models, out-of-fold (``effects``), and their evaluation with the blind AIPW scores (``evaluation``);
4. the learned treatment rules and their doubly robust values (``rules``);
5. the locked analysis plan — alpha, multiplicity method, every margin, the primary claims — with its SHA-256
   (``plan``), fixed here, before any site is seen.

Every figure is recorded as a claim with SE and 95 % CI in a :class:`Claims` object; per-unit quantities go to
the sidecar table that the unmask step re-scores with the known rates.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

from .. import __version__
from .average import (
    aipw,
    balance_table,
    covariate_auc_warnings,
    ipw_hajek,
    naive,
    overlap_summary,
    overlap_weighted,
    regression_adjusted,
)
from .binning import fold_bins
from .bootstrap import shared_rank_metrics
from .effects import CATE_KEYS, CateFit, fit_cate
from ..core.errors import SiteproofError
from .costcurve import cost_curve
from .evaluation import RankResult, blp, gates, r_loss_comparison
from .nuisance import Nuisances, cross_fit_nuisances, make_folds
from .rules import TreeRule, budget_rule, cross_fitted_tree, rule_value, threshold_rule
from ..core.scores import arm_scores
from ..intake.study import BlindData, Study
from .claims import CLAIMS_SCHEMA, CLAIMS_VERSION, Claims, rule_column, rule_name, score_column, tau_column
from .plan import build_plan, check_multiplicity
from ..core.checks import alpha_level
from ..core.interpret import ALPHA, DEFAULT_MULTIPLICITY, DEFAULT_PRIMARY

ATE_ESTIMATORS = ("naive", "regression", "ipw", "aipw", "overlap")
SMALL_DATA = 20_000  # below this many units the boosting fits run on one OpenMP thread (see _thread_limit)


@dataclass(frozen=True)
class BlindConfig:
    """Settings of the blind analysis (every random step is driven by ``seed``)."""

    folds: int = 5
    seed: int = 2026
    clip: tuple[float, float] = (0.01, 0.99)
    models: tuple[str, ...] = CATE_KEYS
    gates_groups: int = 5
    n_boot: int = 200
    budgets: tuple[float, ...] = (0.1, 0.2, 0.3, 0.4, 0.5)
    tree: bool = True
    tree_bins: int = 32
    threads: int | None = None
    margin: float | None = None
    alpha: float = ALPHA
    multiplicity: str = DEFAULT_MULTIPLICITY
    primary: tuple[str, ...] = DEFAULT_PRIMARY
    nuisance_learners: dict[str, Any] | None = field(default=None, compare=False)
    cate_learner: Any = field(default=None, compare=False)

    def __post_init__(self) -> None:
        self.validate()

    def validate(self) -> None:
        """Raise :class:`SiteproofError` for settings that cannot work."""
        if self.folds < 2:
            raise SiteproofError(f"folds = {self.folds}: cross-fitting needs at least 2 folds", "use folds ≥ 2 (default 5)")
        if self.tree_bins < 2:
            raise SiteproofError(f"tree_bins = {self.tree_bins}: a split needs at least 2 bins", "use tree_bins ≥ 2 (default 32)")
        if self.seed < 0:
            raise SiteproofError(f"seed = {self.seed} is negative", "use a seed ≥ 0")
        repeated = sorted({m for m in self.models if self.models.count(m) > 1})
        if repeated:
            raise SiteproofError(f"effect model(s) listed twice: {', '.join(repeated)}", "list each model once")
        unknown = [m for m in self.models if m not in CATE_KEYS]
        if unknown:
            raise SiteproofError(
                f"unknown effect model(s) {', '.join(unknown)}", f"choose among {', '.join(CATE_KEYS)}"
            )
        if "constant" not in self.models:
            raise SiteproofError(
                "the constant-effect model is missing from the model list",
                "keep 'constant': every R-loss comparison is made against it",
            )
        lo, hi = self.clip
        if not 0 <= lo < 0.5 < hi <= 1:
            raise SiteproofError(f"clipping bounds {self.clip} are not 0 ≤ low < 0.5 < high ≤ 1", "use e.g. 0.01,0.99")
        if any(not 0 < q < 1 for q in self.budgets):
            raise SiteproofError("budget shares must lie strictly between 0 and 1", "use e.g. 0.1,0.2,0.3")
        if len(set(self.budgets)) < len(self.budgets):
            raise SiteproofError("a budget share is listed twice", "list each budget share once")
        if self.gates_groups < 2:
            raise SiteproofError("GATES needs at least 2 groups", "set gates_groups ≥ 2")
        if self.threads is not None and self.threads < 1:
            raise SiteproofError(f"threads = {self.threads} is not a positive count", "use threads ≥ 1, or None for the default")
        if self.n_boot < 20:
            raise SiteproofError("too few bootstrap draws for an SE", "use n_boot ≥ 20 (default 200)")
        if self.margin is not None and not (np.isfinite(self.margin) and self.margin > 0):
            raise SiteproofError(f"the equivalence margin is {self.margin}", "give a positive number in outcome units")
        alpha_level(self.alpha, upper=0.5)
        check_multiplicity(self.multiplicity)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready settings (learner objects are described by their class names)."""
        return {
            "folds": self.folds,
            "seed": self.seed,
            "clip": list(self.clip),
            "models": list(self.models),
            "gates_groups": self.gates_groups,
            "n_boot": self.n_boot,
            "budgets": list(self.budgets),
            "tree": self.tree,
            "tree_bins": self.tree_bins,
            "threads": self.threads,
            "margin": self.margin,
            "alpha": self.alpha,
            "multiplicity": self.multiplicity,
            "primary": list(self.primary),
            "nuisance_learners": "default" if self.nuisance_learners is None else "user-supplied",
            "cate_learner": "default" if self.cate_learner is None else type(self.cate_learner).__name__,
        }


def _timed(timings: dict[str, float], key: str, start: float) -> float:
    now = time.perf_counter()
    timings[key] = timings.get(key, 0.0) + now - start
    return now


def _ate_claims(data: BlindData, nuis: Nuisances) -> list:
    """The five average-effect estimators, each an Estimate with per-unit scores."""
    y, w, e, c = data.y, data.w, nuis.e_hat, data.clusters
    return [
        naive(y, w, c),
        regression_adjusted(data.X, y, w, c),
        ipw_hajek(y, w, e, c),
        aipw(y, w, e, nuis.mu0, nuis.mu1, c),
        overlap_weighted(y, w, e, c),
    ]


def _tau_summary(tau: np.ndarray) -> dict[str, float]:
    q = np.quantile(tau, [0.1, 0.5, 0.9])
    return {"mean": float(tau.mean()), "sd": float(tau.std(ddof=1)), "q10": float(q[0]), "q50": float(q[1]), "q90": float(q[2])}


def _evaluate_model(
    key: str, tau: np.ndarray, tau_const: np.ndarray, data: BlindData, nuis: Nuisances,
    gamma: np.ndarray, config: BlindConfig, ranks: dict[str, RankResult],
) -> dict[str, Any]:
    """All evaluation figures of one CATE model, with the blind AIPW scores."""
    y, w, e, c = data.y, data.w, nuis.e_hat, data.clusters
    out: dict[str, Any] = {"model": key, "tau_summary": _tau_summary(tau)}
    out["r_loss"] = r_loss_comparison(y, w, e, nuis.m_hat, tau, tau_const, clusters=c).to_dict()
    if key == "constant":
        return out
    out["gates"] = gates(tau, gamma, k=config.gates_groups, clusters=c).to_dict()
    out["blp"] = blp(y, w, e, tau, nuis.mu0, clusters=c).to_dict()
    for kind in ("autoc", "qini"):
        out[kind] = ranks[kind].to_dict()
    if data.cost is not None:
        out["cost_curve"] = cost_curve(tau, gamma, data.cost, clusters=c).to_dict()
    return out


def _rule_claims(
    data: BlindData, nuis: Nuisances, fits: dict[str, CateFit], config: BlindConfig,
) -> tuple[list[dict[str, Any]], dict[str, np.ndarray], TreeRule | None]:
    """Threshold, budget and depth-2 tree rules with their doubly robust values."""
    gamma0, gamma1 = arm_scores(data.y, data.w, nuis.e_hat, nuis.mu0, nuis.mu1)
    records: list[dict[str, Any]] = []
    assignments: dict[str, np.ndarray] = {}

    def add(model: str | None, kind: str, budget: float | None, pi: np.ndarray, text: str = "") -> None:
        name = rule_name(model, kind, budget)
        value = rule_value(pi, gamma0, gamma1, data.cost, clusters=data.clusters)
        rec = {"rule": name, "model": model, "kind": kind, "budget": budget, **value.to_dict()}
        if text:
            rec["tree_text"] = text
        records.append(rec)
        assignments[name] = pi

    for key, fit in fits.items():
        if key == "constant":
            continue
        add(key, "threshold", None, threshold_rule(fit.tau, data.cost))
        for q in config.budgets:
            add(key, "budget", q, budget_rule(fit.tau, q))
    tree = None
    if config.tree:
        pi_tree, tree, _ = cross_fitted_tree(
            data.X, gamma0, gamma1, nuis.folds, data.feature_names, cost=data.cost, max_bins=config.tree_bins
        )
        add(None, "tree", None, pi_tree, tree.to_text())
    return records, assignments, tree


def _units_table(
    data: BlindData, nuis: Nuisances, ates: list, fits: dict[str, CateFit], rules: dict[str, np.ndarray]
) -> pd.DataFrame:
    """The per-unit sidecar (docs/claims-format.md)."""
    cols: dict[str, Any] = {
        "row_key": data.row_key.astype(str),
        "fold": nuis.folds.astype(np.int16),
        "e_hat": nuis.e_hat,
        "e_raw": nuis.e_raw,
        "mu0": nuis.mu0,
        "mu1": nuis.mu1,
        "m_hat": nuis.m_hat,
    }
    cols.update({score_column(est.name): est.scores for est in ates})
    cols.update({tau_column(key): fit.tau for key, fit in fits.items()})
    cols.update({rule_column(name): pi.astype(np.int8) for name, pi in rules.items()})
    return pd.DataFrame(cols)


def _data_record(data: BlindData) -> dict[str, Any]:
    return {
        "n": int(data.y.size),
        "outcome": data.outcome,
        "treatment": data.treatment,
        "treated_value": data.treated_value,
        "covariates": list(data.covariates),
        "features": list(data.feature_names),
        "binary_outcome": bool(data.binary_outcome),
        "excluded": dict(data.n_excluded),
        "outcome_sd": float(data.outcome_sd()),
        "has_cost": data.cost is not None,
        "n_treated": int(data.w.sum()),
        "clustered": data.clusters is not None,
        "n_clusters": data.n_clusters,
    }


def run_blind(
    data: Study | BlindData, config: BlindConfig | None = None, progress: Callable[[str], None] | None = None
) -> Claims:
    """Run the whole blind analysis on ``data`` and return its claims.

    A :class:`Study` is reduced to its blind view ``study.blind`` first, so the site never reaches this code.

    ``progress`` is called with a short label after each model fit (see :func:`count_fits` for the total).
    """
    if isinstance(data, Study):
        data = data.blind
    config = config or BlindConfig()
    with threadpool_limits(limits=_thread_limit(config, data.y.size), user_api="openmp"):
        return _run_blind(data, config, progress)


def _thread_limit(config: BlindConfig, n: int) -> int | None:
    """OpenMP threads for the boosting fits: ``config.threads``, else one thread below 20 000 units.

    On small data a boosting fit gains little from threads, and when the cores are shared (several analyses,
    a Monte Carlo study) threads that wait for descheduled siblings slow it by an order of magnitude; large
    data keep every core (None = no limit).
    """
    if config.threads is not None:
        return config.threads
    return 1 if n < SMALL_DATA else None


def _run_blind(data: BlindData, config: BlindConfig, progress: Callable[[str], None] | None) -> Claims:
    tick = progress or (lambda label="": None)
    timings: dict[str, float] = {}
    t0 = start = time.perf_counter()

    folds = make_folds(data.w, config.folds, config.seed, groups=data.clusters)
    nuis = cross_fit_nuisances(
        data.X, data.y, data.w, folds, binary_outcome=data.binary_outcome,
        learners=config.nuisance_learners, clip=config.clip, seed=config.seed, progress=tick,
    )
    start = _timed(timings, "nuisances", start)

    ates = _ate_claims(data, nuis)
    overlap = overlap_summary(nuis.e_raw, data.w, config.clip)
    balance = balance_table(data.X, data.w, nuis.e_hat, data.feature_names)
    auc_flags = covariate_auc_warnings(data.X, data.w, folds, data.feature_names)
    start = _timed(timings, "average", start)

    bins = fold_bins(data.X, folds, config.seed) if config.cate_learner is None else None
    fits = {
        key: fit_cate(
            key, data.X, data.y, data.w, e_hat=nuis.e_hat, mu0=nuis.mu0, mu1=nuis.mu1, m_hat=nuis.m_hat,
            folds=folds, binary_outcome=data.binary_outcome, learner=config.cate_learner, seed=config.seed,
            progress=tick, nuisance_models=nuis.models, bins=bins,
        )
        for key in config.models
    }
    start = _timed(timings, "effects", start)

    gamma = ates[ATE_ESTIMATORS.index("aipw")].scores
    tau_const = fits["constant"].tau
    ranks = shared_rank_metrics({k: f.tau for k, f in fits.items() if k != "constant"}, gamma,
                                n_boot=config.n_boot, seed=config.seed, clusters=data.clusters)
    cate = [_evaluate_model(k, f.tau, tau_const, data, nuis, gamma, config, ranks.get(k, {})) for k, f in fits.items()]
    start = _timed(timings, "evaluation", start)

    rule_records, assignments, tree = _rule_claims(data, nuis, fits, config)
    start = _timed(timings, "rules", start)

    warnings = [
        f"covariate {name} alone predicts treatment with out-of-fold AUC {auc:.2f} > 0.9: "
        "a likely post-treatment or design variable" for name, auc in auc_flags
    ]
    timings["total"] = time.perf_counter() - t0
    record = {
        "schema": CLAIMS_SCHEMA,
        "version": CLAIMS_VERSION,
        "siteproof_version": __version__,
        "fingerprint": data.fingerprint,
        "settings": config.to_dict(),
        "data": _data_record(data),
        "nuisance": nuis.to_dict(),
        "overlap": overlap,
        "balance": balance.to_dict(orient="records"),
        "warnings": warnings,
        "ate": [{"estimator": est.name, **est.to_dict()} for est in ates],
        "cate": cate,
        "rules": rule_records,
        "timings": {k: round(v, 3) for k, v in timings.items()},
    }
    record["plan"] = build_plan(record, data.y, data.w, nuis.mu0, nuis.mu1, margin=config.margin,
                                alpha=config.alpha, multiplicity=config.multiplicity, primary=config.primary)
    units = _units_table(data, nuis, ates, fits, assignments)
    return Claims(record=record, units=units, cate_fits=fits, tree=tree)


def count_fits(config: BlindConfig) -> int:
    """Number of progress ticks of :func:`run_blind`: one per nuisance candidate and fold, one per effect
    model and fold (the progress-bar total)."""
    candidates = 2 if config.nuisance_learners is None else 1
    return config.folds * (4 * candidates + len(config.models))
