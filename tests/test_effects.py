"""Tests of the out-of-fold CATE models (siteproof.blind.effects).

Exact checks use noise-free invented data where the model's population target is linear in x, so that a
linear second stage recovers τ(x) to rounding; statistical checks use an invented DGP with known τ(x).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.linear_model import LinearRegression
from sklearn.neighbors import KNeighborsRegressor
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits  # installed with scikit-learn

from conftest import cross_fit_linear
from siteproof.blind.effects import CATE_KEYS, CateFit, fit_cate
from siteproof.core.errors import SiteproofError
from siteproof.core.scores import aipw_scores



@pytest.fixture
def one_openmp_thread():
    """Gradient boosting runs OpenMP threads that spin badly on a crowded machine; one thread keeps it fast."""
    with threadpool_limits(limits=1, user_api="openmp"):
        yield


def _noise_free(n: int = 400, seed: int = 0) -> dict[str, np.ndarray]:
    """Y = μ₀(x) + W·τ(x) exactly, τ(x) = 1 + 2x₁ − x₂, with the true nuisances as the 'cross-fitted' ones."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, (n, 3))
    e = 1 / (1 + np.exp(-0.8 * X[:, 0]))
    mu0 = 0.5 + X[:, 1] - X[:, 2]
    tau = 1 + 2 * X[:, 0] - X[:, 1]
    w = (rng.random(n) < e).astype(float)
    y = mu0 + w * tau
    return dict(X=X, y=y, w=w, e_hat=e, mu0=mu0, mu1=mu0 + tau, m_hat=mu0 + e * tau, tau=tau,
                folds=np.arange(n) % 4)


def _fit(key: str, d: dict[str, np.ndarray], **kw) -> CateFit:
    return fit_cate(key, d["X"], d["y"], d["w"], e_hat=d["e_hat"], mu0=d["mu0"], mu1=d["mu1"], m_hat=d["m_hat"],
                    folds=d["folds"], **kw)


def _dgp(n: int, seed: int) -> dict[str, np.ndarray]:
    """Noisy invented DGP: e(x) = logistic(0.5 x₁), μ₀ = x₂ + 0.5 x₃, τ(x) = 1 + x₁, ε ~ N(0, 1), x ~ U(−1, 1)⁵."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, (n, 5))
    e = 1 / (1 + np.exp(-0.5 * X[:, 0]))
    tau = 1 + X[:, 0]
    w = (rng.random(n) < e).astype(float)
    y = X[:, 1] + 0.5 * X[:, 2] + w * tau + rng.normal(size=n)
    return dict(X=X, y=y, w=w, tau=tau, folds=np.arange(n) % 5)


def _cross_fit_linear(d: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The DGP dict with cross-fitted logistic/linear nuisances added (conftest.cross_fit_linear)."""
    return {**d, **cross_fit_linear(d["X"], d["y"], d["w"], d["folds"])}


# ---------------------------------------------------------------------------------------------- exact checks
@pytest.mark.parametrize("key", ["x", "r", "dr"])
def test_linear_second_stage_recovers_linear_tau_exactly(key):
    # noise-free Y with true nuisances: the X-learner's imputed effects, the R-learner's (Y−m)/(W−e) and the
    # AIPW pseudo-outcome all equal τ(x) exactly, so a linear fit on any training folds returns τ(x).
    d = _noise_free()
    fit = _fit(key, d, learner=LinearRegression())
    np.testing.assert_allclose(fit.tau, d["tau"], atol=1e-9)
    X_new = np.array([[0.3, -0.2, 0.9], [-1.0, 1.0, 0.0]])
    np.testing.assert_allclose(fit.predict(X_new), 1 + 2 * X_new[:, 0] - X_new[:, 1], atol=1e-9)


def test_t_learner_uses_cross_fitted_arms_and_refits_for_prediction():
    d = _noise_free()
    fit = _fit("t", d, learner=LinearRegression())
    np.testing.assert_array_equal(fit.tau, d["mu1"] - d["mu0"])
    X_new = np.array([[0.5, 0.5, 0.5]])
    # each arm is linear in x without noise, so the refit fold models reproduce τ(x) = 1 + 2·0.5 − 0.5 = 1.5
    np.testing.assert_allclose(fit.predict(X_new), [1.5], atol=1e-9)
    assert len(fit.fold_models) == 4


def test_s_learner_with_linear_regression_returns_the_treatment_coefficient():
    # constant τ = 1.5 and Y linear in (X, W): OLS on (X, W) gives exactly 1.5 for every unit
    d = _noise_free()
    d["y"] = d["mu0"] + 1.5 * d["w"]
    fit = _fit("s", d, learner=LinearRegression())
    np.testing.assert_allclose(fit.tau, 1.5, atol=1e-9)


