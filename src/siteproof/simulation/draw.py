"""Drawing units from a scenario: sites, covariates, helpers, μ₀, τ, assignment, cost and missing values.

Each step has its own random stream, spawned from ``numpy.random.SeedSequence(seed)`` and fed to
``Generator(PCG64(...))`` (:func:`streams`), so the same seed gives identical frames and editing one part of a
scenario does not reshuffle the others.  The steps and their order are listed in
:mod:`siteproof.simulation.simulate`.  The ``clusters`` stream comes last, so scenarios without clusters draw
exactly what they drew before clusters existed (``SeedSequence.spawn`` gives the i-th child the same state
whatever the number of children).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from ..core.errors import SiteproofError
from .expressions import evaluate
from .samplers import sample_covariate
from .scenario import Clustering, CostModel, Covariate, Scenario

_STREAMS = ("sites", "covariates", "assignment", "noise", "cost", "missing", "clusters")
_EPS = 1e-12


@dataclass(frozen=True)
class Groups:
    """Drawn clusters: each unit's cluster index, each cluster's site index, label and random effect u_c."""

    unit: np.ndarray
    site: np.ndarray
    labels: np.ndarray
    effect: np.ndarray


def streams(seed: Any) -> dict[str, np.random.Generator]:
    """One independent Generator(PCG64) per simulation step, spawned from SeedSequence(seed)."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SiteproofError(f"seed = {seed!r} is not a non-negative integer", "pass seed=0 or another integer ≥ 0")
    children = np.random.SeedSequence(int(seed)).spawn(len(_STREAMS))
    return {name: np.random.Generator(np.random.PCG64(child)) for name, child in zip(_STREAMS, children)}


def draw_units(scenario: Scenario, n: int, rng: dict[str, np.random.Generator]) -> dict[str, Any]:
    """Sites, clusters, covariates, helpers, μ₀ and τ (with the hidden effect) for n units — no assignment yet."""
    try:
        return _generate_units(scenario, n, rng)
    except SiteproofError as exc:
        raise SiteproofError(f"design '{scenario.name}': {exc.what}", exc.fix) from None


def _generate_units(scenario: Scenario, n: int, rng: dict[str, np.random.Generator]) -> dict[str, Any]:
    """The unit draws of :func:`draw_units`, without the scenario name in the errors."""
    shares = np.array([s.share for s in scenario.sites])
    site_idx = rng["sites"].choice(len(scenario.sites), size=n, p=shares / shares.sum())
    env: dict[str, Any] = {name: value for name, value in scenario.parameters}
    clustering = scenario.clusters
    groups = draw_clusters(scenario, clustering, site_idx, rng["clusters"]) if clustering is not None else None
    covariates = _draw_covariates(scenario, site_idx, rng["covariates"], env, groups)
    for helper, text in scenario.helpers:
        env[helper] = evaluate(text, env, n, f"helpers.{helper}")
    hidden = scenario.hidden_values()[site_idx]
    level = hidden if scenario.hidden.arm == "both" else np.zeros(n)
    extra = hidden if scenario.hidden.arm == "treated" else np.zeros(n)
    return {
        "site_idx": site_idx,
        "groups": groups,
        "covariates": covariates,
        "env": env,
        "hidden": hidden,
        "mu0": evaluate(scenario.baseline, env, n, "outcome.baseline") + level,
        "tau": evaluate(scenario.effect, env, n, "effect.tau") + extra,
        "e_true": np.array([s.rate for s in scenario.sites])[site_idx],
    }


def draw_clusters(scenario: Scenario, clustering: Clustering, site_idx: np.ndarray,
                  rng: np.random.Generator) -> Groups:
    """Deal each site's units to its clusters and draw the cluster labels and random effects.

    Inside site s the units are shuffled and dealt round-robin to its G_s clusters (sizes differ by at most
    one); the labels prefix + 1..G are shuffled so that a label's number says nothing about the site; then
    u_c = σ_c·N(0, 1) per cluster (:meth:`Clustering.cluster_sd`).
    """
    counts = dict(clustering.counts)
    unit = np.empty(site_idx.size, dtype=np.int64)
    cluster_site: list[int] = []
    for s, site in enumerate(scenario.sites):
        members = np.flatnonzero(site_idx == s)
        g_s = counts[site.name]
        if members.size < g_s:
            raise SiteproofError(f"site '{site.name}' drew {members.size} units for its {g_s} clusters",
                                 "simulate more units (n) or declare fewer clusters")
        unit[rng.permutation(members)] = len(cluster_site) + np.arange(members.size) % g_s
        cluster_site += [s] * g_s
    g = len(cluster_site)
    labels = unit_ids(clustering.id_prefix, g)[rng.permutation(g)]
    effect = clustering.cluster_sd(scenario.noise_sd) * rng.standard_normal(g)
    return Groups(unit, np.array(cluster_site, dtype=np.int64), labels, effect)


