"""Heterogeneous-effect (CATE) models, out-of-fold for every unit.

``fit_cate(key, ...)`` fits one model and returns τ̂(x_i) for every unit i from second-stage models trained
on the folds other than fold(i).  The nuisance arrays (ê, μ̂₀, μ̂₁, m̂) are arguments: they come from
cross-fitting (each unit's value from models not trained on that unit), so this module never fits a
propensity or outcome model for the out-of-fold τ̂ itself.

Models, selected by short keys (formulas in docs/methods-heterogeneity.md):

* ``constant`` — τ̂ = mean of the AIPW scores Γ_j over the training folds (Robins, Rotnitzky & Zhao 1994).
* ``s`` — one regression f(x, w) of Y on (X, W); τ̂(x) = f(x, 1) − f(x, 0) (Künzel, Sekhon, Bickel & Yu 2019).
* ``t`` — τ̂ = μ̂₁ − μ̂₀, the two cross-fitted arm regressions (Künzel et al. 2019).
* ``x`` — X-learner (Künzel et al. 2019): imputed effects D¹ = Y − μ̂₀(x) (treated), D⁰ = μ̂₁(x) − Y
  (controls), regressions τ̂₁, τ̂₀ on X, combined as τ̂ = ê·τ̂₀ + (1 − ê)·τ̂₁.
* ``r`` — R-learner (Nie & Wager 2021): weighted regression of (Y − m̂)/(W − ê) on X, weights (W − ê)².
* ``dr`` — DR-learner (Kennedy 2023): regression of the AIPW pseudo-outcome Γ on X.

With the default boosting second stage, every regression of fold k is fit on the bin codes of cuts found once
on the units outside fold k (``binning.fold_bins``, scikit-learn's unweighted bin rule on all of them), shared
by all models, so the R-learner's weighted fit no longer computes weighted quantiles in every fit.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
from sklearn.pipeline import Pipeline
from sklearn.utils.validation import has_fit_parameter

from ..core.checks import in_unit_interval, unit_vector
from ..core.errors import SiteproofError
from ..core.learners import ConstantModel, MappedModel, fit_model, predict_model
from ..core.scores import aipw_scores
from .binning import FoldBins, fold_bins

CATE_KEYS = ("constant", "s", "t", "x", "r", "dr")

#: Default second-stage boosting settings. Pseudo-outcomes such as (Y − m̂)/(W − ê) are much noisier than Y,
#: and scikit-learn's default boosting overfits them at a few thousand units (on the demo design at n = 3000
#: the R- and DR-learners' PEHE was about twice that of a constant effect); small trees, a slower learning
#: rate, larger leaves, L2 shrinkage and early stopping on a 20 % validation split fix that (PEHE 2.5–2.6 vs
#: the constant's 3.45) and cost less time.
SECOND_STAGE_BOOSTING: dict[str, Any] = {
    "learning_rate": 0.05, "max_iter": 300, "max_leaf_nodes": 8, "min_samples_leaf": 50,
    "l2_regularization": 1.0, "early_stopping": True, "validation_fraction": 0.2, "n_iter_no_change": 20,
}

#: The outcome regressions of the S-learner (and of the T-learner when it refits): the same trees with twice
#: the learning rate and half the round cap (the same total shrinkage, 0.1 × 150 = 0.05 × 300).  An outcome
#: carries far more signal than a pseudo-outcome, so its validation loss kept falling until the 300-round cap
#: at 100 000 units and the S-learner cost as much as the R- and DR-learners together; early stopping on the
#: 20 % validation split still picks the number of rounds below the cap.
OUTCOME_STAGE_BOOSTING: dict[str, Any] = {**SECOND_STAGE_BOOSTING, "learning_rate": 0.1, "max_iter": 150}


# --------------------------------------------------------------------------------------------------------
# small fitted-model wrappers: each has predict(X) -> τ̂(X)
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class _DirectModel:
    """τ̂(x) = g(x) for a regression g fitted to a pseudo-outcome (R- and DR-learner)."""

    model: Any

    def predict(self, X: np.ndarray) -> np.ndarray:
        return predict_model(self.model, X)


@dataclass(frozen=True, eq=False)
class _SingleModel:
    """S-learner: τ̂(x) = f(z, 1) − f(z, 0) for one regression f of Y on (Z, W), Z = features(X) (the fold's
    bin codes, or X itself)."""

    model: Any
    features: Callable[[np.ndarray], np.ndarray] | None = None

    def predict(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=float)
        Z = X if self.features is None else self.features(X)
        return predict_model(self.model, _with_arm(Z, 1.0)) - predict_model(self.model, _with_arm(Z, 0.0))


@dataclass(frozen=True, eq=False)
class _ArmDifferenceModel:
    """T-learner: τ̂(x) = μ̂₁(x) − μ̂₀(x) from two arm regressions."""

    treated: Any
    control: Any

    def predict(self, X: np.ndarray) -> np.ndarray:
        return predict_model(self.treated, X) - predict_model(self.control, X)


@dataclass(frozen=True, eq=False)
class _CrossImputedModel:
    """X-learner: τ̂(x) = g(x)·τ̂₀(x) + (1 − g(x))·τ̂₁(x), g a regression of W on X clipped to [0, 1]."""

    from_treated: Any
    from_control: Any
    weight: Any

    def predict(self, X: np.ndarray) -> np.ndarray:
        g = np.clip(predict_model(self.weight, X), 0.0, 1.0)
        return g * predict_model(self.from_control, X) + (1.0 - g) * predict_model(self.from_treated, X)


@dataclass(frozen=True, eq=False)
class CateFit:
    """An out-of-fold CATE fit.

    ``tau[i]`` comes from models trained on folds ≠ fold(i) (for ``t``: the cross-fitted μ̂₁ − μ̂₀).
    ``fold_models[k]`` is the second-stage model trained on the folds ≠ k; :meth:`predict` averages them to
    transport τ̂ to new units.  ``bounds`` clips predictions (binary outcomes: [−1, 1]).
    """

    key: str
    tau: np.ndarray
    fold_models: list
    bounds: tuple[float, float] | None = None

    def predict(self, X_new: np.ndarray) -> np.ndarray:
        """τ̂ for new units: the mean of the fold models' predictions (clipped to ``bounds`` if set)."""
        X_new = np.asarray(X_new, dtype=float)
        if X_new.ndim != 2:
            raise SiteproofError("X_new must be a 2-D array (units × covariates)", "pass X_new with shape (n, p)")
        pred = np.mean([m.predict(X_new) for m in self.fold_models], axis=0)
        return _clip(pred, self.bounds)


