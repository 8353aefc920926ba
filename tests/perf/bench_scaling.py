"""Scaling of the blind run with n, and Dask throughput of a design study (figures, not assertions).

Usage:  python tests/perf/bench_scaling.py [--sizes 10000,100000,1000000] [--p 20] [--threads N]
                                           [--study-n 1000] [--study-replicates 6] [--skip-scaling] [--skip-dask]

1. **Scaling** : for each n, the blind run of ``bench_blind.py`` (intake + ``run_blind`` with
   default settings on its synthetic 20-covariate trial) in its own subprocess, so that its peak RSS is its own:
   wall time, time inside scikit-learn fit/predict calls (model time), the share outside them, peak RSS.  The
   instrumentation, the data and the subprocess runner are imported from ``bench_blind`` (not copied).
2. **Dask throughput**: the same small design study (``covariate_allocation``, default learners) on a
   LocalCluster with 1 and then 2 single-threaded workers, each cluster warmed up (siteproof imported in every
   worker) before the clock starts; replicates per minute = R / wall minutes.

Targets (on a 2-core machine): outside-fitting share ≤ 10 % at 100k and ≤ 12 % at 1M, wall(1M)/wall(100k)
≤ 11, peak RSS at 1M ≤ 2 GB, 2 workers ≥ 1.7 × one.  ``--threads`` sets OMP_NUM_THREADS for the scaling
children (default: unset, the blind run's own choice).  The machine's load average is printed beside the figures: on a shared
machine the Dask ratio measures the cores that were free, not the code.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_blind  # sibling script: data, sklearn instrumentation, subprocess runner


def scaling(sizes: list[int], p: int, threads: int | None = None) -> list[dict]:
    """One ``bench_blind`` siteproof child per n; prints a line per n and the 1M/100k ratio."""
    rows = []
    for n in sizes:
        result = bench_blind._in_subprocess("siteproof", n, p, threads)
        result["n"] = n
        rows.append(result)
        print(f"n = {n:>9,}: wall {result['wall']:8.1f} s, model fit/predict {result['model']:8.1f} s, "
              f"outside-model share {100 * result['outside_share']:5.1f} %, peak RSS {result['peak_rss_mb']:7.0f} MB, "
              f"load {result['load']:.1f} at the start, {_load()} at the end", flush=True)
        print("\n".join(bench_blind._stage_lines(result)), flush=True)
    walls = {r["n"]: r["wall"] for r in rows}
    for big, small in ((1_000_000, 100_000), (100_000, 10_000)):
        if big in walls and small in walls:
            print(f"wall({big:,}) / wall({small:,}) = {walls[big] / walls[small]:.2f}")
    return rows


def dask_throughput(workers: int, n: int, replicates: int) -> float:
    """Replicates per minute of a warmed-up LocalCluster with ``workers`` single-threaded workers."""
    from dask.distributed import Client, LocalCluster

    from siteproof.simulation.montecarlo import run_study

    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0") as cluster, \
            Client(cluster) as client:
        client.run(_warm_up)
        with tempfile.TemporaryDirectory() as folder:
            start = time.perf_counter()
            run_study("covariate_allocation", replicates, Path(folder) / "study", n=n, seed=11,
                      scheduler=cluster.scheduler_address, report=False)
            minutes = (time.perf_counter() - start) / 60.0
    rate = replicates / minutes
    print(f"Dask LocalCluster, {workers} worker(s): {replicates} replicates of n = {n:,} in {60 * minutes:.1f} s "
          f"= {rate:.2f} replicates/min, load {_load()}", flush=True)
    return rate


def _warm_up() -> int:
    import siteproof.simulation.montecarlo  # noqa: F401  (import cost paid before the clock starts)

    return os.getpid()


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", default="10000,100000,1000000")
    parser.add_argument("--p", type=int, default=20)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--study-n", type=int, default=1000)
    parser.add_argument("--study-replicates", type=int, default=6)
    parser.add_argument("--skip-scaling", action="store_true")
    parser.add_argument("--skip-dask", action="store_true")
    args = parser.parse_args()
    print(f"{os.cpu_count()} CPUs, load average {_load()}")
    if not args.skip_scaling:
        scaling([int(s) for s in args.sizes.split(",")], args.p, args.threads)
    if not args.skip_dask:
        one = dask_throughput(1, args.study_n, args.study_replicates)
        two = dask_throughput(2, args.study_n, args.study_replicates)
        print(f"speed-up 2 workers / 1 worker: {two / one:.2f}")


if __name__ == "__main__":
    main()
