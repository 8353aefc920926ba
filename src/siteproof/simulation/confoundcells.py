"""Covariate cells of a randomized trial, for drawing confounded subsamples (:mod:`.confound`).

A cell is a set of trial units that share one pair of keep probabilities (one for each arm).  Cells come
from one of three sources:

* **a prognostic score** (the default): a cross-fitted least-squares prediction of the outcome from the
  covariates, fitted on the control units (the prognostic score of Hansen 2008, "The prognostic analogue of
  the propensity score", *Biometrika* 95(2)), cut at its K-quantiles.  Each unit's score comes from the models
  fitted on the other folds, so no control's own outcome enters its score (fitting the score on units it is
  not used on follows Aikens, Greaves & Baiocchi 2020, *Statistics in Medicine* 39(30)).  Tied scores share a
  cell, so a cell is a function of the covariates;
* **one or two covariates** (``by``): a numeric column with more than K distinct values is cut at its
  K-quantiles, otherwise each value (or each level of a text column) is a cell; with two columns the cells
  are the observed combinations;
* **a rule file** (TOML) naming each cell by a condition on the columns and giving its keep probabilities::

      [[cell]]
      name = "young"
      when = "age < 25"
      keep_treated = 0.9
      keep_control = 0.4

  Conditions use the expression language of scenario files (:mod:`.expressions`); at most one cell may omit
  ``when`` and then takes every unit no other condition selects.  Every unit must fall in exactly one cell.

Score and covariate cells carry an order ``rank`` in [−1, 1] (lowest score or value −1, highest +1; with two
columns the mean of the two ranks), which :mod:`.confound` turns into assignment rates.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from ..core.errors import SiteproofError
from ..intake.encoding import encode_covariates
from ..intake.sitetrials import natural_key
from ..intake.values import as_float, is_numeric, text_labels
from .expressions import Scope, check_expression, evaluate

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

SCORE_FOLDS = 5
RULE_KEYS = ("name", "when", "keep_treated", "keep_control")
CELL_COLUMNS = ("cell", "definition", "rank", "keep_treated", "keep_control")


@dataclass(frozen=True, eq=False)
class CellPlan:
    """Each trial unit's cell label and one row per cell (:data:`CELL_COLUMNS`, in cell order).

    ``rank`` is NaN and the keep probabilities are given for rule-file cells; score and covariate cells have
    a rank and NaN keep probabilities (they follow from the strength).  ``source`` is "score", "by" or "rule".
    """

    labels: np.ndarray
    table: pd.DataFrame
    source: str


def _rank_of(position: int, count: int) -> float:
    """Evenly spaced order in [−1, 1]: −1 + 2j/(J − 1) for the j-th of J ordered bins (0 for one bin)."""
    return 0.0 if count <= 1 else -1.0 + 2.0 * position / (count - 1)


def _fmt(value: float) -> str:
    return f"{value:.4g}"


def quantile_bins(values: np.ndarray, k: int, name: str) -> tuple[np.ndarray, list[str]]:
    """Bin index of each value at the k-quantiles (ties in one bin, empty bins removed) and each bin's text.

    Bin j holds edges[j] ≤ v < edges[j+1] (the last bin includes its upper edge).
    """
    edges = np.unique(np.quantile(values, np.linspace(0, 1, k + 1)))
    inner = edges[1:-1]
    index = np.searchsorted(inner, values, side="right")
    used = np.unique(index)
    index = np.searchsorted(used, index)
    texts = []
    for j in used:
        low = edges[j]
        high = edges[j + 1] if j + 1 < edges.size else edges[-1]
        closing = "]" if j == used[-1] else ")"
        texts.append(f"{name} in [{_fmt(low)}, {_fmt(high)}{closing}")
    return index, texts


def _ordered_groups(values: np.ndarray, name: str, numeric: bool) -> tuple[np.ndarray, list[str]]:
    """One bin per distinct value, in numeric or natural order."""
    levels = sorted(set(values.tolist()), key=(float if numeric else natural_key))
    lookup = {level: j for j, level in enumerate(levels)}
    texts = [f"{name} = {_fmt(v) if numeric else v}" for v in levels]
    return np.array([lookup[v] for v in values.tolist()]), texts


def _column_bins(frame: pd.DataFrame, name: str, k: int) -> tuple[np.ndarray, list[str]]:
    """Bins of one covariate: K-quantiles of a numeric column with more than K values, else its values."""
    series = frame[name]
    if is_numeric(series):
        values = as_float(series)
        if not np.all(np.isfinite(values)):
            raise SiteproofError(f"covariate '{name}' has missing or infinite values, so its cells are undefined",
                                 "choose another covariate with --by, or fill in the missing values")
        if np.unique(values).size > k:
            return quantile_bins(values, k, name)
        return _ordered_groups(values, name, numeric=True)
    labels = text_labels(series)
    if any(v is None for v in labels):
        raise SiteproofError(f"covariate '{name}' has missing values, so its cells are undefined",
                             "choose another covariate with --by, or fill in the missing values")
    return _ordered_groups(labels, name, numeric=False)


def _plan(parts: list[tuple[np.ndarray, list[str]]], source: str) -> CellPlan:
    """Cells = the observed combinations of the parts' bins, named c1, c2, … in bin order."""
    codes = np.column_stack([index for index, _ in parts])
    combos, inverse = np.unique(codes, axis=0, return_inverse=True)
    names = [f"c{j + 1}" for j in range(len(combos))]
    rows = []
    for name, combo in zip(names, combos):
        texts = [part[1][int(b)] for part, b in zip(parts, combo)]
        rank = float(np.mean([_rank_of(int(b), len(part[1])) for part, b in zip(parts, combo)]))
        rows.append({"cell": name, "definition": " and ".join(texts), "rank": rank,
                     "keep_treated": math.nan, "keep_control": math.nan})
    labels = np.array(names, dtype=object)[np.asarray(inverse).ravel()]
    return CellPlan(labels, pd.DataFrame(rows, columns=list(CELL_COLUMNS)), source)


