"""Tests of siteproof.blind.rules: simple rules, rule values and their SEs, and the exhaustive tree search."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from siteproof.core.errors import SiteproofError
from siteproof.blind.rules import (
    RuleValue,
    TreeNode,
    TreeRule,
    _feature_bins,
    budget_rule,
    cross_fitted_tree,
    fit_tree_rule,
    rule_value,
    rule_value_by_group,
    threshold_rule,
)
from siteproof.core.estimates import Z95

# ───────────────────────────── simple rules ─────────────────────────────


def test_threshold_rule_without_and_with_cost():
    tau = np.array([-1.0, 0.0, 0.5, 2.0])
    assert threshold_rule(tau).tolist() == [0, 0, 1, 1]              # strict τ̂ > 0
    assert threshold_rule(tau, cost=0.5).tolist() == [0, 0, 0, 1]     # strict τ̂ > c
    assert threshold_rule(tau, cost=np.array([-2.0, 1.0, 0.0, 3.0])).tolist() == [1, 0, 1, 0]
    assert threshold_rule(tau).dtype == np.int8


@pytest.mark.parametrize("n", [1, 7, 10, 33, 100])
@pytest.mark.parametrize("q", [0.0, 0.1, 0.2, 0.25, 0.5, 1.0])
def test_budget_rule_treats_exactly_round_qn_highest(n, q):
    rng = np.random.default_rng(n)
    tau = rng.normal(size=n)
    pi = budget_rule(tau, q)
    m = round(q * n)
    assert pi.sum() == m
    if 0 < m < n:
        assert tau[pi == 1].min() >= tau[pi == 0].max()


def test_budget_rule_breaks_ties_by_index():
    tau = np.array([1.0, 5.0, 1.0, 1.0, 5.0, 1.0])
    assert budget_rule(tau, 0.5).tolist() == [1, 1, 0, 0, 1, 0]      # both 5s, then the first 1
    assert budget_rule(np.zeros(5), 0.4).tolist() == [1, 1, 0, 0, 0]


def test_budget_rule_rejects_share_outside_unit_interval():
    with pytest.raises(SiteproofError):
        budget_rule(np.zeros(3), 1.5)


def test_threshold_and_budget_rules_treat_the_expected_shares():
    # 20 evenly spaced τ̂ in [−1, 1]: exactly 10 are > 0; budget q treats round(q·n) units (by definition)
    tau = np.linspace(-1, 1, 20)
    assert int(threshold_rule(tau).sum()) == 10
    assert [int(budget_rule(tau, q).sum()) for q in (0.1, 0.5)] == [2, 10]
    assert np.all(budget_rule(tau, 0.1)[-2:] == 1)  # the two largest τ̂


def test_rule_inputs_are_checked():
    with pytest.raises(SiteproofError, match="one-dimensional"):
        threshold_rule(np.zeros((2, 2)))
    with pytest.raises(SiteproofError, match="NaN or infinite"):
        threshold_rule([0.0, np.nan])
    with pytest.raises(SiteproofError, match=r"\[0, 1\]"):
        rule_value([0.5, 2.0], [0.0, 0.0], [1.0, 1.0])


# ───────────────────────────── rule values ─────────────────────────────


def test_rule_value_matches_hand_computation():
    pi = np.array([1, 0, 1, 0])
    g0 = np.array([1.0, 2.0, 3.0, 4.0])
    g1 = np.array([3.0, 1.0, 4.0, 4.0])
    rv = rule_value(pi, g0, g1)
    # ψ = π Γ₁ + (1−π) Γ₀ = [3, 2, 4, 4]: mean 3.25, Σ(ψ−ψ̄)² = 2.75
    assert rv.value.estimate == pytest.approx(3.25)
    assert rv.value.se == pytest.approx(math.sqrt(2.75 / 3 / 4))
    # gain = 3.25 − [0.5·mean(Γ₁) + 0.5·mean(Γ₀)] = 3.25 − (1.5 + 1.25) = 0.5
    # φ = (π − ½)(D − D̄), D = [2, −1, 1, 0], D̄ = ½ → [0.75, 0.75, 0.25, 0.25]: Σ(φ−φ̄)² = 0.25
    assert rv.gain.estimate == pytest.approx(0.5)
    assert rv.gain.se == pytest.approx(math.sqrt(0.25 / 3 / 4))
    assert rv.treated_share == 0.5 and rv.n == 4
    lo, hi = rv.gain.ci
    assert (lo, hi) == pytest.approx((0.5 - Z95 * rv.gain.se, 0.5 + Z95 * rv.gain.se))


def test_rule_value_with_cost_matches_hand_computation():
    pi = np.array([1, 0, 1, 0])
    g0 = np.array([1.0, 2.0, 3.0, 4.0])
    g1 = np.array([3.0, 1.0, 4.0, 4.0])
    cost = np.array([0.5, 0.5, 1.0, 0.0])
    rv = rule_value(pi, g0, g1, cost)
    # Γ₁ − c = [2.5, 0.5, 3, 4]; ψ = [2.5, 2, 3, 4]: mean 2.875, Σ(ψ−ψ̄)² = 2.1875
    assert rv.value.estimate == pytest.approx(2.875)
    assert rv.value.se == pytest.approx(math.sqrt(2.1875 / 3 / 4))
    # D = Γ₁ − c − Γ₀ = [1.5, −1.5, 0, 0], D̄ = 0; φ = (π − ½)D = [0.75, 0.75, 0, 0]: mean 0.375, Σ(φ−φ̄)² = 0.5625
    # check: 2.875 − [0.5·mean(Γ₁ − c) + 0.5·mean(Γ₀)] = 2.875 − (1.25 + 1.25) = 0.375
    assert rv.gain.estimate == pytest.approx(0.375)
    assert rv.gain.se == pytest.approx(math.sqrt(0.5625 / 3 / 4))
    # a scalar cost is broadcast
    assert rule_value(pi, g0, g1, 0.5).value.estimate == pytest.approx(np.mean([2.5, 2.0, 3.5, 4.0]))


def test_rule_value_scores_average_to_estimates_and_to_dict_is_json():
    rng = np.random.default_rng(3)
    g0, g1 = rng.normal(size=50), rng.normal(size=50)
    pi = (rng.uniform(size=50) < 0.3).astype(np.int8)
    rv = rule_value(pi, g0, g1)
    assert rv.value.scores.mean() == pytest.approx(rv.value.estimate)
    assert rv.gain.scores.mean() == pytest.approx(rv.gain.estimate)
    q = pi.mean()
    assert rv.gain.estimate == pytest.approx(rv.value.estimate - (q * g1.mean() + (1 - q) * g0.mean()))
    d = json.loads(json.dumps(rv.to_dict()))
    assert set(d) == {"value", "gain", "treated_share", "n"} and set(d["gain"]) >= {"estimate", "se", "ci"}


def test_rule_value_by_group_equals_value_on_each_subset():
    rng = np.random.default_rng(4)
    n = 60
    g0, g1, cost = rng.normal(size=n), rng.normal(size=n), rng.uniform(size=n)
    pi = (rng.uniform(size=n) < 0.5).astype(np.int8)
    groups = np.array(["b", "a", "c"] * 20)
    by = rule_value_by_group(pi, g0, g1, groups, cost)
    assert list(by) == ["a", "b", "c"]
    for label, rv in by.items():
        m = groups == label
        ref = rule_value(pi[m], g0[m], g1[m], cost[m])
        assert isinstance(rv, RuleValue) and rv.n == 20
        assert rv.value.estimate == pytest.approx(ref.value.estimate)
        assert rv.gain.estimate == pytest.approx(ref.gain.estimate)
        assert rv.gain.se == pytest.approx(ref.gain.se)


def test_rule_value_rejects_bad_inputs():
    with pytest.raises(SiteproofError):
        rule_value([1, 0], [0.0, 1.0], [0.0])
    with pytest.raises(SiteproofError):
        rule_value([2, 0], [0.0, 1.0], [0.0, 1.0])
    with pytest.raises(SiteproofError):
        rule_value([1, 0], [np.nan, 1.0], [0.0, 1.0])


def test_gain_of_random_rule_is_zero_in_expectation():
    """π independent of everything ⇒ E[Ĝ] = (n−1)/n · Cov(π, D) = 0; tolerance 4 Monte Carlo SEs."""
    rng = np.random.default_rng(11)
    reps, n = 400, 200
    gains = np.empty(reps)
    for r in range(reps):
        x = rng.uniform(size=n)
        g0 = x + rng.normal(size=n)
        g1 = g0 + 2.0 + 3.0 * x + rng.normal(size=n)
        pi = (rng.uniform(size=n) < 0.3).astype(np.int8)
        gains[r] = rule_value(pi, g0, g1).gain.estimate
    assert abs(gains.mean()) < 4 * gains.std(ddof=1) / math.sqrt(reps)


def _coverage_design(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """x ~ U(0,1), Γ₀ = x + ε₀, Γ₁ = x + 3 + 2x + ε₁, π = 1{x > 0.6}.

    True gain  G = Cov(π, 2x) = 2(E[x·1{x>0.6}] − 0.4·0.5) = 2(0.32 − 0.20) = 0.24.
    True value V = E[Γ₀] + E[π(3 + 2x)] = 0.5 + 1.2 + 0.64 = 2.34.
    The large mean effect (E[D] = 4) makes the q̂ term of the influence function matter.
    """
    x = rng.uniform(size=n)
    g0 = x + rng.normal(size=n)
    g1 = x + 3.0 + 2.0 * x + rng.normal(size=n)
    return (x > 0.6).astype(np.int8), g0, g1


def _coverage_run(reps: int, n: int, seed: int) -> dict[str, float]:
    rng = np.random.default_rng(seed)
    gain, gain_se, naive_se, cover_gain, cover_value = (np.empty(reps) for _ in range(5))
    for r in range(reps):
        pi, g0, g1 = _coverage_design(rng, n)
        rv = rule_value(pi, g0, g1)
        gain[r], gain_se[r] = rv.gain.estimate, rv.gain.se
        cover_gain[r] = rv.gain.ci[0] <= 0.24 <= rv.gain.ci[1]
        cover_value[r] = rv.value.ci[0] <= 2.34 <= rv.value.ci[1]
        # the SE that ignores the randomness of q̂: scores (π − q̂)·D without centring D
        naive_se[r] = np.std((pi - pi.mean()) * (g1 - g0), ddof=1) / math.sqrt(n)
    sd = gain.std(ddof=1)
    return {"se_ratio": gain_se.mean() / sd, "naive_ratio": naive_se.mean() / sd,
            "cover_gain": cover_gain.mean(), "cover_value": cover_value.mean()}


def _check_coverage(out: dict[str, float], reps: int) -> None:
    # relative Monte Carlo error of a sample SD over `reps` replications ≈ 1/√(2(reps−1)); allow 3 of them
    assert abs(out["se_ratio"] - 1.0) < 3.0 / math.sqrt(2 * (reps - 1))
    # per-unit variance of the naive scores ≈ 4.73 vs 0.51 for φ (docs/methods-rules.md) ⇒ ratio ≈ 3.05
    assert out["naive_ratio"] > 2.0
    # binomial error of the coverage of a 95 % interval: √(0.95·0.05/reps); allow 3.5 of them
    tol = 3.5 * math.sqrt(0.95 * 0.05 / reps)
    assert abs(out["cover_gain"] - 0.95) < tol
    assert abs(out["cover_value"] - 0.95) < tol


def test_gain_se_accounts_for_estimated_share_small():
    _check_coverage(_coverage_run(reps=300, n=400, seed=2026), reps=300)


@pytest.mark.slow
def test_gain_se_accounts_for_estimated_share_large():
    _check_coverage(_coverage_run(reps=4000, n=1000, seed=7), reps=4000)


# ───────────────────────────── tree rules ─────────────────────────────


def _leaf_sizes(node: TreeNode, X: np.ndarray, mask: np.ndarray) -> list[int]:
    if node.is_leaf:
        return [int(mask.sum())]
    go = X[:, node.feature] <= node.threshold
    return _leaf_sizes(node.left, X, mask & go) + _leaf_sizes(node.right, X, mask & ~go)


def _brute_force_best(X: np.ndarray, reward: np.ndarray, depth: int, min_leaf: int) -> float:
    """Enumerate every tree of the given depth on all mid-point cuts; best Σ_leaves max(0, Σ reward)."""
    n, p = X.shape
    splits = [(j, t) for j in range(p) for t in np.unique(X[:, j])[:-1] + 0.5]   # integer features

    def leaf(mask: np.ndarray) -> float:
        return max(0.0, float(reward[mask].sum())) if mask.sum() >= min_leaf else -np.inf

    def side(mask: np.ndarray, levels: int) -> float:
        best = leaf(mask)
        if levels == 0:
            return best
        for j, t in splits:
            go = X[:, j] <= t
            best = max(best, side(mask & go, levels - 1) + side(mask & ~go, levels - 1))
        return best

    return side(np.ones(n, dtype=bool), depth)


@pytest.mark.parametrize("depth,min_leaf,seed", [(2, 1, 0), (2, 15, 1), (1, 1, 2), (1, 30, 3), (2, 40, 4)])
def test_fast_search_matches_brute_force(depth, min_leaf, seed):
    rng = np.random.default_rng(seed)
    n = 200
    X = rng.integers(0, 5, size=(n, 3)).astype(float)
    g0 = rng.normal(size=n)
    g1 = g0 + np.sin(X[:, 0]) - 0.3 * X[:, 1] + 0.5 * X[:, 2] * (X[:, 0] > 2) + rng.normal(size=n)
    reward = g1 - g0
    tree = fit_tree_rule(X, g0, g1, ["a", "b", "c"], depth=depth, max_bins=8, min_leaf=min_leaf)
    achieved = float((tree.predict(X) * reward).sum())
    assert achieved == pytest.approx(_brute_force_best(X, reward, depth, min_leaf), abs=1e-9)
    assert tree.objective == pytest.approx((g0.sum() + achieved) / n)
    assert min(_leaf_sizes(tree.root, X, np.ones(n, dtype=bool))) >= min_leaf
    assert tree.root.depth() <= depth


def test_fast_search_with_cost_matches_brute_force():
    rng = np.random.default_rng(5)
    n = 150
    X = rng.integers(0, 4, size=(n, 3)).astype(float)
    g0, g1 = rng.normal(size=n), rng.normal(size=n) + 0.4 * X[:, 1]
    cost = rng.uniform(0, 1, size=n)
    tree = fit_tree_rule(X, g0, g1, ["a", "b", "c"], max_bins=8, cost=cost, min_leaf=5)
    reward = g1 - cost - g0
    achieved = float((tree.predict(X) * reward).sum())
    assert achieved == pytest.approx(_brute_force_best(X, reward, 2, 5), abs=1e-9)


def _planted(rng: np.random.Generator, n: int, noise: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Treat iff x0 > 0 and x1 < 0.5: τ = +1 there and −1 elsewhere; x2, x3 are irrelevant."""
    X = np.column_stack([rng.normal(size=n), rng.uniform(size=n), rng.normal(size=n), rng.integers(0, 2, n)])
    tau = np.where((X[:, 0] > 0) & (X[:, 1] < 0.5), 1.0, -1.0)
    g0 = noise * rng.normal(size=n)
    return X, g0, g0 + tau + noise * rng.normal(size=n)