def test_constant_model_is_the_aipw_mean_of_the_training_folds():
    rng = np.random.default_rng(3)
    d = _noise_free()
    d["y"] = d["y"] + rng.normal(size=d["y"].size)
    fit = _fit("constant", d)
    gamma = aipw_scores(d["y"], d["w"], d["e_hat"], d["mu0"], d["mu1"])
    for k in range(4):
        np.testing.assert_allclose(fit.tau[d["folds"] == k], gamma[d["folds"] != k].mean(), rtol=1e-12)
    np.testing.assert_allclose(fit.predict(d["X"][:2]), np.mean([gamma[d["folds"] != k].mean() for k in range(4)]))


# ------------------------------------------------------------------------------------------ out-of-fold
@pytest.mark.parametrize("key", CATE_KEYS)
def test_out_of_fold_value_ignores_the_units_own_fold(key):
    # the nuisance arrays are held fixed, so changing outcomes in fold 0 must not move fold 0's τ̂,
    # and changing them in fold 1 must move it (except for t, whose τ̂ is the nuisance difference itself).
    d = _noise_free()
    base = _fit(key, d, learner=LinearRegression()).tau
    in0, in1 = d["folds"] == 0, d["folds"] == 1
    shocked = dict(d, y=d["y"] + np.where(in0, 5.0 * d["X"][:, 2] + 3.0, 0.0))
    np.testing.assert_array_equal(_fit(key, shocked, learner=LinearRegression()).tau[in0], base[in0])
    if key != "t":
        other = dict(d, y=d["y"] + np.where(in1, 5.0 * d["X"][:, 2] + 3.0, 0.0))
        assert not np.allclose(_fit(key, other, learner=LinearRegression()).tau[in0], base[in0])


# ------------------------------------------------------------------------------------------ statistics
def test_r_and_dr_learners_beat_the_constant_in_pehe():
    # τ(x) = 1 + x₁, x₁ ~ U(−1, 1): PEHE of the best constant is sd(τ) = 1/√3 ≈ 0.577.  A linear R/DR second
    # stage on ~1600 training units has coefficient SEs of order 1/√(1600·0.24·(1/3)) ≈ 0.09, so its PEHE is
    # ≈ 0.1 — far below half of the constant's.
    d = _cross_fit_linear(_dgp(2000, seed=11))
    pehe = {key: float(np.sqrt(np.mean((_fit(key, d, learner=LinearRegression()).tau - d["tau"]) ** 2)))
            for key in ("constant", "r", "dr")}
    # PEHE² of the constant = Var τ + (τ̂ − ATE)² = 1/3 + (AIPW error, SE ≈ 0.05)²
    assert abs(pehe["constant"] - 1 / np.sqrt(3)) < 0.05
    assert pehe["r"] < 0.5 * pehe["constant"]
    assert pehe["dr"] < 0.5 * pehe["constant"]


@pytest.mark.slow
@pytest.mark.usefixtures("one_openmp_thread")
def test_r_and_dr_learners_with_boosting_beat_the_constant_in_pehe_large_n():
    d = _cross_fit_linear(_dgp(40_000, seed=12))
    learner = HistGradientBoostingRegressor(max_iter=100, random_state=0)
    pehe = {key: float(np.sqrt(np.mean((_fit(key, d, learner=learner).tau - d["tau"]) ** 2)))
            for key in ("constant", "r", "dr")}
    assert pehe["r"] < pehe["constant"]
    assert pehe["dr"] < pehe["constant"]


# ------------------------------------------------------------------------------------------ behaviour
@pytest.mark.usefixtures("one_openmp_thread")
def test_default_learner_is_seeded_and_deterministic():
    d = _cross_fit_linear(_dgp(200, seed=5))
    d["folds"] = np.arange(200) % 2
    a = _fit("dr", d, seed=7)
    b = _fit("dr", d, seed=7)
    np.testing.assert_array_equal(a.tau, b.tau)
    assert a.fold_models[0].model.model.random_state == 7  # the boosting fit inside the bin-code wrapper


@pytest.mark.usefixtures("one_openmp_thread")
def test_binary_outcome_clips_tau_and_uses_probabilities():
    rng = np.random.default_rng(2)
    d = _noise_free(n=300)
    d["y"] = (rng.random(300) < 0.2 + 0.6 * d["w"] * (d["X"][:, 0] > 0)).astype(float)
    d["mu0"] = np.full(300, 0.2)
    d["mu1"] = np.full(300, 0.5)
    d["folds"] = np.arange(300) % 2
    for key in ("s", "t", "x", "r", "dr"):
        fit = _fit(key, d, binary_outcome=True, learner=LinearRegression())
        assert fit.bounds == (-1.0, 1.0)
        assert np.all(np.abs(fit.tau) <= 1.0)
        assert np.all(np.abs(fit.predict(d["X"][:5] * 50)) <= 1.0)  # extrapolation is clipped too
    s_fit = _fit("s", d, binary_outcome=True)  # default: boosted classifier giving P(Y = 1)
    assert np.all(np.abs(s_fit.tau) <= 1.0)
    with pytest.raises(SiteproofError, match="0/1"):
        _fit("s", dict(d, y=d["y"] + 0.5), binary_outcome=True)


def test_unknown_key_lists_the_keys():
    d = _noise_free(n=40)
    with pytest.raises(SiteproofError) as err:
        _fit("causal_forest", d)
    for key in CATE_KEYS:
        assert key in err.value.fix


