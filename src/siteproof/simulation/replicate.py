"""One replicate of a design study: its seeds, the simulated trial loaded as a study, blind + unmask, and its
rows (one per ATE estimator, CATE model and learned rule, in the layout :data:`~siteproof.simulation.parts.COLUMNS`).

What each row holds, and how the study runs many replicates, is described in
:mod:`siteproof.simulation.montecarlo`, which re-exports everything here.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..blind.analysis import BlindConfig, run_blind
from ..blind.evaluation import rank_metric
from ..core.errors import SiteproofWarning
from ..intake.study import Study, StudySpec, load_study
from ..unmask.scoring import Scorecard, run_unmask
from ..unmask.verdicts import claim_verdicts
from .parts import COLUMNS
from .scenario import Scenario
from .simulate import SimulatedTrial, simulate

__all__ = ["ReplicateResult", "ReplicateTask", "replicate_seeds", "run_replicate", "simulated_study",
           "true_rank_metric"]


@dataclass(frozen=True)
class ReplicateTask:
    """Everything one replicate needs (picklable, so it can travel to a process or a Dask worker).

    ``config`` is the blind configuration including its learners (its ``seed`` is replaced by the
    replicate's own); ``site_learner`` is unmask's site classifier for propensity recovery (None: default);
    ``clusters``: analyse a clustered scenario with its cluster column (False: as if the clusters were unknown,
    to show what ignoring them costs).
    """

    design: Scenario
    n: int
    replicate: int
    seeds: tuple[int, int, int]
    truth: float
    config: BlindConfig
    site_learner: Any = None
    clusters: bool = True


@dataclass(frozen=True)
class ReplicateResult:
    """The rows of one replicate (:data:`COLUMNS`) and its wall time in seconds."""

    replicate: int
    rows: pd.DataFrame
    seconds: float
    worker: str = ""


def replicate_seeds(seed: int, replicates: int) -> list[tuple[int, int, int]]:
    """(simulation, blind, unmask) seeds of replicates 0..R−1 from SeedSequence(seed).spawn(R).

    Child r of the spawn has spawn key (r,), so replicate r gets the same seeds whatever R is.
    """
    children = np.random.SeedSequence(int(seed)).spawn(int(replicates))
    return [tuple(int(v) for v in child.generate_state(3, dtype=np.uint32)) for child in children]


def simulated_study(trial: SimulatedTrial, seed: int, clusters: bool = True) -> Study:
    """Load a simulated trial as a study: declared rates known, cost column left out of the analysis, and the
    scenario's cluster column (if any) declared unless ``clusters`` is False."""
    roles = trial.design.roles
    clustering = trial.design.clusters
    spec = StudySpec(
        data=f"<simulated {trial.design.name}>", outcome=roles.outcome, treatment=roles.treatment,
        site=roles.site, id=roles.id, covariates=list(roles.covariates), rates=dict(trial.rates), seed=seed,
        name=trial.design.name, cluster=clustering.column if clustering is not None and clusters else None,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        return load_study(spec, frame=trial.data)


def run_replicate(task: ReplicateTask) -> ReplicateResult:
    """Simulate, run blind + unmask and score every claim against the truth (see the module docstring)."""
    start = time.perf_counter()
    sim_seed, blind_seed, unmask_seed = task.seeds
    trial = simulate(task.design, n=task.n, seed=sim_seed)
    study = simulated_study(trial, seed=blind_seed, clusters=task.clusters)
    claims = run_blind(study.blind, dataclasses.replace(task.config, seed=blind_seed))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        card = run_unmask(study, claims.record, claims.units, seed=unmask_seed, site_learner=task.site_learner)
    tau = trial.truth.set_index("id")["tau"].loc[claims.units["row_key"].to_numpy()].to_numpy(dtype=float)
    rows = (
        _ate_rows(claims.record, card, task.truth, float(tau.mean()))
        + _cate_rows(claims.record, claims.units, card, tau)
        + _rule_rows(claims.record, claims.units, card, tau)
    )
    frame = pd.DataFrame(rows, columns=list(COLUMNS[1:]))
    frame.insert(0, "replicate", task.replicate)
    return ReplicateResult(task.replicate, frame, time.perf_counter() - start, f"{os.uname().nodename}:{os.getpid()}")


def _row(kind: str, name: str, est: dict[str, Any] | None, truth: float, truth_sample: float,
         design_based: float = math.nan, verdict: str = "", pehe: float = math.nan) -> dict[str, Any]:
    """One output row; ``est`` is an {estimate, se, ci} dict (None: no interval claim, e.g. PEHE only)."""
    estimate, se, low, high = (math.nan,) * 4
    if est is not None:
        estimate, se = _num(est.get("estimate")), _num(est.get("se"))
        low, high = (_num(v) for v in est.get("ci", (None, None)))
    has_ci = math.isfinite(low) and math.isfinite(high)
    return {
        "kind": kind, "name": name, "estimate": estimate, "se": se, "ci_low": low, "ci_high": high,
        "truth": truth, "truth_sample": truth_sample, "error": estimate - truth,
        "covered": bool(low <= truth <= high) if has_ci and math.isfinite(truth) else None,
        "covered_sample": bool(low <= truth_sample <= high) if has_ci and math.isfinite(truth_sample) else None,
        "design_based": design_based, "verdict": verdict, "pehe": pehe,
    }


def _num(value: Any) -> float:
    """``value`` as a float, None as NaN."""
    return math.nan if value is None else float(value)


def _ate_rows(record: dict[str, Any], card: Scorecard, truth: float, truth_sample: float) -> list[dict[str, Any]]:
    """Each blind ATE estimator, then unmask's design-based estimator as ``design``."""
    verdicts = dict(claim_verdicts(card))
    compared = {row.estimator: row for row in card.ate}
    rows = []
    for claim in record["ate"]:
        name = claim["estimator"]
        comp = compared.get(name)
        design_value = math.nan
        if comp is not None:
            design_value = (comp.same_estimand or comp.comparison).design
        rows.append(_row("ate", name, claim, truth, truth_sample, design_value, verdicts.get(f"ATE {name}", "")))
    rows.append(_row("ate", "design", card.design.to_dict(), truth, truth_sample))
    return rows


def _claim_columns(record: dict[str, Any], units: pd.DataFrame, card: Scorecard, section: str, key: str,
                   metric: str, label: str) -> Iterator[tuple[str, dict[str, Any], np.ndarray, float, str]]:
    """Per claim of ``section`` ("cate" or "rules"): its name, the claim, its per-unit column in ``units``
    (``tau_<model>`` or ``rule_<rule>``), unmask's design-based ``metric`` and the verdict ``label <name>``."""
    verdicts = dict(claim_verdicts(card))
    design = {row[key]: row[metric]["design"] for row in card.to_dict()[section]}
    prefix = {"cate": "tau", "rules": "rule"}[section]
    for claim in record[section]:
        name = claim[key]
        column = units[f"{prefix}_{name}"].to_numpy(dtype=float)
        yield name, claim, column, _num(design.get(name)), verdicts.get(f"{label} {name}", "")


def _cate_rows(record: dict[str, Any], units: pd.DataFrame, card: Scorecard, tau: np.ndarray) -> list[dict[str, Any]]:
    """PEHE of every CATE model; blind AUTOC against the true AUTOC of the same ranking."""
    rows = []
    for model, claim, tau_hat, design_autoc, verdict in _claim_columns(record, units, card, "cate", "model",
                                                                       "autoc", "CATE"):
        pehe = float(np.sqrt(np.mean((tau_hat - tau) ** 2)))
        if "autoc" not in claim:
            rows.append(_row("cate", model, None, math.nan, math.nan, pehe=pehe))
            continue
        true_autoc = true_rank_metric(tau_hat, tau)
        rows.append(_row("cate", model, claim["autoc"], true_autoc, true_autoc, design_autoc, verdict, pehe))
    return rows


def true_rank_metric(tau_hat: np.ndarray, tau: np.ndarray, kind: str = "autoc") -> float:
    """AUTOC (or Qini) of the ranking by τ̂ with the true effects τ_i as the per-unit scores.

    Uses :func:`siteproof.blind.evaluation.rank_metric` for the statistic; only its point value is used (two
    half-samples are drawn because the function always computes an SE).
    """
    return float(rank_metric(tau_hat, tau, kind=kind, n_boot=2, seed=0).estimate_of(0).estimate)


def _rule_rows(record: dict[str, Any], units: pd.DataFrame, card: Scorecard, tau: np.ndarray) -> list[dict[str, Any]]:
    """Blind gain of each rule against its true gain mean((π − q̂)·τ)."""
    rows = []
    for name, claim, pi, design_gain, verdict in _claim_columns(record, units, card, "rules", "rule", "gain", "rule"):
        truth = float(np.mean((pi - pi.mean()) * tau))
        rows.append(_row("rule", name, claim["gain"], truth, truth, design_gain, verdict))
    return rows
