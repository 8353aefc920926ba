"""Leave-one-site-out transport: does what the blind analysis learned on the other sites hold in a new site?

For each site s with ≥ 50 units and ≥ 2 units in each arm:

1. rerun the whole blind analysis (``blind.run_blind``) on the units of the *other* sites;
2. predict τ̂ on site s with each fitted CATE model (``CateFit.predict``: the mean of its fold models) and
   apply the learned rules there — the threshold rule τ̂ > cost, the budget rules (the top q share *of site
   s* by τ̂) and the depth-2 tree (``TreeRule.predict``);
3. score them on site s with its known rate: oracle AIPW scores
       Γ_i = μ̂₁(x_i) − μ̂₀(x_i) + W_i(Y_i − μ̂₁(x_i))/e_s − (1 − W_i)(Y_i − μ̂₀(x_i))/(1 − e_s),
   where μ̂₀, μ̂₁ are the full blind run's cross-fitted outcome models (out-of-fold for the unit, so with the
   known e_s the score is unbiased for τ(X, s); docs/methods-unmask.md).  AUTOC (Yadlowsky et al.) of the
   transported ranking with half-sample bootstrap SE, and each rule's gain over random allocation with the
   same treated share (Imai & Li 2023; ``rules.rule_value``).

Beside the transported AUTOC we report the AUTOC of the full run's out-of-fold τ̂ on the same site (whose
models saw the other units of site s) and the paired difference "transported − in-sample" on the same
half-samples: the price of never having seen the site.

Clustered data (``BlindData.clusters``, the shuffled integer codes of the blind view): the training data keeps
the codes of its rows, re-coded 0..G'−1 in order of first appearance (``BlindData.n_clusters`` reads the
largest code), so the blind rerun keeps clusters whole; the held-out site's rule values and gains get the
cluster-sum SE of their per-unit scores (Liang & Zeger 1986; Cameron & Miller 2015).  The AUTOC half-samples
stay those of ``blind.evaluation.rank_metric``.

Sites run in parallel in local processes (``concurrent.futures.ProcessPoolExecutor`` with the ``spawn``
start method, ``workers`` of them); every task is seeded by the blind configuration and results are
collected in site order, so the output does not depend on ``workers``.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..blind.analysis import BlindConfig, run_blind
from ..intake.sitetrials import site_order
from ..core.clusters import cluster_codes
from ..core.errors import SiteproofError
from ..core.estimates import Estimate
from ..blind.evaluation import rank_metric
from ..blind.rules import RuleValue, budget_rule, rule_value, threshold_rule
from ..core.scores import arm_scores
from ..intake.study import BlindData, fingerprint

MIN_SITE_UNITS = 50
MIN_PER_ARM = 2
Tick = Callable[[str], None]


@dataclass(frozen=True)
class SiteTransport:
    """One held-out site: the transported rankings' AUTOC and the transported rules' gains there."""

    site: str
    n: int
    n_train: int
    rate: float
    autoc: dict[str, Estimate]
    autoc_in_sample: dict[str, Estimate]
    autoc_loss: dict[str, Estimate]
    rules: dict[str, RuleValue]
    seconds: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "site": self.site,
            "n": self.n,
            "n_train": self.n_train,
            "known_rate": self.rate,
            "autoc": {k: v.to_dict() for k, v in self.autoc.items()},
            "autoc_in_sample": {k: v.to_dict() for k, v in self.autoc_in_sample.items()},
            "autoc_transported_minus_in_sample": {k: v.to_dict() for k, v in self.autoc_loss.items()},
            "rules": {k: v.to_dict() for k, v in self.rules.items()},
            "seconds": round(self.seconds, 3),
        }


@dataclass(frozen=True)
class TransportResult:
    """Leave-one-site-out transport over every eligible site (``skipped`` says why the others were left out)."""

    sites: list[SiteTransport]
    skipped: list[dict[str, str]]
    n_boot: int
    seed: int
    workers: int

    def table(self) -> pd.DataFrame:
        """One row per held-out site and model/rule: AUTOC and gains with SEs (long format)."""
        rows = []
        for s in self.sites:
            for model, est in s.autoc.items():
                rows.append({"site": s.site, "n": s.n, "claim": f"autoc {model}", "estimate": est.estimate,
                             "se": est.se, "in_sample": s.autoc_in_sample[model].estimate})
            for rule, val in s.rules.items():
                rows.append({"site": s.site, "n": s.n, "claim": f"gain {rule}", "estimate": val.gain.estimate,
                             "se": val.gain.se, "in_sample": float("nan")})
        return pd.DataFrame(rows, columns=["site", "n", "claim", "estimate", "se", "in_sample"])

    def summary_line(self) -> str:
        """One sentence for the terminal summary."""
        if not self.sites:
            return "Transport: no site had ≥ 50 units and ≥ 2 per arm, so nothing was held out."
        positive = sum(1 for s in self.sites for e in s.autoc.values() if e.ci[0] > 0)
        total = sum(len(s.autoc) for s in self.sites)
        gains = sum(1 for s in self.sites for v in s.rules.values() if v.gain.estimate > 0)
        n_rules = sum(len(s.rules) for s in self.sites)
        return (
            f"Transport (leave one site out, {len(self.sites)} sites): {positive} of {total} transported rankings "
            f"have AUTOC significantly > 0 in the held-out site; {gains} of {n_rules} transported rules gain there."
        )

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": "leave one site out: blind rerun on the other sites, scored on the held-out site with its "
            "known rate (oracle AIPW scores)",
            "min_site_units": MIN_SITE_UNITS,
            "n_boot": self.n_boot,
            "seed": self.seed,
            "workers": self.workers,
            "sites": [s.to_dict() for s in self.sites],
            "skipped": self.skipped,
        }


@dataclass(frozen=True)
class _Task:
    """Everything one worker needs (picklable): training data and the held-out site's arrays."""

    site: str
    train: BlindData
    X: np.ndarray
    y: np.ndarray
    w: np.ndarray
    rate: np.ndarray
    mu0: np.ndarray
    mu1: np.ndarray
    cost: np.ndarray | None
    tau_full: dict[str, np.ndarray]
    config: BlindConfig
    clusters: np.ndarray | None = None


