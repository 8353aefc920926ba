"""Reading and writing the blind claims: ``claims.json`` plus the per-unit sidecar ``units.parquet``.

The format is documented in docs/claims-format.md.  Both files are written atomically.
"""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import pandas as pd

from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_bytes, atomic_write_json

CLAIMS_FILE = "claims.json"
UNITS_FILE = "units.parquet"


def write_claims(record: dict[str, Any], units: pd.DataFrame, out_dir: Path | str) -> Path:
    """Write ``claims.json`` and ``units.parquet`` (zstd) into ``out_dir``; returns the claims path."""
    out = Path(out_dir)
    buffer = io.BytesIO()
    units.to_parquet(buffer, compression="zstd", index=False)
    atomic_write_bytes(out / UNITS_FILE, buffer.getvalue())
    return atomic_write_json(out / CLAIMS_FILE, record)


def read_claims(path: Path | str) -> tuple[dict[str, Any], pd.DataFrame]:
    """Read claims from a folder (or a ``claims.json`` path) → (record, per-unit table)."""
    path = Path(path)
    folder = path if path.is_dir() else path.parent
    claims_path = folder / CLAIMS_FILE
    units_path = folder / UNITS_FILE
    if not claims_path.exists() or not units_path.exists():
        raise SiteproofError(
            f"no blind claims found in {folder} (need {CLAIMS_FILE} and {UNITS_FILE})",
            "run `siteproof blind` first, or point at the folder it wrote",
        )
    try:
        record = json.loads(claims_path.read_text(encoding="utf-8"))
        units = pd.read_parquet(units_path)
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read the claims in {folder}: {exc}", "rerun `siteproof blind`") from exc
    if record.get("schema") != "siteproof/claims":
        raise SiteproofError(f"{claims_path} is not a siteproof claims file", "point at the folder `siteproof blind` wrote")
    if len(units) != record.get("data", {}).get("n"):
        raise SiteproofError(
            f"{UNITS_FILE} has {len(units)} rows but the claims describe {record.get('data', {}).get('n')} units",
            "rerun `siteproof blind`; the two files must come from the same run",
        )
    return record, units
