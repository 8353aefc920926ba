"""Column roles: every named column exists and plays one role, the treated arm, the usable rows and keys.

The treatment becomes 0/1 (0/1 and true/false are inferred, anything else needs the treated value); units with
a missing outcome or treatment are excluded and counted; site, stratum, id and cost must be complete in the
usable rows.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .sitetrials import MIN_PER_ARM, site_order
from .spec import FLAG_OF, StudySpec
from .values import (
    check_magnitude, closest, examples, is_nested, numeric_column, parses_as_number, text_label, text_labels,
)
from ..core.errors import SiteproofError

MIN_UNITS = 20
INFERRED_TREATED = ({"0", "1"}, "1"), ({"false", "true"}, "true")


def _need_column(frame: pd.DataFrame, name: str, flag: str, what: str) -> None:
    """Refuse a column name that the table does not have, suggesting the closest one."""
    if name not in frame.columns:
        raise SiteproofError(
            f"{what} '{name}' (from {flag}) is not a column of the data{closest(name, frame.columns)}",
            f"name one of its columns: {examples(frame.columns, 12)}",
        )


def _role_columns(spec: StudySpec) -> dict[str, str]:
    """Column → the role it plays (outcome, treatment, site, id, cost, stratum, cluster); one role per column."""
    roles: dict[str, str] = {}
    for role in ("outcome", "treatment", "site", "id", "cost", "stratum", "cluster"):
        column = getattr(spec, role)
        if column is None:
            continue
        if column in roles:
            raise SiteproofError(
                f"column '{column}' is named both as {roles[column]} and as {role}",
                f"give {FLAG_OF[role]} a different column",
            )
        roles[column] = role
    return roles


def _covariate_names(spec: StudySpec, frame: pd.DataFrame, roles: dict[str, str]) -> list[str]:
    """The covariates named, or every column that has no role and is not dropped or site-derived."""
    excluded = set(spec.drop_columns) | set(spec.site_derived)
    if spec.covariates is None:
        return [c for c in frame.columns if c not in roles and c not in excluded]
    for name in spec.covariates:
        _need_column(frame, name, "--covariates", "covariate")
        if name in roles:
            raise SiteproofError(
                f"covariate '{name}' is the {roles[name]} column", f"remove '{name}' from --covariates"
            )
        if name in excluded:
            flag = "--drop-column" if name in spec.drop_columns else "--site-derived"
            raise SiteproofError(f"column '{name}' is both a covariate and named in {flag}", "name it in only one")
    return list(dict.fromkeys(spec.covariates))


def check_columns(spec: StudySpec, frame: pd.DataFrame) -> list[str]:
    """Every named column exists and plays one role, none holds nested values, and the numeric ones (outcome,
    cost, covariates) hold no magnitudes beyond ±1e100; returns the covariate names."""
    _need_column(frame, spec.site, "--site", "site column")
    for role in ("outcome", "treatment", "id", "cost", "stratum", "cluster"):
        if getattr(spec, role) is not None:
            _need_column(frame, getattr(spec, role), FLAG_OF[role], f"{role} column")
    for key in ("keep_columns", "drop_columns", "site_derived"):
        for name in getattr(spec, key):
            _need_column(frame, name, FLAG_OF[key], "column")
    roles = _role_columns(spec)
    covariates = _covariate_names(spec, frame, roles)
    _refuse_nested(frame, [*roles, *covariates])
    numeric_roles = [(column, role) for column, role in roles.items() if role in ("outcome", "cost")]
    for column, role in numeric_roles + [(column, "covariate") for column in covariates]:
        check_magnitude(frame[column], column, role)
    return covariates


def _refuse_nested(frame: pd.DataFrame, columns: list[str]) -> None:
    """Refuse list, struct and map columns among the columns the analysis uses, naming all of them."""
    nested = [name for name in columns if is_nested(frame[name])]
    if nested:
        names = ", ".join(f"'{name}'" for name in nested)
        raise SiteproofError(
            f"column{'s' if len(nested) > 1 else ''} {names} hold{'' if len(nested) > 1 else 's'} lists or records "
            "(nested Parquet/Arrow values), not one value per unit",
            f"flatten {'them' if len(nested) > 1 else 'it'} into plain columns, or leave "
            f"{'them' if len(nested) > 1 else 'it'} out with --drop-column {nested[0]}",
        )


def _match_treated(wanted: str, values: list[str], name: str) -> str:
    """The treatment value equal to ``wanted`` — exactly, ignoring case, or as a number ("1.0" → "1")."""
    for value in values:
        if value == wanted:
            return value
    for value in values:
        if value.lower() == wanted.lower():
            return value
    if parses_as_number(wanted) and text_label(float(wanted)) in values:
        return text_label(float(wanted))
    raise SiteproofError(
        f"--treated-value {wanted!r} is not a value of treatment column '{name}' ({examples(values)})",
        f"use --treated-value {values[0]} or --treated-value {values[1]}",
    )


def treated_label(spec: StudySpec, labels: np.ndarray) -> str:
    """Which of the exactly two treatment values is the treated arm (given, or inferred for 0/1, true/false)."""
    values = site_order(v for v in labels if v is not None)
    name = spec.treatment
    if not values:
        raise SiteproofError(
            f"treatment column '{name}' is empty", "name the column that records the arm with --treatment"
        )
    if len(values) == 1:
        raise SiteproofError(
            f"treatment column '{name}' has only one value ({values[0]!r}): every unit is in the same arm",
            "name the column that records the assigned arm with --treatment",
        )
    if len(values) > 2:
        raise SiteproofError(
            f"treatment column '{name}' has {len(values)} distinct values ({examples(values, 5)}); "
            "it needs exactly two",
            "recode it to treated / control, or remove the rows of the extra arms",
        )
    if spec.treated_value is not None:
        return _match_treated(str(spec.treated_value).strip(), values, name)
    lowered = {v.lower(): v for v in values}
    for pair, treated in INFERRED_TREATED:
        if set(lowered) == pair:
            return lowered[treated]
    raise SiteproofError(
        f"cannot tell which value of treatment column '{name}' is the treated arm ({examples(values)})",
        f"say it with --treated-value {values[0]} or --treated-value {values[1]} (treated_value in a study file)",
    )


def usable_rows(y: np.ndarray, treatment: np.ndarray) -> tuple[np.ndarray, dict[str, int]]:
    """Rows with an outcome and a treatment; a unit missing both is counted under missing_outcome."""
    missing_y = np.isnan(y)
    missing_w = np.array([v is None for v in treatment], dtype=bool)
    keep = ~missing_y & ~missing_w
    return keep, {"missing_outcome": int(missing_y.sum()), "missing_treatment": int((missing_w & ~missing_y).sum())}


def exclusion_note(n_excluded: dict[str, int]) -> str:
    """"3 units with a missing outcome and 1 with a missing treatment" (empty when nothing was excluded)."""
    parts = [f"{k} with a missing {key.split('_')[1]}" for key, k in n_excluded.items() if k]
    if not parts:
        return ""
    first, *rest = parts
    count, tail = first.split(" ", 1)
    return " and ".join([f"{count} unit{'s' if count != '1' else ''} {tail}", *rest])


def check_sample(y: np.ndarray, w: np.ndarray, spec: StudySpec, n_excluded: dict[str, int]) -> None:
    """At least MIN_UNITS usable units, ≥ 2 in each arm, and an outcome that varies."""
    note = exclusion_note(n_excluded)
    after = f" (after excluding {note})" if note else ""
    if y.size < MIN_UNITS:
        raise SiteproofError(
            f"only {y.size} usable units{after}; at least {MIN_UNITS} are needed",
            "give more units, or fill in missing outcome and treatment values",
        )
    for arm, count in (("treated", int(w.sum())), ("control", int(y.size - w.sum()))):
        if count == 0:
            raise SiteproofError(
                f"all {y.size} usable units{after} are in the {'control' if arm == 'treated' else 'treated'} arm",
                f"check --treatment '{spec.treatment}' and --treated-value, and that both arms have outcomes",
            )
        if count < MIN_PER_ARM:
            raise SiteproofError(
                f"only {count} usable unit{after} is in the {arm} arm; at least {MIN_PER_ARM} are needed",
                "give more units of that arm",
            )
    if np.ptp(y) == 0:
        raise SiteproofError(
            f"outcome column '{spec.outcome}' takes a single value ({y[0]:g}) in every usable unit",
            "name the outcome column with --outcome",
        )


def design_labels(series: pd.Series, name: str, role: str, origin: np.ndarray) -> np.ndarray:
    """Site, stratum or cluster labels of the usable rows; missing values are an error (the rate would be unknown).

    ``origin`` holds the 0-based row numbers of the usable rows in the data (messages count from 1)."""
    labels = text_labels(series)
    missing = np.flatnonzero([v is None for v in labels])
    if missing.size:
        raise SiteproofError(
            f"{role} column '{name}' is empty for {missing.size} usable unit(s) "
            f"(first in data row {origin[missing[0]] + 1})",
            f"fill in every unit's {role}, or remove those rows from the data",
        )
    return labels


def row_keys(frame: pd.DataFrame, id_column: str | None) -> np.ndarray:
    """The id column's values as text (all present and distinct), else the 0-based row number."""
    if id_column is None:
        return np.arange(len(frame)).astype(str).astype(object)
    keys = text_labels(frame[id_column])
    missing = np.flatnonzero([v is None for v in keys])
    if missing.size:
        raise SiteproofError(
            f"id column '{id_column}' is empty in {missing.size} row(s) (first in data row {missing[0] + 1})",
            "give every unit an id, or leave out --id",
        )
    counts = pd.Series(keys).value_counts()
    repeated = counts[counts > 1]
    if len(repeated):
        raise SiteproofError(
            f"id column '{id_column}' has {len(repeated)} repeated value(s), e.g. {repeated.index[0]!r} "
            f"({int(repeated.iloc[0])} times)",
            "make the ids unique, or name the right column with --id",
        )
    return keys


def cost_column(frame: pd.DataFrame, column: str | None, origin: np.ndarray) -> np.ndarray | None:
    """The per-unit cost of treating (numeric, complete in the usable rows), or None without ``--cost``."""
    if column is None:
        return None
    cost = numeric_column(frame[column], column, "cost", "--cost")
    missing = np.flatnonzero(np.isnan(cost))
    if missing.size:
        raise SiteproofError(
            f"cost column '{column}' is empty for {missing.size} usable unit(s) "
            f"(first in data row {origin[missing[0]] + 1})",
            "fill in every unit's cost of treating, or leave out --cost",
        )
    return cost
