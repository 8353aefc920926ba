"""Checks of the teacher's key on reading: every field of key.json and units.csv, and its SHA-256 seals.

Sealing writes into key.json the SHA-256 of units.csv, leak_audit.csv and secret.txt (``files``) and a SHA-256
over key.json's own canonical content (``key_sha256``: the JSON with sorted keys, no spaces, ASCII escapes,
without the ``key_sha256`` entry itself). Reading the key recomputes all of them, so a changed rate, a deleted
field or an edited hash is refused with an error naming the key file. The SHA-256 (FIPS 180-4) detects any
change; it is a checksum, not a signature: someone who edits the key and recomputes the hashes with this code
is not stopped, which is why the key must stay with the teacher.

Every field is also checked for its kind and range before it is used, so a damaged key gives one line naming
the field instead of a traceback.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..core.errors import SiteproofError
from .layout import KEY_FILE, KEY_FILES, KEY_UNIT_COLUMNS, TOKEN

_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_RESTORE = "restore the key folder from the sealed copy (it was changed or damaged after sealing)"


def content_sha256(meta: dict[str, Any]) -> str:
    """SHA-256 of key.json's canonical content: sorted keys, compact separators, ASCII, ``key_sha256`` left out."""
    body = {k: v for k, v in meta.items() if k != "key_sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def verify_integrity(meta: dict[str, Any], folder: Path) -> None:
    """Refuse a key whose key.json content or whose files differ from what was sealed."""
    actual = content_sha256(meta)
    if actual != meta["key_sha256"]:
        raise SiteproofError(
            f"benchmark key {folder / KEY_FILE} was changed after sealing (its content has SHA-256 "
            f"{actual[:12]}…, the key says {meta['key_sha256'][:12]}…)", _RESTORE)
    for name in KEY_FILES:
        path = folder / name
        if not path.is_file():
            raise SiteproofError(f"benchmark key {folder} misses {name}", _RESTORE)
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        if digest != meta["files"][name]:
            raise SiteproofError(
                f"benchmark key file {path} was changed after sealing (SHA-256 {digest[:12]}… instead of "
                f"{meta['files'][name][:12]}…)", _RESTORE)


# ───────────────────────────── key.json ─────────────────────────────


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _is_text(v: Any) -> bool:
    return isinstance(v, str) and v.strip() != ""


def _is_hex64(v: Any) -> bool:
    return isinstance(v, str) and _HEX64.match(v) is not None


_FIELDS: dict[str, tuple[Callable[[Any], bool], str]] = {
    "siteproof_version": (_is_text, "a version string"),
    "name": (_is_text, "a non-empty name"),
    "source_file": (lambda v: isinstance(v, str), "a file name"),
    "seed": (lambda v: _is_int(v) and v >= 0, "a whole number ≥ 0"),
    "public_sha256": (_is_hex64, "64 hex digits"),
    "benchmark_id": (lambda v: isinstance(v, str) and re.match(r"^[0-9a-f]{12}$", v) is not None, "12 hex digits"),
    "n": (lambda v: _is_int(v) and v >= 1, "a whole number ≥ 1"),
    "n_graded": (lambda v: _is_int(v) and v >= 1, "a whole number ≥ 1"),
    "holdout_share": (lambda v: _is_number(v) and 0 <= v < 1, "a share in [0, 1)"),
    "columns": (lambda v: isinstance(v, dict), "a table of column names"),
    "rates_source": (lambda v: v in ("declared", "realized"), "'declared' or 'realized'"),
    "design_ate": (lambda v: isinstance(v, dict), "a table with estimate, se and ci"),
    "sites": (lambda v: isinstance(v, list) and len(v) >= 2 and all(isinstance(r, dict) and "site" in r for r in v),
              "a list of at least 2 site records"),
    "outcome_models": (lambda v: isinstance(v, dict), "a table"),
    "audit": (lambda v: isinstance(v, dict) and isinstance(v.get("columns"), list), "the leak audit table"),
    "warnings": (lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v), "a list of texts"),
    "files": (lambda v: isinstance(v, dict) and set(v) == set(KEY_FILES) and all(map(_is_hex64, v.values())),
              f"the SHA-256 of {', '.join(KEY_FILES)}"),
    "key_sha256": (_is_hex64, "64 hex digits"),
}

_COLUMN_FIELDS: dict[str, tuple[Callable[[Any], bool], str]] = {
    "token": (lambda v: v == TOKEN, f"'{TOKEN}'"),
    "outcome": (_is_text, "a column name"),
    "treatment": (_is_text, "a column name"),
    "binary_outcome": (lambda v: isinstance(v, bool), "true or false"),
    "covariates": (lambda v: isinstance(v, list) and all(isinstance(c, str) for c in v), "a list of column names"),
    "cost": (lambda v: v is None or _is_text(v), "a column name or null"),
    "part": (lambda v: v is None or _is_text(v), "a column name or null"),
}


def _field_error(where: Path, field: str, value: Any, expected: str) -> SiteproofError:
    shown = repr(value)
    shown = shown if len(shown) <= 40 else shown[:37] + "…"
    return SiteproofError(f"benchmark key {where}: {field} is {shown}, not {expected}", _RESTORE)


