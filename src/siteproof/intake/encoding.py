"""Covariate screens and encoding into the blind feature matrix.

Numeric columns are kept with median imputation and a ``<col>:missing`` indicator; dates enter as days since
their earliest value; text, boolean and categorical columns are one-hot encoded against their most frequent
level, with a ``<col>:missing`` indicator; constant feature columns are dropped.  Screens drop covariates
that copy the outcome or the treatment (each determines the other, or a threshold separates the arms) and
covariates that copy the site (every value occurs in one site only) — unless a cluster column is given and
the covariate is measured at the cluster level (constant within clusters, varying between clusters of one
site): such a covariate describes the cluster, not the site, and is kept — and refuse undeclared identifiers and
numbers mixed with stray text.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .sitetrials import natural_key
from .spec import StudySpec
from .values import as_float, days_since_earliest, examples, is_datetime, is_numeric, parses_as_number, text_labels
from ..core.clusters import cluster_codes
from ..core.errors import SiteproofError

ID_UNIQUE_SHARE = 0.9
ID_MIN_VALUES = 10
SEPARATION_MIN_ARM = 10


def _values(series: pd.Series) -> tuple[np.ndarray, bool]:
    """(values, numeric?) — float64 with NaN for missing (±inf kept, for the note) or object labels with None."""
    if is_numeric(series):
        return as_float(series), True
    return text_labels(series), False


def _present(values: np.ndarray, numeric: bool) -> np.ndarray:
    """Which values are present (not NaN / not None)."""
    return ~np.isnan(values) if numeric else np.array([v is not None for v in values], dtype=bool)


def _check_text_column(name: str, labels: np.ndarray) -> None:
    """Refuse numbers with stray text and undeclared identifiers among text covariates."""
    present = [v for v in labels if v is not None]
    distinct = set(present)
    numeric = {v for v in distinct if parses_as_number(v)}
    text = distinct - numeric
    if len(numeric) >= 10 and 0 < len(text) <= 3 and sum(v in numeric for v in present) >= 0.8 * len(present):
        raise SiteproofError(
            f"covariate '{name}' holds numbers but also text such as {examples(sorted(text))}",
            "replace those entries with empty cells (they are then imputed), "
            f"or leave it out with --drop-column {name}",
        )
    if len(present) >= ID_MIN_VALUES and len(distinct) >= ID_UNIQUE_SHARE * len(present):
        raise SiteproofError(
            f"text column '{name}' looks like an identifier ({len(distinct)} of {len(present)} values are different)",
            f"declare it with --id {name}, or leave it out with --drop-column {name}",
        )


def _copies_site(values: np.ndarray, numeric: bool, site: np.ndarray) -> bool:
    """True when every value of the column occurs in one site only and values repeat (a site code/attribute).

    Requires ≥ 2 sites among the rows where the column is present and at most half as many distinct values
    as present rows, so that a continuous covariate with all-different values is not flagged.
    """
    present = _present(values, numeric)
    if present.sum() < 2:
        return False
    pairs = pd.DataFrame({"v": values[present], "s": site[present]})
    if pairs["s"].nunique() < 2 or pairs["v"].nunique() > present.sum() / 2:
        return False
    return bool((pairs.groupby("v")["s"].nunique() == 1).all())


def _cluster_level(values: np.ndarray, numeric: bool, clusters: np.ndarray | None, site: np.ndarray) -> bool:
    """True when the column is constant within every cluster (some with two or more units) but takes two or
    more values among the clusters of at least one site (missing values ignored): a cluster-level covariate,
    not a copy of the site.  With one unit per cluster nothing is cluster-level and the site screen applies."""
    if clusters is None:
        return False
    present = _present(values, numeric)
    pairs = pd.DataFrame({"v": values[present], "c": clusters[present], "s": site[present]})
    if not (pairs.groupby("c").size() > 1).any() or (pairs.groupby("c")["v"].nunique() > 1).any():
        return False
    return bool((pairs.groupby("s")["v"].nunique() > 1).any())


def _function_of(values: np.ndarray, numeric: bool, target: np.ndarray, target_levels: int) -> bool:
    """True when the covariate and ``target`` (outcome or treatment, numeric, ``target_levels`` distinct
    values) determine each other in the rows where the covariate is present.

    Either the target is constant within each level of a covariate whose values repeat (at most half as many
    levels as rows: a copy, a relabelling, or a perfect predictor), or a numeric covariate with as many
    levels as the target is a strictly monotone function of it (a copy, a rescaling, a log, …).  A strictly
    monotone function with few levels is a relabelling, so the second test is needed only for many levels.
    """
    present = _present(values, numeric)
    v, t = values[present], target[present]
    if v.size < 2 or t.min() == t.max():
        return False
    levels = pd.unique(v).size
    if levels < 2:
        return False
    if levels <= v.size / 2:
        return bool((pd.DataFrame({"v": v, "t": t}).groupby("v")["t"].nunique() == 1).all())
    if not numeric or levels != target_levels:
        return False
    order = np.argsort(t, kind="stable")
    t, v = t[order], np.asarray(v, dtype=float)[order]
    same_t, step = np.diff(t) == 0, np.diff(v)
    if (step[same_t] != 0).any():  # v varies among units with the same target: not a function of it
        return False
    step = step[~same_t]
    return bool((step > 0).all() or (step < 0).all())


def _separates_arms(values: np.ndarray, numeric: bool, w: np.ndarray) -> bool:
    """True when a threshold on a numeric covariate puts every treated unit on one side and every control on
    the other (checked with at least :data:`SEPARATION_MIN_ARM` units per arm, where chance separation of a
    continuous covariate has probability 2 / C(n₁ + n₀, n₁) < 1e-5)."""
    if not numeric:
        return False
    present = _present(values, numeric)
    treated, control = values[present & (w == 1)], values[present & (w == 0)]
    if min(treated.size, control.size) < SEPARATION_MIN_ARM:
        return False
    return bool(treated.min() > control.max() or treated.max() < control.min())


def _copies_design(name: str, values: np.ndarray, numeric: bool, y: tuple[np.ndarray, int], w: np.ndarray,
                   spec: StudySpec, per_cluster: np.ndarray | None = None) -> str:
    """A warning when the covariate copies the outcome (``y`` = values and their number of distinct values)
    or the treatment ``w`` (it is then dropped), else "".

    For a cluster-level covariate ``per_cluster`` indexes one unit of each cluster and the treatment screens
    run on those rows: in a cluster-randomized trial a value shared by a cluster's units trivially shares its
    arm, so only a covariate that determines the arm *across clusters* copies the treatment.
    """
    if _function_of(values, numeric, *y):
        return (f"covariate '{name}' is the outcome '{spec.outcome}' in another form (each determines the other), "
                "so it would hand the analysis the answer; it was dropped")
    if per_cluster is not None:
        values, w = values[per_cluster], w[per_cluster]
    if _function_of(values, numeric, w, 2) or _separates_arms(values, numeric, w):
        return (f"covariate '{name}' determines the treatment '{spec.treatment}' exactly (no unit has the other "
                "arm at its value), so no comparison is possible within it; it was dropped")
    return ""


def screen_covariates(
    frame: pd.DataFrame, names: list[str], site: np.ndarray, spec: StudySpec, clusters: np.ndarray | None = None,
) -> tuple[dict[str, tuple[np.ndarray, bool]], list[str], list[str]]:
    """Values of the covariates that survive the screens, the warnings raised on the way, and the names of the
    kept covariates measured at the cluster level.

    Dates become days since their earliest value; covariates that copy the outcome or the treatment
    (:func:`_copies_design`) are dropped; covariates that copy the site are dropped unless kept, or unless
    they vary between clusters of a site while constant within each (:func:`_cluster_level`, given
    ``clusters``, the cluster labels).
    """
    kept: dict[str, tuple[np.ndarray, bool]] = {}
    notes: list[str] = []
    cluster_level: list[str] = []
    per_cluster = None if clusters is None else np.unique(cluster_codes(clusters)[0], return_index=True)[1]
    outcome = as_float(frame[spec.outcome])
    y = (outcome, pd.unique(outcome).size)
    arms = text_labels(frame[spec.treatment])
    w = (arms == arms[0]).astype(float)  # which arm is 1 does not matter to the screens
    for name in names:
        if is_datetime(frame[name]):
            values, earliest = days_since_earliest(frame[name])
            numeric = True
            notes.append(f"covariate '{name}' holds dates; it enters as days since its earliest value ({earliest})")
        else:
            values, numeric = _values(frame[name])
        if not numeric:
            _check_text_column(name, values)
        if numeric and np.isinf(values).any():
            notes.append(f"covariate '{name}' has infinite values; they are treated as missing")
            values = np.where(np.isinf(values), np.nan, values)
        at_cluster_level = _cluster_level(values, numeric, clusters, site)
        copy_note = _copies_design(name, values, numeric, y, w, spec, per_cluster if at_cluster_level else None)
        if copy_note:
            notes.append(copy_note)
            continue
        if at_cluster_level:
            cluster_level.append(name)
        elif _copies_site(values, numeric, site):
            if name not in spec.keep_columns:
                notes.append(
                    f"covariate '{name}' copies the site column '{spec.site}' (each of its values occurs in one "
                    f"site only), so the blind analysis would see the site; it was dropped — pass "
                    f"--keep-column {name} to keep it"
                )
                continue
            notes.append(f"covariate '{name}' copies the site column '{spec.site}' and was kept (--keep-column): "
                         "the blind analysis can see the site through it")
        if not _present(values, numeric).any():
            notes.append(f"covariate '{name}' has no values in the usable units; it is ignored")
        kept[name] = (values, numeric)
    if cluster_level:
        notes.append(f"covariate(s) {', '.join(repr(n) for n in cluster_level)} are measured at the level of the "
                     f"cluster '{spec.cluster}' (constant within clusters, varying between clusters of a site); "
                     "they describe the cluster, not the site, and were kept")
    return kept, notes, cluster_level


def _encode_numeric(name: str, values: np.ndarray) -> tuple[list[np.ndarray], list[str]]:
    """The column with missing values set to the median, plus ``<name>:missing`` if any are missing."""
    missing = np.isnan(values)
    if missing.all():
        return [], []
    filled = np.where(missing, np.median(values[~missing]), values)
    if not missing.any():
        return [filled], [name]
    return [filled, missing.astype(float)], [name, f"{name}:missing"]


def _encode_categorical(name: str, labels: np.ndarray) -> tuple[list[np.ndarray], list[str]]:
    """One indicator per level except the most frequent (ties: first in natural order); ``<name>:missing``."""
    present = [v for v in labels if v is not None]
    columns: list[np.ndarray] = []
    names: list[str] = []
    if present:
        counts = pd.Series(present).value_counts()
        levels = sorted(counts.index, key=lambda v: (-counts[v], natural_key(v)))
        for level in sorted(levels[1:], key=natural_key):
            columns.append((labels == level).astype(float))
            names.append(f"{name}={level}")
    if len(present) < labels.size:
        columns.append(np.array([v is None for v in labels], dtype=float))
        names.append(f"{name}:missing")
    return columns, names


def encode_covariates(covariates: dict[str, tuple[np.ndarray, bool]], n: int) -> tuple[np.ndarray, list[str], list[str]]:
    """Feature matrix (constant columns dropped), feature names, and the covariates that contribute."""
    columns: list[np.ndarray] = []
    names: list[str] = []
    used: list[str] = []
    for name, (values, numeric) in covariates.items():
        block, block_names = (_encode_numeric if numeric else _encode_categorical)(name, values)
        varying = [(c, nm) for c, nm in zip(block, block_names) if np.ptp(c) > 0]
        if varying:
            used.append(name)
            columns.extend(c for c, _ in varying)
            names.extend(nm for _, nm in varying)
    X = np.column_stack(columns) if columns else np.empty((n, 0))
    return np.ascontiguousarray(X, dtype=np.float64), names, used
