"""Learned treatment rules and their values: who to treat, and what treating them that way is worth.

Rules
-----
* **Threshold rule** (from a CATE model): treat iff τ̂(x) > c (per-unit cost, 0 without a cost column).
* **Budget rule**: treat exactly round(q·n) units with the highest τ̂ (q = 10 %, 20 %, …).
* **Depth-2 decision tree** found by exhaustive search over doubly robust arm scores on a coarsened grid of
  covariate splits (Athey & Wager 2021, Econometrica 89(1):133–161; the empirical-welfare view is Kitagawa &
  Tetenov 2018, Econometrica 86(2):591–616).  The search uses 2-D histograms of the reward difference and their
  cumulative sums, so it costs O(p²·n + p²·B²) for p features and B bins instead of O(p²·n²).

Values
------
With doubly robust arm scores Γ₀, Γ₁ (Robins, Rotnitzky & Zhao 1994; ``siteproof.core.scores.arm_scores``) and a
per-unit cost c (0 if absent), the value of a rule π(x) ∈ {0, 1} is the mean of

    ψ_i = π_i·(Γ₁_i − c_i) + (1 − π_i)·Γ₀_i,                    V̂(π) = mean(ψ),  SE = sd(ψ)/√n,

and its gain over random allocation with the same treated share q̂ = mean(π) is (Imai & Li 2023, JASA
118(541):242–256, "population average prescriptive effect")

    Ĝ(π) = V̂(π) − [q̂·mean(Γ₁ − c) + (1 − q̂)·mean(Γ₀)] = mean[(π − q̂)·(D − D̄)],   D = Γ₁ − Γ₀ − c.

Its influence function, with q̂ estimated, is φ_i = (π_i − q̂)(D_i − D̄) (the naive (π_i − q̂)D_i misses the term
−(π_i − q̂)·D̄ that comes from estimating q); SE = sd(φ)/√n.  The derivation is in docs/methods-rules.md.

The value functions take plain arrays, so the unmask step can re-score the same assignments with design-based
arm scores (known site rates), pooled and per site (:func:`rule_value_by_group`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ..core.checks import in_unit_interval, unit_vector, unit_vector_or_scalar
from ..core.errors import SiteproofError
from ..core.estimates import Estimate

DEFAULT_MIN_LEAF_SHARE = 0.05
_TREAT, _NO_TREAT = "treat", "do not treat"


# ───────────────────────────── input checks ─────────────────────────────


def _vector(name: str, values: Any, n: int | None = None) -> np.ndarray:
    """A finite float64 vector (of length n if given), else SiteproofError (:func:`~siteproof.core.checks.unit_vector`)."""
    return unit_vector(name, values, n, f"impute or drop them before computing {name}")


def _cost_vector(cost: Any, n: int) -> np.ndarray:
    """Per-unit cost as a length-n vector: 0 if None, a scalar broadcast, or the array itself."""
    if cost is None:
        return np.zeros(n)
    return unit_vector_or_scalar("cost", cost, n, "impute or drop them before computing cost")


def _assignment(pi: Any, n: int | None = None) -> np.ndarray:
    """Assignments π_i ∈ [0, 1] (0/1 for deterministic rules; fractions for randomised ones)."""
    arr = _vector("rule assignments", pi, n)
    in_unit_interval("rule assignments", arr, "pass 0/1 treat indicators (or probabilities)")
    return arr


def _arm_pair(gamma0: Any, gamma1: Any) -> tuple[np.ndarray, np.ndarray]:
    g0 = _vector("gamma0", gamma0)
    return g0, _vector("gamma1", gamma1, g0.size)


# ───────────────────────────── simple rules ─────────────────────────────


def threshold_rule(tau: Any, cost: Any = None) -> np.ndarray:
    """Treat iff τ̂_i > c_i (c = 0 without a cost): the plug-in rule of a CATE model.  Returns int8 0/1."""
    tau = _vector("tau", tau)
    return (tau > _cost_vector(cost, tau.size)).astype(np.int8)


def budget_rule(tau: Any, q: float) -> np.ndarray:
    """Treat exactly round(q·n) units with the highest τ̂ (Python rounding: halves go to the even integer).

    Ties in τ̂ are broken deterministically by a stable sort: among equal τ̂ the unit with the lower index is
    treated first.  Returns int8 0/1.
    """
    tau = _vector("tau", tau)
    if not 0.0 <= float(q) <= 1.0:
        raise SiteproofError(f"budget share {q} is outside [0, 1]", "give the treated share as a fraction, e.g. 0.2")
    n_treat = int(round(float(q) * tau.size))
    order = np.argsort(-tau, kind="stable")
    pi = np.zeros(tau.size, dtype=np.int8)
    pi[order[:n_treat]] = 1
    return pi


# ───────────────────────────── rule values ─────────────────────────────


@dataclass(frozen=True)
class RuleValue:
    """Value of a rule (net of cost), its gain over random allocation with the same treated share, and SEs."""

    value: Estimate
    gain: Estimate
    treated_share: float
    n: int

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary: value and gain (estimate, se, ci), treated share and n."""
        return {"treated_share": self.treated_share, "n": self.n,
                "value": self.value.to_dict(), "gain": self.gain.to_dict()}


