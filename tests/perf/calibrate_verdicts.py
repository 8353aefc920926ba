"""Monte Carlo calibration of the adjusted verdicts (figures, not assertions) → docs/validation.md.

Usage:
    python tests/perf/calibrate_verdicts.py run DESIGN --replicates R --out FOLDER [--n 2000] [--seed 1] [--shard k/K] [--reverse]
    python tests/perf/calibrate_verdicts.py summary FOLDER [FOLDER ...]

``run`` draws R replicates of a synthetic_sites design (replicate r: seeds from SeedSequence(seed).spawn(R)[r],
as ``simulation.montecarlo.replicate_seeds``), runs the blind analysis in the reduced configuration below and
unmasks it by its locked plan, then writes the replicate's whole verdicts table to FOLDER/rep-00042.csv
(atomically, so an interrupted run resumes where it stopped).  Reduced configuration: default nuisance learners
(boosting and linear candidates, picked by out-of-fold loss) with 3 folds, CATE models constant, t and dr, the
five default budgets plus threshold rules, no tree, 20 bootstrap half-samples for AUTOC/Qini (the minimum), a
logistic site classifier for propensity recovery (it enters no verdict).

``summary`` prints, per folder, with Monte Carlo SEs √(p(1 − p)/R):

* the family-wise false-`different` rate: share of replicates with at least one adjusted `different` among the
  claims of an adjustment family (the primary claims; each family without them; naive aside), and over the
  ate, cate and rule families at once, with the raw-verdict rate beside it (replicates run before the per-site
  verdicts were wired in have no site_ate rows, so those families are summarised over the replicates that do);
* the share of replicates whose ate.aipw adjusted verdict is `different` (power where the design is biased);
* the share of replicates whose naive verdict is `different` (can the benchmark discriminate?).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.core.errors import SiteproofWarning
from siteproof.core.interpret import ALPHA, DEFAULT_MULTIPLICITY, DIFFERENT
from siteproof.core.outputs import atomic_write_text
from siteproof.simulation.montecarlo import replicate_seeds, simulated_study
from siteproof.simulation.simulate import simulate
from siteproof.unmask.scoring import run_unmask
from siteproof.unmask.verdicts import adjust_rows

CONFIG = dict(folds=3, models=("constant", "t", "dr"), tree=False, n_boot=20)


def run(design: str, replicates: int, out: Path, n: int, seed: int, shard: tuple[int, int] = (0, 1),
        reverse: bool = False, folds: int = CONFIG["folds"]) -> None:
    """Replicates 0..R−1 not yet in ``out`` (those with r mod K = k for ``shard`` (k, K); from R−1 down with
    ``reverse``, so a second process can work from the other end); one CSV each."""
    out.mkdir(parents=True, exist_ok=True)
    k, shards = shard
    seeds = list(enumerate(replicate_seeds(seed, replicates)))
    for r, (sim_seed, blind_seed, unmask_seed) in (seeds[::-1] if reverse else seeds):
        path = out / f"rep-{r:05d}.csv"
        if path.exists() or r % shards != k:
            continue
        trial = simulate(design, n=n, seed=sim_seed)
        study = simulated_study(trial, seed=blind_seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SiteproofWarning)
            claims = run_blind(study.blind, BlindConfig(seed=blind_seed, **{**CONFIG, "folds": folds}))
            card = run_unmask(study, claims, seed=unmask_seed,
                              site_learner=make_pipeline(StandardScaler(), LogisticRegression(max_iter=500)))
        frame = card.to_frame()
        frame.insert(0, "replicate", r)
        atomic_write_text(path, frame.to_csv(index=False, lineterminator="\n"))
        print(f"{design} replicate {r} done", flush=True)


def _share(flags: pd.Series) -> str:
    p, k = float(flags.mean()), int(flags.size)
    return f"{100 * p:.1f} % ± {100 * np.sqrt(p * (1 - p) / k):.1f} (R = {k})"


def readjust(frame: pd.DataFrame, method: str = DEFAULT_MULTIPLICITY, alpha: float = ALPHA) -> pd.DataFrame:
    """Adjusted p-values and verdicts recomputed from the stored raw p-values with ``unmask.verdicts``, so a
    summary always reflects the current adjustment rule (and can compare Holm with BH)."""
    out = []
    for _, rep in frame.groupby("replicate", sort=True):
        rows = rep.to_dict("records")
        for row in rows:
            row["primary"] = bool(row["primary"])
        out += adjust_rows(rows, method, alpha)
    return pd.DataFrame(out)


def summary(folder: Path, method: str = DEFAULT_MULTIPLICITY) -> None:
    """The rates of the module docstring for one study folder."""
    frame = pd.concat([pd.read_csv(p) for p in sorted(folder.glob("rep-*.csv"))], ignore_index=True)
    frame = readjust(frame, method)
    print(f"== {folder} ({method})")
    scored = frame[frame["family"] != "reference"].assign(
        adjusted_in=lambda f: np.where(f["primary"], "primary", f["family"]))
    common = scored[~scored["family"].str.startswith("site_ate")]  # every replicate has these families
    for column in ("verdict_adjusted", "verdict"):
        per_rep = common.assign(hit=common[column] == DIFFERENT).groupby("replicate")["hit"].any()
        print(f"  any {column:17s} different, ate + cate + rule families: {_share(per_rep)}")
    for family, rows in scored.groupby("adjusted_in"):
        per_rep = rows.assign(hit=rows["verdict_adjusted"] == DIFFERENT).groupby("replicate")["hit"].any()
        print(f"  any adjusted different, family {family:18s}: {_share(per_rep)}")
    for claim in ("ate.aipw", "ate.naive"):
        rows = frame[frame["claim"] == claim].set_index("replicate")
        print(f"  {claim} adjusted different: {_share(rows['verdict_adjusted'] == DIFFERENT)}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    go = sub.add_parser("run")
    go.add_argument("design")
    go.add_argument("--replicates", type=int, required=True)
    go.add_argument("--out", type=Path, required=True)
    go.add_argument("--n", type=int, default=2000)
    go.add_argument("--seed", type=int, default=1)
    go.add_argument("--shard", default="0/1", help="k/K: run the replicates r with r mod K = k (parallel runs)")
    go.add_argument("--reverse", action="store_true", help="work from the last replicate down")
    go.add_argument("--folds", type=int, default=CONFIG["folds"], help="cross-fitting folds (default 3)")
    show = sub.add_parser("summary")
    show.add_argument("folders", type=Path, nargs="+")
    show.add_argument("--multiplicity", default=DEFAULT_MULTIPLICITY, choices=("holm", "bh"))
    args = parser.parse_args(argv)
    if args.command == "run":
        k, shards = (int(v) for v in args.shard.split("/"))
        run(args.design, args.replicates, args.out, args.n, args.seed, (k, shards), args.reverse, args.folds)
    else:
        for folder in args.folders:
            summary(folder, args.multiplicity)


if __name__ == "__main__":
    main(sys.argv[1:])