def test_r_learner_passes_weights_through_a_pipeline():
    # scaling does not change a linear fit, so with the weights reaching the last step the pipeline gives the
    # plain weighted fit (noisy y, so that unweighted and weighted fits differ)
    d = _noise_free()
    d["y"] = d["y"] + np.random.default_rng(4).normal(size=d["y"].size)
    plain = _fit("r", d, learner=LinearRegression())
    piped = _fit("r", d, learner=make_pipeline(StandardScaler(), LinearRegression()))
    np.testing.assert_allclose(piped.tau, plain.tau, atol=1e-9)


def test_r_learner_needs_sample_weight():
    d = _noise_free(n=40)
    with pytest.raises(SiteproofError, match="sample_weight"):
        _fit("r", d, learner=KNeighborsRegressor())


def test_training_folds_with_one_arm_are_refused():
    d = _noise_free(n=40)
    d["folds"] = np.arange(40) % 2
    d["w"] = (d["folds"] == 0).astype(float)  # fold 1's training folds (fold 0) are all treated
    with pytest.raises(SiteproofError, match="one treatment arm"):
        _fit("x", d, learner=LinearRegression())


@pytest.mark.parametrize(
    "change, message",
    [
        (dict(e_hat=np.ones(40)), "strictly inside"),
        (dict(w=np.full(40, 2.0)), "0/1"),
        (dict(folds=np.zeros(40, dtype=int)), "at least 2 folds"),
        (dict(mu0=np.zeros(39)), "mu0 has 39 entries but 40"),
        (dict(m_hat=np.full(40, np.nan)), "m_hat: NaN or infinite"),
        (dict(X=np.zeros(40)), "2-D"),
    ],
)
def test_input_mistakes_raise_siteproof_error(change, message):
    d = dict(_noise_free(n=40), **change)
    with pytest.raises(SiteproofError, match=message):
        _fit("dr", d, learner=LinearRegression())


def test_progress_is_called_once_per_fold():
    d = _noise_free(n=80)
    labels: list[str] = []
    _fit("r", d, learner=LinearRegression(), progress=labels.append)
    assert labels == [f"r fold {k}/4" for k in range(1, 5)]


# ------------------------------------------------------------------------------------------ shared binning
def test_fold_bins_match_scikit_learn_binning_of_the_training_units():
    # Reference: scikit-learn's own bin mapper (the binning HistGradientBoosting applies inside fit); on
    # ≤ 200 000 rows it uses every row, so the codes must agree exactly.
    from sklearn.ensemble._hist_gradient_boosting.binning import _BinMapper

    from siteproof.blind.binning import fold_bins

    rng = np.random.default_rng(3)
    X = np.column_stack([rng.normal(size=2000), rng.integers(0, 4, 2000), rng.exponential(size=2000)])
    folds = np.arange(2000) % 4
    shared = fold_bins(X, folds, seed=0)
    for k in range(4):
        train = folds != k
        reference = _BinMapper(n_bins=256).fit(X[train])
        np.testing.assert_array_equal(shared.codes[k][train], reference.transform(X[train]))


def test_fold_bins_never_use_the_covariates_of_the_held_out_fold():
    from siteproof.blind.binning import fold_bins

    rng = np.random.default_rng(4)
    X = rng.normal(size=(1000, 2))
    folds = np.arange(1000) % 5
    moved = X.copy()
    moved[folds == 2] *= 50.0  # fold 2's own covariates must not move fold 2's cuts
    a, b = fold_bins(X, folds, seed=0), fold_bins(moved, folds, seed=0)
    for cut_a, cut_b in zip(a.bins[2].cuts, b.bins[2].cuts):
        np.testing.assert_array_equal(cut_a, cut_b)


@pytest.mark.usefixtures("one_openmp_thread")
def test_shared_bins_give_the_same_fit_as_bins_computed_inside():
    from siteproof.blind.binning import fold_bins

    d = _cross_fit_linear(_dgp(1500, seed=8))
    bins = fold_bins(d["X"], d["folds"], seed=3)
    for key in ("s", "x", "r", "dr"):
        inside, shared = _fit(key, d, seed=3), _fit(key, d, seed=3, bins=bins)
        np.testing.assert_array_equal(inside.tau, shared.tau)
        X_new = d["X"][:50] + 0.01
        np.testing.assert_array_equal(inside.predict(X_new), shared.predict(X_new))


@pytest.mark.usefixtures("one_openmp_thread")
def test_default_fold_models_predict_new_units_through_their_fold_cuts():
    # transporting τ̂ must map new covariates with the fold's own cuts: predicting the training covariates
    # reproduces the out-of-fold τ̂ of the fold each unit was held out from
    d = _cross_fit_linear(_dgp(1200, seed=9))
    fit = _fit("dr", d, seed=1)
    for position in range(5):
        held_out = d["folds"] == position
        np.testing.assert_allclose(fit.fold_models[position].predict(d["X"][held_out]), fit.tau[held_out], rtol=0, atol=1e-12)
