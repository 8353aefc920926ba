"""Folds and cross-fitted nuisance functions: propensity ê(x), arm regressions μ̂₀, μ̂₁ and m̂(x) = E[Y | X].

Cross-fitting (Chernozhukov et al. 2018): the units are split into K folds, stratified on treatment.  For each
fold k, every nuisance model is trained on the units *outside* fold k and predicts for the units *inside* fold
k, so no unit's prediction comes from a model that saw that unit.  Exactly:

* ê(x_i)  — classifier of W on X, trained on all units of the other folds;
* μ̂₀(x_i) — model of Y on X, trained on the control units (W = 0) of the other folds;
* μ̂₁(x_i) — model of Y on X, trained on the treated units (W = 1) of the other folds;
* m̂(x_i)  — model of Y on X, trained on all units of the other folds.

Each nuisance has candidate learners (by default histogram gradient boosting and a regularised
logistic / ridge model on standardised features); every candidate is cross-fitted, the one with the lower
out-of-fold loss is kept and the pick and all losses are reported.  Losses: log-loss for ê and, with a 0/1
outcome, for μ̂₀, μ̂₁ and m̂ (fitted by classifiers, predictions P(Y = 1 | X)); mean squared error otherwise.
μ̂_a's loss is computed on the arm-a units only (the only units whose outcome is observed under arm a).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin, is_classifier
from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from ..core.checks import finite_matrix, finite_vector
from ..core.clusters import cluster_codes
from ..core.errors import SiteproofError
from ..core.learners import fit_model, predict_model

NUISANCE_NAMES = ("propensity", "mu0", "mu1", "m")
_PROB_FLOOR = 1e-15
_RIDGE_ALPHAS = tuple(float(a) for a in np.logspace(-3, 3, 13))
_ROW_BLOCK = 1 << 15


def make_folds(w: np.ndarray, k: int = 5, seed: int = 0, groups: Any = None) -> np.ndarray:
    """Fold ids 0..k−1 stratified on treatment: each arm is shuffled (seeded) and dealt round-robin.

    The treated arm's deal starts where the control arm's ended, so fold sizes differ by at most one and
    each arm's fold counts differ by at most one.  An arm with fewer than k units cannot be split (some
    fold would lack that arm) and raises :class:`SiteproofError`.  With ``groups`` (one cluster label per
    unit) whole groups are dealt instead, see :func:`_group_folds`.
    """
    w = _as_treatment(w)
    if int(k) != k or k < 2:
        raise SiteproofError(
            f"the number of folds must be an integer ≥ 2, got {k}", "use k = 5 (the default) or more"
        )
    k = int(k)
    if groups is not None:
        return _group_folds(w, k, seed, groups)
    rng = np.random.default_rng(seed)
    folds = np.empty(w.size, dtype=np.int64)
    offset = 0
    for arm in (0, 1):
        idx = np.flatnonzero(w == arm)
        if idx.size < k:
            label = "treated" if arm else "control"
            raise SiteproofError(
                f"the {label} arm has {idx.size} units, fewer than the {k} folds",
                "use fewer folds or data with more units in each arm",
            )
        folds[idx[rng.permutation(idx.size)]] = (np.arange(idx.size) + offset) % k
        offset = (offset + idx.size) % k
    return folds


def _group_folds(w: np.ndarray, k: int, seed: int, groups: Any) -> np.ndarray:
    """Fold ids with no group split across folds, balanced on both arms by a seeded greedy deal.

    Groups are taken largest first (a seeded shuffle breaks ties in size) and each goes to the fold where it
    raises Σ_f Σ_a (c_fa / N_a)² least — c_fa the fold's units of arm a, N_a the arm's total — i.e. the fold
    whose arm shares it fills least (ties: a seeded random fold).  A group of one arm thus goes to the fold
    with the fewest units of that arm, so each arm's fold counts differ by at most that arm's largest group
    (list scheduling, Graham 1969).  Keeping groups whole stops a unit's out-of-fold models from training
    on its cluster-mates, who carry its cluster's arm and outcome level.  Fewer groups than folds, or a
    fold left without one arm, raise :class:`SiteproofError`.
    """
    codes, labels = cluster_codes(groups, w.size)
    n_groups = labels.size
    if n_groups < k:
        raise SiteproofError(f"{n_groups} groups cannot fill {k} folds without splitting a group",
                             "use fewer folds or data with more clusters")
    arms = np.column_stack([np.bincount(codes, weights=1.0 - w, minlength=n_groups),
                            np.bincount(codes, weights=w.astype(float), minlength=n_groups)])
    totals = np.maximum(arms.sum(axis=0), 1.0)
    rng = np.random.default_rng(seed)
    order = rng.permutation(n_groups)
    order = order[np.argsort(-arms[order].sum(axis=1), kind="stable")]
    counts = np.zeros((k, 2))
    group_fold = np.empty(n_groups, dtype=np.int64)
    for g in order:
        raise_by = ((arms[g] * (2.0 * counts + arms[g])) / totals ** 2).sum(axis=1)
        fold = int(np.lexsort((rng.random(k), raise_by))[0])
        group_fold[g] = fold
        counts[fold] += arms[g]
    empty = np.flatnonzero(counts.min(axis=1) == 0)
    if empty.size:
        raise SiteproofError(f"fold {int(empty[0])} has no unit of one arm when whole groups are kept together",
                             "use fewer folds or data with more clusters in each arm")
    return group_fold[codes]


@dataclass(frozen=True)
class Nuisances:
    """Out-of-fold nuisance predictions, the learner picked for each and the out-of-fold losses.

    ``e_hat`` clipped and ``e_raw`` unclipped propensity; ``mu0``/``mu1`` arm regressions (μ̂_a trained on
    the arm-a units of the other folds); ``m_hat`` = Ê[Y | X]; ``picks`` nuisance → chosen learner label;
    ``losses`` nuisance → label → out-of-fold loss; ``n_clipped`` units with e_raw outside ``clip``.
    """

    e_hat: np.ndarray
    e_raw: np.ndarray
    mu0: np.ndarray
    mu1: np.ndarray
    m_hat: np.ndarray
    folds: np.ndarray
    clip: tuple[float, float]
    n_clipped: int
    picks: dict[str, str]
    losses: dict[str, dict[str, float]]
    models: dict[str, list] = field(default_factory=dict, repr=False)   # picked learner's model per fold

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary without arrays: picks, losses, clip bounds, count clipped, number of folds."""
        return {
            "picks": dict(self.picks),
            "losses": {name: {lab: float(v) for lab, v in d.items()} for name, d in self.losses.items()},
            "clip": [float(self.clip[0]), float(self.clip[1])],
            "n_clipped": int(self.n_clipped),
            "n_folds": int(np.unique(self.folds).size),
        }


