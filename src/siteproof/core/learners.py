"""Fitting and reading scikit-learn estimators the same way everywhere.

Conventions shared by the nuisance and effect models: an estimator is cloned before fitting; an unset
``random_state`` gets the analysis seed; sample weights reach the last step of a Pipeline; a classifier is
read as P(class 1); a classifier asked to fit a target with one class only becomes the constant 0 or 1.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
from sklearn.base import clone, is_classifier
from sklearn.pipeline import Pipeline

from .errors import SiteproofError


@dataclass(frozen=True, eq=False)
class ConstantModel:
    """Predicts the same value for every unit (the constant effect, or a degenerate one-class fit)."""

    value: float

    def predict(self, X: np.ndarray) -> np.ndarray:
        return np.full(np.asarray(X).shape[0], self.value, dtype=float)


@dataclass(frozen=True, eq=False)
class MappedModel:
    """A model fitted on transform(X) (e.g. shared bin codes): predicts ``predict_model(model, transform(X))``."""

    model: Any
    transform: Callable[[np.ndarray], np.ndarray]

    def predict(self, X: np.ndarray) -> np.ndarray:
        return predict_model(self.model, self.transform(np.asarray(X, dtype=float)))


def weight_parameter(estimator: Any) -> str:
    """Name of the fit() keyword carrying sample weights (a Pipeline passes them to its last step)."""
    return f"{estimator.steps[-1][0]}__sample_weight" if isinstance(estimator, Pipeline) else "sample_weight"


def fit_model(
    estimator: Any, X: np.ndarray, y: np.ndarray, *, seed: int | None = None,
    sample_weight: np.ndarray | None = None,
) -> Any:
    """Clone ``estimator``, give it ``seed`` if its random_state is unset, and fit it on (X, y)."""
    if is_classifier(estimator) and np.unique(y).size < 2:
        return ConstantModel(float(np.asarray(y)[0] == 1))
    model = clone(estimator)
    params = model.get_params()
    if seed is not None and "random_state" in params and params["random_state"] is None:
        model.set_params(random_state=seed)
    if sample_weight is None:
        model.fit(X, y)
    else:
        model.fit(X, y, **{weight_parameter(model): sample_weight})
    return model


def predict_model(model: Any, X: np.ndarray) -> np.ndarray:
    """Regressor → predict; classifier → P(class 1) (a :class:`MappedModel` already returns either)."""
    if isinstance(model, (ConstantModel, MappedModel)) or not is_classifier(model):
        return np.asarray(model.predict(X), dtype=float)
    classes = list(model.classes_)
    if 1 not in classes:
        raise SiteproofError(
            f"classifier {type(model).__name__} was trained on labels {classes} without class 1",
            "code the binary variable as 0/1",
        )
    return np.asarray(model.predict_proba(X)[:, classes.index(1)], dtype=float)
