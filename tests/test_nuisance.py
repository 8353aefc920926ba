"""Folds and cross-fitted nuisances: stratification, the out-of-fold property, determinism, learner picks."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.base import is_classifier
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge
from sklearn.neighbors import KNeighborsRegressor
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from siteproof.core.errors import SiteproofError
from siteproof.core.learners import fit_model, predict_model
from siteproof.blind.nuisance import (
    GcvRidge,
    Nuisances,
    cross_fit_nuisances,
    default_learners,
    make_folds,
)


def _data(n: int = 400, p: int = 3, seed: int = 0, binary: bool = False, strength: float = 0.8):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    e = 1.0 / (1.0 + np.exp(-strength * X[:, 0]))
    w = (rng.random(n) < e).astype(np.int8)
    signal = X[:, 1] + 0.5 * w
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-signal))).astype(float) if binary else signal + rng.normal(size=n)
    return X, y, w


# Fast candidates for most tests (histogram boosting's thread pool is slow on a loaded 2-core machine).
FAST_REG = {"tree": DecisionTreeRegressor(max_depth=3, max_features=2, random_state=0), "ols": LinearRegression()}
FAST_CLF = {"tree": DecisionTreeClassifier(max_depth=3, max_features=2, random_state=0), "logit": LogisticRegression()}


# ------------------------------------------------------------------------------------------------- folds


def test_folds_are_stratified_balanced_and_deterministic():
    w = np.r_[np.ones(37), np.zeros(64)].astype(np.int8)
    folds = make_folds(w, k=5, seed=3)
    assert set(np.unique(folds)) == set(range(5))
    for arm, n_arm in ((1, 37), (0, 64)):
        counts = np.bincount(folds[w == arm], minlength=5)
        assert counts.max() - counts.min() <= 1 and counts.sum() == n_arm  # round-robin deal per arm
    sizes = np.bincount(folds, minlength=5)
    assert sizes.max() - sizes.min() <= 1  # treated deal continues where control ended
    assert np.array_equal(folds, make_folds(w, k=5, seed=3))
    assert not np.array_equal(folds, make_folds(w, k=5, seed=4))


def test_folds_reject_too_few_units_or_folds():
    w = np.r_[np.ones(3), np.zeros(20)]
    with pytest.raises(SiteproofError):
        make_folds(w, k=5)
    with pytest.raises(SiteproofError):
        make_folds(np.r_[np.ones(10), np.zeros(10)], k=1)
    with pytest.raises(SiteproofError):
        make_folds(np.array([0, 1, 2, 1, 0]), k=2)


def test_folds_without_groups_are_the_same_as_before_groups_existed():
    # copy of make_folds' output on these inputs before the `groups` argument was added
    w = np.array([1, 0, 0, 1, 1, 0, 1, 0, 0, 0, 1, 1, 0, 0, 1, 0, 1, 0, 0, 1, 0, 1, 0])
    assert make_folds(w, 3, 5).tolist() == [2, 0, 1, 1, 1, 2, 1, 2, 1, 2, 1, 0, 2, 1, 2, 0, 2, 0, 0, 0, 1, 0, 0]
    assert make_folds(w, 4, 0).tolist() == [2, 2, 0, 2, 0, 1, 3, 3, 3, 0, 1, 1, 0, 2, 3, 3, 2, 1, 0, 1, 2, 0, 1]
    assert np.array_equal(make_folds(w, 4, 0, groups=None), make_folds(w, 4, 0))


def _cluster_randomized(n_clusters: int = 60, seed: int = 0):
    """Clusters of 1–30 units, each wholly treated (share 0.4) or control, in shuffled row order."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 31, size=n_clusters)
    groups = np.repeat(np.arange(n_clusters), sizes)
    arm = (rng.random(n_clusters) < 0.4).astype(np.int8)
    order = rng.permutation(groups.size)
    return arm[groups][order], groups[order].astype(str), sizes, arm