def test_planted_rule_is_recovered_from_exact_scores():
    rng = np.random.default_rng(21)
    X, g0, g1 = _planted(rng, 3000, noise=0.0)
    tree = fit_tree_rule(X, g0, g1, ["x0", "x1", "x2", "x3"])
    used = {tree.root.feature} | {c.feature for c in (tree.root.left, tree.root.right) if not c.is_leaf}
    assert used == {0, 1}
    thresholds = {tree.root.feature: tree.root.threshold}
    thresholds.update({c.feature: c.threshold for c in (tree.root.left, tree.root.right) if not c.is_leaf})
    # with exact scores the optimum is the grid cut next to the truth: 32 quantile bins are ≈ 1/(32·φ(0)) ≈ 0.078
    # wide near 0 for x0 ~ N(0,1), and 1/32 ≈ 0.031 wide for x1 ~ U(0,1)
    assert abs(thresholds[0]) < 0.1
    assert abs(thresholds[1] - 0.5) < 0.04


def test_planted_rule_is_recovered_from_noisy_scores():
    rng = np.random.default_rng(22)
    X, g0, g1 = _planted(rng, 4000, noise=1.0)
    tree = fit_tree_rule(X, g0, g1, ["x0", "x1", "x2", "x3"])
    X_new, _, _ = _planted(rng, 4000, noise=0.0)
    truth = (X_new[:, 0] > 0) & (X_new[:, 1] < 0.5)
    assert np.mean(tree.predict(X_new) == truth) > 0.95