def check_cell_count(k: Any) -> int:
    """The number of cells K: a whole number ≥ 2."""
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 2:
        raise SiteproofError(f"--cells {k!r} is not a whole number ≥ 2", "ask for e.g. --cells 4")
    return int(k)


def covariate_cells(frame: pd.DataFrame, by: Sequence[str], k: int) -> CellPlan:
    """Cells from one or two covariates (module docstring)."""
    if not 1 <= len(by) <= 2:
        raise SiteproofError(f"--by names {len(by)} columns", "name one or two covariates, e.g. --by age,educ")
    return _plan([_column_bins(frame, name, k) for name in by], "by")


def prognostic_score(X: np.ndarray, y: np.ndarray, w: np.ndarray, seed: int, folds: int = SCORE_FOLDS) -> np.ndarray:
    """Cross-fitted least squares of Y on (1, X) among controls: unit i's score is x_iᵀβ̂_{−f(i)}, β̂_{−f}
    fitted on the controls outside fold f (minimum-norm solution when X is rank-deficient); folds drawn from
    ``numpy.random.default_rng([seed, 0])``."""
    rng = np.random.default_rng([int(seed), 0])
    fold = rng.permutation(np.arange(y.size) % folds)
    design = np.column_stack([np.ones(y.size), X])
    score = np.empty(y.size)
    for f in range(folds):
        train = (fold != f) & (w == 0)
        beta = np.linalg.lstsq(design[train], y[train], rcond=None)[0]
        score[fold == f] = design[fold == f] @ beta
    return score


def score_cells(X: np.ndarray, y: np.ndarray, w: np.ndarray, k: int, seed: int) -> CellPlan:
    """Cells at the K-quantiles of the cross-fitted prognostic score (module docstring)."""
    if int((w == 0).sum()) < 2 * SCORE_FOLDS:
        raise SiteproofError("too few control units to fit a prognostic score",
                             "form the cells from covariates with --by, or give them in a rule file")
    return _plan([quantile_bins(prognostic_score(X, y, w, seed), k, "prognostic score")], "score")


def encoded_covariates(frame: pd.DataFrame, names: Sequence[str]) -> np.ndarray:
    """The covariates as a float matrix (one-hot text, median-imputed numbers with missingness indicators)."""
    values = {}
    for name in names:
        series = frame[name]
        values[name] = (as_float(series), True) if is_numeric(series) else (text_labels(series), False)
    return encode_covariates(values, len(frame))[0]


