"""Validation of the omitted-variable-bias sensitivity analysis against the known bias (figures, not assertions).

Usage:  nice -n 10 python tests/perf/validate_sensitivity.py --design covariate_allocation --replicates 100 \
            --out /tmp/sens-validation
        python tests/perf/validate_sensitivity.py --summarize /tmp/sens-validation  → the table of docs/sensitivity.md

Per replicate (seeds from SeedSequence(seed).spawn(R), as in the Monte Carlo studies): simulate the design,
cross-fit linear nuisances (logistic ê, GCV ridge μ̂₀, μ̂₁; 5 folds — the cheap configuration), the blind AIPW,
the design-based ATE, the realized bias blind − design with its paired SE, and the sensitivity analysis with
cheap benchmarks (ridge projections).  One CSV row per replicate in OUT/<design>.csv; rows already there are kept,
so an interrupted run resumes.
"""

from __future__ import annotations

import argparse
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

from siteproof.blind.average import aipw
from siteproof.blind.nuisance import GcvRidge, cross_fit_nuisances, default_learners, make_folds
from siteproof.core.errors import SiteproofWarning
from siteproof.intake.sitetrials import design_ate
from siteproof.simulation.montecarlo import replicate_seeds, simulated_study
from siteproof.simulation.simulate import simulate
from siteproof.unmask.correspondence import compare_scores, default_margin
from siteproof.unmask.sensitivity import R2_CAP, bias_bound, sensitivity_analysis

KS = (1.0, 2.0, 3.0)


def replicate(design: str, n: int, r: int, seeds: tuple[int, int, int]) -> dict:
    """One replicate's row: estimate, realized bias, robustness values, bound at k × strongest, warned."""
    sim_seed, blind_seed, _ = seeds
    trial = simulate(design, n=n, seed=sim_seed)
    study = simulated_study(trial, seed=blind_seed)
    d = study.blind
    linear = {k: v["linear"] for k, v in default_learners(d.binary_outcome, blind_seed).items()}
    folds = make_folds(d.w, 5, blind_seed)
    nuis = cross_fit_nuisances(d.X, d.y, d.w, folds, binary_outcome=d.binary_outcome, learners=linear, seed=blind_seed)
    truth = design_ate(d.y, d.w, study.site)
    est = aipw(d.y, d.w, nuis.e_hat, nuis.mu0, nuis.mu1)
    margin = default_margin(d.y)
    comp = compare_scores(est.scores[truth.included], truth.estimate.scores, margin)
    sens = sensitivity_analysis(d.y, d.w, nuis.e_hat, nuis.mu0, nuis.mu1, X=d.X, feature_names=d.feature_names,
                                covariates=d.covariates, folds=folds, realized_bias=comp.difference,
                                learner=GcvRidge(), seed=blind_seed)
    row = {"design": design, "replicate": r, "n": d.n, "estimate": est.estimate, "se": est.se,
           "design_ate": truth.estimate.estimate, "bias": comp.difference.estimate, "bias_se": comp.difference.se,
           "bias_significant": comp.p_value < 0.05, "margin": margin, "scale": sens.scale,
           "rv": sens.robustness_value, "rv_alpha": sens.robustness_value_alpha,
           "rv_to_design": sens.robustness_value_to_design, "strongest": sens.strongest.covariate}
    for k in KS:
        row[f"bound_k{k:g}"] = strongest_bound(sens, k)
        row[f"warned_k{k:g}"] = abs(comp.difference.estimate) <= row[f"bound_k{k:g}"]
    row["k_needed"] = k_needed(sens, abs(comp.difference.estimate))
    return row


def strongest_bound(sens, k: float) -> float:
    """The largest bound over the benchmarks k× as strong as each covariate."""
    return max(float(bias_bound(sens.scale, min(k * b.r2_outcome, 1.0), min(k * b.r2_treatment, R2_CAP)))
               for b in sens.benchmarks)


def k_needed(sens, bias: float, k_max: float = 1000.0) -> float:
    """The smallest k at which the strongest k× benchmark bound reaches |bias| (bisection; the bound grows
    with k), or k_max if it never does."""
    if strongest_bound(sens, k_max) < bias:
        return k_max
    lo, hi = 0.0, k_max
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if strongest_bound(sens, mid) < bias else (lo, mid)
    return hi


def run(design: str, replicates: int, n: int, seed: int, out: Path) -> None:
    path = out / f"{design}.csv"
    done = pd.read_csv(path) if path.exists() else pd.DataFrame()
    have = set(done["replicate"]) if len(done) else set()
    rows = [] if not len(done) else done.to_dict("records")
    for r, seeds in enumerate(replicate_seeds(seed, replicates)):
        if r in have:
            continue
        rows.append(replicate(design, n, r, seeds))
        if len(rows) % 10 == 0 or r == replicates - 1:
            out.mkdir(parents=True, exist_ok=True)
            pd.DataFrame(rows).to_csv(path, index=False)


def summarize(out: Path) -> str:
    """The markdown table: per design, the share of replicates where the bias was real, where the analysis warned
    (|bias| inside the k× strongest-benchmark bound), the median k that would have been needed, and where it
    called the estimate fragile (the 1× bound reaches |estimate|, a false alarm when there is no bias)."""
    lines = ["| design | replicates | mean bias (SD) | bias significant | RV to design (mean) | strongest benchmark (mode) "
             "| warned k=1 | warned k=2 | warned k=3 | k needed (median) | fragile k=1 |",
             "|---|---:|---:|---:|---:|---|---:|---:|---:|---:|---:|"]
    for path in sorted(out.glob("*.csv")):
        f = pd.read_csv(path)
        lines.append(
            f"| {path.stem} | {len(f)} | {f['bias'].mean():.2f} ({f['bias'].std():.2f}) | "
            f"{100 * f['bias_significant'].mean():.0f} % | {f['rv_to_design'].mean():.3f} | {f['strongest'].mode()[0]} | "
            + " | ".join(f"{100 * f[f'warned_k{k:g}'].mean():.0f} %" for k in KS) + f" | {f['k_needed'].median():.2g} | "
            f"{100 * (f['bound_k1'] >= f['estimate'].abs()).mean():.0f} % |"
        )
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--design", default="covariate_allocation")
    parser.add_argument("--replicates", type=int, default=100)
    parser.add_argument("--n", type=int, default=1000)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--out", type=Path, default=Path("sens-validation"))
    parser.add_argument("--summarize", type=Path, default=None)
    args = parser.parse_args()
    if args.summarize is not None:
        print(summarize(args.summarize))
        return
    with warnings.catch_warnings(), threadpool_limits(1):
        warnings.simplefilter("ignore", SiteproofWarning)
        run(args.design, args.replicates, args.n, args.seed, args.out)


if __name__ == "__main__":
    main()
