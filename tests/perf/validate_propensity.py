"""Monte Carlo of the propensity stage: the propensity verdict and the paired-D coverage of IPW / overlap.

Per replicate r (seeds: child r of SeedSequence(7).spawn(100), as montecarlo.replicate_seeds): simulate n
units of DESIGN, load them with the declared rates (montecarlo.simulated_study), cross-fit the nuisances with
the default propensity candidates (GcvRidge outcome models: they do not touch ê), then

* propensity verdict (recovery.recover_propensity, no site classifier) for the default ê, for a poor learner
  fitted on noise (logistic regression on as many N(0, 1) columns as X has, same folds) and for ê = the
  treated share;
* paired D = mean(ψ_blind − ψ_design) with SE sd(·)/√n for the Hájek IPW against the design DiM scores and
  the overlap-weighted estimate against the design-based ATO scores, with the scores that treat ê as known
  (blind.average) and those of unmask.designscores.

Usage:  python tests/perf/validate_propensity.py N FIRST LAST OUT.csv [DESIGN]   (replicates FIRST..LAST−1)
        python tests/perf/validate_propensity.py summary OUT_a.csv OUT_b.csv ...
Results: docs/validation.md ("Propensity verdict").
"""

from __future__ import annotations

import sys
import warnings

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from siteproof.blind.average import ipw_hajek, overlap_weighted
from siteproof.blind.nuisance import GcvRidge, cross_fit_nuisances, make_folds
from siteproof.core.scores import arm_scores
from siteproof.intake.sitetrials import design_ate
from siteproof.simulation.montecarlo import replicate_seeds, simulated_study
from siteproof.simulation.simulate import simulate
from siteproof.unmask.designscores import ipw_paired_scores, overlap_paired_scores
from siteproof.unmask.recovery import recover_propensity
from siteproof.unmask.scoring import overlap_design_scores

REPLICATES = 100


def old_rule(slope: float, ci: tuple[float, float], tolerance: float = 0.1) -> bool:
    """The previous verdict: the slope's 95 % CI covers 1 or |slope − 1| ≤ 0.1."""
    return bool(np.isfinite(slope) and ((ci[0] <= 1.0 <= ci[1]) or abs(slope - 1.0) <= tolerance))


def replicate(r: int, seeds: tuple[int, int, int], n: int, design: str) -> list[dict]:
    """The rows of one replicate (module docstring)."""
    s1, s2, s3 = seeds
    study = simulated_study(simulate(design, n=n, seed=s1), seed=s2)
    d = study.blind
    folds = make_folds(d.w, 5, s2)
    cheap = {"mu0": GcvRidge(), "mu1": GcvRidge(), "m": GcvRidge()}
    nu = cross_fit_nuisances(d.X, d.y, d.w, folds, learners=cheap, seed=s2)
    logistic = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=1000))
    noise_x = np.random.default_rng(s3).normal(size=d.X.shape)
    noise = cross_fit_nuisances(noise_x, d.y, d.w, folds, learners={**cheap, "propensity": logistic}, seed=s2)
    fits = {"default": nu.e_hat, "noise": noise.e_hat,
            "constant": np.full(d.y.size, float(np.clip(d.w.mean(), 0.01, 0.99)))}
    rows = []
    for name, e in fits.items():
        rec = recover_propensity(e, study.known_rate, study.site, d.w, seed=s3)
        slope = rec.calibration_slope
        rows.append(dict(rep=r, part="propensity", name=name, slope=slope.estimate, slope_se=slope.se,
                         old=old_rule(slope.estimate, slope.ci), bound=rec.calibration_bound,
                         new=bool(rec.recovered), rmse=rec.rmse,
                         pick=nu.picks["propensity"] if name == "default" else ""))
    truth = design_ate(d.y, d.w, study.site, study.stratum)
    inc = truth.included
    y, w, e, m0, m1 = d.y[inc], d.w[inc].astype(float), nu.e_hat[inc], nu.mu0[inc], nu.mu1[inc]
    g0, g1 = arm_scores(y, w, np.asarray(study.known_rate, dtype=float)[inc], m0, m1)
    dim, ato = truth.estimate.scores, overlap_design_scores(e, g1 - g0)
    pairs = {
        "ipw.old": (ipw_hajek(y, w, e).scores, dim),
        "ipw.new": (ipw_paired_scores(y, w, e, m0, m1), dim),
        "overlap.old": (overlap_weighted(y, w, e).scores, ato),
        "overlap.new": (overlap_paired_scores(y, w, e, m0, m1), ato),
    }
    for name, (blind, design_scores) in pairs.items():
        diff = blind - design_scores
        D, se = float(diff.mean()), float(diff.std(ddof=1) / np.sqrt(diff.size))
        rows.append(dict(rep=r, part="pair", name=name, D=D, se=se, z=D / se))
    return rows


def summary(paths: list[str]) -> None:
    """Print the verdict shares and the z-score summaries of D."""
    df = pd.concat([pd.read_csv(p) for p in paths])
    p = df[df.part == "propensity"].groupby("name")
    print(pd.DataFrame({"reps": p.size(), "recovered_new": p["new"].mean(), "recovered_old": p["old"].mean(),
                        "slope": p["slope"].mean(), "slope_se": p["slope_se"].mean(),
                        "bound_mean": p["bound"].mean(), "bound_max": p["bound"].max()}).round(3).to_string())
    q = df[df.part == "pair"].groupby("name")
    t = pd.DataFrame({"reps": q.size(), "mean_z": q["z"].mean(), "sd_z": q["z"].std(),
                      "covers_0": q["z"].apply(lambda z: np.mean(np.abs(z) < 1.959964)),
                      "sd_D": q["D"].std(), "mean_se": q["se"].mean()})
    t["se_ratio"] = t["mean_se"] / t["sd_D"]
    print(t.round(3).to_string())


def main(argv: list[str]) -> None:
    if argv[0] == "summary":
        summary(argv[1:])
        return
    n, first, last, out = int(argv[0]), int(argv[1]), int(argv[2]), argv[3]
    design = argv[4] if len(argv) > 4 else "covariate_allocation"
    warnings.simplefilter("ignore")
    rows: list[dict] = []
    for r, seeds in list(enumerate(replicate_seeds(7, REPLICATES)))[first:last]:
        rows += replicate(r, seeds, n, design)
        pd.DataFrame(rows).to_csv(out, index=False)  # rewritten after every replicate
        print(r, file=sys.stderr, flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