# ----------------------------------------------------------------------------------------------------------
# rule files
# ----------------------------------------------------------------------------------------------------------
def _read_rule(path: Path) -> list[dict[str, Any]]:
    """The ``[[cell]]`` tables of a rule file."""
    if not path.is_file():
        raise SiteproofError(f"rule file {path} not found", "check the path given to --rule")
    try:
        raw = tomllib.loads(path.read_bytes().decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SiteproofError(f"rule file {path} is not valid UTF-8 TOML ({exc})", "fix the line it names") from None
    extra = [key for key in raw if key != "cell"]
    cells = raw.get("cell")
    if extra or not isinstance(cells, list) or not cells:
        raise SiteproofError(f"rule file {path} must hold [[cell]] tables only",
                             "write one [[cell]] table per cell with name, when, keep_treated, keep_control")
    return cells


def _keep_value(cell: dict[str, Any], key: str, where: str) -> float:
    """A keep probability in (0, 1]: a cell with a zero keep probability would keep one arm only."""
    value = cell.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 1:
        raise SiteproofError(f"{where}: {key} is {value!r}, not a probability in (0, 1]",
                             f"write {key} = 0.5 (both arms need a positive keep probability)")
    return float(value)


def _scope(frame: pd.DataFrame, outcome: str, treatment: str) -> tuple[Scope, dict[str, np.ndarray]]:
    """Names a condition may use (every column but the outcome and the treatment) and their values."""
    numeric: set[str] = set()
    categorical: dict[str, tuple[str, ...]] = {}
    env: dict[str, np.ndarray] = {}
    for name in frame.columns:
        if name in (outcome, treatment) or not str(name).isidentifier():
            continue
        if is_numeric(frame[name]):
            numeric.add(name)
            env[name] = as_float(frame[name])
        else:
            labels = text_labels(frame[name])
            categorical[name] = tuple(sorted({v for v in labels if v is not None}, key=natural_key))
            env[name] = labels
    return Scope(numeric, categorical), env


def rule_cells(path: Path | str, frame: pd.DataFrame, outcome: str, treatment: str) -> CellPlan:
    """Cells and keep probabilities from a rule file (module docstring); every unit in exactly one cell."""
    path = Path(path)
    cells = _read_rule(path)
    scope, env = _scope(frame, outcome, treatment)
    n = len(frame)
    rows, masks, rest = [], [], None
    for i, cell in enumerate(cells):
        where = f"rule file {path}, cell {i + 1}"
        unknown = [key for key in cell if key not in RULE_KEYS]
        if unknown:
            raise SiteproofError(f"{where}: unknown key '{unknown[0]}'", f"use only {', '.join(RULE_KEYS)}")
        name = cell.get("name")
        if not isinstance(name, str) or not name.strip() or ":" in name or name in [r["cell"] for r in rows]:
            raise SiteproofError(f"{where}: name {name!r} is missing, repeated or holds ':'",
                                 'give every cell its own name, e.g. name = "young"')
        row = {"cell": name.strip(), "rank": math.nan, "keep_treated": _keep_value(cell, "keep_treated", where),
               "keep_control": _keep_value(cell, "keep_control", where)}
        when = cell.get("when")
        if when is None:
            if rest is not None:
                raise SiteproofError(f"{where}: a second cell without 'when'",
                                     "only one cell may take the units no condition selects")
            rest = i
            row["definition"] = "every other unit"
            masks.append(np.zeros(n, dtype=bool))
        else:
            if not isinstance(when, str):
                raise SiteproofError(f"{where}: 'when' must be text", 'write when = "age < 25"')
            check_expression(when, f"{where} 'when'", scope)
            masks.append(evaluate(when, env, n, f"{where} 'when'") != 0)
            row["definition"] = when.strip()
        rows.append(row)
    hits = np.sum(masks, axis=0)
    if np.any(hits > 1):
        first = int(np.flatnonzero(hits > 1)[0])
        both = [rows[j]["cell"] for j, m in enumerate(masks) if m[first]]
        raise SiteproofError(f"rule file {path}: {int((hits > 1).sum())} unit(s) match several cells "
                             f"(e.g. data row {first + 1} matches {', '.join(both)})", "make the conditions disjoint")
    if rest is not None:
        masks[rest] = hits == 0
    elif np.any(hits == 0):
        raise SiteproofError(f"rule file {path}: {int((hits == 0).sum())} unit(s) match no cell "
                             f"(first in data row {int(np.flatnonzero(hits == 0)[0]) + 1})",
                             "widen the conditions or add a last cell without 'when'")
    labels = np.empty(n, dtype=object)
    for row, mask in zip(rows, masks):
        labels[mask] = row["cell"]
    table = pd.DataFrame(rows, columns=list(CELL_COLUMNS))
    empty = [row["cell"] for row, mask in zip(rows, masks) if not mask.any()]
    if empty:
        raise SiteproofError(f"rule file {path}: cell(s) {', '.join(empty)} hold no unit of the trial",
                             "remove them or change their conditions")
    return CellPlan(labels, table, "rule")