def rule_value(pi: Any, gamma0: Any, gamma1: Any, cost: Any = None, clusters: Any = None) -> RuleValue:
    """Value and gain of the assignments π from arm scores Γ₀, Γ₁ (Imai & Li 2023; Athey & Wager 2021).

    value: ψ_i = π_i(Γ₁_i − c_i) + (1 − π_i)Γ₀_i, V̂ = mean(ψ), SE = sd(ψ)/√n.
    gain:  φ_i = (π_i − q̂)(D_i − D̄), D = Γ₁ − Γ₀ − c, q̂ = mean(π); Ĝ = mean(φ)
           = V̂ − [q̂·mean(Γ₁ − c) + (1 − q̂)·mean(Γ₀)], SE = sd(φ)/√n (accounts for the estimated share q̂).

    Both treat the rule as a fixed function of x (it was fit out-of-fold or elsewhere); for a budget rule this
    means conditioning on its realised cutoff (see docs/methods-rules.md).  With ``clusters`` both SEs are
    the cluster-robust SEs of a mean (Liang & Zeger 1986).
    """
    g0, g1 = _arm_pair(gamma0, gamma1)
    n = g0.size
    if n == 0:
        raise SiteproofError("no units to evaluate the rule on", "pass non-empty arrays")
    p = _assignment(pi, n)
    net1 = g1 - _cost_vector(cost, n)
    q_hat = float(p.mean())
    diff = net1 - g0
    value_scores = p * net1 + (1.0 - p) * g0
    gain_scores = (p - q_hat) * (diff - diff.mean())
    return RuleValue(
        value=Estimate.from_scores("rule value", value_scores, estimand="value of the rule (mean outcome net of cost)",
                                    clusters=clusters),
        gain=Estimate.from_scores("rule gain", gain_scores,
                                  estimand="gain over random allocation with the same treated share",
                                  clusters=clusters),
        treated_share=q_hat,
        n=n,
    )


def rule_value_by_group(pi: Any, gamma0: Any, gamma1: Any, groups: Any, cost: Any = None,
                        clusters: Any = None) -> dict[str, RuleValue]:
    """:func:`rule_value` within each group (e.g. site), keyed by ``str(label)`` in sorted label order.

    Within a group the gain compares the rule with random allocation at that group's own treated share; with
    ``clusters`` (one label per unit, nested in the groups) each group's SEs are cluster-robust.
    """
    g0, g1 = _arm_pair(gamma0, gamma1)
    n = g0.size
    p = _assignment(pi, n)
    c = _cost_vector(cost, n)
    labels = np.asarray(groups)
    if labels.shape != (n,):
        raise SiteproofError(f"groups has shape {labels.shape} but {n} units were given", "pass one label per unit")
    uniques, codes = np.unique(labels, return_inverse=True)
    members = None if clusters is None else np.asarray(clusters, dtype=object)
    return {str(label): rule_value(p[codes == g], g0[codes == g], g1[codes == g], c[codes == g],
                                   clusters=None if members is None else members[codes == g])
            for g, label in enumerate(uniques)}


