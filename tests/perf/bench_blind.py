"""Performance benchmark of the blind analysis (figures, not assertions).

Usage:  python tests/perf/bench_blind.py [--n 100000] [--p 20] [--threads 1,2] [--skip-baseline]

Each measurement runs in its own subprocess (OMP_NUM_THREADS set to each requested thread count, the same
nice level as this script) so that its peak resident memory (ru_maxrss) is its own; for each thread count the
baseline and the blind run follow each other, so their ratio is measured side by side.  It prints, for the
given n and p, with the 1-minute load average at the start of each measurement:

* the wall time of a minimal hand-written cross-fitted AIPW with scikit-learn's default histogram gradient
  boosting (4 nuisances × 5 folds) — the baseline;
* the wall time of `siteproof.blind.analysis.run_blind` with default settings, its ratio to the baseline, the time spent
  inside scikit-learn ``fit``/``predict``/``predict_proba`` calls (model time) and the share outside them;
* per stage of the blind run: wall time, model time and the rest ("intake" and "tail" — the per-unit table
  and the claims record after the last stage — have no model time);
* the process CPU time of the blind run and the share of it outside model calls (on a loaded machine wall
  time includes waiting for a core; with one thread, CPU time is what the run would take on an idle core);
* peak RSS of each.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np


def make_data(n: int, p: int, seed: int = 1):
    """Synthetic pooled trial: 20 covariates, propensity depending on x through a hidden site mixture."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    site = (X[:, 0] + rng.normal(scale=1.0, size=n) > 0).astype(int) + (X[:, 1] > 0.5)
    rate = np.array([0.5, 0.67, 0.8])[site]
    w = (rng.random(n) < rate).astype(np.int8)
    tau = 1.0 + 0.5 * (X[:, 2] < 0)
    y = X[:, :5].sum(axis=1) + w * tau + rng.normal(size=n)
    return X, y, w


def _instrument_sklearn(totals: dict[str, float]) -> None:
    """Wrap fit/predict/predict_proba of the estimators siteproof uses to accumulate model time."""
    from sklearn import ensemble, linear_model

    classes = [ensemble.HistGradientBoostingRegressor, ensemble.HistGradientBoostingClassifier,
               linear_model.LogisticRegression, linear_model.Ridge, linear_model.RidgeCV,
               linear_model.LinearRegression]
    depth = {"level": 0}
    for cls in classes:
        for name in ("fit", "predict", "predict_proba"):
            if not hasattr(cls, name) or name in cls.__dict__.get("_sp_wrapped", ()):
                continue
            original = getattr(cls, name)

            @functools.wraps(original)  # keeps the signature: scikit-learn inspects fit() for sample_weight
            def wrapped(self, *a, __orig=original, **k):
                depth["level"] += 1
                t, cpu = time.perf_counter(), time.process_time()
                try:
                    return __orig(self, *a, **k)
                finally:
                    depth["level"] -= 1
                    if depth["level"] == 0:
                        totals["model"] += time.perf_counter() - t
                        totals["model_cpu"] = totals.get("model_cpu", 0.0) + time.process_time() - cpu

            setattr(cls, name, wrapped)


def run_baseline(n: int, p: int) -> dict:
    from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
    from sklearn.model_selection import StratifiedKFold

    X, y, w = make_data(n, p)
    t0, cpu0 = time.perf_counter(), time.process_time()
    e = np.empty(n); mu0 = np.empty(n); mu1 = np.empty(n); m = np.empty(n)
    for train, test in StratifiedKFold(5, shuffle=True, random_state=0).split(X, w):
        Xt, yt, wt = X[train], y[train], w[train]
        e[test] = HistGradientBoostingClassifier().fit(Xt, wt).predict_proba(X[test])[:, 1]
        mu0[test] = HistGradientBoostingRegressor().fit(Xt[wt == 0], yt[wt == 0]).predict(X[test])
        mu1[test] = HistGradientBoostingRegressor().fit(Xt[wt == 1], yt[wt == 1]).predict(X[test])
        m[test] = HistGradientBoostingRegressor().fit(Xt, yt).predict(X[test])
    e = np.clip(e, 0.01, 0.99)
    gamma = mu1 - mu0 + w * (y - mu1) / e - (1 - w) * (y - mu0) / (1 - e)
    wall = time.perf_counter() - t0
    return {"wall": wall, "cpu": time.process_time() - cpu0, "ate": float(gamma.mean()), "peak_rss_mb": _peak_mb()}


def _instrument_stages(totals: dict[str, float], split: dict[str, float]) -> None:
    """Record the model time of each blind-run stage: the analysis closes every stage with ``_timed``."""
    from siteproof.blind import analysis

    original, seen = analysis._timed, {"model": 0.0}

    def timed(timings: dict[str, float], key: str, start: float) -> float:
        split[key] = split.get(key, 0.0) + totals["model"] - seen["model"]
        seen["model"] = totals["model"]
        return original(timings, key, start)

    analysis._timed = timed


