"""Feature binning shared by every second-stage boosting fit of one fold.

Histogram gradient boosting (Ke et al. 2017, "LightGBM", NeurIPS 30; scikit-learn's
``HistGradientBoosting*``) replaces each feature by its bin index before growing trees: at most 255 bins cut
at the quantiles 1/256, …, 255/256 of the training values (the midpoints of the distinct values when there are
fewer).  scikit-learn recomputes those cuts in every ``fit`` — and with ``sample_weight`` it computes
*weighted* quantiles one percentile at a time, which made the R-learner's weighted fit about ten times slower
than the unweighted fits of the same size (all of it in the binning, not in the boosting rounds).

:func:`fold_bins` computes the cuts once per fold from that fold's *training* units (covariates only, so
no unit's outcome ever reaches its own prediction) with the unweighted quantile rule scikit-learn uses,
and maps every unit to its bin index.  A boosting fit on the bin indices sees at most 255 distinct values per
feature, so its own binning is the cheap midpoint rule and its trees split the data exactly where splits on
the original values at the same cuts would.  The same cuts serve every model of that fold (a fit left to
itself would bin only its own rows: the 80 % left after its early-stopping split, or one arm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MAX_BINS = 255  # scikit-learn's default (and maximum) number of bins for non-missing values
BINNING_SUBSAMPLE = 200_000  # scikit-learn's default subsample for finding the cuts


@dataclass(frozen=True, eq=False)
class FeatureBins:
    """Cut points per feature; :meth:`codes` maps a value x to bin i iff cuts[i−1] < x ≤ cuts[i]."""

    cuts: tuple[np.ndarray, ...]

    def codes(self, X: np.ndarray) -> np.ndarray:
        """Bin indices (n, p) as uint8."""
        X = np.asarray(X, dtype=float)
        out = np.empty(X.shape, dtype=np.uint8)
        for j, cut in enumerate(self.cuts):
            out[:, j] = np.searchsorted(cut, X[:, j], side="left")
        return out

    def transform(self, X: np.ndarray) -> np.ndarray:
        """Bin indices as float64, the input a boosting model fitted on :meth:`codes` expects."""
        return self.codes(X).astype(float)


def _cuts_of_sorted(ordered: np.ndarray, max_bins: int) -> np.ndarray:
    """Cuts of one feature from its sorted training values: the midpoints of the distinct values if there are
    ≤ ``max_bins`` of them, else the quantiles at levels k/max_bins (k = 1..max_bins−1, the
    ``averaged_inverted_cdf`` rule scikit-learn uses), duplicates removed."""
    distinct = ordered[np.r_[True, ordered[1:] != ordered[:-1]]]
    if distinct.size <= max_bins:
        return (distinct[:-1] + distinct[1:]) / 2.0
    levels = np.linspace(0, 100, num=max_bins + 1)[1:-1]
    return np.unique(np.percentile(ordered, levels, method="averaged_inverted_cdf"))


@dataclass(frozen=True, eq=False)
class FoldBins:
    """Per fold position k: the cuts found on the units outside fold k and every unit's bin codes (n, p)."""

    bins: tuple[FeatureBins, ...]
    codes: tuple[np.ndarray, ...]

    def train_matrix(self, k: int, rows: np.ndarray) -> np.ndarray:
        """The float64 bin-index matrix of ``rows`` under fold position k's cuts."""
        return self.codes[k][rows].astype(float)


def _binning_rows(train: np.ndarray, seed: int) -> np.ndarray | None:
    """The training rows the cuts are found on: None = all of them, else 200 000 drawn without replacement."""
    rows = np.flatnonzero(train)
    if rows.size <= BINNING_SUBSAMPLE:
        return None
    return np.sort(np.random.default_rng(seed).choice(rows, BINNING_SUBSAMPLE, replace=False))


def fold_bins(X: np.ndarray, folds: np.ndarray, seed: int, max_bins: int = MAX_BINS) -> FoldBins:
    """Cuts for each fold from its training units (folds ≠ k), and all units' codes under those cuts.

    Each column is sorted once for all folds: a fold's training values are read off the sorted column in
    order, and the codes follow from where the cuts fall in it (units between the (i−1)-th and i-th cut get
    code i), so no unit is searched for individually.
    """
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    trains = [folds != k for k in np.unique(folds)]
    samples = [_binning_rows(train, seed) for train in trains]
    codes = [np.empty((n, p), dtype=np.uint8) for _ in trains]
    cuts: list[list[np.ndarray]] = [[] for _ in trains]
    for j in range(p):
        column = np.ascontiguousarray(X[:, j])
        order = np.argsort(column, kind="stable")
        ordered = column[order]
        for f, (train, rows) in enumerate(zip(trains, samples)):
            cut = _cuts_of_sorted(ordered[train[order]] if rows is None else np.sort(column[rows]), max_bins)
            cuts[f].append(cut)
            edges = np.concatenate([[0], np.searchsorted(ordered, cut, side="right"), [n]])
            codes[f][order, j] = np.repeat(np.arange(cut.size + 1, dtype=np.uint8), np.diff(edges))
    return FoldBins(tuple(FeatureBins(tuple(c)) for c in cuts), tuple(codes))