def test_min_leaf_is_respected_and_constant_reward_gives_a_single_leaf():
    rng = np.random.default_rng(8)
    X = rng.normal(size=(300, 4))
    g0, g1 = rng.normal(size=300), rng.normal(size=300)
    tree = fit_tree_rule(X, g0, g1, list("abcd"), min_leaf=40)
    assert min(_leaf_sizes(tree.root, X, np.ones(300, dtype=bool))) >= 40
    everyone = fit_tree_rule(X, g0, g0 + 1.0, list("abcd"))
    assert everyone.root.is_leaf and everyone.to_text() == "treat everyone"
    no_one = fit_tree_rule(X, g0, g0 - 1.0, list("abcd"))
    assert no_one.root.is_leaf and no_one.to_text() == "treat no one"
    assert fit_tree_rule(X, g0, g1, list("abcd"), min_leaf=200).root.is_leaf   # no split leaves 200 on each side


def test_feature_bins_are_quantile_groups_and_indicator_cuts_at_half():
    x = np.random.default_rng(9).normal(size=1000)
    cuts, bins = _feature_bins(x, 4)
    assert cuts.size == 3 and np.bincount(bins).tolist() == [250, 250, 250, 250]
    cuts, bins = _feature_bins(np.array([0.0, 1.0, 1.0, 0.0]), 32)
    assert cuts.tolist() == [0.5] and bins.tolist() == [0, 1, 1, 0]


