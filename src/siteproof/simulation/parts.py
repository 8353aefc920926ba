"""The part files of a Monte Carlo study folder: one per finished replicate, verified before it is counted.

Replicate r leaves two files in ``parts/``: ``rep-00042.csv`` (its rows, :data:`COLUMNS`) and, written
last, ``rep-00042.json`` (its record: the replicate's three seeds, the SHA-256 of the rows file's bytes,
the row count and the wall time).  A replicate counts as finished only when its record exists, names r,
carries the seeds the study assigns to r and the SHA-256 of the rows file as it is now; a damaged, truncated
or foreign part is reported and recomputed, never counted.  ``replicates.csv`` is rebuilt from the verified
parts (header, then each part's rows verbatim, so numbers are never re-rounded).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pandas as pd

from ..core.errors import SiteproofError, warn
from ..core.outputs import atomic_write_bytes, atomic_write_json, atomic_write_text

#: columns of replicates.csv (one row per replicate × ATE estimator / CATE model / rule)
COLUMNS = (
    "replicate", "kind", "name", "estimate", "se", "ci_low", "ci_high", "truth", "truth_sample", "error",
    "covered", "covered_sample", "design_based", "verdict", "pehe",
)
PARTS = "parts"


def part_path(out: Path, replicate: int) -> Path:
    """Where replicate r's rows are written: parts/rep-00042.csv."""
    return out / PARTS / f"rep-{replicate:05d}.csv"


def record_path(out: Path, replicate: int) -> Path:
    """The part's record: parts/rep-00042.json (seeds, SHA-256 of the rows file, timing)."""
    return out / PARTS / f"rep-{replicate:05d}.json"


def part_problem(out: Path, replicate: int, seeds: tuple[int, int, int] | None) -> str:
    """Why replicate r's part cannot be trusted ("" when it can): the record is missing or damaged, the rows
    file's SHA-256 differs from the record's, or the record's seeds are not this study's seeds for r."""
    try:
        record = json.loads(record_path(out, replicate).read_text(encoding="utf-8"))
        data = part_path(out, replicate).read_bytes()
    except (OSError, UnicodeDecodeError, ValueError):
        return "record or rows missing or unreadable"
    if not isinstance(record, dict) or record.get("replicate") != replicate or "sha256" not in record:
        return "record without a checksum"
    if hashlib.sha256(data).hexdigest() != record["sha256"]:
        return "rows changed after they were written (checksum differs)"
    if seeds is not None and record.get("seeds") != list(seeds):
        return "written by another study (other seeds)"
    return ""


def part_numbers(out: Path) -> set[int]:
    """Replicate numbers that have a rows file or a record in parts/."""
    folder = out / PARTS
    if not folder.is_dir():
        return set()
    numbers = set()
    for path in [*folder.glob("rep-*.csv"), *folder.glob("rep-*.json")]:
        digits = path.stem.split("-", 1)[1]
        if digits.isdigit():
            numbers.add(int(digits))
    return numbers


def verify_parts(out: Path | str, seeds: list[tuple[int, int, int]] | None) -> tuple[set[int], dict[int, str]]:
    """(replicates whose part is intact, {replicate: problem} for damaged or foreign parts).

    ``seeds`` are the study's replicate seeds (None: unknown); parts beyond them are checked by their
    checksum only.
    """
    out = Path(out)
    numbers = part_numbers(out)
    good, bad = set(), {}
    for r in sorted(numbers):
        problem = part_problem(out, r, seeds[r] if seeds is not None and r < len(seeds) else None)
        if problem:
            bad[r] = problem
        else:
            good.add(r)
    return good, bad


def discard_parts(out: Path, bad: dict[int, str]) -> None:
    """Remove damaged or foreign parts (they are recomputed) and say so once."""
    for r in bad:
        part_path(out, r).unlink(missing_ok=True)
        record_path(out, r).unlink(missing_ok=True)
    if bad:
        listed = ", ".join(f"{r} ({why})" for r, why in list(bad.items())[:5]) + (" …" if len(bad) > 5 else "")
        warn(f"{len(bad)} part file(s) in {out / PARTS} could not be trusted and are recomputed: replicate {listed}")


def save_part(out: Path, replicate: int, rows: pd.DataFrame, seeds: tuple[int, int, int], seconds: float,
              worker: str) -> None:
    """Rows first, record last: a replicate counts as finished only when its record (seeds, SHA-256 of the
    rows file) is written and matches the rows."""
    data = rows.to_csv(index=False, lineterminator="\n").encode("utf-8")
    atomic_write_bytes(part_path(out, replicate), data)
    atomic_write_json(record_path(out, replicate), {
        "replicate": replicate, "seeds": list(seeds), "sha256": hashlib.sha256(data).hexdigest(),
        "rows": len(rows), "seconds": seconds, "worker": worker,
    })


def collect(out: Path | str, replicates: int, seeds: list[tuple[int, int, int]]) -> pd.DataFrame:
    """Rebuild replicates.csv (and timings.csv) from the verified parts of replicates 0..R−1, in replicate
    order; all R must be there.  The file is the header followed by each part's rows verbatim."""
    out = Path(out)
    done = sorted(r for r in verify_parts(out, seeds)[0] if r < replicates)
    if len(done) < replicates:
        missing = sorted(set(range(replicates)) - set(done))
        raise SiteproofError(f"only {len(done)} of {replicates} replicates in {out} are finished and intact "
                             f"(missing: {', '.join(map(str, missing[:8]))}{' …' if len(missing) > 8 else ''})",
                             "rerun the same command: the missing replicates are computed")
    header, bodies = None, []
    for r in done:
        first, _, body = part_path(out, r).read_text(encoding="utf-8").partition("\n")
        header = header or first
        bodies.append(body)
    atomic_write_text(out / "replicates.csv", f"{header}\n" + "".join(bodies))
    timings = [json.loads(record_path(out, r).read_text(encoding="utf-8")) for r in done]
    atomic_write_text(out / "timings.csv", pd.DataFrame(timings, columns=["replicate", "seconds", "worker"])
                      .to_csv(index=False, lineterminator="\n"))
    return read_replicates(out / "replicates.csv")


def read_replicates(path: Path | str) -> pd.DataFrame:
    """replicates.csv as a frame (floats parsed exactly; ``covered`` columns as nullable booleans)."""
    frame = pd.read_csv(path, keep_default_na=False,
                        na_values={c: [""] for c in COLUMNS if c not in ("kind", "name", "verdict")})
    for column in ("covered", "covered_sample"):
        frame[column] = frame[column].map({True: True, False: False, "True": True, "False": False}).astype("boolean")
    return frame
