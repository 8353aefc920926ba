"""Tests of the shared half-sample pass for ranking metrics (siteproof.blind.bootstrap)."""

from __future__ import annotations

import numpy as np
import pytest

from siteproof.blind.bootstrap import shared_rank_metrics
from siteproof.blind.evaluation import rank_metric
from siteproof.core.errors import SiteproofError


def _models(n: int, seed: int) -> tuple[dict[str, np.ndarray], np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    gamma = 1 + x + rng.normal(scale=2, size=n)
    taus = {"good": x + rng.normal(scale=0.3, size=n), "tied": np.round(x, 0), "noise": rng.normal(size=n)}
    return taus, gamma


@pytest.mark.parametrize("two_columns", [False, True])
def test_shared_pass_equals_separate_rank_metric_calls(two_columns):
    # the shared pass is a re-arrangement of the same arithmetic on the same draws: results must be identical
    taus, gamma = _models(1001, seed=1)
    if two_columns:
        gamma = np.column_stack([gamma, gamma[::-1]])
    shared = shared_rank_metrics(taus, gamma, n_boot=40, seed=5, grid=20)
    for model, tau in taus.items():
        for kind in ("autoc", "qini"):
            alone = rank_metric(tau, gamma, kind=kind, n_boot=40, seed=5, grid=20)
            assert shared[model][kind].to_dict() == alone.to_dict()
            np.testing.assert_array_equal(shared[model][kind].boot, alone.boot)


def test_replicates_are_paired_across_models():
    # same half-samples for every model: the replicate difference of a model with itself is exactly zero,
    # and the paired SE of two different rankings is below the unpaired √(se₁² + se₂²) when they correlate
    taus, gamma = _models(2000, seed=2)
    taus["good_copy"] = taus["good"].copy()
    shared = shared_rank_metrics(taus, gamma, kinds=("autoc",), n_boot=60, seed=0)
    same = shared["good"]["autoc"].boot - shared["good_copy"]["autoc"].boot
    assert np.all(same == 0)
    a, b = shared["good"]["autoc"], shared["tied"]["autoc"]
    paired_se = float(np.std(a.boot[:, 0] - b.boot[:, 0], ddof=1))
    assert paired_se < float(np.hypot(a.se[0], b.se[0]))


def test_shared_pass_rejects_unknown_kinds_and_tiny_samples():
    taus, gamma = _models(50, seed=3)
    with pytest.raises(SiteproofError):
        shared_rank_metrics(taus, gamma, kinds=("gini",))
    with pytest.raises(SiteproofError):
        shared_rank_metrics({"a": np.arange(3.0)}, np.ones(3))
    assert shared_rank_metrics({}, gamma) == {}
