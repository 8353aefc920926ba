"""The teacher's sealed key: the key-side outcome models, writing and reading key/, the public file's SHA-256.

``key/key.json`` holds everything about the benchmark except the per-unit table; ``key/units.csv`` holds, per
token, the site, known rate, graded flag, outcome, treatment, cost and the cross-fitted outcome models μ̂₀, μ̂₁
the grader needs, and (for a clustered study) the cluster label of every unit, held out or not; ``key/leak_audit.csv`` the audit table; ``key/secret.txt`` the sealing secret. key.json
carries the SHA-256 of the three files and a SHA-256 over its own canonical content
(:mod:`siteproof.benchmark.keycheck`), so any change to the key is detected when it is read.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sklearn.dummy import DummyClassifier, DummyRegressor

from .. import __version__
from ..blind.nuisance import cross_fit_nuisances, make_folds
from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_bytes, atomic_write_text, json_records, to_json_text
from ..intake.sitetrials import DesignATE
from ..intake.study import Study, StudySpec
from .keycheck import check_key_fields, check_units, content_sha256, verify_integrity
from .layout import (FORMAT_VERSION, KEY_AUDIT, KEY_FILE, KEY_SCHEMA, KEY_SECRET, KEY_UNITS, PART, PUBLIC_DATA,
                     TOKEN)
from .leakaudit import LeakAudit


def fit_key_units(
    study: Study, units: np.ndarray, tokens: np.ndarray, graded: np.ndarray, folds: int, learners: Any,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Per token: row key, site, stratum, known rate, graded flag, y, w, cost and cross-fitted μ̂₀, μ̂₁.

    The grader needs only μ̂₀ and μ̂₁ (the rates are known), so ê and m̂ are fitted by constant models. The
    models are fitted on the units in source order, so they depend on the seed only and not on the sealing
    secret that shuffled ``units``.
    """
    blind = study.blind
    y, w = blind.y[units], blind.w[units]
    source = np.argsort(units, kind="stable")  # the shuffled units back in source order
    unused = DummyClassifier(strategy="prior") if blind.binary_outcome else DummyRegressor()
    only_arms = {**dict(learners or {}), "propensity": DummyClassifier(strategy="prior"), "m": unused}
    nuis = cross_fit_nuisances(blind.X[units[source]], y[source], w[source],
                               make_folds(w[source], folds, study.spec.seed), binary_outcome=blind.binary_outcome,
                               learners=only_arms, seed=study.spec.seed)
    mu0, mu1 = np.empty(units.size), np.empty(units.size)
    mu0[source], mu1[source] = nuis.mu0, nuis.mu1
    frame = pd.DataFrame({
        TOKEN: tokens, "row_key": blind.row_key[units], "site": study.site[units],
        "stratum": study.stratum[units] if study.stratum is not None else None,
        "rate": study.known_rate[units], "graded": graded.astype(int), "y": y, "w": w.astype(int),
        "cost": blind.cost[units] if blind.cost is not None else np.nan, "mu0": mu0, "mu1": mu1,
    })
    if study.cluster is not None:
        frame["cluster"] = np.asarray(study.cluster, dtype=object)[units].astype(str)
    return frame, nuis.to_dict()


def key_metadata(
    study: Study, spec: StudySpec, audit: LeakAudit, design: DesignATE, sha: str, key_units: pd.DataFrame,
    public: pd.DataFrame, holdout_share: float, nuisance_summary: dict[str, Any], notes: list[str],
) -> dict[str, Any]:
    """key.json: everything about the benchmark except the per-unit table (which is units.csv)."""
    blind = study.blind
    graded = key_units["graded"].to_numpy(dtype=bool)
    return {
        "schema": KEY_SCHEMA, "version": FORMAT_VERSION, "siteproof_version": __version__,
        "name": spec.name or Path(spec.source).stem, "source_file": Path(spec.source).name,
        "seed": int(spec.seed), "public_sha256": sha, "benchmark_id": sha[:12],
        "n": int(len(key_units)), "n_graded": int(graded.sum()), "holdout_share": float(holdout_share),
        "columns": {
            "token": TOKEN, "part": PART if holdout_share > 0 else None, "outcome": blind.outcome,
            "treatment": blind.treatment, "treated_value": blind.treated_value, "binary_outcome": blind.binary_outcome,
            "covariates": list(blind.covariates), "cost": spec.cost if blind.cost is not None else None,
            "covariate_types": {c: _column_type(public[c]) for c in blind.covariates},
            "missing": {c: int(public[c].isna().sum()) for c in blind.covariates},
            "site": spec.site, "stratum": spec.stratum, "id": spec.id,
        },
        "rates_source": study.rates_source,
        "design_ate": design.to_dict(),
        "sites": json_records(design.by_site),
        "outcome_models": {**nuisance_summary, "fit_on": "all benchmark units, cross-fitted from X only"},
        "audit": audit.to_dict(),
        "warnings": list(study.warnings) + notes,
    }


