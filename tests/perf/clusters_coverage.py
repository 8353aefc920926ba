"""Coverage of the pooled design-based ATE with clustered vs unit-level SEs on the `clustered` design.

Each replicate simulates `clustered` (4 districts × 20 circles × ≈ 25 children, whole circles coached, ICC 0.2)
with seed r and computes, per district, the difference in means with the CR2 cluster-robust variance and with
the unit-level HC2 variance; the pooled estimate is Σ_s (n_s/n)·τ̂_s with SE √Σ_s (n_s/n)²·V_s.  It also
computes the mean of the per-unit difference-in-means scores with the unit-level SE sd(ψ)/√n and with
cluster_mean_se(ψ, circle).  Target: the sample ATE (mean of the true unit effects) for the pooled interval,
the district's mean unit effect for the per-district intervals.  Writes a JSON summary to stdout.

    nice -n 10 python tests/perf/clusters_coverage.py --replicates 400 > clusters_coverage.json
"""

from __future__ import annotations

import argparse
import json
import math

import numpy as np

from siteproof.core.clusters import cluster_mean_se, cr2_difference_in_means
from siteproof.core.estimates import Z95
from siteproof.simulation.simulate import load_design, simulate


def _scores(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Per-unit difference-in-means scores W(Y − ȳ₁)/p̂ − (1 − W)(Y − ȳ₀)/(1 − p̂) + τ̂ of one site."""
    p = w.mean()
    y1, y0 = y[w == 1].mean(), y[w == 0].mean()
    return w * (y - y1) / p - (1 - w) * (y - y0) / (1 - p) + (y1 - y0)


def replicate(design, seed: int) -> dict[str, float]:
    """One simulated trial: pooled estimates, SEs and truth, and per-site interval hits."""
    trial = simulate(design, seed=seed)
    data, roles, cluster = trial.data, design.roles, design.clusters.column
    n = len(data)
    estimate = var_cr2 = var_hc2 = 0.0
    psi = np.empty(n)
    site_hits = {"cr2_t": 0, "hc2_z": 0, "sites": 0}
    for site, part in data.groupby(roles.site):
        y, w = part[roles.outcome].to_numpy(float), part[roles.treatment].to_numpy(float)
        cr2 = cr2_difference_in_means(y, w, part[cluster])
        hc2 = cr2_difference_in_means(y, w, np.arange(len(part)))
        share = len(part) / n
        estimate += share * cr2.estimate
        var_cr2 += share ** 2 * cr2.se ** 2
        var_hc2 += share ** 2 * hc2.se ** 2
        psi[data.index.get_indexer(part.index)] = _scores(y, w)
        truth_s = trial.truth.loc[part.index, "tau"].mean()
        site_hits["cr2_t"] += int(cr2.ci[0] <= truth_s <= cr2.ci[1])
        site_hits["hc2_z"] += int(abs(hc2.estimate - truth_s) <= Z95 * hc2.se)
        site_hits["sites"] += 1
    return {"estimate": estimate, "truth": trial.true_ate, "se_cr2": math.sqrt(var_cr2),
            "se_hc2": math.sqrt(var_hc2), "se_scores_unit": float(psi.std(ddof=1) / math.sqrt(n)),
            "se_scores_cluster": cluster_mean_se(psi, data[cluster]), "psi_mean": float(psi.mean()), **site_hits}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=400)
    args = parser.parse_args()
    design = load_design("clustered")
    rows = [replicate(design, seed) for seed in range(args.replicates)]
    err = np.array([r["estimate"] - r["truth"] for r in rows])
    out: dict[str, object] = {"replicates": args.replicates, "bias": float(err.mean()),
                              "sd_of_error": float(err.std(ddof=1))}
    for key in ("se_cr2", "se_hc2", "se_scores_unit", "se_scores_cluster"):
        se = np.array([r[key] for r in rows])
        cover = float(np.mean(np.abs(err) <= Z95 * se))
        out[key] = {"mean_se": float(se.mean()), "coverage": cover,
                    "mc_se": math.sqrt(cover * (1 - cover) / len(rows))}
    sites = sum(r["sites"] for r in rows)
    out["per_site_coverage"] = {"cr2_t": sum(r["cr2_t"] for r in rows) / sites,
                                "hc2_z": sum(r["hc2_z"] for r in rows) / sites, "intervals": sites}
    out["max_scores_vs_estimate"] = float(max(abs(r["psi_mean"] - r["estimate"]) for r in rows))
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
