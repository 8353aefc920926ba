"""One half-sample bootstrap pass for every ranking metric of every CATE model.

:func:`~siteproof.blind.evaluation.rank_metric` draws its n_boot half-samples from (n, n_boot, seed) alone, so
separate calls for AUTOC and Qini of each model already use the same units — but each call draws them again
and re-gathers the scores.  :func:`shared_rank_metrics` draws each chunk of half-samples once and, for every
model, gathers the AIPW scores Γ of the half-sample in that model's τ̂ order once; AUTOC and Qini are two
rank-weighted sums of the same gathered scores (and their TOC curves are identical), so both come from one
gather.  The results are exactly those of separate :func:`rank_metric` calls with the same seed (same draws,
same arithmetic); sharing the draws across models is what makes paired model-vs-model differences of the
replicates coherent.

Estimator (Yadlowsky, Fleming, Shah, Brunskill & Wager, rank-weighted average treatment effects): with units
sorted by τ̂, θ = (1/n) Σ_p ω(p)·Γ_(p), ω the AUTOC or Qini rank weights; SE = SD of θ over half-samples of
n//2 units drawn without replacement (see :func:`~siteproof.blind.evaluation.rank_metric`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from ..core.checks import unit_vector
from ..core.errors import SiteproofError
from .evaluation import (
    RANK_KINDS,
    RankResult,
    _grid_cuts,
    _rank_weights,
    _score_matrix,
    _sorted_rows,
    _tie_average,
    half_sample_batches,
)


@dataclass(frozen=True, eq=False)
class _Ranking:
    """One model's τ̂ order: Γ in that order (c, n), tied blocks (None without ties), unit → position."""

    sorted_scores_t: np.ndarray
    sorted_blocks: np.ndarray | None
    position: np.ndarray


def _ranking(tau: np.ndarray, scores: np.ndarray) -> _Ranking:
    n = tau.size
    order = np.argsort(-tau, kind="stable")
    sorted_tau = tau[order]
    blocks = np.concatenate([[0], np.cumsum(sorted_tau[1:] != sorted_tau[:-1])])
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)
    return _Ranking(np.ascontiguousarray(scores[order].T), blocks if blocks[-1] + 1 < n else None, position)


def _gathered(r: _Ranking, rows: np.ndarray) -> np.ndarray:
    """Γ of the units at sorted positions ``rows`` (B, m) → (c, B, m), averaged within tied τ̂ blocks."""
    g = np.take(r.sorted_scores_t, rows, axis=1)
    return g if r.sorted_blocks is None else _tie_average(g, np.take(r.sorted_blocks, rows))


def _toc(g: np.ndarray, cuts: np.ndarray) -> np.ndarray:
    """TOC on the grid (B, grid, c): mean of the top ⌈q·m⌉ minus the mean of all, per row."""
    m = g.shape[2]
    distinct, back = np.unique(cuts, return_inverse=True)
    segments = np.add.reduceat(g, np.concatenate([[0], distinct[:-1]]), axis=2)
    top_sums = np.cumsum(segments, axis=2)[:, :, back]
    return ((top_sums / cuts) - top_sums[:, :, -1:] / m).transpose(1, 2, 0)


def _check(kinds: Sequence[str], n: int, n_boot: int, grid: int) -> None:
    unknown = [k for k in kinds if k not in RANK_KINDS]
    if unknown:
        raise SiteproofError(f"unknown rank metric kind(s) {', '.join(unknown)}", f"use {', '.join(RANK_KINDS)}")
    if n < 4:
        raise SiteproofError(f"rank metrics need at least 4 units, got {n}", "evaluate on more units")
    if n_boot < 2 or grid < 1:
        raise SiteproofError("n_boot must be ≥ 2 and grid ≥ 1", "increase n_boot (default 200) or grid (default 100)")


def shared_rank_metrics(
    taus: Mapping[str, Any], gamma: Any, *, kinds: Sequence[str] = RANK_KINDS, n_boot: int = 200, seed: int = 0,
    grid: int = 100, clusters: Any = None,
) -> dict[str, dict[str, RankResult]]:
    """``{model: {kind: RankResult}}`` for every τ̂ in ``taus`` and every kind, from one pass over the
    half-samples (the draws of ``half_samples(n, n_boot, seed)``, shared by all models and kinds).

    Equal, number for number, to ``rank_metric(taus[model], gamma, kind=kind, n_boot=n_boot, seed=seed,
    grid=grid, clusters=clusters)`` for each pair.  With ``clusters`` the half-samples keep clusters whole
    (:func:`siteproof.blind.evaluation.half_sample_batches`).
    """
    if not taus:
        return {}
    n = unit_vector("tau", next(iter(taus.values()))).size
    _check(kinds, n, n_boot, grid)
    scores, one_column = _score_matrix(gamma, n)
    rankings = {model: _ranking(unit_vector(f"tau of {model}", tau, n), scores) for model, tau in taus.items()}
    full_rows = np.arange(n)[None, :]
    omega_full = {kind: _rank_weights(n, kind) for kind in kinds}
    halves: dict[int, tuple[np.ndarray, dict[str, np.ndarray]]] = {}
    theta: dict[tuple[str, str], list[np.ndarray]] = {(mod, kind): [] for mod in rankings for kind in kinds}
    tocs: dict[str, list[np.ndarray]] = {mod: [] for mod in rankings}
    for units in half_sample_batches(n, n_boot, seed, clusters):
        m = units.shape[1]
        if m not in halves:
            halves[m] = (_grid_cuts(m, grid), {kind: _rank_weights(m, kind) for kind in kinds})
        half_cuts, omega_half = halves[m]
        for model, r in rankings.items():
            g = _gathered(r, _sorted_rows(units, r.position, n))
            for kind in kinds:
                theta[model, kind].append(((g @ omega_half[kind]) / m).T)
            tocs[model].append(_toc(g, half_cuts))
    q = np.arange(1, grid + 1) / grid
    out: dict[str, dict[str, RankResult]] = {}
    for model, r in rankings.items():
        g_full = _gathered(r, full_rows)
        toc_full = _toc(g_full, _grid_cuts(n, grid))[0]
        toc_se = np.concatenate(tocs[model], axis=0).std(axis=0, ddof=1)
        out[model] = {}
        for kind in kinds:
            boot = np.concatenate(theta[model, kind], axis=0)
            out[model][kind] = RankResult(
                kind=kind, estimate=((g_full @ omega_full[kind]) / n).T[0], se=boot.std(axis=0, ddof=1),
                boot=boot, q=q, toc=toc_full, toc_se=toc_se, n=n, seed=seed, one_column=one_column,
            )
    return out