# --------------------------------------------------------------------------------------------------------
# fitting helpers
# --------------------------------------------------------------------------------------------------------
def _with_arm(X: np.ndarray, arm: float | np.ndarray) -> np.ndarray:
    """Append the treatment column W to X (the S-learner's design)."""
    col = np.broadcast_to(np.asarray(arm, dtype=float), (X.shape[0],))
    return np.column_stack([X, col])


def _accepts_weights(estimator: Any) -> bool:
    final = estimator.steps[-1][1] if isinstance(estimator, Pipeline) else estimator
    return has_fit_parameter(final, "sample_weight")


def _clip(tau: np.ndarray, bounds: tuple[float, float] | None) -> np.ndarray:
    return tau if bounds is None else np.clip(tau, bounds[0], bounds[1])


@dataclass(frozen=True, eq=False)
class _Inputs:
    """Validated arrays shared by the per-key fitters."""

    X: np.ndarray
    y: np.ndarray
    w: np.ndarray
    e_hat: np.ndarray
    mu0: np.ndarray
    mu1: np.ndarray
    m_hat: np.ndarray
    folds: np.ndarray
    regressor: Any
    outcome_model: Any
    seed: int
    nuisance_models: Mapping[str, Sequence[Any]]
    bins: FoldBins | None = None

    def features(self, k: int, rows: np.ndarray) -> np.ndarray:
        """The second stage's design for ``rows`` at fold position k: shared bin codes, or X itself."""
        return self.X[rows] if self.bins is None else self.bins.train_matrix(k, rows)

    def fit(self, estimator: Any, k: int, rows: np.ndarray, target: np.ndarray,
            sample_weight: np.ndarray | None = None) -> Any:
        """Fit ``estimator`` on (features(k, rows), target); with shared bins the model maps new X itself."""
        model = fit_model(estimator, self.features(k, rows), target, seed=self.seed, sample_weight=sample_weight)
        return model if self.bins is None else MappedModel(model, self.bins.bins[k].transform)