# ───────────────────────────── tree rules ─────────────────────────────


@dataclass(frozen=True)
class TreeNode:
    """A node of a tree rule: a leaf (``action`` 0/1) or a split ``x[feature] <= threshold`` → left, else right."""

    action: int | None = None
    feature: int | None = None
    threshold: float | None = None
    left: TreeNode | None = None
    right: TreeNode | None = None

    @property
    def is_leaf(self) -> bool:
        return self.action is not None

    def predict(self, X: np.ndarray) -> np.ndarray:
        """0/1 action for every row of X."""
        if self.is_leaf:
            return np.full(X.shape[0], self.action, dtype=np.int8)
        go_left = X[:, self.feature] <= self.threshold
        return np.where(go_left, self.left.predict(X), self.right.predict(X)).astype(np.int8)

    def depth(self) -> int:
        return 0 if self.is_leaf else 1 + max(self.left.depth(), self.right.depth())

    def to_dict(self, names: Sequence[str]) -> dict[str, Any]:
        if self.is_leaf:
            return {"action": _TREAT if self.action else _NO_TREAT, "treat": int(self.action)}
        return {"feature": names[self.feature], "feature_index": int(self.feature), "threshold": float(self.threshold),
                "left": self.left.to_dict(names), "right": self.right.to_dict(names)}

    def text_lines(self, names: Sequence[str], indent: str) -> list[str]:
        """``if name <= t:`` / ``else:`` lines; a leaf child is written on the same line."""
        lines: list[str] = []
        for head, child in ((f"if {names[self.feature]} <= {self.threshold:.6g}:", self.left), ("else:", self.right)):
            if child.is_leaf:
                lines.append(f"{indent}{head} {_TREAT if child.action else _NO_TREAT}")
            else:
                lines.append(f"{indent}{head}")
                lines.extend(child.text_lines(names, indent + "  "))
        return lines


@dataclass(frozen=True)
class TreeRule:
    """A depth-≤2 decision-tree treatment rule found by exhaustive search (Athey & Wager 2021).

    ``label`` says which units it was fit on; ``objective`` is its in-sample mean of Γ₀ + π·(Γ₁ − c − Γ₀) on
    those units (optimistic by construction — honest values come from out-of-fold assignments).
    """

    root: TreeNode
    feature_names: tuple[str, ...]
    max_depth: int
    min_leaf: int
    n_fit: int
    objective: float
    label: str = "fit on all units"

    def predict(self, X: Any) -> np.ndarray:
        """0/1 treatment for every row of X (same columns as the data the tree was fit on)."""
        X = np.asarray(X, dtype=float)
        if X.ndim != 2 or X.shape[1] != len(self.feature_names):
            raise SiteproofError(f"X has shape {X.shape} but the rule uses {len(self.feature_names)} features",
                                 "pass the same feature columns the rule was fit on")
        return self.root.predict(X)

    def to_text(self) -> str:
        """Readable if-then text, e.g. ``if age <= 42.5:\\n  if score <= 3: treat\\n  else: do not treat\\n…``."""
        if self.root.is_leaf:
            return "treat everyone" if self.root.action else "treat no one"
        return "\n".join(self.root.text_lines(self.feature_names, ""))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description: nested splits, the text form and how the tree was fit."""
        return {"kind": "tree", "label": self.label, "max_depth": self.max_depth, "depth": self.root.depth(),
                "min_leaf": self.min_leaf, "n_fit": self.n_fit, "objective": self.objective,
                "feature_names": list(self.feature_names), "root": self.root.to_dict(self.feature_names),
                "text": self.to_text()}


def _cuts_of_sorted(xs: np.ndarray, max_bins: int) -> np.ndarray:
    """Cut points of one feature from its sorted values (bin ≤ t ⇔ x ≤ cuts[t]).

    With at most ``max_bins`` distinct values every gap between neighbours is a candidate; otherwise the
    candidates are the empirical quantiles at levels 1/B, …, (B−1)/B.  A cut is placed half-way between a
    candidate value and the next larger observed value, so it splits the data exactly where the candidate does
    and reads naturally (0/1 indicators split at 0.5).
    """
    distinct = xs[np.r_[True, xs[1:] != xs[:-1]]]
    if distinct.size <= max_bins:
        lower = np.arange(distinct.size - 1)
    else:
        levels = np.arange(1, max_bins) / max_bins
        values = xs[np.ceil(levels * xs.size).astype(np.intp) - 1]
        lower = np.unique(np.searchsorted(distinct, values))
        lower = lower[lower < distinct.size - 1]
    return (distinct[lower] + distinct[lower + 1]) / 2.0


def _feature_bins(x: np.ndarray, max_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Cut points of one feature (:func:`_cuts_of_sorted`) and every unit's bin index (bin ≤ t ⇔ x ≤ cuts[t])."""
    cuts = _cuts_of_sorted(np.sort(x), max_bins)
    return cuts, np.searchsorted(cuts, x, side="left")


