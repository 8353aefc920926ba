"""Monte Carlo validation of the cluster handling (figures, not assertions) → docs/validation.md.

Usage:
    python tests/perf/clusters_validation.py run --replicates R --out FOLDER [--ignore-clusters] [--shard k/K]
        [--design clustered] [--seed 1]
    python tests/perf/clusters_validation.py summary FOLDER [FOLDER ...]

``run`` draws R replicates of a clustered synthetic_sites design (default ``clustered``: 4 districts × 20
reading circles × 25 children, ICC 0.2, whole circles assigned), loads each with its cluster column declared
(or, with ``--ignore-clusters``, as if the clusters were unknown), runs the blind analysis in a reduced
configuration (default nuisance learners, 5 folds, CATE models constant and t, no tree, 20 half-samples) and
unmasks it; one CSV line per replicate in FOLDER/rep-00042.csv (atomic writes, so a killed run resumes).

``summary`` prints, per folder, with Monte Carlo SEs √(p(1 − p)/R):

* coverage of the population ATE (mean τ of 200,000 fresh units, ``simulate.population_ate``) by the 95 % CI
  of the design-based estimate (known rates) and of the blind AIPW;
* the share of replicates whose adjusted ``ate.aipw`` verdict is `different` (every claim is recoverable in
  this design — unconfoundedness given X holds — so this is a false-`different` rate, target ≤ 5 %);
* the mean and the 95th percentile of corr(ê, W) over replicates (target < 0.5: a propensity model that has
  learnt each circle's arm from its circle-mates sits near 1).
"""

from __future__ import annotations

import argparse
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.core.errors import SiteproofWarning
from siteproof.core.interpret import DIFFERENT
from siteproof.core.outputs import atomic_write_text
from siteproof.simulation.montecarlo import replicate_seeds, simulated_study
from siteproof.simulation.simulate import population_ate, simulate

CONFIG = dict(folds=5, models=("constant", "t"), tree=False, n_boot=20)


def _replicate(design: str, seeds: tuple[int, int, int], clusters: bool) -> dict[str, float | str]:
    """One replicate's design-based and AIPW estimates, the AIPW adjusted verdict and corr(ê, W)."""
    from siteproof.unmask.scoring import run_unmask

    sim_seed, blind_seed, unmask_seed = seeds
    trial = simulate(design, seed=sim_seed)
    study = simulated_study(trial, seed=blind_seed, clusters=clusters)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        claims = run_blind(study.blind, BlindConfig(seed=blind_seed, **CONFIG))
        card = run_unmask(study, claims, seed=unmask_seed,
                          site_learner=make_pipeline(StandardScaler(), LogisticRegression(max_iter=500)))
    verdict = next(row["verdict_adjusted"] for row in card.verdicts if row["claim"] == "ate.aipw")
    blind = next(c for c in claims.record["ate"] if c["estimator"] == "aipw")
    e_hat = claims.units["e_hat"].to_numpy(dtype=float)
    w = study.blind.w.astype(float)  # the sidecar rows are the blind rows, in order
    design_est = card.design.estimate
    return {
        "design": design_est.estimate, "design_low": design_est.ci[0], "design_high": design_est.ci[1],
        "aipw": blind["estimate"], "aipw_low": blind["ci"][0], "aipw_high": blind["ci"][1],
        "aipw_verdict": verdict,
        "corr_e_w": float(np.corrcoef(e_hat, w)[0, 1]),
    }


def run(design: str, replicates: int, out: Path, seed: int, clusters: bool, shard: tuple[int, int]) -> None:
    """Replicates 0..R−1 with r mod K = k not yet in ``out``; one CSV each."""
    out.mkdir(parents=True, exist_ok=True)
    k, shards = shard
    for r, seeds in enumerate(replicate_seeds(seed, replicates)):
        path = out / f"rep-{r:05d}.csv"
        if path.exists() or r % shards != k:
            continue
        row = {"replicate": r, **_replicate(design, seeds, clusters)}
        atomic_write_text(path, pd.DataFrame([row]).to_csv(index=False, lineterminator="\n"))
        print(f"replicate {r} done", flush=True)


def _share(flags: pd.Series) -> str:
    p, k = float(flags.mean()), int(flags.size)
    return f"{100 * p:.1f} % ± {100 * math.sqrt(p * (1 - p) / k):.1f}"


def summary(folders: list[Path], design: str) -> None:
    """Coverage, false-`different` rate and corr(ê, W) per folder (see the module docstring)."""
    truth = population_ate(design)
    print(f"population ATE of '{design}': {truth:.4f}")
    for folder in folders:
        frame = pd.concat([pd.read_csv(p) for p in sorted(folder.glob("rep-*.csv"))], ignore_index=True)
        print(f"{folder} (R = {len(frame)})")
        print(f"  design-based 95 % CI coverage: {_share((frame.design_low <= truth) & (truth <= frame.design_high))}")
        print(f"  blind AIPW 95 % CI coverage:   {_share((frame.aipw_low <= truth) & (truth <= frame.aipw_high))}")
        print(f"  ate.aipw adjusted 'different': {_share(frame.aipw_verdict == DIFFERENT)}")
        print(f"  corr(ê, W): mean {frame.corr_e_w.mean():.3f}, 95th percentile {frame.corr_e_w.quantile(0.95):.3f}")
        print(f"  SD of design estimate {frame.design.std(ddof=1):.3f}; of AIPW {frame.aipw.std(ddof=1):.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    run_p = sub.add_parser("run")
    run_p.add_argument("--replicates", type=int, required=True)
    run_p.add_argument("--out", type=Path, required=True)
    run_p.add_argument("--design", default="clustered")
    run_p.add_argument("--seed", type=int, default=1)
    run_p.add_argument("--ignore-clusters", action="store_true")
    run_p.add_argument("--shard", default="0/1")
    sum_p = sub.add_parser("summary")
    sum_p.add_argument("folders", type=Path, nargs="+")
    sum_p.add_argument("--design", default="clustered")
    args = parser.parse_args()
    if args.command == "run":
        k, shards = (int(v) for v in args.shard.split("/"))
        run(args.design, args.replicates, args.out, args.seed, not args.ignore_clusters, (k, shards))
    else:
        summary(args.folders, args.design)


if __name__ == "__main__":
    main()