def default_learners(binary_outcome: bool, seed: int) -> dict[str, dict[str, Any]]:
    """Candidate learners per nuisance: ``{"boosting": histogram gradient boosting, "linear": ...}``.

    Boosting uses scikit-learn's defaults (with ``random_state=seed``).  The linear alternative is a
    standardised L2 logistic regression (lbfgs, C = 1) for classifiers and :class:`GcvRidge` (standardised
    ridge, penalty chosen by generalised cross-validation) for regressors.
    """
    def classifiers() -> dict[str, Any]:
        return {
            "boosting": HistGradientBoostingClassifier(random_state=seed),
            "linear": make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=1000)),
        }

    def regressors() -> dict[str, Any]:
        return {
            "boosting": HistGradientBoostingRegressor(random_state=seed),
            "linear": GcvRidge(),
        }

    outcome = classifiers if binary_outcome else regressors
    return {"propensity": classifiers(), "mu0": outcome(), "mu1": outcome(), "m": outcome()}


class GcvRidge(RegressorMixin, BaseEstimator):
    """Ridge regression on standardised features, penalty α chosen by generalised cross-validation.

    Minimises Σ_i s_i (ỹ_i − x̃_i'β)² + α‖β‖² on (weighted-)centred y and centred, SD-scaled X; with the
    eigendecomposition G = X̃'SX̃ = V diag(d) V' and c = V'X̃'Sỹ, β_α = V (c / (d + α)),
    RSS(α) = ỹ'Sỹ − Σ_j c_j² (d_j + 2α)/(d_j + α)², df(α) = Σ_j d_j/(d_j + α), and α minimises
    GCV(α) = n·RSS(α)/(n − df(α))² (Golub, Heath & Wahba 1979).  Cost O(np²) once, then O(p) per α; no
    copy of X beyond one row block at a time.
    """

    def __init__(self, alphas: tuple[float, ...] = _RIDGE_ALPHAS) -> None:
        self.alphas = alphas

    def fit(self, X: np.ndarray, y: np.ndarray, sample_weight: np.ndarray | None = None) -> "GcvRidge":
        """Fit on (X, y) with optional non-negative unit weights s_i; sets ``alpha_``, ``coef_``, ``intercept_``."""
        alphas = np.asarray(self.alphas, dtype=float)
        if alphas.size == 0 or np.any(alphas <= 0):
            raise SiteproofError(f"ridge penalties must be positive, got {self.alphas}", "pass alphas > 0")
        X = np.asarray(X, dtype=float)
        y = np.asarray(y, dtype=float)
        sw = np.ones(y.size) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        x_mean, y_mean = (sw @ X) / sw.sum(), float(sw @ y) / sw.sum()
        gram, cross = _centred_cross_products(X, y - y_mean, sw, x_mean)
        scale = np.sqrt(np.diag(gram) / sw.sum())
        scale[scale <= 1e-12 * np.maximum(1.0, np.abs(x_mean))] = 1.0
        d, V = np.linalg.eigh(gram / np.outer(scale, scale))
        d = np.clip(d, 0.0, None)
        c = V.T @ (cross / scale)
        self.alpha_ = _gcv_alpha(alphas, d, c, float(sw @ (y - y_mean) ** 2), y.size)
        self.coef_ = (V @ (c / (d + self.alpha_))) / scale
        self.intercept_ = y_mean - float(x_mean @ self.coef_)
        self.n_features_in_ = X.shape[1]
        return self

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Linear predictor x'β̂ + intercept on the original feature scale."""
        return np.asarray(X, dtype=float) @ self.coef_ + self.intercept_