def _code_dtype(max_bins: int) -> type:
    return np.uint8 if max_bins <= 256 else np.intp


def _bin_matrix(X: np.ndarray, max_bins: int) -> tuple[np.ndarray, list[np.ndarray], int]:
    """Bin every column once: (p, n) bin indices (one contiguous row per feature; uint8 when the bins fit),
    the cut points per feature and the common bin count B."""
    cuts = []
    bins = np.empty((X.shape[1], X.shape[0]), dtype=_code_dtype(max_bins))
    for j, column in enumerate(np.ascontiguousarray(X.T)):
        cut, bins[j] = _feature_bins(column, max_bins)
        cuts.append(cut)
    return bins, cuts, max(1, max(c.size + 1 for c in cuts))


def _bin_matrices(X: np.ndarray, subsets: Sequence[np.ndarray], max_bins: int) -> list[tuple[np.ndarray, list[np.ndarray], int]]:
    """:func:`_bin_matrix` of X[subset] for every boolean row mask, sorting each column once for all of them.

    A subset's sorted values are read off the sorted column in order; every unit's code under the subset's
    cuts follows from where the cuts fall in the sorted column (units between cut t−1 and cut t get code t).
    """
    n, p = X.shape
    bins = [np.empty((p, int(mask.sum())), dtype=_code_dtype(max_bins)) for mask in subsets]
    cuts: list[list[np.ndarray]] = [[] for _ in subsets]
    codes = np.empty(n, dtype=_code_dtype(max_bins))
    for j, column in enumerate(np.ascontiguousarray(X.T)):
        order = np.argsort(column, kind="stable")
        ordered = column[order]
        for f, mask in enumerate(subsets):
            cut = _cuts_of_sorted(ordered[mask[order]], max_bins)
            edges = np.concatenate([[0], np.searchsorted(ordered, cut, side="right"), [n]])
            codes[order] = np.repeat(np.arange(cut.size + 1, dtype=codes.dtype), np.diff(edges))
            bins[f][j] = codes[mask]
            cuts[f].append(cut)
    return [(b, c, max(1, max(k.size + 1 for k in c))) for b, c in zip(bins, cuts)]