def eligible_sites(
    site: np.ndarray, w: np.ndarray, min_units: int = MIN_SITE_UNITS
) -> tuple[list[str], list[dict[str, str]]]:
    """Sites with ≥ ``min_units`` units and ≥ 2 per arm (natural order), and the skipped ones with a reason."""
    site = np.asarray(site).astype(str)
    w = np.asarray(w)
    keep, skipped = [], []
    for s in site_order(site):
        inside = site == s
        n, n1 = int(inside.sum()), int(w[inside].sum())
        if n < min_units:
            skipped.append({"site": s, "reason": f"{n} units < {min_units}"})
        elif min(n1, n - n1) < MIN_PER_ARM:
            skipped.append({"site": s, "reason": f"fewer than {MIN_PER_ARM} units in an arm"})
        else:
            keep.append(s)
    return keep, skipped


def hold_out_site(task: _Task, n_boot: int, seed: int) -> SiteTransport:
    """Run the blind analysis without ``task.site`` and score what it learned on that site (module docstring)."""
    start = time.perf_counter()
    claims = run_blind(task.train, task.config)
    g0, g1 = arm_scores(task.y, task.w, task.rate, task.mu0, task.mu1)
    gamma = g1 - g0
    autoc, in_sample, loss, rules = {}, {}, {}, {}
    for key, fit in claims.cate_fits.items():
        if key == "constant":
            continue
        tau = fit.predict(task.X)
        moved = rank_metric(tau, gamma, kind="autoc", n_boot=n_boot, seed=seed, clusters=task.clusters)
        autoc[key] = moved.estimate_of(0)
        if key in task.tau_full:
            here = rank_metric(task.tau_full[key], gamma, kind="autoc", n_boot=n_boot, seed=seed,
                               clusters=task.clusters)
            in_sample[key] = here.estimate_of(0)
            d = moved.boot[:, 0] - here.boot[:, 0]
            loss[key] = Estimate.from_value(
                "autoc_transport_loss", float(moved.estimate[0] - here.estimate[0]), float(d.std(ddof=1)),
                estimand="AUTOC transported − in-sample",
            )
        rules[f"{key}.threshold"] = _rule(threshold_rule(tau, task.cost), g0, g1, task)
        for q in task.config.budgets:
            rules[f"{key}.top{round(q * 100)}"] = _rule(budget_rule(tau, q), g0, g1, task)
    if claims.tree is not None:
        rules["tree"] = _rule(claims.tree.predict(task.X), g0, g1, task)
    return SiteTransport(
        site=task.site, n=int(task.y.size), n_train=int(task.train.y.size), rate=float(task.rate.mean()),
        autoc=autoc, autoc_in_sample=in_sample, autoc_loss=loss, rules=rules,
        seconds=time.perf_counter() - start,
    )