def _validate(
    key: str, X: Any, y: Any, w: Any, e_hat: Any, mu0: Any, mu1: Any, m_hat: Any, folds: Any,
    binary_outcome: bool,
) -> tuple[np.ndarray, ...]:
    if key not in CATE_KEYS:
        raise SiteproofError(f"unknown CATE model key {key!r}", f"use one of {', '.join(CATE_KEYS)}")
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise SiteproofError(f"X must be 2-D (units × covariates), got {X.ndim}-D", "pass X with shape (n, p)")
    n = X.shape[0]
    y, w, e_hat, mu0, mu1, m_hat = (
        unit_vector(name, v, n, "impute or drop those units before fitting")
        for name, v in (("y", y), ("w", w), ("e_hat", e_hat), ("mu0", mu0), ("mu1", mu1), ("m_hat", m_hat))
    )
    if not np.all((w == 0) | (w == 1)):
        raise SiteproofError("the treatment w must be coded 0/1", "recode the treatment column to 0 and 1")
    in_unit_interval("e_hat", e_hat, "clip the cross-fitted propensity away from 0 and 1", strict=True)
    if binary_outcome and not np.all((y == 0) | (y == 1)):
        raise SiteproofError("binary_outcome=True but y is not coded 0/1", "recode the outcome or set binary_outcome=False")
    folds = np.asarray(folds)
    if folds.shape != (n,) or not np.issubdtype(folds.dtype, np.integer):
        raise SiteproofError("folds must be one integer fold id per unit", "pass the fold ids used for cross-fitting")
    if np.unique(folds).size < 2:
        raise SiteproofError("out-of-fold fitting needs at least 2 folds", "use 2 or more folds")
    return X, y, w, e_hat, mu0, mu1, m_hat, folds


def _need_both_arms(w_train: np.ndarray, key: str, fold: int) -> None:
    if w_train.min() == w_train.max():
        raise SiteproofError(
            f"the training folds for fold {fold} hold only one treatment arm, so the {key!r} model cannot be fit",
            "use fewer folds or check that both arms are present",
        )


# --------------------------------------------------------------------------------------------------------
# one second-stage fit per key, on the training folds `tr`
# --------------------------------------------------------------------------------------------------------
def _fit_constant(d: _Inputs, tr: np.ndarray, k: int) -> ConstantModel:
    gamma = aipw_scores(d.y[tr], d.w[tr], d.e_hat[tr], d.mu0[tr], d.mu1[tr])
    return ConstantModel(float(gamma.mean()))


def _fit_single(d: _Inputs, tr: np.ndarray, k: int) -> _SingleModel:
    model = fit_model(d.outcome_model, _with_arm(d.features(k, tr), d.w[tr]), d.y[tr], seed=d.seed)
    return _SingleModel(model, None if d.bins is None else d.bins.bins[k].transform)


def _fit_arm_difference(d: _Inputs, tr: np.ndarray, k: int) -> _ArmDifferenceModel:
    """Arm regressions on the training folds: the nuisance fold models when given, else refit."""
    if "mu0" in d.nuisance_models and "mu1" in d.nuisance_models:
        return _ArmDifferenceModel(d.nuisance_models["mu1"][k], d.nuisance_models["mu0"][k])
    t, c = tr[d.w[tr] == 1], tr[d.w[tr] == 0]
    return _ArmDifferenceModel(d.fit(d.outcome_model, k, t, d.y[t]), d.fit(d.outcome_model, k, c, d.y[c]))


