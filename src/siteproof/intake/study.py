"""Study intake: a pooled multi-site trial plus the roles of its columns → :class:`Study`.

The study description (:mod:`~siteproof.intake.spec`) says which column is the outcome, the treatment, the
site, and optionally the unit id, the per-unit cost of treating, a randomization stratum within site and a
cluster (the unit of assignment or of repeated measurement, nested in sites);
every other column is a covariate unless listed otherwise.  Intake

* reads the table (:mod:`~siteproof.intake.readers`: CSV, Parquet, Stata, SAS, SPSS, Feather/Arrow, or a
  pandas DataFrame given as ``data``) and checks every named column (:mod:`~siteproof.intake.roles`);
* turns the treatment into 0/1 and excludes units with a missing outcome or treatment, and counts them;
* screens and encodes the covariates (:mod:`~siteproof.intake.encoding`);
* attaches the known assignment probability of every unit and tests the realized treated counts against
  the declared rates (:mod:`~siteproof.intake.rates`).

The result keeps the site away from the blind analysis by construction: :class:`BlindData` has no site
field and its fingerprint does not depend on the site column; clusters reach it only as shuffled integer codes
(which units share a cluster), never as labels.  Every user mistake raises
``SiteproofError(what, fix)``; every warning is issued once as a ``SiteproofWarning`` and recorded in
``Study.warnings``.

``StudySpec``, ``load_spec_toml``, ``parse_rates``, ``parse_column_list`` and ``read_table`` are re-exported
here because other modules import them from this module.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Iterable

import numpy as np
import pandas as pd

from .encoding import encode_covariates, screen_covariates
from .rates import attach_rates, one_arm_sites
from .readers import read_table, tidy_columns
from .roles import (
    check_columns, check_sample, cost_column, design_labels, exclusion_note, row_keys, treated_label, usable_rows,
)
from .spec import StudySpec, check_spec, load_spec_toml, parse_column_list, parse_rates
from .values import numeric_column, text_labels
from ..core.clusters import ClusterDesign, cluster_codes, cluster_design
from ..core.errors import warn
from ..core.results import ResultsMixin

__all__ = [
    "BlindData", "Study", "StudySpec", "fingerprint", "load_spec_toml", "load_study", "parse_column_list",
    "parse_rates", "read_table",
]


@dataclass(frozen=True, eq=False, repr=False)
class BlindData(ResultsMixin):
    """What the blind analysis may see: no site field and nothing derived from the site."""

    X: np.ndarray
    feature_names: tuple[str, ...]
    y: np.ndarray
    w: np.ndarray
    row_key: np.ndarray
    cost: np.ndarray | None
    binary_outcome: bool
    outcome: str
    treatment: str
    treated_value: str
    covariates: tuple[str, ...]
    n_excluded: dict[str, int]
    fingerprint: str
    raw_covariates: pd.DataFrame
    clusters: np.ndarray | None = None

    @property
    def n_clusters(self) -> int | None:
        """Number of clusters, or None when units are not clustered."""
        return None if self.clusters is None else int(self.clusters.max()) + 1

    @property
    def n(self) -> int:
        return int(self.y.size)

    def outcome_sd(self) -> float:
        """Sample standard deviation of the outcome (n − 1 divisor)."""
        return float(np.std(self.y, ddof=1))

    def _key_numbers(self) -> dict[str, object]:
        return {"n": self.n, "treated": int(self.w.sum()), "features": len(self.feature_names),
                "outcome": self.outcome, "fingerprint": self.fingerprint[:12]}

    def to_frame(self) -> pd.DataFrame:
        """One row per encoded feature: its mean in each arm and the standardized mean difference
        (pooled-SD form, Austin 2009)."""
        treated, control = self.X[self.w == 1], self.X[self.w == 0]
        m1, m0 = treated.mean(axis=0), control.mean(axis=0)
        sd = np.sqrt((treated.var(axis=0, ddof=1) + control.var(axis=0, ddof=1)) / 2)
        with np.errstate(divide="ignore", invalid="ignore"):
            smd = np.where(sd > 0, (m1 - m0) / sd, np.nan)
        return pd.DataFrame({"feature": self.feature_names, "mean_treated": m1, "mean_control": m0, "smd": smd})


def fingerprint(
    row_key: np.ndarray, y: np.ndarray, w: np.ndarray, X: np.ndarray, feature_names: Iterable[str],
    cost: np.ndarray | None = None, clusters: np.ndarray | None = None,
) -> str:
    """sha256 of the usable rows as the blind analysis sees them: feature names, row keys, y, w, X, cost and
    the cluster codes.

    Numbers are hashed as little-endian float64 (w as int8, cluster codes as int64) in row order; the site is
    not part of it.
    """
    digest = hashlib.sha256(b"siteproof-blind-v1\0")
    digest.update("\x1f".join(feature_names).encode("utf-8") + b"\0")
    digest.update("\x1f".join(map(str, row_key)).encode("utf-8") + b"\0")
    digest.update(np.ascontiguousarray(y, dtype="<f8").tobytes())
    digest.update(np.ascontiguousarray(w, dtype="i1").tobytes())
    digest.update(np.ascontiguousarray(X, dtype="<f8").tobytes())
    if cost is not None:
        digest.update(b"cost\0" + np.ascontiguousarray(cost, dtype="<f8").tobytes())
    if clusters is not None:
        digest.update(b"clusters\0" + np.ascontiguousarray(clusters, dtype="<i8").tobytes())
    return digest.hexdigest()


@dataclass(frozen=True, eq=False, repr=False)
class Study(ResultsMixin):
    """A loaded study: the blind data plus what only unmasking may use (site, stratum, known rates).

    ``site``/``stratum`` are text labels aligned with the blind rows; ``known_rate`` is each unit's declared
    cell rate, or the realized treated share of its cell when ``rates_source == "realized"`` (then 0 or 1 for
    a cell with one arm).  ``cells`` has one row per site (or site × stratum): site, stratum (None without a
    stratum column), n, n_treated, n_control, rate_declared (NaN if none), rate_realized, binom_p (exact
    binomial test against the declared rate, NaN if none) and ``warning`` (binom_p < 0.001).
    """

    blind: BlindData
    site: np.ndarray
    stratum: np.ndarray | None
    known_rate: np.ndarray
    rates_source: str
    cells: pd.DataFrame
    spec: StudySpec
    warnings: tuple[str, ...]
    cluster: np.ndarray | None = None
    cluster_design: ClusterDesign | None = None
    cluster_level: tuple[str, ...] = ()

    @property
    def n(self) -> int:
        return self.blind.n

    @property
    def n_sites(self) -> int:
        return len(set(self.site))

    def _key_numbers(self) -> dict[str, object]:
        return {"n": self.n, "sites": self.n_sites, "treated": int(self.blind.w.sum()),
                "rates": self.rates_source, "warnings": len(self.warnings)}

    def to_frame(self) -> pd.DataFrame:
        """The cell table: one row per site (or site × stratum) with its counts and rates."""
        return self.cells.copy()


def load_study(spec: StudySpec, frame: pd.DataFrame | None = None) -> Study:
    """Check and encode a pooled multi-site trial (see the module docstring); ``frame`` skips reading the file."""
    check_spec(spec)
    table = read_table(spec.data, spec.encoding) if frame is None else tidy_columns(frame, "the data table")
    covariate_names = check_columns(spec, table)
    row_key_all = row_keys(table, spec.id)
    treatment = text_labels(table[spec.treatment])
    treated_value = treated_label(spec, treatment)
    y_all = numeric_column(table[spec.outcome], spec.outcome, "outcome", "--outcome")
    keep, n_excluded = usable_rows(y_all, treatment)
    rows = table.loc[keep].reset_index(drop=True)
    y = y_all[keep]
    w = (treatment[keep] == treated_value).astype(np.int8)
    check_sample(y, w, spec, n_excluded)
    notes = [f"excluded {exclusion_note(n_excluded)} from the analysis"] if any(n_excluded.values()) else []
    origin = np.flatnonzero(keep)
    site = design_labels(rows[spec.site], spec.site, "site", origin)
    stratum = None if spec.stratum is None else design_labels(rows[spec.stratum], spec.stratum, "stratum", origin)
    cluster, codes, design = cluster_column(rows, spec, site, w, origin)
    cost = cost_column(rows, spec.cost, origin)
    covariates, screen_notes, cluster_level = screen_covariates(rows, covariate_names, site, spec, cluster)
    X, feature_names, used = encode_covariates(covariates, y.size)
    known_rate, cells, source, rate_notes = attach_rates(spec, site, stratum, w)
    notes += cluster_notes(spec, design) + screen_notes
    notes += ["no covariates remain for the blind analysis"] if not used else []
    notes += rate_notes + one_arm_sites(site, w)
    for note in notes:
        warn(note)
    row_key = row_key_all[keep]
    blind = BlindData(
        X=X, feature_names=tuple(feature_names), y=y, w=w, row_key=row_key, cost=cost,
        binary_outcome=bool(np.isin(y, (0.0, 1.0)).all()), outcome=spec.outcome, treatment=spec.treatment,
        treated_value=treated_value, covariates=tuple(used), n_excluded=n_excluded,
        fingerprint=fingerprint(row_key, y, w, X, feature_names, cost, codes),
        raw_covariates=rows[used].reset_index(drop=True), clusters=codes,
    )
    kept_cluster_level = tuple(name for name in cluster_level if name in used)
    return Study(blind, site, stratum, known_rate, source, cells, spec, tuple(notes), cluster, design,
                 kept_cluster_level)


def cluster_column(rows: pd.DataFrame, spec: StudySpec, site: np.ndarray, w: np.ndarray, origin: np.ndarray,
                   ) -> tuple[np.ndarray | None, np.ndarray | None, ClusterDesign | None]:
    """The cluster labels (nested in sites), the blind view's cluster codes and the assignment pattern.

    The codes 0..G−1 are a permutation of the clusters drawn with the study seed, so neither their order
    nor their values carry the labels (which may spell the site) into the blind analysis: it sees only
    which units share a cluster.  Without ``spec.cluster`` all three are None; when every cluster holds one
    unit the labels and codes are None too (singletons carry no correlation, so the analysis is the
    unclustered one, figure for figure) and only the design is kept, for the note.
    """
    if spec.cluster is None:
        return None, None, None
    labels = design_labels(rows[spec.cluster], spec.cluster, "cluster", origin)
    design = cluster_design(w, labels, site)
    if design.sizes[2] == 1:
        return None, None, design
    codes, _ = cluster_codes(labels)
    relabel = np.random.default_rng([spec.seed, 0xC1]).permutation(design.n_clusters)
    return labels, relabel[codes].astype(np.int64), design


def cluster_notes(spec: StudySpec, design: ClusterDesign | None) -> list[str]:
    """What the cluster column says about the design: cluster-randomized (with clusters per arm per site) or
    a correlation structure only."""
    if design is None:
        return []
    low, median, high = design.sizes
    if high == 1:
        return [f"every cluster in '{spec.cluster}' holds one unit, so clusters change nothing: the analysis is "
                "the unclustered one"]
    head = (f"{design.n_clusters} clusters in '{spec.cluster}' (sizes {low}–{high}, median {median:g}); "
            "every standard error, fold split, bootstrap and holdout keeps clusters whole")
    if design.cluster_randomized:
        arms = "; ".join(f"{site}: {t} treated / {c} control" for site, (t, c, _) in design.per_site.items())
        return [f"{head}. Treatment is constant within every cluster: a cluster-randomized design ({arms})"]
    mixed = sum(m for _, _, m in design.per_site.values())
    return [f"{head}. Treatment varies within {mixed} cluster(s): clusters are used as a correlation "
            "structure only (repeated measures or units sharing an environment)"]
