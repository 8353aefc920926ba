"""Writing results safely: atomic files and output folders that never hold a half-finished run.

Every writer goes through :func:`atomic_write_bytes` / :func:`atomic_write_text` (write to a temporary file
in the same folder, then ``os.replace``), so an interrupted or failed run leaves either the old file or the
new one, never a partial file.  :func:`check_out_dir` refuses a folder that already holds siteproof
results unless ``force`` is set.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from .errors import SiteproofError

RESULT_FILES = ("claims.json", "scorecard.json", "report.html", "report.md", "units.parquet")


def atomic_write_bytes(path: Path | str, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and an atomic rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def atomic_write_text(path: Path | str, text: str) -> Path:
    """UTF-8 text version of :func:`atomic_write_bytes`."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.ndarray):
        return [_json_default(v) if isinstance(v, np.generic) else v for v in obj.tolist()]
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot serialise {type(obj).__name__} to JSON")


def _finite(obj: Any) -> Any:
    """Replace non-finite floats by None so that the JSON is standard (no NaN/Infinity tokens)."""
    if isinstance(obj, float):
        return obj if np.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def json_records(frame: Any) -> list[dict[str, Any]]:
    """Rows of a pandas DataFrame as JSON-ready dicts: NumPy scalars as Python values, NaN and ±inf as None."""
    def plain(v: Any) -> Any:
        v = v.item() if isinstance(v, np.generic) else v
        return None if isinstance(v, float) and not math.isfinite(v) else v

    return [{k: plain(v) for k, v in row.items()} for row in frame.to_dict("records")]


def to_json_text(obj: Any) -> str:
    """Standard JSON (NaN → null, numpy scalars → numbers), indented for people to read."""
    plain = json.loads(json.dumps(obj, default=_json_default, allow_nan=True))
    return json.dumps(_finite(plain), indent=2, allow_nan=False) + "\n"


def atomic_write_json(path: Path | str, obj: Any) -> Path:
    """Write ``obj`` as standard JSON atomically."""
    return atomic_write_text(path, to_json_text(obj))


def check_out_dir(out_dir: Path | str, force: bool = False) -> Path:
    """Refuse an output path that is a file, or a folder holding earlier siteproof results (unless ``force``)."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise SiteproofError(f"output path {out} is a file, not a folder", "name a folder with --out")
    if out.is_dir() and not force:
        earlier = [name for name in RESULT_FILES if (out / name).exists()]
        if earlier:
            raise SiteproofError(
                f"output folder {out} already holds earlier results ({', '.join(earlier)})",
                "choose another --out folder or add --force to overwrite them",
            )
    return out


class StagedOutput:
    """A scratch folder beside ``out_dir`` whose files are moved into ``out_dir`` only when all succeeded.

    Used as a context manager: write every output into ``.path``; on a clean exit each file is renamed into
    the final folder (``os.replace``, atomic per file); on an error the scratch folder is removed and the final
    folder is left as it was — no partial outputs.
    """

    def __init__(self, out_dir: Path | str, force: bool = False) -> None:
        self.out_dir = Path(out_dir)
        self.force = force
        self.path: Path | None = None

    def __enter__(self) -> Path:
        check_out_dir(self.out_dir, self.force)
        parent = self.out_dir.resolve().parent
        parent.mkdir(parents=True, exist_ok=True)
        self.path = Path(tempfile.mkdtemp(prefix=f".{self.out_dir.name}.", suffix=".partial", dir=parent))
        return self.path

    def __exit__(self, exc_type, exc, tb) -> None:
        assert self.path is not None
        try:
            if exc_type is None:
                self._publish(self.path)
        finally:
            _remove_tree(self.path)

    def _publish(self, staged: Path) -> None:
        self.out_dir.mkdir(parents=True, exist_ok=True)
        for src in sorted(staged.rglob("*")):
            if src.is_file():
                dest = self.out_dir / src.relative_to(staged)
                dest.parent.mkdir(parents=True, exist_ok=True)
                os.replace(src, dest)


def _remove_tree(path: Path) -> None:
    if not path.exists():
        return
    for child in sorted(path.rglob("*"), reverse=True):
        child.rmdir() if child.is_dir() else child.unlink()
    path.rmdir()
