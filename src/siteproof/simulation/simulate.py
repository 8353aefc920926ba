"""Synthetic multi-site trials with a known truth: a scenario (synthetic_sites TOML) → data + truth.

The public entry points of the simulator.  A *scenario* (:mod:`siteproof.simulation.scenario`, read by
:mod:`siteproof.simulation.scenariofile`) describes a pooled multi-site randomized trial; the shipped ones
live in the package ``siteproof.synthetic_sites`` (folder ``synthetic_sites/``), the file format is documented
in ``synthetic_sites/README.md`` and the demo story in ``docs/demo-scenario.md``.

Generative model for ``n`` units, in this order (each step has its own random stream, see
:func:`siteproof.simulation.draw.streams`, so the same seed gives identical frames and editing one part of a
scenario does not reshuffle the others):

1. site S_i ~ Categorical(share_1, …, share_K), independently per unit (rows are therefore in random site
   order, and the unit id says nothing about the site);
2. covariates in their declared order, each drawn from its distribution given the earlier covariates, with the
   site's enrollment rule applied (location shift, truncation, category probabilities); every non-derived
   covariate consumes exactly one uniform U_i and is drawn by the inverse CDF, truncated draws included:
   X = F⁻¹(F(lo) + U·(F(hi) − F(lo)));
3. assignment by complete randomization inside each site: n₁ₛ = round(rate_s · n_s) treated units (Python
   rounding, halves to even), chosen uniformly at random without replacement;
4. outcome Y = μ₀(x) + h_S·[arm = both] + W·(τ(x) + h_S·[arm = treated]) + σ·ε, ε ~ N(0, 1);
5. cost (if declared) c(x) + σ_c·η, η ~ N(0, 1), floored at its lower bound;
6. missing values: each covariate value is blanked independently with its declared share (missing completely
   at random), after steps 2–5, so the outcome always depends on the true values.

With clusters (``[clusters]``, :class:`~siteproof.simulation.scenario.Clustering`), after step 1 each site's
units are dealt to its G_s clusters (sizes differ by at most one), cluster-level covariates are drawn once per
cluster in step 2, whole clusters are assigned in step 3 (round(rate_s·G_s) treated clusters) when
``assignment = "cluster"``, and the outcome of step 4 gains the cluster effect u_c ~ N(0, σ²·icc/(1 − icc)).
The data then has the cluster column (after the outcome) and the truth the columns ``cluster`` and
``cluster_effect``.

The hidden site effect h_s (:meth:`Scenario.hidden_values`), added to both arms, shifts the outcome level of
whole sites in step with their assignment rate, so P(W = 1 | X, level) ≠ P(W = 1 | X) and unconfoundedness
given X fails although every site is a randomized experiment.

The truth frame holds, per unit: ``id``, ``site``, ``e_true`` (the site's declared rate, the unit's true
assignment probability), ``mu0`` (noise-free control mean incl. a hidden level), ``mu1`` = mu0 + tau, ``tau``
(τ(x) plus a hidden effect on the treated arm) and ``hidden`` (h_S).  Within each site the difference in
means is unbiased for the mean of ``tau`` over the site's units (Neyman 1923).
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_bytes
from .draw import assign, draw_cost, draw_units, observed_covariates, streams, unit_ids
from .scenario import MIN_N, Scenario
from .scenariofile import list_designs, load_design

__all__ = ["SimulatedTrial", "list_designs", "load_design", "population_ate", "simulate", "write_simulation"]


@dataclass(frozen=True)
class SimulatedTrial:
    """Simulated data (what a user would have) and the per-unit truth behind it."""

    design: Scenario
    data: pd.DataFrame
    truth: pd.DataFrame
    rates: dict[str, float]
    seed: int = 0

    @property
    def true_ate(self) -> float:
        """Sample average effect: mean of truth.tau over the simulated units."""
        return float(self.truth["tau"].mean())


def simulate(scenario: Scenario | str | Path, n: int | None = None, seed: int = 0) -> SimulatedTrial:
    """Simulate ``n`` units (default: the scenario's ``default_n``) of a scenario with a known truth.

    ``scenario``: a loaded :class:`Scenario`, a shipped name or a TOML path.  See the module docstring for the
    generative model.  Same ``seed`` ⇒ identical data and truth frames.
    """
    scenario = scenario if isinstance(scenario, Scenario) else load_design(scenario)
    n = scenario.default_n if n is None else _check_n(n)
    rng = streams(seed)
    units = draw_units(scenario, n, rng)
    groups = units["groups"]
    w = assign(scenario, units["site_idx"], rng["assignment"], groups)
    y = units["mu0"] + w * units["tau"] + scenario.noise_sd * rng["noise"].standard_normal(n)
    if groups is not None:
        y = y + groups.effect[groups.unit]
    ids = unit_ids(scenario.id_prefix, n)
    site_names = np.array([s.name for s in scenario.sites], dtype=object)[units["site_idx"]]
    roles = scenario.roles
    columns: dict[str, Any] = {roles.id: ids, roles.site: site_names, roles.treatment: w.astype(np.int64),
                               roles.outcome: y}
    if groups is not None and scenario.clusters is not None:
        columns[scenario.clusters.column] = groups.labels[groups.unit]
    columns.update(observed_covariates(scenario, units["covariates"], rng["missing"]))
    if scenario.cost is not None and roles.cost is not None:
        columns[roles.cost] = draw_cost(scenario.cost, units["env"], rng["cost"], n)
    truth = pd.DataFrame({
        "id": ids, "site": site_names, "e_true": units["e_true"], "mu0": units["mu0"],
        "mu1": units["mu0"] + units["tau"], "tau": units["tau"], "hidden": units["hidden"],
        **({"cluster": groups.labels[groups.unit], "cluster_effect": groups.effect[groups.unit]}
           if groups is not None else {}),
    })
    return SimulatedTrial(scenario, pd.DataFrame(columns), truth, scenario.rates, seed)


def population_ate(scenario: Scenario | str | Path, n: int = 200_000, seed: int = 12345) -> float:
    """Monte Carlo approximation of the population ATE E[τ]: mean of the unit effects of ``n`` fresh units.

    Its Monte Carlo SE is sd(τ)/√n (sites and covariates are i.i.d. across units).
    """
    scenario = scenario if isinstance(scenario, Scenario) else load_design(scenario)
    units = draw_units(scenario, _check_n(n), streams(seed))
    return float(units["tau"].mean())


def _check_n(n: Any) -> int:
    """``n`` as an int, refusing non-integers and fewer than MIN_N units."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < MIN_N:
        raise SiteproofError(f"n = {n!r} is not a whole number of at least {MIN_N}",
                             f"ask for n ≥ {MIN_N} units, e.g. n=3000")
    return int(n)


def write_simulation(trial: SimulatedTrial, out: Path | str, truth: Path | str | None = None) -> None:
    """Write the data (and, if asked, the truth) as CSV or Parquet by file suffix, atomically."""
    out = Path(out)
    if truth is not None and Path(truth).resolve() == out.resolve():
        raise SiteproofError(f"the data and the truth would both be written to {out}",
                             "give the truth file its own name")
    _write_frame(trial.data, out)
    if truth is not None:
        _write_frame(trial.truth, Path(truth))


def _write_frame(frame: pd.DataFrame, path: Path) -> None:
    """``frame`` as CSV (``.csv``) or Parquet (``.parquet``/``.pq``), written atomically."""
    suffix = path.suffix.lower()
    if suffix == ".csv":
        payload = frame.to_csv(index=False).encode("utf-8")
    elif suffix in (".parquet", ".pq"):
        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        payload = buffer.getvalue()
    else:
        raise SiteproofError(f"cannot tell the file format of {path} from its suffix",
                             "end the file name in .csv or .parquet")
    atomic_write_bytes(path, payload)
