"""Confounded subsamples of one randomized trial with known assignment rates (docs/confound.md).

A trial randomized each unit with probability p (declared, or the realized treated share).  Units are
grouped into covariate cells c (:mod:`.confoundcells`) and kept with a probability that depends on their arm
and cell only: k₁(c) for treated, k₀(c) for control units (independent Bernoulli draws, seeded).  Among the
kept units of cell c the probability of treatment is then known exactly,

    e_c = p·k₁(c) / (p·k₁(c) + (1 − p)·k₀(c)),

so the kept sample is an observational data set whose confounding is known: each cell is a "site" with the
known rate e_c, and the whole pipeline (blind, unmask, seal, grade, Monte Carlo) runs on it unchanged.  This
follows the observational samples drawn from randomized trials of Gentzel, Pruthi & Jensen (2021, "How and
why to use experimental data to evaluate methods for observational causal inference", ICML) and the
rejection sampling of Keith, Feldman, Jurgens, Bragg & Bhattacharya (2023, "RCT rejection sampling for causal
estimation evaluation", TMLR).

**Rates from a strength.**  For score or covariate cells with order rank r_c ∈ [−1, 1] and strength S,
logit e_c = logit p + S·r_c (the treated odds of the highest cell are e^{2S} times those of the lowest).  The
keep probabilities k₁(c) = q·e_c/p and k₀(c) = q·(1 − e_c)/(1 − p) keep the same share
q_c = p·k₁(c) + (1 − p)·k₀(c) = q of every cell, with q = min_c min(p/e_c, (1 − p)/(1 − e_c)) the largest
share for which every keep probability is at most 1.  Because the kept cell composition equals the trial's,
the kept population's ATE is the trial's (the rejection-sampling property of Keith et al. 2023).  A rule
file gives k₁(c), k₀(c) directly; the cell shares then need not be preserved.

**Truths** (docs/confound.md proves what each estimates): the full trial's difference in means with its
Neyman SE (Neyman 1923); the trial's cell-weighted estimate Σ_c (n_c/n)·DiM_c; the kept population's ATE
estimated from the trial, Σ_c ω_c·DiM_c with ω_c ∝ n₁_c·k₁(c) + n₀_c·k₀(c); and, for one drawn sample, its conditional target
Σ_c (m_c/m)·DiM_c (m_c its kept units of cell c) for which the sample's design-based estimate is exactly
unbiased given its kept counts, with the finite-population SE of that comparison.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import special

from ..core.errors import SiteproofError, warn
from ..core.estimates import Estimate
from ..core.results import ResultsMixin
from ..intake.readers import read_table
from ..intake.roles import check_sample, treated_label, usable_rows
from ..intake.sitetrials import MIN_PER_ARM, DesignATE, design_ate, difference_in_means, naive_ate
from ..intake.spec import StudySpec
from ..intake.values import closest, examples, numeric_column, text_labels
from .confoundcells import (
    CellPlan, check_cell_count, covariate_cells, encoded_covariates, rule_cells, score_cells,
)

DEFAULT_STRENGTH = 1.0
DEFAULT_CELLS = 4
MIN_KEPT = 20
SAME_SHARE_TOLERANCE = 1e-9
TRIAL_CELL_COLUMNS = ("n_trial", "n_treated_trial", "n_control_trial", "dim_trial", "var_trial",
                      "var_treated_trial", "var_control_trial")


# ----------------------------------------------------------------------------------------------------------
# the trial
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Trial:
    """The usable units of the randomized trial: rows (original columns), outcome y, arm w (0/1)."""

    frame: pd.DataFrame
    y: np.ndarray
    w: np.ndarray
    outcome: str
    treatment: str
    treated_value: str
    covariates: tuple[str, ...]
    source: str
    n_excluded: dict[str, int]


def _need(frame: pd.DataFrame, name: str, flag: str) -> None:
    if name not in frame.columns:
        raise SiteproofError(f"'{name}' (from {flag}) is not a column of the data{closest(name, frame.columns)}",
                             f"name one of its columns: {examples(frame.columns, 12)}")


def read_trial(data: Path | str | pd.DataFrame, outcome: str, treatment: str, covariates: Sequence[str] | None = None,
               treated_value: str | None = None, encoding: str | None = None) -> Trial:
    """Read the trial with the intake readers; units missing the outcome or the treatment are left out.

    The treated arm and the sample checks are those of study intake (a trial has no site: the spec built for
    them names the treatment in the site's place, and only its outcome, treatment and treated value are read).
    """
    spec = StudySpec(data=data, outcome=outcome, treatment=treatment, site=treatment,
                     treated_value=None if treated_value is None else str(treated_value))
    frame = read_table(data, encoding)
    _need(frame, outcome, "--outcome")
    _need(frame, treatment, "--treatment")
    if outcome == treatment:
        raise SiteproofError(f"column '{outcome}' is named both as outcome and as treatment",
                             "give --treatment the column that records the arm")
    names = [c for c in frame.columns if c not in (outcome, treatment)] if covariates is None else list(covariates)
    for name in names:
        _need(frame, name, "--covariates")
        if name in (outcome, treatment):
            raise SiteproofError(f"covariate '{name}' is the outcome or the treatment", f"remove '{name}' from --covariates")
    labels = text_labels(frame[treatment])
    treated = treated_label(spec, labels)
    y_all = numeric_column(frame[outcome], outcome, "outcome", "--outcome")
    keep, n_excluded = usable_rows(y_all, labels)
    y = y_all[keep]
    w = (labels[keep] == treated).astype(np.int8)
    check_sample(y, w, spec, n_excluded)
    source = spec.source
    return Trial(frame.loc[keep].reset_index(drop=True), y, w, outcome, treatment, treated,
                 tuple(dict.fromkeys(names)), source, n_excluded)


# ----------------------------------------------------------------------------------------------------------
# the plan: cells, keep probabilities and the trial's truths
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class ConfoundPlan:
    """A trial with its cells and keep probabilities, from which subsamples are drawn (:func:`draw_sample`).

    ``cells`` has one row per cell: cell, definition, rank, keep_treated, keep_control, rate (e_c), keep_share
    (q_c), and the trial's n, arm counts, DiM and Neyman variance in that cell (:data:`TRIAL_CELL_COLUMNS`).
    """

    trial: Trial
    labels: np.ndarray
    cells: pd.DataFrame
    trial_rate: float
    trial_rate_source: str
    settings: dict[str, Any]

    @property
    def rates(self) -> dict[str, float]:
        """The known assignment rate e_c of every cell."""
        return dict(zip(self.cells["cell"], self.cells["rate"].astype(float)))

    @property
    def composition_preserved(self) -> bool:
        """True when every cell keeps the same share q_c, so kept cell shares equal the trial's."""
        share = self.cells["keep_share"].to_numpy(dtype=float)
        return bool(np.ptp(share) < SAME_SHARE_TOLERANCE)

    def truth(self) -> Estimate:
        """The full trial's difference in means ȳ₁ − ȳ₀ with its Neyman SE (Neyman 1923)."""
        return difference_in_means(self.trial.y, self.trial.w, name="trial")

    def _weighted(self, name: str, weight: np.ndarray, note: str) -> Estimate:
        """Σ_c ω_c·DiM_c over the trial's cells and SE √(Σ_c ω_c²·V_c), the weights ω_c taken as fixed."""
        weight = weight / weight.sum()
        dim, var = self.cells["dim_trial"].to_numpy(float), self.cells["var_trial"].to_numpy(float)
        return Estimate.from_value(name, float(weight @ dim), float(math.sqrt(weight**2 @ var)), note=note)

    def trial_cell_weighted(self) -> Estimate:
        """Σ_c (n_c/n)·DiM_c of the full trial (post-stratified on the cells)."""
        return self._weighted("trial_cell_weighted", self.cells["n_trial"].to_numpy(float),
                              "full trial, cells weighted by their trial shares")

    def kept_population(self) -> Estimate:
        """Σ_c ω_c·DiM_c of the full trial with ω_c ∝ n₁_c·k₁(c) + n₀_c·k₀(c), the expected kept units of cell c:
        the kept population's ATE estimated from the trial, and the value subsamples' design-based estimates
        are centred on given the trial (docs/confound.md)."""
        cells = self.cells
        weight = (cells["n_treated_trial"].to_numpy(float) * cells["keep_treated"].to_numpy(float)
                  + cells["n_control_trial"].to_numpy(float) * cells["keep_control"].to_numpy(float))
        return self._weighted("kept_population", weight, "full trial, cells weighted by their expected kept units")

    def predicted_naive(self) -> float:
        """The naive difference in means the keep probabilities produce in expectation, given the trial:
        Σ_c k₁(c)·n₁_c·ȳ₁_c / Σ_c k₁(c)·n₁_c − Σ_c k₀(c)·n₀_c·ȳ₀_c / Σ_c k₀(c)·n₀_c (to first order)."""
        keep = self.keep_probability()
        y, w = self.trial.y, self.trial.w
        treated, control = w == 1, w == 0
        return float((keep * y)[treated].sum() / keep[treated].sum() - (keep * y)[control].sum() / keep[control].sum())

    def keep_probability(self) -> np.ndarray:
        """Each trial unit's keep probability k_{W_i}(c_i)."""
        table = self.cells.set_index("cell")
        k1 = table["keep_treated"].reindex(self.labels).to_numpy(float)
        k0 = table["keep_control"].reindex(self.labels).to_numpy(float)
        return np.where(self.trial.w == 1, k1, k0)


def check_strength(strength: Any) -> float:
    """The strength S: a finite number."""
    if isinstance(strength, bool) or not isinstance(strength, (int, float, np.floating)) or not math.isfinite(strength):
        raise SiteproofError(f"--strength {strength!r} is not a finite number",
                             "give e.g. --strength 1 (0: no confounding; negative: the reverse direction)")
    return float(strength)


def _trial_rate(trial: Trial, rate: float | None) -> tuple[float, str]:
    """The trial's assignment probability p: declared (in (0, 1)), or the realized treated share."""
    if rate is None:
        return float(trial.w.mean()), "realized"
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not 0 < rate < 1:
        raise SiteproofError(f"--trial-rate {rate!r} is not a probability in (0, 1)",
                             "give the trial's assignment probability, e.g. --trial-rate 0.5, or leave it out")
    return float(rate), "declared"


def strength_keeps(rank: np.ndarray, p: float, strength: float) -> tuple[np.ndarray, np.ndarray]:
    """Keep probabilities (k₁, k₀) that give the rates e_c = expit(logit p + S·r_c) and keep the same share q of
    every cell: k₁ = q·e_c/p, k₀ = q·(1 − e_c)/(1 − p), q = min_c min(p/e_c, (1 − p)/(1 − e_c))."""
    rate = special.expit(special.logit(p) + strength * rank)
    share = float(np.min(np.minimum(p / rate, (1 - p) / (1 - rate))))
    return np.minimum(1.0, share * rate / p), np.minimum(1.0, share * (1 - rate) / (1 - p))


def _trial_cell_stats(trial: Trial, labels: np.ndarray, cells: pd.DataFrame) -> pd.DataFrame:
    """The trial's units, arm counts, DiM and Neyman variance in every cell (≥ 2 units per arm required)."""
    rows = []
    for cell in cells["cell"]:
        mask = labels == cell
        y1, y0 = trial.y[mask & (trial.w == 1)], trial.y[mask & (trial.w == 0)]
        if min(y1.size, y0.size) < 2:
            raise SiteproofError(
                f"cell {cell} holds {y1.size} treated and {y0.size} control unit(s) of the trial; each arm needs "
                "at least 2 for the cell's effect", "use fewer cells (--cells) or other cell conditions")
        rows.append({"n_trial": int(mask.sum()), "n_treated_trial": y1.size, "n_control_trial": y0.size,
                     "dim_trial": float(y1.mean() - y0.mean()),
                     "var_trial": float(y1.var(ddof=1) / y1.size + y0.var(ddof=1) / y0.size),
                     "var_treated_trial": float(y1.var(ddof=1)), "var_control_trial": float(y0.var(ddof=1))})
    return pd.DataFrame(rows, columns=list(TRIAL_CELL_COLUMNS))


def plan_confounding(
    data: Path | str | pd.DataFrame, outcome: str, treatment: str, covariates: Sequence[str] | None = None, *,
    strength: float | None = None, cells: int | None = None, by: Sequence[str] | str | None = None,
    rule: Path | str | None = None, seed: int = 0, trial_rate: float | None = None,
    treated_value: str | None = None, encoding: str | None = None,
) -> ConfoundPlan:
    """Read the trial, form its cells and set the keep probabilities (module docstring); nothing is drawn."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SiteproofError(f"--seed {seed!r} is not a whole number ≥ 0", "give e.g. --seed 1")
    if rule is not None and (strength is not None or cells is not None or by is not None):
        raise SiteproofError("a rule file sets the cells and their keep probabilities itself",
                             "leave out --strength, --cells and --by when you give --rule")
    trial = read_trial(data, outcome, treatment, covariates, treated_value, encoding)
    p, source = _trial_rate(trial, trial_rate)
    by_list = [by] if isinstance(by, str) else (list(by) if by is not None else None)
    if rule is not None:
        plan = rule_cells(rule, trial.frame, outcome, treatment)
    else:
        strength = check_strength(DEFAULT_STRENGTH if strength is None else strength)
        k = check_cell_count(DEFAULT_CELLS if cells is None else cells)
        plan = _ordered_cells(trial, by_list, k, seed)
    table = plan.table.copy()
    if plan.source != "rule":
        table["keep_treated"], table["keep_control"] = strength_keeps(table["rank"].to_numpy(float), p, float(strength))
    k1, k0 = table["keep_treated"].to_numpy(float), table["keep_control"].to_numpy(float)
    table["rate"] = p * k1 / (p * k1 + (1 - p) * k0)
    table["keep_share"] = p * k1 + (1 - p) * k0
    table = pd.concat([table, _trial_cell_stats(trial, plan.labels, table)], axis=1)
    settings = {"cells_from": plan.source, "strength": None if rule is not None else strength,
                "cells": None if rule is not None else len(table), "by": by_list,
                "rule": None if rule is None else str(rule), "seed": int(seed), "trial_rate": p,
                "trial_rate_source": source, "covariates": list(trial.covariates)}
    result = ConfoundPlan(trial, plan.labels, table, p, source, settings)
    expected = float(result.keep_probability().sum())
    if expected < MIN_KEPT:
        raise SiteproofError(f"the keep probabilities keep about {expected:.0f} units in expectation; at least "
                             f"{MIN_KEPT} are needed", "lower --strength or use fewer cells")
    return result


def _ordered_cells(trial: Trial, by: list[str] | None, k: int, seed: int) -> CellPlan:
    """Cells of a prognostic score of the covariates, or of one or two ``by`` covariates."""
    if by is not None:
        for name in by:
            _need(trial.frame, name, "--by")
            if name in (trial.outcome, trial.treatment):
                raise SiteproofError(f"--by names the {'outcome' if name == trial.outcome else 'treatment'} "
                                     f"column '{name}'", "form cells from covariates only")
        return covariate_cells(trial.frame, by, k)
    X = encoded_covariates(trial.frame, trial.covariates)
    if X.shape[1] == 0:
        raise SiteproofError("no covariate varies, so there is no prognostic score to form cells from",
                             "name covariates with --covariates, or give cells in a rule file with --rule")
    return score_cells(X, trial.y, trial.w, k, seed)


# ----------------------------------------------------------------------------------------------------------
# drawing a sample
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False, repr=False)
class ConfoundedSample(ResultsMixin):
    """One confounded subsample of a trial, with its truths.

    ``data``: the kept units (the trial's covariate, outcome and treatment columns, plus ``site_column``
    holding the cell); ``kept``: the mask over the trial's usable units; ``design``: the sample's design-based
    ATE (cells as sites); ``naive``: its difference in means; ``conditional_target``, ``design_se_fpc`` and
    ``design_sd_exact``: the value the design-based estimate is unbiased for given the kept counts, the
    finite-population SE of the estimate around it, and that SD computed from the trial's variances
    (:func:`conditional_design`, docs/confound.md); ``cells``: the plan's cell table with the kept counts.
    """

    plan: ConfoundPlan
    data: pd.DataFrame
    kept: np.ndarray
    site_column: str
    seed: int
    design: DesignATE
    naive: Estimate
    conditional_target: float
    design_se_fpc: float
    design_sd_exact: float
    bias_se: float
    cells: pd.DataFrame = field(repr=False)

    @property
    def truth(self) -> Estimate:
        return self.plan.truth()

    @property
    def rates(self) -> dict[str, float]:
        return self.plan.rates

    def induced_bias(self) -> dict[str, float]:
        """The confounding: predicted (the naive estimate's expectation given the trial − the kept population's
        ATE from the trial), realized (naive − design-based on this sample, with the paired SE from the per-unit
        scores) and naive − the full trial's difference in means."""
        return {"predicted": self.plan.predicted_naive() - self.plan.kept_population().estimate,
                "realized": self.naive.estimate - self.design.estimate.estimate, "realized_se": self.bias_se,
                "naive_minus_truth": self.naive.estimate - self.truth.estimate}

    def _key_numbers(self) -> dict[str, Any]:
        return {"n_trial": int(self.kept.size), "n_kept": int(self.kept.sum()), "cells": len(self.cells),
                "truth": self.truth.estimate, "naive": self.naive.estimate,
                "design": self.design.estimate.estimate, "bias": self.induced_bias()["realized"]}

    def to_frame(self) -> pd.DataFrame:
        """One row per cell: its definition, keep probabilities, known rate and counts in trial and sample."""
        return self.cells.copy()

    def truth_record(self) -> dict[str, Any]:
        """truth.json: the trial's DiM as ``estimate``/``se``, the other truths, the sample and the cells."""
        plan, truth = self.plan, self.plan.truth()
        return {
            "estimate": truth.estimate, "se": truth.se, "ci": list(truth.ci),
            "estimand": "ATE of the full trial: its difference in means with the Neyman SE",
            "target": "trial" if plan.composition_preserved else "kept_population",
            "target_note": ("every cell keeps the same share, so the kept population's ATE is the trial's ATE; "
                            "given this trial, subsamples' design-based estimates centre on kept_population"
                            if plan.composition_preserved else
                            "cells keep different shares: the design-based estimate on the sample targets the "
                            "kept population's ATE (kept_population), not the trial's"),
            "trial": {"source": plan.trial.source, "n": int(self.kept.size), "n_treated": int(plan.trial.w.sum()),
                      "rate": plan.trial_rate, "rate_source": plan.trial_rate_source,
                      "excluded": plan.trial.n_excluded},
            "trial_cell_weighted": _short(plan.trial_cell_weighted()),
            "kept_population": _short(plan.kept_population()),
            "sample": {"n": int(self.kept.sum()), "n_treated": int(plan.trial.w[self.kept].sum()), "seed": self.seed,
                       "design": self.design.to_dict(), "design_se_fpc": self.design_se_fpc,
                       "design_sd_exact": self.design_sd_exact,
                       "conditional_target": self.conditional_target, "naive": _short(self.naive)},
            "induced_bias": self.induced_bias(),
            "settings": plan.settings,
            "cells": self.cells.to_dict("records"),
        }


def _short(estimate: Estimate) -> dict[str, Any]:
    return {"estimate": estimate.estimate, "se": estimate.se, "ci": list(estimate.ci)}


def site_column_name(columns: Sequence[str]) -> str:
    """``cell``, or ``cell_2``, ``cell_3``, … when the data already have a column of that name."""
    name, j = "cell", 1
    while name in columns:
        j += 1
        name = f"cell_{j}"
    return name


def _kept_counts(plan: ConfoundPlan, kept: np.ndarray) -> pd.DataFrame:
    """Per cell: kept units, kept treated and controls, and the kept arms' sample variances."""
    rows = []
    y, w = plan.trial.y, plan.trial.w
    for cell in plan.cells["cell"]:
        mask = kept & (plan.labels == cell)
        y1, y0 = y[mask & (w == 1)], y[mask & (w == 0)]
        rows.append({"n_kept": int(mask.sum()), "n_treated_kept": y1.size, "n_control_kept": y0.size,
                     "var_treated_kept": float(y1.var(ddof=1)) if y1.size > 1 else math.nan,
                     "var_control_kept": float(y0.var(ddof=1)) if y0.size > 1 else math.nan})
    return pd.DataFrame(rows)


def conditional_design(cells: pd.DataFrame, source: str = "kept") -> tuple[float, float]:
    """Given the kept counts, the design-based estimate's exact target and its finite-population SE.

    Conditional on the trial and on the kept counts m₁_c, m₀_c, the kept units of each arm and cell are a
    simple random sample without replacement of the trial's units of that arm and cell, so over the cells with
    ≥ 2 kept units per arm (the included cells)

        E[τ̂_design | counts] = Σ_c (m_c/m)·DiM_c^trial,
        Var = Σ_c (m_c/m)²·[(1 − m₁_c/n₁_c)·S²₁_c/m₁_c + (1 − m₀_c/n₀_c)·S²₀_c/m₀_c]

    (Cochran 1977, *Sampling Techniques*, chapter 2: the mean of a sample without replacement is unbiased, with
    that variance, and the sample variance is unbiased for S²).  S² are the trial's arm-cell variances with
    ``source = "trial"`` (the exact conditional SD, known to whoever drew the sample) or the kept arms' sample
    variances with ``source = "kept"`` (what an analyst of the sample can compute, given the trial's counts).
    """
    used = cells[(cells["n_treated_kept"] >= 2) & (cells["n_control_kept"] >= 2)]
    weight = used["n_kept"].to_numpy(float) / used["n_kept"].sum()
    target = float(weight @ used["dim_trial"].to_numpy(float))
    var = sum(
        (1 - used[f"n_{arm}_kept"] / used[f"n_{arm}_trial"]) * used[f"var_{arm}_{source}"] / used[f"n_{arm}_kept"]
        for arm in ("treated", "control")
    ).to_numpy(float)
    return target, float(math.sqrt(weight**2 @ var))


def draw_sample(plan: ConfoundPlan, seed: int) -> ConfoundedSample:
    """Keep each trial unit with probability k_{W_i}(c_i): independent draws from
    ``numpy.random.default_rng([seed, 1])`` (the prognostic score's folds use the stream ``[seed, 0]``)."""
    rng = np.random.default_rng([int(seed), 1])
    kept = rng.random(plan.trial.y.size) < plan.keep_probability()
    trial = plan.trial
    y, w, cell = trial.y[kept], trial.w[kept], plan.labels[kept]
    if min(int(w.sum()), int((1 - w).sum())) < 2 or kept.sum() < MIN_KEPT:
        raise SiteproofError(f"the drawn sample keeps {int(kept.sum())} units ({int(w.sum())} treated)",
                             "lower --strength, use fewer cells, or try another --seed")
    design = design_ate(y, w, cell)
    naive = naive_ate(y, w)
    cells = pd.concat([plan.cells, _kept_counts(plan, kept)], axis=1)
    if design.excluded_sites:
        warn(f"cell(s) {', '.join(design.excluded_sites)} kept fewer than {MIN_PER_ARM} units in an arm, so the "
             "design-based estimate leaves them out and their rate cannot be checked; use fewer cells (--cells) "
             "or a lower --strength")
    target, se_fpc = conditional_design(cells)
    sd_exact = conditional_design(cells, "trial")[1]
    paired = naive.scores[design.included] - design.estimate.scores
    bias_se = float(paired.std(ddof=1) / math.sqrt(paired.size))
    columns = [c for c in trial.frame.columns if c in set(trial.covariates) | {trial.outcome, trial.treatment}]
    site = site_column_name(trial.frame.columns)
    data = trial.frame.loc[kept, columns].reset_index(drop=True)
    data[site] = cell
    return ConfoundedSample(plan, data, kept, site, int(seed), design, naive, target, se_fpc, sd_exact, bias_se,
                            cells)


def confound_trial(
    data: Path | str | pd.DataFrame, outcome: str, treatment: str, covariates: Sequence[str] | None = None, *,
    strength: float | None = None, cells: int | None = None, seed: int = 0, rule: Path | str | None = None,
    treated_value: str | None = None, by: Sequence[str] | str | None = None, trial_rate: float | None = None,
    encoding: str | None = None,
) -> ConfoundedSample:
    """A confounded subsample of a randomized trial with known per-cell assignment rates (module docstring).

    ``strength`` S (default 1) and ``cells`` K (default 4) set the rates of score or covariate cells
    (``by``: one or two covariates; default a prognostic score of ``covariates``); ``rule`` is a TOML rule
    file with the cells and keep probabilities instead; ``trial_rate`` the trial's assignment probability
    (default the realized treated share); ``seed`` drives the score folds and the draw.
    """
    plan = plan_confounding(data, outcome, treatment, covariates, strength=strength, cells=cells, by=by, rule=rule,
                            seed=seed, trial_rate=trial_rate, treated_value=treated_value, encoding=encoding)
    return draw_sample(plan, seed)
