"""PEHE of every CATE model with the default second stage on shipped designs (figures, not assertions).

Usage:  python tests/perf/cate_accuracy.py [--designs demo,covariate_allocation] [--n 3000] [--seeds 20]
        python tests/perf/cate_accuracy.py --compare before.jsonl after.jsonl

For each design and seed s = 0..seeds−1: simulate n units (seed s), load them blind, cross-fit the nuisances
exactly as the blind run does (5 folds, seed s, default learners) and fit each CATE model out-of-fold; PEHE =
√mean((τ̂ᵢ − τᵢ)²) against the simulated per-unit effect τᵢ.  Prints one JSON line per design: mean PEHE per
model, its Monte Carlo SE (SD over seeds / √seeds) and the per-seed values (so two code versions run on the
same seeds can be compared pairwise).  One OpenMP thread.  ``--compare`` reads two such outputs (e.g. the same
script run with PYTHONPATH pointing at two code versions) and prints, per design and model, both means and the
paired difference after − before with its Monte Carlo SE (SD of the per-seed differences / √seeds).
"""

from __future__ import annotations

import argparse
import json

import numpy as np
from threadpoolctl import threadpool_limits

from siteproof.blind.effects import fit_cate
from siteproof.blind.nuisance import cross_fit_nuisances, make_folds
from siteproof.simulation.montecarlo import simulated_study
from siteproof.simulation.simulate import simulate

MODELS = ("constant", "s", "t", "x", "r", "dr")


def pehe_by_model(design: str, n: int, seed: int) -> dict[str, float]:
    trial = simulate(design, n=n, seed=seed)
    data = simulated_study(trial, seed=seed).blind
    tau = trial.truth.set_index("id")["tau"].loc[data.row_key].to_numpy(dtype=float)
    folds = make_folds(data.w, 5, seed)
    nuis = cross_fit_nuisances(data.X, data.y, data.w, folds, binary_outcome=data.binary_outcome, seed=seed)
    out = {}
    for key in MODELS:
        fit = fit_cate(key, data.X, data.y, data.w, e_hat=nuis.e_hat, mu0=nuis.mu0, mu1=nuis.mu1, m_hat=nuis.m_hat,
                       folds=folds, binary_outcome=data.binary_outcome, seed=seed, nuisance_models=nuis.models)
        out[key] = float(np.sqrt(np.mean((fit.tau - tau) ** 2)))
    return out


def compare(before_path: str, after_path: str) -> None:
    """Table of mean PEHE before/after and the paired difference with its Monte Carlo SE."""
    def read(path: str) -> dict[str, dict]:
        with open(path, encoding="utf-8") as handle:
            return {rec["design"]: rec for rec in map(json.loads, filter(str.strip, handle))}

    before, after = read(before_path), read(after_path)
    print("| design | model | before | after | after − before (MC SE) |")
    print("|---|---|---|---|---|")
    for design in [d for d in before if d in after]:
        for key in MODELS:
            a, b = np.asarray(before[design]["per_seed"][key]), np.asarray(after[design]["per_seed"][key])
            d = b - a
            print(f"| {design} | {key} | {a.mean():.3f} | {b.mean():.3f} | "
                  f"{d.mean():+.3f} ({d.std(ddof=1) / np.sqrt(d.size):.3f}) |")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--compare", nargs=2, metavar=("BEFORE", "AFTER"))
    parser.add_argument("--designs", default="demo,covariate_allocation")
    parser.add_argument("--n", type=int, default=3000)
    parser.add_argument("--seeds", type=int, default=20)
    args = parser.parse_args()
    if args.compare:
        compare(*args.compare)
        return
    with threadpool_limits(limits=1, user_api="openmp"):
        for design in args.designs.split(","):
            runs = [pehe_by_model(design, args.n, s) for s in range(args.seeds)]
            per_model = {k: [r[k] for r in runs] for k in MODELS}
            summary = {k: {"mean": float(np.mean(v)), "mcse": float(np.std(v, ddof=1) / np.sqrt(len(v)))}
                       for k, v in per_model.items()}
            print(json.dumps({"design": design, "n": args.n, "seeds": args.seeds, "pehe": summary,
                              "per_seed": per_model}), flush=True)


if __name__ == "__main__":
    main()