def _rule(pi: np.ndarray, g0: np.ndarray, g1: np.ndarray, task: _Task) -> RuleValue:
    """``rules.rule_value`` on the held-out site; with clusters its value and gain SEs are the cluster-sum SEs
    of the same per-unit scores (:func:`clustered_rule_value`)."""
    return clustered_rule_value(rule_value(pi, g0, g1, task.cost), task.clusters)


def clustered_rule_value(val: RuleValue, clusters: np.ndarray | None) -> RuleValue:
    """The rule value and gain re-estimated from their per-unit scores with cluster-sum SEs,
    SE = √(G/(G − 1)·Σ_g T_g²)/n with T_g the cluster sums of ψ − ψ̄ (Liang & Zeger 1986); unchanged for None."""
    if clusters is None:
        return val

    def again(est: Estimate) -> Estimate:
        return Estimate.from_scores(est.name, est.scores, estimand=est.estimand, note=est.note, clusters=clusters)

    return dataclasses.replace(val, value=again(val.value), gain=again(val.gain))


def leave_one_site_out(
    data: BlindData,
    site: np.ndarray,
    known_rate: np.ndarray,
    mu0: np.ndarray,
    mu1: np.ndarray,
    config: BlindConfig,
    *,
    tau_full: dict[str, np.ndarray] | None = None,
    workers: int = 1,
    n_boot: int | None = None,
    seed: int | None = None,
    progress: Tick | None = None,
) -> TransportResult:
    """Leave-one-site-out transport over every eligible site (module docstring).

    ``mu0``/``mu1`` are the full blind run's cross-fitted outcome models (sidecar), ``tau_full`` its
    out-of-fold τ̂ per model (for the in-sample comparison).  ``n_boot``/``seed`` of the AUTOC bootstrap
    default to the blind configuration's.  ``workers`` > 1 runs sites in that many local processes.
    """
    if workers < 1:
        raise SiteproofError(f"--workers must be at least 1, got {workers}", "use --workers 1 or more")
    site = np.asarray(site).astype(str)
    rate = np.asarray(known_rate, dtype=float)
    n_boot = config.n_boot if n_boot is None else n_boot
    seed = config.seed if seed is None else seed
    keep, skipped = eligible_sites(site, data.w)
    tasks = [_task(data, site, rate, mu0, mu1, tau_full or {}, config, s) for s in keep]
    tick = progress or (lambda label="": None)
    results = []
    if workers == 1 or len(tasks) <= 1:
        for task in tasks:
            results.append(hold_out_site(task, n_boot, seed))
            tick(f"transport {task.site}")
    else:
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=min(workers, len(tasks)), mp_context=context) as pool:
            futures = [pool.submit(hold_out_site, task, n_boot, seed) for task in tasks]
            for task, future in zip(tasks, futures):
                results.append(future.result())
                tick(f"transport {task.site}")
    return TransportResult(sites=results, skipped=skipped, n_boot=n_boot, seed=seed, workers=workers)


def training_data(data: BlindData, keep: np.ndarray) -> BlindData:
    """The blind data restricted to the rows in ``keep`` (data order), with its own fingerprint; cluster codes
    follow their rows and are re-coded 0..G'−1 (order of first appearance)."""
    X, y, w, key = data.X[keep], data.y[keep], data.w[keep], data.row_key[keep]
    cost = None if data.cost is None else data.cost[keep]
    clusters = None if data.clusters is None else cluster_codes(np.asarray(data.clusters)[keep])[0]
    return dataclasses.replace(
        data, X=X, y=y, w=w, row_key=key, cost=cost, clusters=clusters,
        fingerprint=fingerprint(key, y, w, X, data.feature_names, cost, clusters),
        raw_covariates=data.raw_covariates.loc[keep].reset_index(drop=True),
    )


def _task(data: BlindData, site: np.ndarray, rate: np.ndarray, mu0: np.ndarray, mu1: np.ndarray,
          tau_full: dict[str, np.ndarray], config: BlindConfig, label: str) -> _Task:
    held = site == label
    return _Task(
        site=label,
        train=training_data(data, ~held),
        X=data.X[held],
        y=data.y[held],
        w=data.w[held].astype(float),
        rate=rate[held],
        mu0=np.asarray(mu0, dtype=float)[held],
        mu1=np.asarray(mu1, dtype=float)[held],
        cost=None if data.cost is None else data.cost[held],
        tau_full={k: np.asarray(v, dtype=float)[held] for k, v in tau_full.items()},
        config=config,
        clusters=None if data.clusters is None else np.asarray(data.clusters)[held],
    )