def _column_type(values: pd.Series) -> str:
    """"number" for a numeric (not boolean) column, else "text", as the task sheet names types."""
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    return "number" if numeric else "text"


def write_key(folder: Path, meta: dict[str, Any], units: pd.DataFrame, audit: LeakAudit, secret: str) -> None:
    """Write units.csv, leak_audit.csv, secret.txt and key.json (their SHA-256 and its own) into ``folder``."""
    files = {
        KEY_UNITS: units.to_csv(index=False, lineterminator="\n").encode("utf-8"),
        KEY_AUDIT: audit.to_frame().to_csv(index=False, lineterminator="\n").encode("utf-8"),
        KEY_SECRET: (secret + "\n").encode("utf-8"),
    }
    sealed = json.loads(to_json_text({**meta, "files": {name: hashlib.sha256(data).hexdigest()
                                                         for name, data in files.items()}}))
    sealed["key_sha256"] = content_sha256(sealed)
    for name, data in files.items():
        atomic_write_bytes(folder / name, data)
    atomic_write_text(folder / KEY_FILE, to_json_text(sealed))


@dataclass(frozen=True, eq=False)
class BenchmarkKey:
    """The sealed key: metadata (key.json) and one row per token (units.csv), in public-file order."""

    path: Path
    meta: dict[str, Any]
    units: pd.DataFrame

    @property
    def tokens(self) -> np.ndarray:
        """The tokens in public-file order."""
        return self.units[TOKEN].to_numpy(dtype=object)

    @property
    def benchmark_id(self) -> str:
        """The first 12 hex digits of the sealed public file's SHA-256."""
        return str(self.meta["benchmark_id"])

    @property
    def clusters(self) -> np.ndarray | None:
        """Cluster label of every unit (public-file order), or None when the benchmark has no clusters."""
        return self.units["cluster"].to_numpy(dtype=object) if "cluster" in self.units.columns else None

    @property
    def graded(self) -> np.ndarray:
        """True for the graded units."""
        return self.units["graded"].to_numpy(dtype=int).astype(bool)


def read_key(key_dir: Path | str) -> BenchmarkKey:
    """Read ``BENCH/key``: every field checked, then every file against the SHA-256 sealed in key.json.

    A folder that is not a benchmark key, a field of the wrong kind, or a key changed after sealing raises one
    :class:`SiteproofError` naming the key file.
    """
    path = Path(key_dir)
    meta_path, units_path = path / KEY_FILE, path / KEY_UNITS
    if not meta_path.is_file() or not units_path.is_file():
        raise SiteproofError(f"{path} is not a benchmark key folder (no {KEY_FILE} and {KEY_UNITS})",
                             "give the key/ folder written by `siteproof seal`")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (ValueError, OSError) as exc:
        raise SiteproofError(f"cannot read benchmark key {meta_path} ({' '.join(str(exc).split())})",
                             "restore the key from the sealed copy") from None
    if not isinstance(meta, dict) or meta.get("schema") != KEY_SCHEMA or meta.get("version") != FORMAT_VERSION:
        raise SiteproofError(f"{meta_path} is not a version-{FORMAT_VERSION} benchmark key",
                             "seal the benchmark again with this version of siteproof")
    check_key_fields(meta, meta_path)
    try:
        raw = pd.read_csv(units_path, dtype=str, keep_default_na=False)
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise SiteproofError(f"cannot read benchmark key {units_path} ({' '.join(str(exc).split())})",
                             "restore the key from the sealed copy") from None
    units = check_units(raw, meta, units_path)
    verify_integrity(meta, path)
    return BenchmarkKey(path, meta, units)


def sha256_of(path: Path | str) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with Path(path).open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def verify_public(key: BenchmarkKey, public_data: Path | str) -> None:
    """Refuse a public data file whose SHA-256 differs from the one sealed in the key."""
    actual = sha256_of(public_data)
    if actual != key.meta["public_sha256"]:
        raise SiteproofError(
            f"{public_data} was changed after sealing (SHA-256 {actual[:12]}… instead of {key.benchmark_id}…)",
            "restore the public file that was handed out, or seal the benchmark again",
        )


def public_check(key: BenchmarkKey, public_data: Path | str | None) -> str:
    """Verify the public file (given, or ``key/../public/data.csv``); say what was checked."""
    path = Path(public_data) if public_data is not None else key.path.parent / "public" / PUBLIC_DATA
    if not path.is_file():
        if public_data is not None:
            raise SiteproofError(f"public data file {path} not found", "give the data.csv that was handed out")
        return "public data file not found beside the key; its SHA-256 was not checked"
    verify_public(key, path)
    return "public data file matches the sealed SHA-256"
