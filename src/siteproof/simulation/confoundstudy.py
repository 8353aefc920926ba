"""Monte Carlo over confounded subsamples of one real trial: bias, RMSE and coverage of the blind estimators.

The trial, its cells and keep probabilities are fixed (:func:`~siteproof.simulation.confound.plan_confounding`);
replicate r draws a fresh subsample with the seeds of ``numpy.random.SeedSequence(seed).spawn(R)[r]``
(:func:`~siteproof.simulation.montecarlo.replicate_seeds`: the first for the draw, the second for the blind
analysis), loads it as a study with its known cell rates, runs the blind analysis and records one row per
ATE estimator in the layout of a design study (:data:`~siteproof.simulation.montecarlo.COLUMNS`), summarized
by :func:`~siteproof.simulation.studysummary.summarize` (Monte Carlo SEs of Morris, White & Crowther 2019).

Rows: every blind ATE estimator; ``naive`` (the sample's difference in means); ``design`` (the design-based
estimate with its Neyman SE), ``design_fpc`` (the same estimate with the finite-population SE of
:func:`~siteproof.simulation.confound.conditional_design` from the sample's variances) and ``design_exact_sd``
(with the exact conditional SD from the trial's variances: a check of the variance formula, not an interval
an analyst of the sample could form).  ``truth`` is the kept population's ATE estimated
from the trial (:meth:`~siteproof.simulation.confound.ConfoundPlan.kept_population`, the value subsamples of this
trial are centred on; with every cell keeping the same share it estimates the trial's ATE, like the trial's
difference in means, from which it differs by the trial's own noise), so ``bias`` and ``coverage`` are measured
against it; ``truth_sample`` is the replicate's conditional target Σ_c (m_c/m)·DiM_c^trial, for which ``design``
is exactly unbiased given the kept counts.

All replicates come from one trial, so their spread is the subsampling variability alone: an interval whose
SE also counts the trial's own sampling (every reported SE) covers the trial's value more often than its
nominal level; ``design_exact_sd`` against ``truth_sample`` is the check at the nominal level, and
``design_fpc`` shows what estimating that SD from small cells costs (docs/confound.md).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from ..blind.analysis import BlindConfig, run_blind
from ..core.console import progress_bar
from ..core.errors import SiteproofError, SiteproofWarning
from ..core.estimates import normal_ci
from ..core.results import ResultsMixin
from ..intake.spec import StudySpec
from ..intake.study import load_study
from .confound import ConfoundedSample, ConfoundPlan, draw_sample, plan_confounding
from .montecarlo import COLUMNS, ProgressFactory, replicate_seeds
from .studysummary import summarize

SUMMARY_COLUMNS = ("name", "replicates", "truth_mean", "estimate_mean", "bias", "bias_mcse", "rmse", "sd_estimate",
                   "se_mean", "coverage", "coverage_mcse", "coverage_sample", "coverage_sample_mcse")


@dataclass(frozen=True, eq=False, repr=False)
class ConfoundStudy(ResultsMixin):
    """R confounded subsamples of one trial: ``replicates`` (one row per replicate × estimator, in the columns
    of a design study), ``summary`` (one row per estimator), and per replicate its kept size and the number of
    cells left out of its design-based estimate (fewer than 2 kept units in an arm)."""

    plan: ConfoundPlan
    replicates: pd.DataFrame = field(repr=False)
    summary: pd.DataFrame = field(repr=False)
    n_kept: np.ndarray = field(repr=False)
    n_excluded_cells: np.ndarray = field(repr=False)
    seed: int = 0

    def _summary_row(self, name: str) -> pd.Series:
        return self.summary.set_index("name").loc[name]

    def _key_numbers(self) -> dict[str, Any]:
        return {"replicates": int(self.n_kept.size), "n_trial": int(self.plan.trial.y.size),
                "mean_kept": float(self.n_kept.mean()), "truth": self.plan.kept_population().estimate,
                "naive_bias": float(self._summary_row("naive")["bias"]),
                "design_coverage_fpc": float(self._summary_row("design_fpc")["coverage_sample"]),
                "with_excluded_cells": int((self.n_excluded_cells > 0).sum())}

    def to_frame(self) -> pd.DataFrame:
        """The summary: bias (with its Monte Carlo SE), RMSE, sd, mean SE and coverages per estimator."""
        return self.summary.copy()


def _row(name: str, estimate: float, se: float, ci: Sequence[float], truth: float, truth_sample: float,
         design: float) -> dict[str, Any]:
    """One row in the columns of a design study (no verdict, no PEHE)."""
    low, high = (float(v) for v in ci)
    return {"kind": "ate", "name": name, "estimate": float(estimate), "se": float(se), "ci_low": low,
            "ci_high": high, "truth": truth, "truth_sample": truth_sample, "error": float(estimate) - truth,
            "covered": bool(low <= truth <= high), "covered_sample": bool(low <= truth_sample <= high),
            "design_based": design, "verdict": "", "pehe": math.nan}


def sample_study(sample: ConfoundedSample, seed: int):
    """The sample as a study: the cell column as the site with its known rate, covariates kept (data.csv's
    study.toml in memory)."""
    trial = sample.plan.trial
    covariates = [c for c in sample.data.columns if c in set(trial.covariates)]
    spec = StudySpec(data=sample.data, outcome=trial.outcome, treatment=trial.treatment, site=sample.site_column,
                     treated_value=trial.treated_value, covariates=covariates, keep_columns=covariates,
                     rates=sample.rates, seed=int(seed), name="confounded sample")
    return load_study(spec, frame=sample.data)


def replicate_rows(sample: ConfoundedSample, truth: float, blind_seed: int,
                   config: BlindConfig | None) -> list[dict[str, Any]]:
    """The rows of one replicate: design, design_fpc, design_exact_sd, naive and (with ``config``) every blind ATE
    estimator."""
    design, naive = sample.design.estimate, sample.naive
    target = sample.conditional_target
    rows = [
        _row("design", design.estimate, design.se, design.ci, truth, target, design.estimate),
        _row("design_fpc", design.estimate, sample.design_se_fpc,
             normal_ci(design.estimate, sample.design_se_fpc), truth, target, design.estimate),
        _row("design_exact_sd", design.estimate, sample.design_sd_exact,
             normal_ci(design.estimate, sample.design_sd_exact), truth, target, design.estimate),
        _row("naive", naive.estimate, naive.se, naive.ci, truth, target, design.estimate),
    ]
    if config is None:
        return rows
    study = sample_study(sample, blind_seed)
    claims = run_blind(study.blind, dataclasses.replace(config, seed=int(blind_seed)))
    for claim in claims.record["ate"]:
        if claim["estimator"] != "naive":
            rows.append(_row(claim["estimator"], claim["estimate"], claim["se"], claim["ci"], truth, target,
                             design.estimate))
    return rows


def confound_study(
    data: Path | str | pd.DataFrame, outcome: str, treatment: str, covariates: Sequence[str] | None = None, *,
    replicates: int = 100, seed: int = 0, strength: float | None = None, cells: int | None = None,
    by: Sequence[str] | str | None = None, rule: Path | str | None = None, trial_rate: float | None = None,
    treated_value: str | None = None, encoding: str | None = None, blind: bool = True,
    config: BlindConfig | None = None, progress: ProgressFactory | None = progress_bar,
) -> ConfoundStudy:
    """R confounded subsamples of one trial, each analysed blind (module docstring); same seed ⇒ same table.

    The cell arguments are those of :func:`~siteproof.simulation.confound.confound_trial`; ``blind = False``
    records only the design-based and naive estimates (fast); ``config`` sets the blind analysis (default
    ``BlindConfig()``); ``progress`` is a progress-bar factory (default: a bar shown only on a terminal;
    None: silent).
    """
    if isinstance(replicates, bool) or not isinstance(replicates, (int, np.integer)) or replicates < 1:
        raise SiteproofError(f"replicates = {replicates!r} is not a whole number ≥ 1", "ask for e.g. 200 replicates")
    plan = plan_confounding(data, outcome, treatment, covariates, strength=strength, cells=cells, by=by, rule=rule,
                            seed=seed, trial_rate=trial_rate, treated_value=treated_value, encoding=encoding)
    config = (config or BlindConfig()) if blind else None
    truth = plan.kept_population().estimate
    rows, kept, excluded = [], [], []
    with (progress or _silent)("subsamples", int(replicates)) as tick:
        for r, (draw_seed, blind_seed, _) in enumerate(replicate_seeds(seed, replicates)):
            with warnings.catch_warnings():  # per-replicate notes; excluded cells are counted instead
                warnings.simplefilter("ignore", SiteproofWarning)
                sample = draw_sample(plan, draw_seed)
                rows += [{"replicate": r, **row} for row in replicate_rows(sample, truth, blind_seed, config)]
            kept.append(int(sample.kept.sum()))
            excluded.append(len(sample.design.excluded_sites))
            tick(f"subsample {r}")
    frame = pd.DataFrame(rows, columns=list(COLUMNS))
    summary = summarize(frame)[list(SUMMARY_COLUMNS)]
    return ConfoundStudy(plan, frame, summary, np.array(kept), np.array(excluded), int(seed))


def _silent(description: str, total: int):
    """A progress factory that shows nothing."""
    return progress_bar(description, total, enabled=False)