def run_siteproof(n: int, p: int) -> dict:
    import pandas as pd

    from siteproof.blind.analysis import run_blind
    from siteproof.intake.study import StudySpec, load_study

    totals, split = {"model": 0.0}, {}
    _instrument_sklearn(totals)
    _instrument_stages(totals, split)
    X, y, w = make_data(n, p)
    frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(p)])
    frame["y"], frame["w"] = y, w
    frame["site"] = "S" + pd.Series((np.arange(n) % 3).astype(str))  # site is dropped before modelling
    t0, cpu0 = time.perf_counter(), time.process_time()
    study = load_study(StudySpec(data="bench.csv", outcome="y", treatment="w", site="site"), frame=frame)
    t_intake = time.perf_counter() - t0
    claims = run_blind(study.blind)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    stages = {k: v for k, v in claims.record["timings"].items() if k != "total"}
    stages["intake"] = t_intake
    stages["tail"] = wall - t_intake - sum(v for k, v in stages.items() if k != "intake")
    return {"wall": wall, "intake": t_intake, "model": totals["model"],
            "outside_share": 1 - totals["model"] / wall, "cpu": cpu, "model_cpu": totals.get("model_cpu", 0.0),
            "stages": stages, "stage_model": split,
            "peak_rss_mb": _peak_mb()}


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _in_subprocess(kind: str, n: int, p: int, threads: int | None = None) -> dict:
    """Run one measurement in a child process (OMP_NUM_THREADS = ``threads`` unless None) and read its JSON."""
    env = dict(os.environ) if threads is None else {**os.environ, "OMP_NUM_THREADS": str(threads)}
    load = os.getloadavg()[0]
    out = subprocess.run([sys.executable, __file__, "--child", kind, "--n", str(n), "--p", str(p)],
                         check=True, capture_output=True, text=True, env=env)
    return {**json.loads(out.stdout.strip().splitlines()[-1]), "load": load}


def _stage_lines(sp: dict) -> list[str]:
    lines = []
    for key, wall in sp["stages"].items():
        model = sp["stage_model"].get(key, 0.0)
        lines.append(f"  {key:<11} wall {wall:7.1f} s   model {model:7.1f} s   rest {wall - model:6.1f} s")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=100_000)
    parser.add_argument("--p", type=int, default=20)
    parser.add_argument("--skip-baseline", action="store_true")
    parser.add_argument("--threads", default="1,2", help="comma-separated OpenMP thread counts")
    parser.add_argument("--child", choices=["baseline", "siteproof"])
    args = parser.parse_args()
    if args.child:
        result = run_baseline(args.n, args.p) if args.child == "baseline" else run_siteproof(args.n, args.p)
        print(json.dumps(result))
        return
    print(f"n = {args.n:,}, p = {args.p}, nice {os.nice(0)}")
    for threads in (int(t) for t in args.threads.split(",")):
        print(f"--- OMP_NUM_THREADS={threads}", flush=True)
        base = None if args.skip_baseline else _in_subprocess("baseline", args.n, args.p, threads)
        if base:
            print(f"baseline cross-fitted AIPW (4 HGB nuisances x 5 folds): wall {base['wall']:.1f} s, "
                  f"peak RSS {base['peak_rss_mb']:.0f} MB (load {base['load']:.1f})", flush=True)
        sp = _in_subprocess("siteproof", args.n, args.p, threads)
        print(f"siteproof blind run: wall {sp['wall']:.1f} s (intake {sp['intake']:.1f} s), "
              f"model fit/predict {sp['model']:.1f} s, outside-model share {100 * sp['outside_share']:.1f} %, "
              f"peak RSS {sp['peak_rss_mb']:.0f} MB (load {sp['load']:.1f}, {os.getloadavg()[0]:.1f} at the end)")
        if "cpu" in sp:
            print(f"  CPU time (all threads, load-independent): total {sp['cpu']:.1f} s, model {sp['model_cpu']:.1f} s, "
                  f"outside-model share {100 * (1 - sp['model_cpu'] / sp['cpu']):.1f} %")
        print("\n".join(_stage_lines(sp)))
        if base:
            print(f"ratio blind / baseline ({threads} thread{'s' if threads > 1 else ''}): "
                  f"{sp['wall'] / base['wall']:.2f}"
                  + (f"; CPU-time ratio {sp['cpu'] / base['cpu']:.2f}" if "cpu" in base and "cpu" in sp else ""),
                  flush=True)


if __name__ == "__main__":
    main()