def _centred_cross_products(
    X: np.ndarray, y_centred: np.ndarray, sw: np.ndarray, x_mean: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """(X − x̄)'S(X − x̄) and (X − x̄)'S ỹ accumulated over row blocks (no full centred copy of X)."""
    gram, cross = np.zeros((X.shape[1],) * 2), np.zeros(X.shape[1])
    for start in range(0, y_centred.size, _ROW_BLOCK):
        block = X[start:start + _ROW_BLOCK] - x_mean
        swb = sw[start:start + _ROW_BLOCK]
        gram += (block * swb[:, None]).T @ block
        cross += block.T @ (swb * y_centred[start:start + _ROW_BLOCK])
    return gram, cross


def _gcv_alpha(alphas: np.ndarray, d: np.ndarray, c: np.ndarray, yy: float, n: int) -> float:
    """argmin_α n·RSS(α)/(n − df(α))², RSS(α) = yy − Σ c²(d + 2α)/(d + α)², df(α) = Σ d/(d + α)."""
    a = alphas[:, None]
    rss = np.clip(yy - np.sum(c**2 * (d + 2 * a) / (d + a) ** 2, axis=1), 0.0, None)
    room = n - np.sum(d / (d + a), axis=1)
    gcv = np.where(room > 0, n * rss / np.maximum(room, 1e-300) ** 2, np.inf)
    return float(alphas[int(np.argmin(gcv))])


def cross_fit_nuisances(
    X: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    folds: np.ndarray,
    *,
    binary_outcome: bool = False,
    learners: Mapping[str, Any] | None = None,
    clip: tuple[float, float] = (0.01, 0.99),
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
) -> Nuisances:
    """Cross-fit ê, μ̂₀, μ̂₁ and m̂ over ``folds`` and keep, per nuisance, the candidate with lower OOF loss.

    ``learners``: None → :func:`default_learners`; otherwise a mapping nuisance name → estimator or
    → {label: estimator} (nuisances not named keep the default candidates).  A bare estimator is labelled
    by its class name.  ``seed`` is the random_state of the default boosting candidates (user estimators
    keep their own).  ``progress(label)`` is called after every model fit.  The propensity is clipped to
    ``clip`` (e_hat); the unclipped values are kept in ``e_raw``.
    """
    X, y, w, folds = _check_inputs(X, y, w, folds, binary_outcome)
    lo, hi = _check_clip(clip)
    candidates = _resolve_learners(learners, binary_outcome, seed)
    tick = progress or (lambda label="": None)
    oof = {name: {label: np.empty(y.size) for label in cands} for name, cands in candidates.items()}
    fitted: dict[str, dict[str, list]] = {name: {label: [] for label in cands} for name, cands in candidates.items()}

    for k in np.unique(folds):
        test = np.flatnonzero(folds == k)
        train = np.flatnonzero(folds != k)
        _fit_fold(X, y, w, train, test, candidates, oof, fitted, tick, k)

    losses = {name: {label: _oof_loss(name, pred, y, w, binary_outcome) for label, pred in preds.items()}
              for name, preds in oof.items()}
    picks = {name: min(loss, key=loss.__getitem__) for name, loss in losses.items()}
    e_raw = oof["propensity"][picks["propensity"]]
    return Nuisances(
        e_hat=np.clip(e_raw, lo, hi),
        e_raw=e_raw,
        mu0=oof["mu0"][picks["mu0"]],
        mu1=oof["mu1"][picks["mu1"]],
        m_hat=oof["m"][picks["m"]],
        folds=folds,
        clip=(lo, hi),
        n_clipped=int(np.count_nonzero((e_raw < lo) | (e_raw > hi))),
        picks=picks,
        losses=losses,
        models={name: fitted[name][label] for name, label in picks.items()},
    )


def _fit_fold(
    X: np.ndarray, y: np.ndarray, w: np.ndarray, train: np.ndarray, test: np.ndarray,
    candidates: dict[str, dict[str, Any]], oof: dict[str, dict[str, np.ndarray]],
    fitted: dict[str, dict[str, list]], tick: Callable[[str], None], k: int,
) -> None:
    """Fit every candidate of every nuisance on the training rows of fold k; write predictions for its rows
    and keep the fitted model (the picked ones are reused by the T- and X-learners and for new units).

    One copy of the training and test rows is made per fold and shared by all nuisances (μ̂_a take the
    arm-a subset of it); the copies are released when the fold is done.
    """
    X_train, X_test = X[train], X[test]
    w_train, y_train = w[train], y[train]
    arm_rows = {"mu0": w_train == 0, "mu1": w_train == 1}
    for name, cands in candidates.items():
        for label, estimator in cands.items():
            if name == "propensity":
                model = fit_model(estimator, X_train, w_train)
            elif name == "m":
                model = fit_model(estimator, X_train, y_train)
            else:
                rows = arm_rows[name]
                model = fit_model(estimator, X_train[rows], y_train[rows])
            pred = predict_model(model, X_test)
            fitted[name][label].append(model)
            if not np.all(np.isfinite(pred)):
                raise SiteproofError(
                    f"learner {label!r} for {name} returned missing or infinite predictions",
                    "check the estimator, or pass a different one",
                )
            oof[name][label][test] = pred
            tick(f"{name}/{label} fold {k + 1}")


def _oof_loss(name: str, pred: np.ndarray, y: np.ndarray, w: np.ndarray, binary_outcome: bool) -> float:
    """Out-of-fold loss: log-loss for ê and binary outcomes, MSE otherwise; μ̂_a scored on arm a only."""
    if name == "propensity":
        return _log_loss(w.astype(float), pred)
    rows = slice(None) if name == "m" else (w == (1 if name == "mu1" else 0))
    target, fitted = y[rows], pred[rows]
    return _log_loss(target, fitted) if binary_outcome else float(np.mean((target - fitted) ** 2))


def _log_loss(target: np.ndarray, prob: np.ndarray) -> float:
    """Mean binary cross-entropy −[t log p + (1 − t) log(1 − p)], p kept inside [1e−15, 1 − 1e−15]."""
    p = np.clip(prob, _PROB_FLOOR, 1.0 - _PROB_FLOOR)
    return float(-np.mean(target * np.log(p) + (1.0 - target) * np.log1p(-p)))


def _resolve_learners(
    learners: Mapping[str, Any] | None, binary_outcome: bool, seed: int
) -> dict[str, dict[str, Any]]:
    """Merge user learners into the default candidates and check each has the right kind."""
    resolved = default_learners(binary_outcome, seed)
    for name, spec in (learners or {}).items():
        if name not in NUISANCE_NAMES:
            raise SiteproofError(f"unknown nuisance {name!r} in learners", f"use keys among {list(NUISANCE_NAMES)}")
        cands = dict(spec) if isinstance(spec, Mapping) else {_label_of(spec): spec}
        if not cands:
            raise SiteproofError(f"no learner given for nuisance {name!r}", "give at least one estimator")
        resolved[name] = cands
    for name, cands in resolved.items():
        needs_classifier = name == "propensity" or binary_outcome
        for label, est in cands.items():
            _check_kind(name, label, est, needs_classifier)
    return resolved


def _check_kind(name: str, label: str, estimator: Any, needs_classifier: bool) -> None:
    if not hasattr(estimator, "fit"):
        raise SiteproofError(
            f"learner {label!r} for {name} is not a scikit-learn estimator", "pass an object with fit/predict"
        )
    if needs_classifier and not hasattr(estimator, "predict_proba"):
        raise SiteproofError(
            f"learner {label!r} for {name} has no predict_proba",
            "pass a classifier (the propensity, and outcome models of a 0/1 outcome, are probabilities)",
        )
    if not needs_classifier and is_classifier(estimator):
        raise SiteproofError(
            f"learner {label!r} for {name} is a classifier but the outcome is continuous",
            "pass a regressor, or declare the outcome binary",
        )


def _label_of(estimator: Any) -> str:
    last = estimator.steps[-1][1] if isinstance(estimator, Pipeline) else estimator
    return type(last).__name__


def _as_treatment(w: np.ndarray) -> np.ndarray:
    w = np.asarray(w)
    if w.ndim != 1 or not np.all((w == 0) | (w == 1)):
        raise SiteproofError("the treatment must be a 1-d array of 0/1 values", "code treated as 1 and control as 0")
    return w.astype(np.int8)


def _check_inputs(
    X: np.ndarray, y: np.ndarray, w: np.ndarray, folds: np.ndarray, binary_outcome: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    w = _as_treatment(w)
    folds = np.asarray(folds)
    if w.size == 0:
        raise SiteproofError("there are no units to fit", "pass non-empty data")
    if X.ndim != 2 or X.shape[0] != y.size or y.size != w.size or folds.shape != w.shape:
        raise SiteproofError(
            f"shapes disagree: X {X.shape}, y {y.shape}, w {w.shape}, folds {folds.shape}",
            "pass X as (n, p) and y, w, folds as length-n arrays",
        )
    finite_matrix("X", X, fix="impute them before cross-fitting")
    finite_vector("y", y, "impute them before cross-fitting")
    if binary_outcome and not np.all((y == 0) | (y == 1)):
        raise SiteproofError(
            "binary_outcome is set but the outcome is not 0/1", "recode it as 0/1 or unset binary_outcome"
        )
    if not np.issubdtype(folds.dtype, np.integer) or folds.min() < 0:
        raise SiteproofError("folds must be non-negative integer fold ids", "build them with make_folds")
    for k in np.unique(folds):
        outside = w[folds != k]
        if outside.size == 0 or outside.min() == outside.max():
            raise SiteproofError(f"the units outside fold {k} do not hold both arms", "build folds with make_folds")
    return X, y, w, folds


def _check_clip(clip: tuple[float, float]) -> tuple[float, float]:
    lo, hi = float(clip[0]), float(clip[1])
    if not 0.0 < lo < hi < 1.0:
        raise SiteproofError(f"clip bounds {clip} are not inside (0, 1) in increasing order", "use e.g. (0.01, 0.99)")
    return lo, hi
