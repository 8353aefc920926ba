"""What did it take to recover the trial?  The blind average effect under several covariate sets, each scored
against the same design-based truth.

Steiner, Cook, Shadish & Clark (2010) and Cook, Steiner & Pohl (2009) compared observational estimates built on
different covariate sets with the randomized benchmark; here the benchmark is each site's own randomization.
For every named set the blind ATE stage runs once — cross-fitted ê, μ̂₀, μ̂₁ on the **same folds and seed**
(folds depend on the treatment and the seed only), then the AIPW estimate with its per-unit scores Γ_set — and
the site is revealed once: the design-based ATE and its per-unit scores ψ_design (``design_ate``) are the same
for every set.  Per set:

* D_set = mean(Γ_set − ψ_design) with its paired SE, the difference and equivalence tests and the four-class
  verdict (``unmask.correspondence``); ``verdict_adjusted`` applies Holm's step-down adjustment (Holm 1979,
  statsmodels ``multipletests``) across the sets to the difference p-values and to the TOST p-values before
  classifying;
* percent bias reduction against the difference in means, PBR = 100·(1 − |b_set|/|b_naive|) (Shadish, Clark &
  Steiner 2008), with a delta-method CI from the paired per-unit differences d_set = Γ_set − ψ and
  d_naive = ψ_naive − ψ: the influence function of PBR is
      φ_i = −100·[sgn(b_set)(d_set,i − b_set)/|b_naive| − |b_set|·sgn(b_naive)(d_naive,i − b_naive)/b_naive²],
  SE = sd(φ)/√n (undefined when either bias is 0: |·| has no derivative there);
* pairwise differences between sets, mean(Γ_a − Γ_b) over the same units with SE sd(Γ_a − Γ_b)/√n.

``drop_each`` adds, beside the full set, one set per covariate left out (its encoded features together).
With ``sensitivity`` every set also gets the omitted-variable-bias analysis of ``unmask.sensitivity`` on the
included units, benchmarked on its own covariates, with the realized bias D_set: did it warn?
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from threadpoolctl import threadpool_limits

from .blind.analysis import SMALL_DATA, BlindConfig
from .blind.average import aipw, naive
from .blind.nuisance import Nuisances, cross_fit_nuisances, make_folds
from .core.errors import SiteproofError
from .core.estimates import Estimate
from .core.interpret import ALPHA, ATE_MARGIN_SD_SHARE, DEFAULT_MULTIPLICITY
from .core.outputs import StagedOutput, atomic_write_json, check_out_dir
from .core.results import ResultsMixin
from .intake.sitetrials import design_ate
from .intake.study import Study, StudySpec, load_study
from .blind.plan import residual_sd
from .unmask.correspondence import (Comparison, compare_scores, paired_difference, percent_bias_reduction_ci,
                                     verdict_from_p)
from .unmask.multiplicity import adjust
from .unmask.sensitivity import SensitivityResult, covariate_groups, sensitivity_analysis

SETS_FILE = "sets.json"
SETS_PAGE = "sets.html"
FULL_SET = "all"
SCHEMA = "siteproof/sets"
VERSION = 1


# --------------------------------------------------------------------------------------------------------
# margin and adjusted verdicts
# --------------------------------------------------------------------------------------------------------
def sets_margin(data, named: Mapping[str, Sequence[str]], runs: Mapping[str, tuple[np.ndarray, Nuisances]]) -> float:
    """The ATE-family margin of the locked plan (``blind.plan``), δ = 0.1 × pooled within-arm residual SD of the
    outcome, from the cross-fitted arm means of the widest set (one δ for every set, fixed blind)."""
    widest = max(named, key=lambda name: len(named[name]))
    nuis = runs[widest][1]
    return ATE_MARGIN_SD_SHARE * residual_sd(data.y, data.w, nuis.mu0, nuis.mu1)


def adjusted_verdicts(comparisons: Sequence[Comparison], alpha: float = ALPHA,
                      method: str = DEFAULT_MULTIPLICITY) -> list[str]:
    """Four-class verdicts (Tryon & Lewis 2008) after adjusting across the sets (Holm 1979 by default, or
    Benjamini–Hochberg), separately for the difference p-values and for the TOST p-values."""
    if not comparisons:
        return []
    p_diff = adjust([c.p_value for c in comparisons], method)
    p_equiv = adjust([c.p_equivalence for c in comparisons], method)
    return [verdict_from_p(d, e, alpha) for d, e in zip(p_diff, p_equiv)]


# --------------------------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SetResult:
    """One covariate set: its blind AIPW estimate, the comparison with the design and the bias reduction."""

    name: str
    covariates: tuple[str, ...]
    blind: Estimate
    comparison: Comparison
    verdict_adjusted: str
    percent_bias_reduction: Estimate
    picks: dict[str, str] = field(default_factory=dict)
    sensitivity: SensitivityResult | None = None

    def to_dict(self) -> dict[str, Any]:
        pbr = self.percent_bias_reduction
        out = {
            "name": self.name, "covariates": list(self.covariates),
            "blind": self.blind.to_dict(), "difference": self.comparison.difference.to_dict(),
            "p_value": self.comparison.p_value, "p_equivalence": self.comparison.p_equivalence,
            "verdict": self.comparison.verdict, "verdict_adjusted": self.verdict_adjusted,
            "percent_bias_reduction": {"estimate": pbr.estimate, "se": pbr.se, "ci": list(pbr.ci)},
            "learners": dict(self.picks),
        }
        if self.sensitivity is not None:
            out["sensitivity"] = self.sensitivity.to_dict()
        return out


@dataclass(frozen=True, repr=False)
class CovariateSetsResult(ResultsMixin):
    """Every covariate set scored against the design-based ATE, and the paired differences between sets."""

    sets: list[SetResult]
    pairwise: list[dict[str, Any]]
    design: Estimate
    naive: Estimate
    naive_comparison: Comparison
    margin: float
    outcome: str
    n: int
    n_included: int
    settings: dict[str, Any]

    def _key_numbers(self) -> dict[str, Any]:
        return {"sets": len(self.sets), "design": self.design.estimate, "n": self.n}

    def to_frame(self) -> pd.DataFrame:
        """One row per set: name, blind, difference, se, ci_low, ci_high, verdict, verdict_adjusted, pbr."""
        rows = [{"set": s.name, "blind": s.blind.estimate, "difference": s.comparison.difference.estimate,
                 "se": s.comparison.difference.se, "ci_low": s.comparison.difference.ci[0],
                 "ci_high": s.comparison.difference.ci[1], "verdict": s.comparison.verdict,
                 "verdict_adjusted": s.verdict_adjusted, "pbr": s.percent_bias_reduction.estimate}
                for s in self.sets]
        return pd.DataFrame(rows)

    def to_dict(self) -> dict[str, Any]:
        """The content of ``sets.json``."""
        from . import __version__

        return {
            "schema": SCHEMA, "version": VERSION, "siteproof_version": __version__,
            "n": self.n, "n_included": self.n_included, "margin": self.margin, "alpha": ALPHA,
            "outcome": self.outcome, "design": self.design.to_dict(), "naive": self.naive.to_dict(),
            "naive_difference": {**self.naive_comparison.difference.to_dict(), "verdict": self.naive_comparison.verdict},
            "settings": self.settings,
            "sets": [s.to_dict() for s in self.sets],
            "pairwise": self.pairwise,
            "adjustment": "Holm (1979) across sets, difference and TOST p-values separately",
        }


# --------------------------------------------------------------------------------------------------------
# orchestration
# --------------------------------------------------------------------------------------------------------
def parse_set_flags(items: Sequence[str]) -> dict[str, list[str]]:
    """``--set NAME=col1,col2`` flags → {name: [columns]}; a malformed flag or a repeated name raises."""
    named: dict[str, list[str]] = {}
    for item in items:
        name, _, text = item.partition("=")
        cols = [c.strip() for c in text.split(",") if c.strip()]
        if not name.strip() or not cols or name.strip() in named:
            raise SiteproofError(f"--set {item!r} is not NAME=col1,col2 with a new name",
                                 "write e.g. --set fluency=spring_wcpm,grade")
        named[name.strip()] = cols
    return named


def resolve_sets(available: Sequence[str], sets: Mapping[str, Sequence[str]] | None,
                 drop_each: bool = False) -> dict[str, tuple[str, ...]]:
    """The named sets to run: the given ones (each checked against the study's covariates), and with
    ``drop_each`` the full set plus one set per covariate left out."""
    out: dict[str, tuple[str, ...]] = {}
    for name, cols in (sets or {}).items():
        cols = tuple(dict.fromkeys(cols))
        unknown = [c for c in cols if c not in available]
        if not cols or unknown:
            raise SiteproofError(
                f"covariate set {name!r} " + (f"names unknown covariate(s) {', '.join(unknown)}" if unknown else "is empty"),
                f"use covariates among {', '.join(available)} (the difference in means is always reported)",
            )
        out[name] = cols
    if drop_each:
        out.setdefault(FULL_SET, tuple(available))
        if len(available) < 2:
            raise SiteproofError("--drop-each needs at least 2 covariates", "name the sets with --set instead")
        for c in available:
            out.setdefault(f"without {c}", tuple(a for a in available if a != c))
    if not out:
        raise SiteproofError("no covariate set given", "give --set NAME=col1,col2 (repeatable), [covariate_sets] in the study file, or --drop-each")
    return out


def set_features(study: Study, cols: Sequence[str]) -> list[int]:
    """The encoded feature columns of the named covariates (each covariate with all of its encoded features)."""
    groups = covariate_groups(study.blind.feature_names, cols)
    return sorted(i for c in cols for i in groups.get(c, []))


def _set_fit(study: Study, cols: Sequence[str], folds: np.ndarray, config: BlindConfig) -> tuple[np.ndarray, Nuisances]:
    """Cross-fitted nuisances of one set on the shared folds and the AIPW scores built on them."""
    data = study.blind
    nuis = cross_fit_nuisances(
        data.X[:, set_features(study, cols)], data.y, data.w, folds, binary_outcome=data.binary_outcome,
        learners=config.nuisance_learners, clip=config.clip, seed=config.seed,
    )
    return aipw(data.y, data.w, nuis.e_hat, nuis.mu0, nuis.mu1).scores, nuis


def _set_sensitivity(study: Study, cols: Sequence[str], nuis: Nuisances, inc: np.ndarray, comp: Comparison,
                     config: BlindConfig, k: float) -> SensitivityResult:
    """The omitted-variable-bias analysis of one set's AIPW on the included units, benchmarked on the set's own
    covariates (cheap projections), with the realized bias blind − design."""
    data = study.blind
    idx = set_features(study, cols)
    return sensitivity_analysis(
        data.y[inc], data.w[inc], nuis.e_hat[inc], nuis.mu0[inc], nuis.mu1[inc], X=data.X[np.ix_(inc, idx)],
        feature_names=[data.feature_names[i] for i in idx], covariates=cols, folds=nuis.folds[inc],
        realized_bias=comp.difference, k=k, clip=config.clip, binary_outcome=data.binary_outcome, seed=config.seed,
    )


def compare_covariate_sets(
    spec: StudySpec | Study, sets: Mapping[str, Sequence[str]] | None = None, config: BlindConfig | None = None,
    *, drop_each: bool = False, margin: float | None = None, alpha: float = ALPHA, sensitivity: bool = False,
    k: float = 1.0,
) -> CovariateSetsResult:
    """Blind AIPW under each covariate set on the same folds and seed, scored against one unmasking.

    ``sets`` maps a name to covariate columns (names as in the data; default: the study file's
    ``[covariate_sets]``); ``drop_each`` adds the full set and every
    leave-one-covariate-out set.  ``margin`` is the equivalence margin (default: the locked plan's ATE-family rule, :func:`sets_margin`).
    ``sensitivity`` adds, per set, the omitted-variable-bias analysis (``unmask.sensitivity``) with benchmarks
    k× each of the set's covariates: would it have warned of the bias the unmasking found?
    """
    study = spec if isinstance(spec, Study) else load_study(spec)
    seed = study.spec.seed if config is None else config.seed
    config = config or BlindConfig(seed=seed)
    named = resolve_sets(study.blind.covariates, study.spec.covariate_sets if sets is None else sets, drop_each)
    data = study.blind
    folds = make_folds(data.w, config.folds, config.seed)
    truth = design_ate(data.y, data.w, study.site, study.stratum)
    inc = truth.included
    psi = truth.estimate.scores
    naive_scores = naive(data.y, data.w).scores[inc]
    threads = config.threads if config.threads is not None else (1 if data.n < SMALL_DATA else None)
    with threadpool_limits(limits=threads, user_api="openmp"):  # as run_blind: one thread on small data
        runs = {name: _set_fit(study, cols, folds, config) for name, cols in named.items()}
        if margin is None:
            margin = study.spec.margin if study.spec.margin is not None else sets_margin(data, named, runs)
        comps = {name: compare_scores(scores[inc], psi, margin, alpha) for name, (scores, _) in runs.items()}
        sens = {name: _set_sensitivity(study, named[name], runs[name][1], inc, comps[name], config, k)
                for name in named} if sensitivity else {}
    adjusted = adjusted_verdicts(list(comps.values()), alpha)
    results = [
        SetResult(name, named[name], Estimate.from_scores(name, runs[name][0]), comps[name], adj,
                  percent_bias_reduction_ci(runs[name][0][inc] - psi, naive_scores - psi), dict(runs[name][1].picks),
                  sens.get(name))
        for name, adj in zip(named, adjusted)
    ]
    pairwise = []
    for a, b in itertools.combinations(named, 2):
        d = paired_difference(runs[a][0], runs[b][0])
        pairwise.append({"a": a, "b": b, "estimate": d.estimate, "se": d.se, "ci": list(d.ci), "p_value": d.p_value})
    return CovariateSetsResult(
        sets=results, pairwise=pairwise, design=truth.estimate, naive=Estimate.from_scores("naive", naive_scores),
        naive_comparison=compare_scores(naive_scores, psi, margin, alpha), margin=margin, outcome=data.outcome,
        n=data.n, n_included=int(inc.sum()),
        settings={"folds": config.folds, "seed": config.seed, "clip": list(config.clip),
                  "nuisance_learners": "default" if config.nuisance_learners is None else "user-supplied"},
    )


def write_sets(result: CovariateSetsResult, out_dir: Path | str, *, force: bool = False) -> Path:
    """Write ``sets.json`` and the page ``sets.html`` (with its bias-by-set figure) into ``out_dir``."""
    from .reporting.sets_page import write_sets_page

    check_out_dir(out_dir, force)
    with StagedOutput(out_dir, force) as staged:
        atomic_write_json(staged / SETS_FILE, result.to_dict())
        write_sets_page(staged, result.to_dict())
    return Path(out_dir) / SETS_FILE


def run_sets(spec: StudySpec, sets: Mapping[str, Sequence[str]] | None, out_dir: Path | str,
             config: BlindConfig | None = None, *, drop_each: bool = False, margin: float | None = None,
             sensitivity: bool = False, force: bool = False) -> CovariateSetsResult:
    """:func:`compare_covariate_sets` then :func:`write_sets` (the ``siteproof sets`` command)."""
    check_out_dir(out_dir, force)  # refuse before any work
    study = load_study(spec)
    result = compare_covariate_sets(study, sets, config, drop_each=drop_each, margin=margin, sensitivity=sensitivity)
    write_sets(result, out_dir, force=force)
    return result
