"""Shared fixtures: small simulated pooled trials and cheap learners so the default suite stays fast."""

from __future__ import annotations

import os

# One thread per test process: small test fits gain nothing from OpenMP/BLAS threads, and on a busy 2-core
# machine oversubscribed threads slow gradient boosting by an order of magnitude.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression
from threadpoolctl import threadpool_limits

threadpool_limits(1)  # in case numpy or scikit-learn were imported before this file set the variables


def small_trial(n: int = 1200, seed: int = 7, hidden: float = 0.0) -> pd.DataFrame:
    """A pooled three-site trial with known rates 0.5/0.67/0.8, site partly visible through x1.

    τ(x) = 1 + 1{x2 < 0}; ``hidden`` adds an outcome shift proportional to the site rate that no covariate
    sees (it breaks unconfoundedness given X).
    """
    rng = np.random.default_rng(seed)
    site = rng.choice(np.array(["north", "harbour", "upland"]), size=n, p=[0.4, 0.35, 0.25])
    rate = pd.Series(site).map({"north": 0.5, "harbour": 2 / 3, "upland": 0.8}).to_numpy()
    x1 = rng.normal(size=n) + (site == "upland") * 1.2 - (site == "north") * 0.8
    x2 = rng.normal(size=n)
    x3 = rng.choice(np.array(["a", "b", "c"]), size=n)
    w = np.zeros(n, dtype=int)
    for s in np.unique(site):
        idx = np.flatnonzero(site == s)
        w[rng.choice(idx, size=round(rate[idx[0]] * idx.size), replace=False)] = 1
    tau = 1.0 + (x2 < 0)
    y = 2 * x1 + x2 + (x3 == "b") + w * tau + hidden * (rate - 0.65) / 0.12 + rng.normal(size=n)
    return pd.DataFrame(
        {"uid": [f"u{i:05d}" for i in range(n)], "site": site, "treated": w, "score": y,
         "x1": x1, "x2": x2, "x3": x3, "cost": 0.5 + rng.random(n)}
    )


SMALL_RATES = {"north": 0.5, "harbour": 2 / 3, "upland": 0.8}


@pytest.fixture
def trial_frame() -> pd.DataFrame:
    return small_trial()


def fast_config(seed: int = 3, **kwargs):
    """BlindConfig with small boosting models (fast, still flexible) for tests."""
    from siteproof.blind.analysis import BlindConfig

    clf = HistGradientBoostingClassifier(max_iter=40, random_state=seed)
    reg = HistGradientBoostingRegressor(max_iter=40, random_state=seed)
    learners = {"propensity": clf, "mu0": reg, "mu1": reg, "m": reg}
    defaults = dict(seed=seed, folds=3, n_boot=50, nuisance_learners=learners, cate_learner=reg)
    defaults.update(kwargs)
    return BlindConfig(**defaults)


def cross_fit_linear(X: np.ndarray, y: np.ndarray, w: np.ndarray, folds: np.ndarray) -> dict[str, np.ndarray]:
    """Cross-fitted logistic ê and linear μ̂₀, μ̂₁, m̂ written out by hand (each unit predicted from the other
    folds) — an independent reference for tests of the effect models and their evaluation."""
    out = {k: np.empty(len(y)) for k in ("e_hat", "mu0", "mu1", "m_hat")}
    for k in np.unique(folds):
        te, tr = folds == k, folds != k
        out["e_hat"][te] = LogisticRegression().fit(X[tr], w[tr]).predict_proba(X[te])[:, 1]
        for arm, name in ((1, "mu1"), (0, "mu0")):
            sel = tr & (w == arm)
            out[name][te] = LinearRegression().fit(X[sel], y[sel]).predict(X[te])
        out["m_hat"][te] = LinearRegression().fit(X[tr], y[tr]).predict(X[te])
    return out
