"""The summary table of a Monte Carlo design study (``summary.csv``): one row per estimator, model and rule.

Monte Carlo standard errors as in Morris, White & Crowther (2019), "Using simulation studies to evaluate
statistical methods", *Statistics in Medicine* 38(11): bias sd(error)/√R, a share (coverage) √(p(1−p)/R).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..core.interpret import DIFFERENT, VERDICTS


def _share(flags: pd.Series) -> tuple[float, float, int]:
    """Share of True among the non-missing flags, its Monte Carlo SE √(p(1−p)/R), and R."""
    values = flags.dropna().astype(float)
    r = int(values.size)
    if r == 0:
        return math.nan, math.nan, 0
    p = float(values.mean())
    return p, math.sqrt(p * (1 - p) / r), r


def _mean_se(values: pd.Series) -> tuple[float, float]:
    """Mean of the non-missing values and its Monte Carlo SE sd/√R (NaN with fewer than two values)."""
    v = values.dropna().astype(float).to_numpy()
    if v.size == 0:
        return math.nan, math.nan
    return float(v.mean()), float(v.std(ddof=1) / math.sqrt(v.size)) if v.size > 1 else math.nan


def summarize(frame: pd.DataFrame) -> pd.DataFrame:
    """One row per (kind, name), in order of first appearance.

    Over the R replicates with a value: mean truth and estimate; bias = mean(error) with its Monte Carlo SE
    sd(error)/√R; RMSE = √mean(error²); sd of the estimate and the mean reported SE (their ratio checks the SE);
    coverage of the population truth and of the sample truth, each with its Monte Carlo SE √(p(1−p)/R);
    the share of each verdict (``different`` with its Monte Carlo SE); mean PEHE with its Monte Carlo SE.
    """
    out = []
    for (kind, name), group in frame.groupby(["kind", "name"], sort=False):
        error = group["error"].dropna()
        bias, bias_se = _mean_se(error)
        coverage, coverage_se, r_cov = _share(group["covered"])
        coverage_s, coverage_s_se, _ = _share(group["covered_sample"])
        verdicts = group["verdict"][group["verdict"] != ""]
        pehe, pehe_se = _mean_se(group["pehe"])
        row = {
            "kind": kind, "name": name, "replicates": int(group["replicate"].nunique()),
            "truth_mean": float(group["truth"].mean()), "estimate_mean": float(group["estimate"].mean()),
            "bias": bias, "bias_mcse": bias_se,
            "rmse": float(np.sqrt(np.mean(error.to_numpy() ** 2))) if error.size else math.nan,
            "sd_estimate": float(group["estimate"].std(ddof=1)) if group["estimate"].notna().sum() > 1 else math.nan,
            "se_mean": float(group["se"].mean()),
            "coverage": coverage, "coverage_mcse": coverage_se, "coverage_replicates": r_cov,
            "coverage_sample": coverage_s, "coverage_sample_mcse": coverage_s_se,
        }
        for verdict in VERDICTS:
            row[verdict.replace(" ", "_")] = float((verdicts == verdict).mean()) if verdicts.size else math.nan
        row["different_mcse"] = _share(verdicts == DIFFERENT)[1] if verdicts.size else math.nan
        row["verdict_replicates"] = int(verdicts.size)
        row["pehe_mean"], row["pehe_mcse"] = pehe, pehe_se
        out.append(row)
    return pd.DataFrame(out)
