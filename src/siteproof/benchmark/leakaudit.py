"""Leak audit: does any column that would be published, or the row order, give the site away?

A holdout benchmark hides the site. A column can still reveal it: a copy of the site under another name, a
region that nearly determines it, an intake code whose first letter is the site's, ids handed out in blocks per
site. The audit asks, for every column on its own, how well the site can be predicted from it, with honest
(cross-validated) accuracy:

* **views of a column.** Every column is read as its *value*: numeric, by a small decision tree (at most 4
  leaves per site, at least 5 units a leaf) on the value and a missing-value indicator; text, by the most
  frequent training site of each level (an unseen level gets the training majority). A text or whole-number
  column is *identifier-like* when its non-missing values are nearly unique (at least 90 % distinct, and at
  least 20 values); a per-value lookup is useless for those, so the audit adds the views an identifier leaks
  through: its *rank order* (a tree on the sort position), its first and last 1–3 characters, its *pattern*
  (digits → 9, letters → a) and its *length*.
* **accuracy vs majority share.** K-fold cross-validated accuracy a (K = 5, shuffled, seeded) is compared with
  the majority share m (the accuracy of always guessing the largest site) through the lift
  ℓ = (a − m)/(1 − m): 0 for no information, 1 for a perfect predictor (the accuracy analogue of Cohen's κ,
  Cohen 1960).
* **a site singled out.** A column can reveal one site perfectly while the overall lift stays small (a 0/1
  indicator of one site among twenty). For each site s the cross-validated predictions have precision p_s and
  recall r_s; the site counts as singled out when (p_s − π_s)/(1 − π_s) ≥ 0.8 and r_s ≥ 0.5, π_s its share.
* **site labels as values or names.** A text cell that holds a site label as a whole word (case-insensitive)
  leaks that row's site whatever the accuracy says; a column named after a site (a site dummy) is flagged too.
  Labels that are numbers are not searched for: numbers recur in any numeric column.
* **row order.** A tree on the row number, flagged by the same rule. The public file is shuffled with a secret
  drawn from the operating system, so a site-sorted source does not reach the students; sealing still stops
  until the teacher confirms (``accept_row_order``), since anything else that carries the source order (a row
  number, a timestamp) would carry the site with it.
* **the sealed public file.** After sealing, the published token and part columns and the public row order are
  audited again against the sites (:func:`audit_public`); a flag there stops sealing outright.

* **cluster-level covariates.** With a cluster column, a covariate that is constant within clusters and varies
  between clusters of one site (a circle leader's experience) is measured at the cluster level. A per-value
  lookup fitted on units would learn each cluster's value from its own circle-mates and "predict" the site
  through the cluster, which no student can do (they never see a site). Such a column is audited again with
  folds of whole clusters; if it does not predict the site then it is reported as ``level = "cluster"``, not
  as a site leak. A column constant within sites is a copy of the site (``level = "site"``) and audited as usual.
* **the published cluster token.** The public cluster column holds random per-cluster tokens; a student who
  wants the sites would try the grouping itself: the cluster sizes, the tokens' sort order and their first
  characters. :func:`audit_cluster_tokens` scores each of these at the cluster level (one row per cluster,
  cluster folds). Order and characters come from the secret, so a flag there stops sealing; a flag on sizes
  is published information of the design itself and is reported with the decision "sizes reported".

A column is flagged when, in any of its views, ℓ ≥ 0.5 or a site is singled out, or when its values or its name
hold site labels. Sealing stops on a flagged column unless it is acknowledged (kept) or dropped.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass, field, replace
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd
from sklearn.model_selection import KFold
from sklearn.tree import DecisionTreeClassifier

from ..core.errors import SiteproofError

LIFT_THRESHOLD = 0.5
SINGLED_OUT_PRECISION_LIFT = 0.8
SINGLED_OUT_RECALL = 0.5
IDENTIFIER_UNIQUE_SHARE = 0.9
IDENTIFIER_MIN_VALUES = 20
AUDIT_FOLDS = 5
_LEAVES_PER_SITE = 4
_TREE_MIN_LEAF = 5
_AFFIX_LENGTHS = (1, 2, 3)
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


@dataclass(frozen=True)
class ViewResult:
    """Cross-validated prediction of the site from one view of a column."""

    view: str
    accuracy: float
    lift: float
    singled_out: int

    @property
    def flagged(self) -> bool:
        return self.lift >= LIFT_THRESHOLD or self.singled_out > 0


@dataclass(frozen=True)
class AuditRow:
    """The audit of one column (or of the row order): its most revealing view and the decision taken."""

    column: str
    kind: str
    identifier_like: bool
    view: str
    accuracy: float
    majority_share: float
    lift: float
    sites_singled_out: int
    rows_with_site_labels: int
    name_has_site_label: bool
    flagged: bool
    reason: str
    decision: str
    level: str = "unit"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class LeakAudit:
    """Audit of every column that would be published, plus the row order, with the decisions taken."""

    rows: list[AuditRow]
    n: int
    n_sites: int
    majority_share: float
    folds: int
    seed: int
    thresholds: dict[str, float] = field(default_factory=lambda: {
        "lift": LIFT_THRESHOLD, "singled_out_precision_lift": SINGLED_OUT_PRECISION_LIFT,
        "singled_out_recall": SINGLED_OUT_RECALL, "identifier_unique_share": IDENTIFIER_UNIQUE_SHARE,
    })

    @property
    def unresolved(self) -> list[AuditRow]:
        """Flagged columns that were neither kept (acknowledged) nor dropped: these stop sealing."""
        return [row for row in self.rows if row.flagged and row.decision == "unresolved"]

    def to_frame(self) -> pd.DataFrame:
        """One row per audited column (the row-order check last), as saved in the key."""
        return pd.DataFrame([row.to_dict() for row in self.rows])

    def to_dict(self) -> dict[str, Any]:
        return {"n": self.n, "n_sites": self.n_sites, "majority_share": self.majority_share, "folds": self.folds,
                "seed": self.seed, "thresholds": dict(self.thresholds), "columns": [r.to_dict() for r in self.rows]}


# ───────────────────────────── public entry points ─────────────────────────────


def audit_columns(
    frame: pd.DataFrame,
    site: str,
    columns: Sequence[str],
    *,
    keep: Iterable[str] = (),
    drop: Iterable[str] = (),
    seed: int = 0,
    accept_row_order: bool = False,
    cluster: str | None = None,
) -> LeakAudit:
    """Audit ``columns`` of ``frame`` (and its row order) for how well each predicts ``frame[site]``.

    ``keep`` lists acknowledged columns (published even when flagged), ``drop`` the columns left out of the
    public file; both are audited all the same so that the saved table explains every decision. A row order
    that predicts the site is unresolved unless ``accept_row_order``. Rows with a missing site are ignored.
    ``cluster`` names the cluster column: flagged cluster-level columns are re-audited with cluster folds.
    """
    keep, drop = set(keep), set(drop)
    _check_names(frame, site, columns, keep, drop)
    rows = frame[frame[site].notna()].reset_index(drop=True)
    if len(rows) < 2 * AUDIT_FOLDS:
        raise SiteproofError(f"only {len(rows)} rows have a site", f"a benchmark needs at least {2 * AUDIT_FOLDS} rows")
    labels = rows[site].astype(str).to_numpy()
    site_codes, site_names = pd.factorize(labels, sort=True)
    folds = _folds(len(rows), seed)
    majority = float(np.bincount(site_codes).max() / site_codes.size)
    label_pattern = _label_pattern(site_names)
    audited = [
        _audit_column(rows[col], col, site_codes, folds, majority, label_pattern, seed, _decision(col, keep, drop))
        for col in columns
    ]
    if cluster is not None:
        audited = [_cluster_level(row, rows[row.column], rows[cluster], labels, site_codes, majority, label_pattern,
                                  seed) for row in audited]
    audited.append(_audit_row_order("(row order)", site_codes, folds, majority, seed, accept_row_order))
    return LeakAudit(audited, len(rows), len(site_names), majority, AUDIT_FOLDS, seed)


def audit_public(public: pd.DataFrame, sites: np.ndarray, columns: Sequence[str], seed: int) -> list[AuditRow]:
    """Audit ``columns`` of the sealed public file and its row order against each row's (key-side) site.

    Nothing here may be flagged: the tokens, the train/test split and the order all come from the sealing
    secret. Returned rows are named "COLUMN (public file)" and "(public row order)".
    """
    site_codes, _ = pd.factorize(np.asarray(sites, dtype=str), sort=True)
    folds = _folds(site_codes.size, seed)
    majority = float(np.bincount(site_codes).max() / site_codes.size)
    rows = [replace(_audit_column(public[col].reset_index(drop=True), col, site_codes, folds, majority, None, seed,
                                  "unresolved"), column=f"{col} (public file)")
            for col in columns]
    rows.append(_audit_row_order("(public row order)", site_codes, folds, majority, seed, accepted=False))
    return rows


def column_level(values: pd.Series, clusters: pd.Series, sites: np.ndarray) -> str:
    """"site" when constant within every site, "cluster" when constant within every cluster (and not site),
    else "unit". Missing values count as one value."""
    text = values.astype(str).where(values.notna(), "\0missing").to_numpy()
    frame = pd.DataFrame({"v": text, "c": clusters.astype(str).to_numpy(), "s": sites})
    if (frame.groupby("s")["v"].nunique() <= 1).all():
        return "site"
    return "cluster" if (frame.groupby("c")["v"].nunique() <= 1).all() else "unit"


def _cluster_level(
    row: AuditRow, values: pd.Series, clusters: pd.Series, labels: np.ndarray, site_codes: np.ndarray,
    majority: float, label_pattern: re.Pattern[str] | None, seed: int,
) -> AuditRow:
    """A cluster-level column re-audited with whole-cluster folds; reported as cluster-level if then clean."""
    level = column_level(values, clusters, labels)
    if level != "cluster":
        return replace(row, level=level)
    if not row.flagged:
        return replace(row, level=level)
    folds = _cluster_folds(clusters.astype(str).to_numpy(), seed)
    grouped = _audit_column(values, row.column, site_codes, folds, majority, label_pattern, seed,
                            row.decision if row.decision != "published" else "unresolved")
    return replace(grouped, level=level)


def _cluster_folds(clusters: np.ndarray, seed: int) -> np.ndarray:
    """Fold of every row, whole clusters to a fold (clusters shuffled with ``seed``)."""
    codes, labels = pd.factorize(clusters)
    cluster_fold = np.empty(labels.size, dtype=np.int64)
    cluster_fold[np.random.default_rng(seed).permutation(labels.size)] = np.arange(labels.size) % AUDIT_FOLDS
    return cluster_fold[codes]


def audit_cluster_tokens(tokens: np.ndarray, sites: np.ndarray, seed: int) -> list[AuditRow]:
    """Can the site be recovered from the published cluster tokens? One row per cluster, cluster folds.

    Views: the cluster size (how many public rows share the token), the token's rank in sort order, and its
    first character. Rank and character come from the secret, so a flag there is unresolved (sealing stops);
    a size flag is reported ("sizes reported"): the sizes are the design's own and follow from any grouping.
    """
    frame = pd.DataFrame({"t": np.asarray(tokens, dtype=str), "s": np.asarray(sites, dtype=str)})
    per = frame.groupby("t", sort=True).agg(site=("s", "first"), size=("s", "size"))
    site_codes, _ = pd.factorize(per["site"].to_numpy(), sort=True)
    g = site_codes.size
    if g < 2 * AUDIT_FOLDS:
        return []
    folds = _folds(g, seed)
    majority = float(np.bincount(site_codes).max() / g)
    first = pd.factorize(per.index.str[0])[0].astype(np.int64)
    views = [("cluster size", per["size"].to_numpy(dtype=float), "sizes reported"),
             ("cluster token order", np.arange(g, dtype=float), "unresolved"),
             ("cluster token first character", first, "unresolved")]
    rows = []
    for view, feature, on_flag in views:
        result = _predict_view(view, feature, site_codes, folds, majority, seed)
        rows.append(AuditRow(
            column=f"cluster ({view}, public file)", kind="cluster token", identifier_like=False, view=view,
            accuracy=result.accuracy, majority_share=majority, lift=result.lift,
            sites_singled_out=result.singled_out, rows_with_site_labels=0, name_has_site_label=False,
            flagged=result.flagged, reason=_reason(result, majority, 0, False) if result.flagged else "",
            decision=on_flag if result.flagged else "published", level="cluster"))
    return rows


def require_no_leaks(audit: LeakAudit) -> None:
    """Raise one :class:`SiteproofError` naming every flagged column (or row order) that was not resolved."""
    bad = audit.unresolved
    if not bad:
        return
    public = [row for row in bad if row.column.endswith("public file)") or row.column == "(public row order)"]
    if public:
        raise SiteproofError(
            "leak audit of the sealed public file: " + "; ".join(f"{r.column} ({r.reason})" for r in public),
            "seal again (a new secret draws a new order and new tokens); if this repeats, report it as a bug",
        )
    columns = [row for row in bad if row.kind != "row order"]
    parts = "; ".join(f"{row.column} ({row.reason})" for row in bad)
    fixes = []
    if columns:
        fixes.append("drop each column with --drop-column COL, or acknowledge a legitimate covariate (e.g. a "
                     "region) with --keep-column COL")
    if len(columns) < len(bad):
        fixes.append("the source file's row order is never published (the public rows are shuffled with a "
                     "secret), so confirm it with --accept-row-order, or shuffle the source file")
    raise SiteproofError(f"leak audit: the site is given away by {parts}", "; ".join(fixes))


# ───────────────────────────── one column ─────────────────────────────


def _audit_column(
    values: pd.Series, name: str, site_codes: np.ndarray, folds: np.ndarray, majority: float,
    label_pattern: re.Pattern[str] | None, seed: int, decision: str,
) -> AuditRow:
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    identifier = _is_identifier_like(values, numeric)
    results = [_predict_view(view, feature, site_codes, folds, majority, seed)
               for view, feature in _views(values, numeric, identifier)]
    revealing = [r for r in results if r.flagged]
    best = max(revealing or results, key=lambda r: r.lift)
    label_rows = 0 if numeric else _rows_with_labels(values, label_pattern)
    label_name = label_pattern is not None and label_pattern.search(name) is not None
    flagged = bool(revealing) or label_rows > 0 or label_name
    reason = _reason(best, majority, label_rows, label_name) if flagged else ""
    return AuditRow(
        column=name, kind="numeric" if numeric else "text", identifier_like=identifier, view=best.view,
        accuracy=best.accuracy, majority_share=majority, lift=best.lift, sites_singled_out=best.singled_out,
        rows_with_site_labels=label_rows, name_has_site_label=label_name, flagged=flagged, reason=reason,
        decision=decision if flagged or decision != "unresolved" else "published",
    )


def _audit_row_order(
    name: str, site_codes: np.ndarray, folds: np.ndarray, majority: float, seed: int, accepted: bool,
) -> AuditRow:
    """The row number as a feature; flagged like a column. Decision: unresolved unless ``accepted``."""
    result = _predict_view("row number", np.arange(site_codes.size, dtype=float), site_codes, folds, majority, seed)
    flagged = result.flagged
    if not flagged:
        decision = "rows shuffled in the public file"
    else:
        decision = "accepted (public rows shuffled with a secret)" if accepted else "unresolved"
    return AuditRow(
        column=name, kind="row order", identifier_like=False, view="row number",
        accuracy=result.accuracy, majority_share=majority, lift=result.lift, sites_singled_out=result.singled_out,
        rows_with_site_labels=0, name_has_site_label=False, flagged=flagged,
        reason=_reason(result, majority, 0, False) if flagged else "", decision=decision,
    )


def _reason(best: ViewResult, majority: float, label_rows: int, label_name: bool) -> str:
    parts = []
    if best.flagged:
        parts.append(f"{best.view} predicts the site with accuracy {best.accuracy:.2f} "
                     f"vs majority share {majority:.2f}")
        if best.singled_out:
            parts[-1] += f", singling out {best.singled_out} site{'s' if best.singled_out > 1 else ''}"
    if label_rows:
        parts.append(f"site labels appear in {label_rows} row{'s' if label_rows > 1 else ''}")
    if label_name:
        parts.append("its name contains a site label")
    return "; ".join(parts)


def _decision(column: str, keep: set[str], drop: set[str]) -> str:
    if column in drop:
        return "dropped"
    if column in keep:
        return "kept (acknowledged)"
    return "unresolved"


# ───────────────────────────── views of a column ─────────────────────────────


def _is_identifier_like(values: pd.Series, numeric: bool) -> bool:
    """Text or whole numbers, nearly unique: at least 90 % of the non-missing values distinct, at least 20.

    Continuous measurements are nearly unique too but are not codes; they are read through their value only.
    """
    present = values.dropna()
    if present.size < IDENTIFIER_MIN_VALUES or present.nunique() < IDENTIFIER_UNIQUE_SHARE * present.size:
        return False
    if numeric:
        arr = present.to_numpy(dtype=float)
        return bool(np.all(np.isfinite(arr) & (arr == np.round(arr))))
    return True


def _views(values: pd.Series, numeric: bool, identifier: bool) -> list[tuple[str, np.ndarray]]:
    """(view name, feature) pairs: float features go to a tree, integer codes to a per-level lookup."""
    views: list[tuple[str, np.ndarray]] = []
    if numeric:
        views.append(("value", values.to_numpy(dtype=float, na_value=np.nan)))
    else:
        views.append(("value", _codes(values.astype("string"))))
    if not identifier:
        return views
    text = _as_text(values, numeric)
    if not numeric:
        rank = text.rank(method="dense").to_numpy(dtype=float, na_value=np.nan)
        views.append(("rank order", rank))
    for k in _AFFIX_LENGTHS:
        views.append((f"first {k} character{'s' if k > 1 else ''}", _codes(text.str[:k])))
        views.append((f"last {k} character{'s' if k > 1 else ''}", _codes(text.str[-k:])))
    pattern = text.str.replace(r"\d", "9", regex=True).str.replace(r"[^\W\d_]", "a", regex=True)
    views.append(("pattern", _codes(pattern)))
    views.append(("length", text.str.len().to_numpy(dtype=float, na_value=np.nan)))
    return views


def _as_text(values: pd.Series, numeric: bool) -> pd.Series:
    """Text form of a column; whole numbers are written without a decimal part (1001.0 → "1001")."""
    return values.astype("Int64").astype("string") if numeric else values.astype("string")


def _codes(values: pd.Series) -> np.ndarray:
    """Integer level codes; missing is a level of its own."""
    return pd.factorize(values.fillna("\0missing"), sort=True)[0].astype(np.int64)


def _rows_with_labels(values: pd.Series, pattern: re.Pattern[str] | None) -> int:
    if pattern is None:
        return 0
    text = values.dropna().astype("string")
    return int(text.str.contains(pattern, regex=True).sum())


def _label_pattern(site_names: Sequence[str]) -> re.Pattern[str] | None:
    """Case-insensitive match of any site label that is not a number, as a whole word ("_" separates words)."""
    words = [re.escape(s.strip()) for s in site_names if s.strip() and not _NUMBER.match(s.strip())]
    if not words:
        return None
    edge_before, edge_after = r"(?<![^\W_])", r"(?![^\W_])"
    return re.compile(edge_before + "(?:" + "|".join(sorted(words, key=len, reverse=True)) + ")" + edge_after,
                      re.IGNORECASE)


# ───────────────────────────── cross-validated prediction ─────────────────────────────


def _folds(n: int, seed: int) -> np.ndarray:
    folds = np.empty(n, dtype=np.int64)
    for k, (_, test) in enumerate(KFold(AUDIT_FOLDS, shuffle=True, random_state=seed).split(np.zeros(n))):
        folds[test] = k
    return folds


def _predict_view(
    view: str, feature: np.ndarray, site_codes: np.ndarray, folds: np.ndarray, majority: float, seed: int
) -> ViewResult:
    """Cross-validated site predictions from one feature → accuracy, lift and sites singled out."""
    lookup = np.issubdtype(feature.dtype, np.integer)
    leaves = max(2, _LEAVES_PER_SITE * (int(site_codes.max()) + 1))
    pred = np.empty(site_codes.size, dtype=np.int64)
    for k in np.unique(folds):
        test = folds == k
        if lookup:
            pred[test] = _lookup_fold(feature[~test], site_codes[~test], feature[test])
        else:
            pred[test] = _tree_fold(feature[~test], site_codes[~test], feature[test], leaves, seed)
    accuracy = float(np.mean(pred == site_codes))
    lift = (accuracy - majority) / (1.0 - majority) if majority < 1.0 else 0.0
    return ViewResult(view, accuracy, float(lift), _singled_out(pred, site_codes))


def _lookup_fold(train: np.ndarray, sites: np.ndarray, test: np.ndarray) -> np.ndarray:
    """Most frequent training site of each level (ties → lowest site code); unseen levels → training majority."""
    n_levels = int(max(train.max(initial=0), test.max(initial=0))) + 1
    counts = np.zeros((n_levels, int(sites.max()) + 1))
    np.add.at(counts, (train, sites), 1.0)
    fallback = int(np.bincount(sites).argmax())
    by_level = np.where(counts.sum(axis=1) > 0, counts.argmax(axis=1), fallback)
    return by_level[test]


def _tree_fold(train: np.ndarray, sites: np.ndarray, test: np.ndarray, leaves: int, seed: int) -> np.ndarray:
    """A small tree (≤ 4 leaves per site, ≥ 5 units a leaf) on the value and a missing-value indicator.

    Four leaves per site suffice for values handed out in one block per site, with room to spare.
    """
    fill = np.nanmin(train) - 1.0 if np.any(np.isfinite(train)) else 0.0

    def design(x: np.ndarray) -> np.ndarray:
        missing = ~np.isfinite(x)
        return np.column_stack([np.where(missing, fill, x), missing])

    tree = DecisionTreeClassifier(max_leaf_nodes=leaves, min_samples_leaf=_TREE_MIN_LEAF, random_state=seed)
    tree.fit(design(train), sites)
    return tree.predict(design(test)).astype(np.int64)


def _singled_out(pred: np.ndarray, truth: np.ndarray) -> int:
    """Number of sites s whose predictions have precision lift (p_s − π_s)/(1 − π_s) ≥ 0.8 and recall ≥ 0.5."""
    count = 0
    for s in np.unique(truth):
        share = float(np.mean(truth == s))
        called = pred == s
        if not called.any() or share >= 1.0:
            continue
        precision = float(np.mean(truth[called] == s))
        recall = float(np.mean(called[truth == s]))
        if (precision - share) / (1.0 - share) >= SINGLED_OUT_PRECISION_LIFT and recall >= SINGLED_OUT_RECALL:
            count += 1
    return count


def _check_names(frame: pd.DataFrame, site: str, columns: Sequence[str], keep: set[str], drop: set[str]) -> None:
    missing = [c for c in [site, *columns, *sorted(keep | drop)] if c not in frame.columns]
    if missing:
        raise SiteproofError(f"unknown column{'s' if len(missing) > 1 else ''} {', '.join(missing)}",
                             f"use column names of the data: {', '.join(map(str, frame.columns))}")
    both = sorted(keep & drop)
    if both:
        raise SiteproofError(f"column{'s' if len(both) > 1 else ''} {', '.join(both)} both kept and dropped",
                             "give each column either --keep-column or --drop-column, not both")