def _pair_histograms(bins: np.ndarray, reward: np.ndarray, n_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """H[j, k, a, b] = Σ reward and N[j, k, a, b] = count of units with bin_j = a and bin_k = b.

    One weighted and one plain ``np.bincount`` over the codes a·B + b per pair j ≤ k (O(p²·n) in total); the
    pair (k, j) is the transpose.
    """
    p, size = bins.shape[0], n_bins * n_bins
    sums = np.empty((p, p, n_bins, n_bins))
    counts = np.empty((p, p, n_bins, n_bins))
    for j in range(p):
        root_code = bins[j].astype(np.intp) * n_bins
        for k in range(j, p):
            code = root_code + bins[k]
            sums[j, k] = np.bincount(code, weights=reward, minlength=size).reshape(n_bins, n_bins)
            counts[j, k] = np.bincount(code, minlength=size).reshape(n_bins, n_bins)
            sums[k, j], counts[k, j] = sums[j, k].T, counts[j, k].T
    return sums, counts


def _positive(a: np.ndarray) -> np.ndarray:
    return np.maximum(a, 0.0)


@dataclass(frozen=True)
class _Child:
    """Best subtree of one side of a root split: a leaf (feature −1) or a split on (feature, bin)."""

    value: float
    feature: int
    bin: int


def _best_children(
    cum_r: np.ndarray, cum_n: np.ndarray, min_leaf: int, tol: float
) -> tuple[list[_Child], list[_Child]]:
    """For a root feature j and every root cut t: the best left and right subtree (leaf or one more split).

    ``cum_r[k, t, s]`` = Σ reward over bin_j ≤ t and bin_k ≤ s (2-D cumulative sums of the pair histograms),
    so the four grandchildren of (x_j ≤ cut t, x_k ≤ cut s) are read off in O(1):
        LL = S[t, s], LR = S[t, B−1] − S[t, s], RL = S[B−1, s] − S[t, s], RR = S[B−1, B−1] − S[t, B−1] − RL.
    A subtree's value is Σ_leaves max(0, Σ_leaf reward); splits leaving a grandchild below ``min_leaf`` units are
    excluded; a split replaces the leaf only if it improves the value by more than ``tol``.
    """
    def quarters(cum: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        left, column, total = cum[:, :, -1:], cum[:, -1:, :], cum[:, -1:, -1:]
        right_low = column - cum
        return cum, left - cum, right_low, total - left - right_low

    ll, lr, rl, rr = quarters(cum_r)
    nll, nlr, nrl, nrr = quarters(cum_n)
    left_total = cum_r[0, :, -1]
    sides = (((ll, lr, nll, nlr), left_total), ((rl, rr, nrl, nrr), cum_r[0, -1, -1] - left_total))
    best = []
    for (a, b, na, nb), side_total in sides:
        value = np.where((na >= min_leaf) & (nb >= min_leaf), _positive(a) + _positive(b), -np.inf)
        s_best = value.argmax(axis=2)                                   # best child cut per (k, t)
        v_best = np.take_along_axis(value, s_best[:, :, None], axis=2)[:, :, 0]
        k_best = v_best.argmax(axis=0)                                  # best child feature per t
        leaf = _positive(side_total)
        children = []
        for t, k in enumerate(k_best):
            split_value = float(v_best[k, t])
            if split_value > leaf[t] + tol:
                children.append(_Child(split_value, int(k), int(s_best[k, t])))
            else:
                children.append(_Child(float(leaf[t]), -1, -1))
        best.append(children)
    return best[0], best[1]


def _search(bins: np.ndarray, reward: np.ndarray, n_bins: int, depth: int, min_leaf: int,
            tol: float) -> tuple[float, tuple[int, int, _Child, _Child] | None]:
    """Exhaustive search of the best depth-1 or depth-2 tree on binned features.

    Returns the best total Σ_leaves max(0, Σ reward) and the root (feature, bin, left child, right child), or
    None when no split beats the single leaf by more than ``tol``.  Ties go to the first candidate in the order
    (root feature, root bin, child feature, child bin), so the result is deterministic.
    """
    total, n = float(reward.sum()), reward.size
    best_value, best_root = float(_positive(np.array(total))), None
    if depth == 1:
        one_sums = [np.bincount(row, weights=reward, minlength=n_bins).cumsum() for row in bins]
        one_counts = [np.bincount(row, minlength=n_bins).cumsum() for row in bins]
    else:
        sums, counts = _pair_histograms(bins, reward, n_bins)
    for j in range(bins.shape[0]):
        if depth == 1:
            left, n_left = one_sums[j], one_counts[j]
            lefts = [_Child(float(v), -1, -1) for v in _positive(left)]
            rights = [_Child(float(v), -1, -1) for v in _positive(total - left)]
        else:
            cum_r = sums[j].cumsum(axis=1).cumsum(axis=2)
            cum_n = counts[j].cumsum(axis=1).cumsum(axis=2)
            n_left = cum_n[0, :, -1]
            lefts, rights = _best_children(cum_r, cum_n, min_leaf, tol)
        for t in range(n_bins):
            if n_left[t] < min_leaf or n - n_left[t] < min_leaf:
                continue
            value = lefts[t].value + rights[t].value
            if value > best_value + tol:
                best_value, best_root = value, (j, t, lefts[t], rights[t])
    return best_value, best_root


def _leaf(mask: np.ndarray, reward: np.ndarray) -> TreeNode:
    """Leaf that treats iff the summed reward difference of its units is positive."""
    return TreeNode(action=int(reward[mask].sum() > 0))


def _build(root: tuple[int, int, _Child, _Child] | None, bins: np.ndarray, cuts: list[np.ndarray],
           reward: np.ndarray) -> TreeNode:
    """Turn the search result into nodes with real-valued thresholds and leaf actions."""
    everyone = np.ones(reward.size, dtype=bool)
    if root is None:
        return _leaf(everyone, reward)
    j, t, left, right = root
    go_left = bins[j] <= t

    def subtree(mask: np.ndarray, child: _Child) -> TreeNode:
        if child.feature < 0:
            return _leaf(mask, reward)
        inner = bins[child.feature] <= child.bin
        return TreeNode(feature=child.feature, threshold=float(cuts[child.feature][child.bin]),
                        left=_leaf(mask & inner, reward), right=_leaf(mask & ~inner, reward))

    return TreeNode(feature=j, threshold=float(cuts[j][t]), left=subtree(go_left, left), right=subtree(~go_left, right))


def _default_min_leaf(n: int) -> int:
    return max(1, math.ceil(DEFAULT_MIN_LEAF_SHARE * n))


def fit_tree_rule(
    X: Any, gamma0: Any, gamma1: Any, feature_names: Sequence[str], *, depth: int = 2, max_bins: int = 32,
    cost: Any = None, min_leaf: int | None = None, label: str = "fit on all units",
) -> TreeRule:
    """Depth-1 or depth-2 tree rule maximising Σ_i [π(x_i)(Γ₁_i − c_i) + (1 − π(x_i))Γ₀_i] (Athey & Wager 2021).

    Every feature is cut at up to ``max_bins`` − 1 quantile points (all gaps when it has ≤ ``max_bins`` distinct
    values).  With R_i = Γ₁_i − c_i − Γ₀_i the objective is Σ Γ₀ + Σ_leaves max(0, Σ_leaf R): a leaf treats iff
    its summed R is positive.  For each pair of features (root j, child k) the 2-D histogram of R over
    (bin_j, bin_k) and its cumulative sums give all four grandchild sums of every (root cut, child cut) in O(1),
    so the exhaustive search costs O(p²·n + p²·B²).

    ``min_leaf`` (default ⌈5 % of n⌉, at least 1): every leaf of the returned tree holds at least this many
    fitting units; a side that cannot be split that way stays a leaf, and if no root split qualifies the rule
    treats everyone or no one.  A split is kept only if it strictly improves the objective, so siblings never
    share an action.
    """
    X = np.asarray(X, dtype=float)
    g0, g1 = _arm_pair(gamma0, gamma1)
    names = tuple(str(name) for name in feature_names)
    _check_tree_inputs(X, g0.size, names, depth, max_bins)
    return _fit_binned(_bin_matrix(X, max_bins), g0, g1 - _cost_vector(cost, g0.size) - g0, names, depth,
                       min_leaf, label)


def _fit_binned(binned: tuple[np.ndarray, list[np.ndarray], int], g0: np.ndarray, reward: np.ndarray,
                names: tuple[str, ...], depth: int, min_leaf: int | None, label: str) -> TreeRule:
    """The search of :func:`fit_tree_rule` on binned features (bins, cuts, B) with reward R = Γ₁ − c − Γ₀."""
    bins, cuts, n_bins = binned
    n = g0.size
    min_leaf = _default_min_leaf(n) if min_leaf is None else int(min_leaf)
    if min_leaf < 1:
        raise SiteproofError(f"min_leaf = {min_leaf} is below 1", "use a minimum leaf size of at least 1 unit")
    tol = 1e-10 * float(np.abs(reward).sum())
    best, root = _search(bins, reward, n_bins, depth, min_leaf, tol)
    node = _build(root, bins, cuts, reward)
    return TreeRule(root=node, feature_names=names, max_depth=depth, min_leaf=min_leaf, n_fit=n,
                    objective=float((g0.sum() + best) / n), label=label)


def _check_tree_inputs(X: np.ndarray, n: int, names: tuple[str, ...], depth: int, max_bins: int) -> None:
    if X.ndim != 2 or X.shape[0] != n:
        raise SiteproofError(f"X has shape {X.shape} but there are {n} arm scores",
                             "pass a 2-D feature matrix with one row per unit")
    if X.shape[1] == 0 or len(names) != X.shape[1]:
        raise SiteproofError(f"{len(names)} feature names for {X.shape[1]} feature columns",
                             "pass one name per column of X (and at least one column)")
    if not np.all(np.isfinite(X)):
        raise SiteproofError("X contains missing or infinite values", "impute them before fitting a tree rule")
    if depth not in (1, 2):
        raise SiteproofError(f"tree depth {depth} is not supported", "use depth 1 or 2")
    if max_bins < 2:
        raise SiteproofError(f"max_bins = {max_bins} is below 2", "allow at least 2 bins per feature")


def cross_fitted_tree(
    X: Any, gamma0: Any, gamma1: Any, folds: Any, feature_names: Sequence[str], *, cost: Any = None,
    max_bins: int = 32, depth: int = 2, min_leaf: int | None = None,
) -> tuple[np.ndarray, TreeRule, list[TreeRule]]:
    """Out-of-fold tree assignments, the tree fit on all units, and the per-fold trees.

    A unit in fold k is assigned by the tree fit on the units of the other folds, so its assignment never
    depends on its own scores; evaluate those assignments with :func:`rule_value`.  The all-units tree is the
    one to print and deploy; its in-sample objective is optimistic and is not the reported value.
    ``min_leaf`` defaults to ⌈5 %⌉ of each fit's own n.
    """
    X = np.asarray(X, dtype=float)
    g0, g1 = _arm_pair(gamma0, gamma1)
    folds = np.asarray(folds)
    if folds.shape != (g0.size,) or not np.issubdtype(folds.dtype, np.integer):
        raise SiteproofError("folds must be one integer fold id per unit", "pass the fold ids used for cross-fitting")
    fold_ids = np.unique(folds)
    if fold_ids.size < 2:
        raise SiteproofError("cross-fitting needs at least 2 folds", "use K ≥ 2 folds")
    names = tuple(str(name) for name in feature_names)
    _check_tree_inputs(X, g0.size, names, depth, max_bins)
    reward = g1 - _cost_vector(cost, g0.size) - g0
    trains = [folds != k for k in fold_ids] + [np.ones(g0.size, dtype=bool)]
    binned = _bin_matrices(X, trains, max_bins)
    pi = np.zeros(g0.size, dtype=np.int8)
    per_fold = []
    for k, train, fold_bins in zip(fold_ids, trains, binned):
        tree = _fit_binned(fold_bins, g0[train], reward[train], names, depth, min_leaf,
                           f"fit on folds other than {int(k)}")
        pi[~train] = tree.predict(X[~train])
        per_fold.append(tree)
    full = _fit_binned(binned[-1], g0, reward, names, depth, min_leaf,
                       "fit on all units (the rule to deploy; valued by the out-of-fold assignments)")
    return pi, full, per_fold