def _fit_cross_imputed(d: _Inputs, tr: np.ndarray, k: int) -> _CrossImputedModel:
    """Imputed-effect regressions; the weight g(x) for new units is the propensity fold model when given."""
    t, c = tr[d.w[tr] == 1], tr[d.w[tr] == 0]
    from_treated = d.fit(d.regressor, k, t, d.y[t] - d.mu0[t])
    from_control = d.fit(d.regressor, k, c, d.mu1[c] - d.y[c])
    if "propensity" in d.nuisance_models:
        weight = d.nuisance_models["propensity"][k]
    else:
        weight = d.fit(d.regressor, k, tr, d.w[tr])
    return _CrossImputedModel(from_treated, from_control, weight)


def _fit_residual(d: _Inputs, tr: np.ndarray, k: int) -> _DirectModel:
    resid_w = d.w[tr] - d.e_hat[tr]
    pseudo = (d.y[tr] - d.m_hat[tr]) / resid_w
    return _DirectModel(d.fit(d.regressor, k, tr, pseudo, sample_weight=resid_w**2))


def _fit_doubly_robust(d: _Inputs, tr: np.ndarray, k: int) -> _DirectModel:
    pseudo = aipw_scores(d.y[tr], d.w[tr], d.e_hat[tr], d.mu0[tr], d.mu1[tr])
    return _DirectModel(d.fit(d.regressor, k, tr, pseudo))


_FITTERS: dict[str, Callable[[_Inputs, np.ndarray, int], Any]] = {
    "constant": _fit_constant,
    "s": _fit_single,
    "t": _fit_arm_difference,
    "x": _fit_cross_imputed,
    "r": _fit_residual,
    "dr": _fit_doubly_robust,
}


def _fits_second_stage(key: str, nuisance_models: Mapping[str, Sequence[Any]]) -> bool:
    """Whether ``key`` fits any regression of its own (``t`` reuses the arm models when given)."""
    if key == "constant":
        return False
    return not (key == "t" and "mu0" in nuisance_models and "mu1" in nuisance_models)


def _on_features(model: Any, Z: np.ndarray) -> np.ndarray:
    """Predict from the second stage's own design Z (a bin-code wrapper's inner model reads Z directly)."""
    return predict_model(model.model if isinstance(model, MappedModel) else model, Z)


def _out_of_fold_value(key: str, d: _Inputs, model: Any, k: int, te: np.ndarray) -> np.ndarray:
    """τ̂ for the held-out fold from its precomputed design (bin codes under fold k's cuts, or X);
    ``t`` uses the cross-fitted arrays, ``x`` weights with the cross-fitted ê."""
    if key == "t":
        return d.mu1[te] - d.mu0[te]
    if key == "constant":
        return model.predict(d.X[te])
    Z = d.features(k, te)
    if key == "x":
        g = d.e_hat[te]
        return g * _on_features(model.from_control, Z) + (1.0 - g) * _on_features(model.from_treated, Z)
    if key == "s":
        return predict_model(model.model, _with_arm(Z, 1.0)) - predict_model(model.model, _with_arm(Z, 0.0))
    return _on_features(model.model, Z)