def _draw_covariates(scenario: Scenario, site_idx: np.ndarray, rng: np.random.Generator,
                     env: dict[str, Any], groups: Groups | None) -> dict[str, np.ndarray]:
    """Draw the covariates in declared order; each adds itself to ``env`` for the ones after it.

    A cluster-level covariate is drawn once per cluster (one uniform per cluster, the cluster's site rule,
    expressions over the parameters and earlier cluster-level covariates) and copied to the cluster's units.
    """
    cluster_level = set(scenario.clusters.covariates) if scenario.clusters is not None else set()
    cluster_env: dict[str, Any] = dict(env)
    values: dict[str, np.ndarray] = {}
    for cov in scenario.covariates:
        if groups is not None and cov.name in cluster_level:
            x_cluster = _draw_one(scenario, cov, groups.site, rng, cluster_env)
            cluster_env[cov.name] = x_cluster
            x = x_cluster[groups.unit]
        else:
            x = _draw_one(scenario, cov, site_idx, rng, env)
        values[cov.name] = x
        env[cov.name] = x
    return values


def _draw_one(scenario: Scenario, cov: Covariate, site_idx: np.ndarray, rng: np.random.Generator,
              env: Mapping[str, Any]) -> np.ndarray:
    """One covariate for the rows of ``site_idx`` (units, or clusters): derived, or one uniform per row."""
    n = site_idx.size
    if cov.kind == "derived":
        x = evaluate(cov.param("value"), env, n, f"covariates[{cov.name}].value")
    else:
        u = np.clip(rng.random(n), _EPS, 1.0 - _EPS)
        x = sample_covariate(scenario, cov, u, site_idx, env)
    return np.round(x, cov.decimals) if cov.decimals is not None else x


def assign(scenario: Scenario, site_idx: np.ndarray, rng: np.random.Generator,
           groups: Groups | None = None) -> np.ndarray:
    """Complete randomization within each site: round(rate_s · n_s) treated, uniformly without replacement.

    With clusters assigned whole, round(rate_s · G_s) of the site's G_s clusters are treated instead.
    """
    if groups is not None and scenario.clusters is not None and scenario.clusters.assignment == "cluster":
        treated = np.zeros(groups.site.size, dtype=np.int64)
        for s, site in enumerate(scenario.sites):
            members = np.flatnonzero(groups.site == s)
            treated[rng.permutation(members)[:int(round(site.rate * members.size))]] = 1
        return treated[groups.unit]
    w = np.zeros(site_idx.size, dtype=np.int64)
    for s, site in enumerate(scenario.sites):
        members = np.flatnonzero(site_idx == s)
        n_treated = int(round(site.rate * members.size))
        w[rng.permutation(members)[:n_treated]] = 1
    return w


def unit_ids(prefix: str, n: int) -> np.ndarray:
    """``prefix`` + 1..n, zero-padded to the width of n (so the ids sort in order)."""
    width = len(str(n))
    return np.array([f"{prefix}{i:0{width}d}" for i in range(1, n + 1)], dtype=object)


def draw_cost(cost: CostModel, env: Mapping[str, Any], rng: np.random.Generator, n: int) -> np.ndarray:
    """c(x) + σ_c·η, η ~ N(0, 1), floored at the cost's lower bound and rounded to its decimals."""
    value = evaluate(cost.value, env, n, "cost.value") + cost.noise_sd * rng.standard_normal(n)
    value = np.maximum(value, cost.lower)
    return np.round(value, cost.decimals) if cost.decimals is not None else value


def observed_covariates(scenario: Scenario, values: dict[str, np.ndarray],
                        rng: np.random.Generator) -> dict[str, Any]:
    """The covariate columns a user sees: declared missing shares blanked (MCAR), integers kept as integers."""
    out: dict[str, Any] = {}
    for cov in scenario.covariates:
        x = values[cov.name]
        blank = rng.random(x.size) < cov.missing
        if cov.kind == "categorical":
            column = x.copy()
            column[blank] = None
            out[cov.name] = column
        elif blank.any():
            out[cov.name] = np.where(blank, np.nan, x)
        elif cov.kind in ("poisson", "bernoulli") or cov.decimals == 0:
            out[cov.name] = x.astype(np.int64)
        else:
            out[cov.name] = x
    return out