def check_key_fields(meta: dict[str, Any], where: Path) -> None:
    """Every field of key.json present and of the right kind; design ATE, ids and counts consistent."""
    for field, (ok, expected) in _FIELDS.items():
        if field not in meta:
            raise SiteproofError(f"benchmark key {where} has no '{field}' field", _RESTORE)
        if not ok(meta[field]):
            raise _field_error(where, field, meta[field], expected)
    for field, (ok, expected) in _COLUMN_FIELDS.items():
        value = meta["columns"].get(field, "(missing)")
        if not ok(value):
            raise _field_error(where, f"columns.{field}", value, expected)
    design = meta["design_ate"]
    for field in ("estimate", "se"):
        if not _is_number(design.get(field)):
            raise _field_error(where, f"design_ate.{field}", design.get(field), "a finite number")
    ci = design.get("ci")
    if not (isinstance(ci, list) and len(ci) == 2 and all(map(_is_number, ci)) and ci[0] <= ci[1]):
        raise _field_error(where, "design_ate.ci", ci, "a pair [low, high] of finite numbers")
    if meta["benchmark_id"] != meta["public_sha256"][:12]:
        raise _field_error(where, "benchmark_id", meta["benchmark_id"], "the first 12 digits of public_sha256")
    if meta["n_graded"] > meta["n"]:
        raise _field_error(where, "n_graded", meta["n_graded"], f"at most n = {meta['n']}")
    if (meta["holdout_share"] > 0) != (meta["columns"]["part"] is not None):
        raise _field_error(where, "columns.part", meta["columns"]["part"], "set exactly when units are held out")


# ───────────────────────────── units.csv ─────────────────────────────


def check_units(raw: pd.DataFrame, meta: dict[str, Any], where: Path) -> pd.DataFrame:
    """units.csv (read as text) checked column by column → the typed per-unit table the grader uses."""
    missing = [c for c in KEY_UNIT_COLUMNS if c not in raw.columns]
    if missing:
        raise SiteproofError(f"benchmark key {where} has no column {missing[0]!r}", _RESTORE)
    if len(raw) != meta["n"]:
        raise SiteproofError(f"benchmark key {where} has {len(raw)} rows but key.json says n = {meta['n']}", _RESTORE)
    tokens = raw[TOKEN]
    _require(where, "token", tokens.str.strip() == "", "a non-empty token", tokens)
    _require(where, "token", tokens.duplicated(), "a token used once", tokens)
    sites = {str(r["site"]) for r in meta["sites"]}
    _require(where, "site", ~raw["site"].isin(sites), f"one of the {len(sites)} sites of key.json", raw["site"])
    rate = _numbers(raw, "rate", where, lambda v: (v > 0) & (v < 1), "a rate in (0, 1)")
    graded = _numbers(raw, "graded", where, lambda v: np.isin(v, (0, 1)), "0 or 1")
    y = _numbers(raw, "y", where, lambda v: np.isin(v, (0, 1)) if meta["columns"]["binary_outcome"] else
                 np.isfinite(v), "a 0/1 outcome" if meta["columns"]["binary_outcome"] else "a finite outcome")
    w = _numbers(raw, "w", where, lambda v: np.isin(v, (0, 1)), "0 or 1")
    mu0 = _numbers(raw, "mu0", where, np.isfinite, "a finite number")
    mu1 = _numbers(raw, "mu1", where, np.isfinite, "a finite number")
    has_cost = meta["columns"]["cost"] is not None
    cost = _numbers(raw, "cost", where, np.isfinite, "a finite cost") if has_cost else np.full(len(raw), np.nan)
    if not has_cost and (raw["cost"] != "").any():
        raise SiteproofError(f"benchmark key {where}: cost values but key.json declares no cost column", _RESTORE)
    if int(graded.sum()) != meta["n_graded"]:
        raise SiteproofError(f"benchmark key {where} grades {int(graded.sum())} units but key.json says "
                             f"n_graded = {meta['n_graded']}", _RESTORE)
    stratum = raw["stratum"].where(raw["stratum"] != "", None)
    cells = raw["site"] + "\0" + raw["stratum"]
    spread = pd.Series(rate).groupby(cells.to_numpy()).agg(np.ptp)
    if (spread > 0).any():
        raise SiteproofError(f"benchmark key {where}: the rate differs between units of one randomization cell",
                             _RESTORE)
    units = pd.DataFrame({
        TOKEN: tokens, "row_key": raw["row_key"], "site": raw["site"], "stratum": stratum, "rate": rate,
        "graded": graded.astype(int), "y": y, "w": w.astype(int), "cost": cost, "mu0": mu0, "mu1": mu1,
    })
    if "cluster" in raw.columns:  # a clustered benchmark: every unit has a label, each cluster in one site
        _require(where, "cluster", raw["cluster"].str.strip() == "", "a cluster label", raw["cluster"])
        _require(where, "cluster", raw.groupby("cluster")["site"].transform("nunique") > 1,
                 "a cluster lying in one site", raw["cluster"])
        units["cluster"] = raw["cluster"]
    return units


def _numbers(raw: pd.DataFrame, column: str, where: Path, ok: Callable[[np.ndarray], np.ndarray],
             expected: str) -> np.ndarray:
    """A units.csv column as floats; refuses text and values outside what ``ok`` allows."""
    values = pd.to_numeric(raw[column], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    bad[~bad] = ~ok(values[~bad])
    _require(where, column, bad, expected, raw[column])
    return values


def _require(where: Path, column: str, bad: Any, expected: str, values: pd.Series) -> None:
    """One-line error for the first bad row of ``column``."""
    bad = np.asarray(bad, dtype=bool)
    if bad.any():
        row = int(np.argmax(bad))
        raise SiteproofError(f"benchmark key {where}: {column} is {str(values.iloc[row])[:30]!r} in row {row + 2} "
                             f"({int(bad.sum())} row{'s' if bad.sum() > 1 else ''} in all), not {expected}", _RESTORE)