def fit_cate(
    key: str,
    X: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    *,
    e_hat: np.ndarray,
    mu0: np.ndarray,
    mu1: np.ndarray,
    m_hat: np.ndarray,
    folds: np.ndarray,
    binary_outcome: bool = False,
    learner: Any = None,
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
    nuisance_models: Mapping[str, Sequence[Any]] | None = None,
    bins: FoldBins | None = None,
) -> CateFit:
    """Fit the CATE model ``key`` out-of-fold: τ̂(x_i) from second-stage models trained on folds ≠ fold(i).

    Parameters
    ----------
    key : one of ``CATE_KEYS`` (``constant``, ``s``, ``t``, ``x``, ``r``, ``dr``).
    X, y, w : covariates (n, p), outcome (n,), treatment (n,) in {0, 1}.
    e_hat, mu0, mu1, m_hat : cross-fitted nuisances ê(x) = P(W=1|x), μ̂_w(x) = E[Y|x, W=w], m̂(x) = E[Y|x].
    folds : fold id per unit (the folds used for the nuisances, so fold k's τ̂ never sees fold k's data
        through the second stage).
    binary_outcome : y in {0, 1}; τ̂ is clipped to [−1, 1] and, with the default learner, the outcome
        regressions of ``s`` and ``t`` are gradient-boosted classifiers returning P(Y=1).
    learner : scikit-learn regressor used for every second-stage regression (a classifier is used through
        P(class 1)); None → histogram gradient boosting with the stronger regularisation of
        ``SECOND_STAGE_BOOSTING`` (pseudo-outcomes are far noisier than outcomes), ``OUTCOME_STAGE_BOOSTING``
        for the outcome regressions of ``s`` (and of ``t`` when it refits).  Learners with an unset
        ``random_state`` get ``seed``.  ``r`` needs a learner whose ``fit`` takes ``sample_weight``.
    progress : optional callback, called once per fold with a label.
    nuisance_models : optional fitted nuisance models per fold (``Nuisances.models``: "mu0", "mu1",
        "propensity" → one model per fold, trained on the other folds).  When given, ``t`` uses the arm models
        and ``x`` the propensity models for new units instead of refitting them.
    bins : optional :func:`~siteproof.blind.binning.fold_bins` of (X, folds) to share between models.  With the
        default learner every second-stage fit of fold k runs on the bin codes of fold k's cuts (found on the
        units outside fold k); they are computed here when not given.  Ignored with a user ``learner``.

    Fold use (all keys): for each fold k, the second stage is fit on units with fold ≠ k and predicts
    fold k.  Exceptions: ``t`` takes τ̂ = μ̂₁ − μ̂₀ straight from the cross-fitted arrays; its fold models (for
    :meth:`CateFit.predict`) are the nuisance arm models of that fold, refit only when ``nuisance_models`` is
    not given; ``x`` weights fold k's units with their cross-fitted ê(x_i), while its fold models carry the
    propensity model of that fold (or a regression of W on X) for new units.

    References: Künzel, Sekhon, Bickel & Yu (2019) PNAS 116(10); Nie & Wager (2021) Biometrika 108(2);
    Kennedy (2023) Electron. J. Statist. 17(2); Robins, Rotnitzky & Zhao (1994) JASA 89.
    """
    X, y, w, e_hat, mu0, mu1, m_hat, folds = _validate(key, X, y, w, e_hat, mu0, mu1, m_hat, folds, binary_outcome)
    if learner is None:
        regressor: Any = HistGradientBoostingRegressor(**SECOND_STAGE_BOOSTING, random_state=seed)
        outcome_class = HistGradientBoostingClassifier if binary_outcome else HistGradientBoostingRegressor
        outcome_model: Any = outcome_class(**OUTCOME_STAGE_BOOSTING, random_state=seed)
    else:
        regressor = outcome_model = learner
    if key == "r" and not _accepts_weights(regressor):
        raise SiteproofError(
            f"the learner {type(regressor).__name__} does not accept sample_weight, which the R-learner needs",
            "pass a learner whose fit() takes sample_weight (e.g. HistGradientBoostingRegressor)",
        )
    nuisance_models = nuisance_models or {}
    if learner is not None or not _fits_second_stage(key, nuisance_models):
        bins = None
    elif bins is None:
        bins = fold_bins(X, folds, seed)
    d = _Inputs(X, y, w, e_hat, mu0, mu1, m_hat, folds, regressor, outcome_model, seed, nuisance_models, bins)
    bounds = (-1.0, 1.0) if binary_outcome else None
    tau = np.empty(X.shape[0], dtype=float)
    fold_ids = np.unique(folds)
    models = []
    for position, k in enumerate(fold_ids):
        te, tr = np.flatnonzero(folds == k), np.flatnonzero(folds != k)
        if key in ("s", "t", "x"):
            _need_both_arms(w[tr], key, int(k))
        model = _FITTERS[key](d, tr, position)
        tau[te] = _out_of_fold_value(key, d, model, position, te)
        models.append(model)
        if progress is not None:
            progress(f"{key} fold {int(k) + 1}/{fold_ids.size}")
    return CateFit(key=key, tau=_clip(tau, bounds), fold_models=models, bounds=bounds)
