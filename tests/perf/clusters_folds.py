"""Does cross-fitting learn the circles' arms? corr(ê, W) with unit folds vs folds that keep circles whole.

On `clustered` draws (seeds 0..R−1), a histogram-boosting propensity (scikit-learn defaults) is cross-fitted
on six covariates (two of them circle-level) with `make_folds(w, 5, seed)` and with
`make_folds(w, 5, seed, groups=circle)`; prints the mean correlations of ê with W and with the known rate.

    nice -n 10 python tests/perf/clusters_folds.py --replicates 5
"""

from __future__ import annotations

import argparse

import numpy as np
from sklearn.ensemble import HistGradientBoostingClassifier

from siteproof.blind.nuisance import make_folds
from siteproof.simulation.simulate import simulate

COLUMNS = ["leader_years", "evening_circle", "age", "free_meal", "spring_wcpm"]


def correlations(seed: int) -> list[float]:
    """[corr(ê, W), corr(ê, e_true)] for unit folds, then for group folds."""
    trial = simulate("clustered", seed=seed)
    data = trial.data
    X = data[COLUMNS].assign(other=(data["home_language"] == "other").astype(float)).to_numpy(float)
    w = data["coached"].to_numpy()
    out = []
    for groups in (None, data["circle"].to_numpy()):
        folds = make_folds(w, 5, seed, groups=groups)
        e_hat = np.empty(w.size)
        for f in range(5):
            model = HistGradientBoostingClassifier(random_state=0).fit(X[folds != f], w[folds != f])
            e_hat[folds == f] = model.predict_proba(X[folds == f])[:, 1]
        out += [float(np.corrcoef(e_hat, w)[0, 1]), float(np.corrcoef(e_hat, trial.truth["e_true"])[0, 1])]
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=5)
    args = parser.parse_args()
    mean = np.mean([correlations(seed) for seed in range(args.replicates)], axis=0)
    print(f"unit folds:  corr(ê, W) = {mean[0]:.2f}, corr(ê, e_true) = {mean[1]:.2f}")
    print(f"group folds: corr(ê, W) = {mean[2]:.2f}, corr(ê, e_true) = {mean[3]:.2f}")


if __name__ == "__main__":
    main()