def test_to_text_and_to_dict():
    root = TreeNode(feature=0, threshold=42.5,
                    left=TreeNode(feature=1, threshold=0.5, left=TreeNode(action=1), right=TreeNode(action=0)),
                    right=TreeNode(action=0))
    tree = TreeRule(root=root, feature_names=("spring_fluency", "home_language=other"), max_depth=2, min_leaf=1,
                    n_fit=10, objective=0.0)
    assert tree.to_text() == ("if spring_fluency <= 42.5:\n  if home_language=other <= 0.5: treat\n"
                              "  else: do not treat\nelse: do not treat")
    X = np.array([[40.0, 0.0], [40.0, 1.0], [50.0, 0.0]])
    assert tree.predict(X).tolist() == [1, 0, 0]
    d = json.loads(json.dumps(tree.to_dict()))
    assert d["root"]["feature"] == "spring_fluency" and d["root"]["left"]["left"]["action"] == "treat"
    assert d["depth"] == 2 and d["text"] == tree.to_text()


def test_tree_input_errors():
    X = np.zeros((10, 2))
    g = np.zeros(10)
    with pytest.raises(SiteproofError):
        fit_tree_rule(X, g, g, ["a"])
    with pytest.raises(SiteproofError):
        fit_tree_rule(X, g, g, ["a", "b"], depth=3)
    X[0, 0] = np.nan
    with pytest.raises(SiteproofError):
        fit_tree_rule(X, g, g, ["a", "b"])