def test_group_folds_keep_clusters_whole_and_balance_each_arm():
    w, groups, sizes, arm = _cluster_randomized()
    folds = make_folds(w, k=5, seed=2, groups=groups)
    assert all(np.unique(folds[groups == g]).size == 1 for g in np.unique(groups))  # no cluster split
    for a in (0, 1):
        counts = np.bincount(folds[w == a], minlength=5)
        # list-scheduling bound (Graham 1969): spread ≤ the largest cluster of that arm
        assert counts.max() - counts.min() <= sizes[arm == a].max()
    assert np.array_equal(folds, make_folds(w, k=5, seed=2, groups=groups))
    assert not np.array_equal(folds, make_folds(w, k=5, seed=3, groups=groups))


def test_group_folds_with_clusters_of_one_treated_share_balance_the_sizes():
    # every cluster half treated: the greedy deal is list scheduling on sizes, spread ≤ largest cluster
    rng = np.random.default_rng(4)
    sizes = 2 * rng.integers(1, 11, size=40)
    groups = np.repeat(np.arange(40), sizes)
    w = np.concatenate([np.r_[np.ones(s // 2), np.zeros(s // 2)] for s in sizes]).astype(np.int8)
    folds = make_folds(w, k=4, seed=0, groups=groups)
    assert all(np.unique(folds[groups == g]).size == 1 for g in range(40))
    for values in (np.bincount(folds, minlength=4), np.bincount(folds[w == 1], minlength=4)):
        assert values.max() - values.min() <= sizes.max()


def test_group_folds_need_enough_groups():
    w = np.array([0, 1, 0, 1, 0, 1, 0, 1], dtype=np.int8)
    with pytest.raises(SiteproofError, match="groups cannot fill"):
        make_folds(w, k=5, groups=[1, 1, 2, 2, 3, 3, 4, 4])
    with pytest.raises(SiteproofError, match="no unit of one arm"):
        make_folds(np.r_[np.zeros(6), np.ones(2)], k=3, groups=[1, 1, 2, 2, 3, 3, 4, 4])


def test_group_folds_stop_cluster_mates_from_revealing_the_arm():
    """Cluster-level covariate, whole clusters assigned: a 1-NN propensity trained on the other folds
    finds a cluster-mate (same X, same W) under unit folds, so ê = W exactly; with group folds every
    training neighbour lies in another cluster."""
    rng = np.random.default_rng(5)
    groups = np.repeat(np.arange(40), 10)
    arm = rng.permutation(np.r_[np.ones(20), np.zeros(20)]).astype(np.int8)
    w, x = arm[groups], rng.normal(size=40)[groups]
    for by_group, expect_exact in ((None, True), (groups, False)):
        folds = make_folds(w, k=5, seed=0, groups=by_group)
        e_hat = np.empty(w.size)
        for f in range(5):
            train, test = folds != f, folds == f
            nearest = np.abs(x[test][:, None] - x[train][None, :]).argmin(axis=1)
            e_hat[test] = w[train][nearest]
        assert np.array_equal(e_hat, w) is expect_exact


# ------------------------------------------------------------------------------------- out-of-fold property


def test_one_nearest_neighbour_predictions_come_from_other_folds_and_the_right_arm():
    """A 1-NN regressor memorises its training rows; its out-of-fold prediction for unit i must be the
    outcome of i's nearest neighbour among the arm-a units (μ̂_a) or all units (m̂) of the other folds."""
    X, y, w = _data(n=120, p=2, seed=1)
    folds = make_folds(w, k=4, seed=0)
    nn = KNeighborsRegressor(n_neighbors=1)
    learners = {"mu0": nn, "mu1": nn, "m": nn, "propensity": LogisticRegression()}
    nu = cross_fit_nuisances(X, y, w, folds, learners=learners)
    dist = ((X[:, None, :] - X[None, :, :]) ** 2).sum(axis=2)
    other_fold = folds[:, None] != folds[None, :]
    for pred, allowed in ((nu.mu0, w == 0), (nu.mu1, w == 1), (nu.m_hat, np.ones_like(w, dtype=bool))):
        d = np.where(other_fold & allowed[None, :], dist, np.inf)
        assert np.array_equal(pred, y[d.argmin(axis=1)])
        assert np.all(pred != y)  # continuous outcome: never its own value
    assert nu.picks == {"propensity": "LogisticRegression", "mu0": "KNeighborsRegressor",
                        "mu1": "KNeighborsRegressor", "m": "KNeighborsRegressor"}


def test_propensity_is_out_of_fold():
    """Each fold's ê equals a logistic regression fitted by hand on the other folds only."""
    X, y, w = _data(n=300, seed=2)
    folds = make_folds(w, k=3, seed=5)
    nu = cross_fit_nuisances(X, y, w, folds, learners={"propensity": LogisticRegression(), "mu0": LinearRegression(),
                                                        "mu1": LinearRegression(), "m": LinearRegression()})
    for k in range(3):
        train, test = folds != k, folds == k
        ref = LogisticRegression().fit(X[train], w[train]).predict_proba(X[test])[:, 1]
        np.testing.assert_allclose(nu.e_raw[test], ref, rtol=1e-12)


# ------------------------------------------------------------------------------------- determinism and picks


def test_same_seed_same_output_and_to_dict():
    X, y, w = _data(n=300, seed=3)
    folds = make_folds(w, seed=7)
    learners = {"propensity": FAST_CLF, "mu0": FAST_REG, "mu1": FAST_REG, "m": FAST_REG}
    labels: list[str] = []
    a = cross_fit_nuisances(X, y, w, folds, learners=learners, seed=7, progress=labels.append)
    assert len(labels) == 4 * 2 * 5  # one tick per model fit: 4 nuisances × 2 candidates × 5 folds
    b = cross_fit_nuisances(X, y, w, folds, learners=learners, seed=7)
    for field in ("e_hat", "e_raw", "mu0", "mu1", "m_hat"):
        assert np.array_equal(getattr(a, field), getattr(b, field))
    assert a.to_dict() == b.to_dict()
    summary = a.to_dict()
    assert set(summary) >= {"picks", "losses", "clip", "n_clipped"}
    assert summary["clip"] == [0.01, 0.99]
    assert all(isinstance(v, float) for d in summary["losses"].values() for v in d.values())


def test_pick_is_the_lower_out_of_fold_loss_and_losses_are_correct():
    X, y, w = _data(n=400, seed=4)
    folds = make_folds(w, seed=0)
    learners = {
        "propensity": {"constant": DummyClassifier(strategy="prior"), "logit": LogisticRegression()},
        "mu0": {"constant": DummyRegressor(), "ols": LinearRegression()},
        "mu1": {"constant": DummyRegressor(), "ols": LinearRegression()},
        "m": {"constant": DummyRegressor(), "ols": LinearRegression()},
    }
    nu = cross_fit_nuisances(X, y, w, folds, learners=learners)
    for name, losses in nu.losses.items():
        assert nu.picks[name] == min(losses, key=losses.get)
    # the data are linear in X, so the regression beats the constant for every nuisance
    assert nu.picks == {"propensity": "logit", "mu0": "ols", "mu1": "ols", "m": "ols"}
    # reported losses are the out-of-fold loss of the picked predictions (MSE on arm a for μ̂_a; log-loss for ê)
    assert nu.losses["mu1"]["ols"] == pytest.approx(np.mean((y[w == 1] - nu.mu1[w == 1]) ** 2), rel=1e-12)
    assert nu.losses["m"]["ols"] == pytest.approx(np.mean((y - nu.m_hat) ** 2), rel=1e-12)
    logloss = -np.mean(w * np.log(nu.e_raw) + (1 - w) * np.log(1 - nu.e_raw))
    assert nu.losses["propensity"]["logit"] == pytest.approx(logloss, rel=1e-12)


def test_clipping_and_count():
    X, y, w = _data(n=300, seed=5, strength=4.0)  # strong confounding → extreme propensities
    folds = make_folds(w, seed=0)
    nu = cross_fit_nuisances(X, y, w, folds, learners={"propensity": LogisticRegression(), "mu0": LinearRegression(),
                                                        "mu1": LinearRegression(), "m": LinearRegression()},
                             clip=(0.05, 0.95))
    outside = (nu.e_raw < 0.05) | (nu.e_raw > 0.95)
    assert nu.n_clipped == outside.sum() > 0
    assert np.array_equal(nu.e_hat, np.clip(nu.e_raw, 0.05, 0.95))
    with pytest.raises(SiteproofError):
        cross_fit_nuisances(X, y, w, folds, clip=(0.0, 1.0))
    bad = X.copy()
    bad[0, 0] = np.nan
    with pytest.raises(SiteproofError, match="X: NaN or infinite"):
        cross_fit_nuisances(bad, y, w, folds)


# ------------------------------------------------------------------------------------------ learner kinds


def test_default_learners_have_boosting_and_linear_of_the_right_kind():
    for binary in (False, True):
        cands = default_learners(binary, seed=0)
        assert set(cands) == {"propensity", "mu0", "mu1", "m"}
        for name, by_label in cands.items():
            assert set(by_label) == {"boosting", "linear"}
            for est in by_label.values():
                assert is_classifier(est) == (name == "propensity" or binary)


def _check_binary_path(nu, y, w, labels: set[str]) -> None:
    for pred in (nu.mu0, nu.mu1, nu.m_hat, nu.e_raw):
        assert np.all((pred >= 0) & (pred <= 1))
    assert all(set(d) == labels for d in nu.losses.values())
    # binary outcome losses are log-losses: recompute for the pick
    p = np.clip(nu.mu0[w == 0], 1e-15, 1 - 1e-15)
    t = y[w == 0]
    assert nu.losses["mu0"][nu.picks["mu0"]] == pytest.approx(-np.mean(t * np.log(p) + (1 - t) * np.log(1 - p)))


def test_binary_outcome_uses_classifiers():
    """The default linear candidates (classifiers for a 0/1 outcome) and a tree; predictions are probabilities."""
    X, y, w = _data(n=300, seed=6, binary=True)
    linear = default_learners(True, seed=1)
    learners = {name: {"linear": cands["linear"], "tree": DecisionTreeClassifier(max_depth=2, random_state=0)}
                for name, cands in linear.items()}
    nu = cross_fit_nuisances(X, y, w, make_folds(w, seed=0), binary_outcome=True, learners=learners, seed=1)
    _check_binary_path(nu, y, w, {"linear", "tree"})


@pytest.mark.slow
def test_default_candidates_end_to_end_binary():
    X, y, w = _data(n=600, seed=6, binary=True)
    nu = cross_fit_nuisances(X, y, w, make_folds(w, seed=0), binary_outcome=True, seed=1)
    _check_binary_path(nu, y, w, {"boosting", "linear"})


def test_kind_mismatches_are_user_errors():
    X, y, w = _data(n=200, seed=7)
    folds = make_folds(w, seed=0)
    with pytest.raises(SiteproofError):  # classifier for a continuous outcome
        cross_fit_nuisances(X, y, w, folds, learners={"m": LogisticRegression()})
    with pytest.raises(SiteproofError):  # regressor for the propensity
        cross_fit_nuisances(X, y, w, folds, learners={"propensity": LinearRegression()})
    with pytest.raises(SiteproofError):  # unknown nuisance name
        cross_fit_nuisances(X, y, w, folds, learners={"tau": LinearRegression()})
    with pytest.raises(SiteproofError):  # binary flag with a continuous outcome
        cross_fit_nuisances(X, y, w, folds, binary_outcome=True)


def _fit_predict(est, X_train, y_train, X_pred, sample_weight=None):
    return predict_model(fit_model(est, X_train, y_train, sample_weight=sample_weight), X_pred)


def test_learner_fit_probability_weights_and_single_class():
    """The fit/predict path every nuisance model goes through (siteproof.core.learners)."""
    rng = np.random.default_rng(8)
    X = rng.normal(size=(200, 2))
    t = (X[:, 0] > 0).astype(int)
    prob = _fit_predict(LogisticRegression(), X, t, X[:5])
    ref = LogisticRegression().fit(X, t).predict_proba(X[:5])[:, 1]
    np.testing.assert_allclose(prob, ref, rtol=1e-12)
    assert np.array_equal(_fit_predict(LogisticRegression(), X, np.ones(200), X[:3]), np.ones(3))
    # sample weights reach the estimator, also inside a Pipeline (weighted least squares by hand)
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    y = X @ [1.0, -2.0] + rng.normal(size=200)
    sw = rng.uniform(0.5, 2.0, size=200)
    Z = np.column_stack([np.ones(200), X])
    beta = np.linalg.solve(Z.T @ (Z * sw[:, None]), Z.T @ (sw * y))
    for est in (LinearRegression(), make_pipeline(StandardScaler(), LinearRegression())):
        pred = _fit_predict(est, X, y, X[:4], sample_weight=sw)
        np.testing.assert_allclose(pred, Z[:4] @ beta, rtol=1e-9)


def test_nuisances_is_frozen():
    X, y, w = _data(n=100, seed=9)
    nu = cross_fit_nuisances(X, y, w, make_folds(w, k=2), learners={"propensity": LogisticRegression(),
                             "mu0": LinearRegression(), "mu1": LinearRegression(), "m": LinearRegression()})
    assert isinstance(nu, Nuisances)
    with pytest.raises(AttributeError):
        nu.n_clipped = 3  # type: ignore[misc]


def _weighted_standardise(X: np.ndarray, sw: np.ndarray) -> np.ndarray:
    mean = sw @ X / sw.sum()
    return X / np.sqrt(sw @ (X - mean) ** 2 / sw.sum())


def test_gcv_ridge_equals_sklearn_ridge_and_minimises_gcv():
    rng = np.random.default_rng(12)
    n, p = 80, 6
    X = rng.normal(size=(n, p)) * [1, 2, 5, 0.1, 1, 3] + 4.0
    y = X @ rng.normal(size=p) + 3 * rng.normal(size=n)
    model = GcvRidge().fit(X, y)
    # source: scikit-learn Ridge with the same penalty on the standardised features
    ref = Ridge(alpha=model.alpha_).fit(_weighted_standardise(X, np.ones(n)), y)
    np.testing.assert_allclose(model.predict(X[:7]), ref.predict(_weighted_standardise(X, np.ones(n))[:7]), rtol=1e-9)
    # GCV(α) = n·‖(I − H_α) ỹ‖²/(n − tr H_α)² with the explicit hat matrix of the centred, scaled design
    Xs = _weighted_standardise(X, np.ones(n))
    Xs -= Xs.mean(axis=0)
    yc = y - y.mean()

    def gcv(alpha: float) -> float:
        H = Xs @ np.linalg.solve(Xs.T @ Xs + alpha * np.eye(p), Xs.T)
        return n * np.sum((yc - H @ yc) ** 2) / (n - np.trace(H)) ** 2

    scores = [gcv(a) for a in model.alphas]
    assert model.alpha_ == model.alphas[int(np.argmin(scores))]


def test_gcv_ridge_sample_weights_equal_sklearn_ridge():
    rng = np.random.default_rng(13)
    n, p = 60, 3
    X = rng.normal(size=(n, p)) * [1, 3, 0.5]
    y = X @ [1.0, -0.5, 2.0] + rng.normal(size=n)
    sw = rng.uniform(0.2, 3.0, size=n)
    model = GcvRidge(alphas=(2.0,)).fit(X, y, sample_weight=sw)
    Xs = _weighted_standardise(X, sw)
    ref = Ridge(alpha=2.0).fit(Xs, y, sample_weight=sw)  # source: scikit-learn Ridge (weighted)
    np.testing.assert_allclose(model.predict(X), ref.predict(Xs), rtol=1e-9)