def test_cross_fitted_tree_is_out_of_fold_and_deterministic():
    rng = np.random.default_rng(31)
    n = 1200
    X, g0, g1 = _planted(rng, n, noise=1.0)
    folds = np.arange(n) % 4
    names = ["x0", "x1", "x2", "x3"]
    pi, full, per_fold = cross_fitted_tree(X, g0, g1, folds, names)
    assert len(per_fold) == 4 and full.n_fit == n and "all units" in full.label
    for k, tree in enumerate(per_fold):
        assert tree.n_fit == np.sum(folds != k)
        assert np.array_equal(pi[folds == k], tree.predict(X[folds == k]))
    # scrambling fold 0's own scores cannot change fold 0's assignments
    g1_scrambled = g1.copy()
    g1_scrambled[folds == 0] = 100.0 * rng.normal(size=np.sum(folds == 0))
    pi2, _, _ = cross_fitted_tree(X, g0, g1_scrambled, folds, names)
    assert np.array_equal(pi2[folds == 0], pi[folds == 0])
    # same inputs ⇒ identical output
    pi3, full3, _ = cross_fitted_tree(X, g0, g1, folds, names)
    assert np.array_equal(pi3, pi) and full3.to_dict() == full.to_dict()


def test_brute_force_helper_enumerates_all_depth_one_trees():
    """Guard for the reference: on 2 units with 1 feature the best depth-1 value is Σ max(0, R_i)."""
    X = np.array([[0.0], [1.0]])
    reward = np.array([2.0, -1.0])
    assert _brute_force_best(X, reward, 1, 1) == 2.0
    assert _brute_force_best(X, reward, 1, 2) == 1.0


def test_depth_one_tree_with_more_than_256_bins_matches_brute_force():
    # more bins than uint8 codes can hold: the search must switch to wide codes; reference = brute force over
    # every gap between the 300 distinct values (Σ_leaves max(0, Σ reward), each leaf ≥ min_leaf units)
    rng = np.random.default_rng(12)
    x = rng.integers(0, 300, 3000).astype(float)
    reward = np.sin(x / 40.0) + rng.normal(scale=0.5, size=x.size)
    tree = fit_tree_rule(x[:, None], np.zeros(x.size), reward, ["x"], depth=1, max_bins=400, min_leaf=100)
    values = np.unique(x)
    best, best_cut = max(reward.sum(), 0.0), None
    for lo, hi in zip(values[:-1], values[1:]):
        left = x <= lo
        if min(left.sum(), (~left).sum()) < 100:
            continue
        value = max(reward[left].sum(), 0.0) + max(reward[~left].sum(), 0.0)
        if value > best + 1e-10 * np.abs(reward).sum():
            best, best_cut = value, (lo + hi) / 2
    assert tree.root.threshold == pytest.approx(best_cut)
    assert tree.objective == pytest.approx(best / x.size)


def test_shared_sorting_bins_each_training_subset_as_binning_it_alone():
    # cross_fitted_tree sorts each column once for all folds; the result must equal binning every subset alone
    from siteproof.blind.rules import _bin_matrices, _bin_matrix

    rng = np.random.default_rng(13)
    X = np.column_stack([rng.normal(size=900), rng.integers(0, 5, 900), np.round(rng.normal(size=900), 1)])
    masks = [np.arange(900) % 3 != k for k in range(3)] + [np.ones(900, dtype=bool)]
    for mask, (bins, cuts, n_bins) in zip(masks, _bin_matrices(X, masks, 16)):
        alone_bins, alone_cuts, alone_n = _bin_matrix(X[mask], 16)
        np.testing.assert_array_equal(bins, alone_bins)
        assert n_bins == alone_n
        for a, b in zip(cuts, alone_cuts):
            np.testing.assert_array_equal(a, b)
