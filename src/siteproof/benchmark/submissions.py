"""Student submissions: finding the files, reading and validating each CSV (and its optional TOML) against the key.

A submission is one row per token with ``tau_hat`` (predicted effects) and/or ``treat`` (a 0/1 rule), and
optionally a TOML file beside it with a display name, the benchmark id and an ``[ate]`` estimate. Every problem
raises :class:`~siteproof.core.errors.SiteproofError` naming the file.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from ..core.errors import SiteproofError
from ..core.estimates import Z95, normal_ci
from .key import BenchmarkKey
from .layout import TEMPLATE_CSV, TOKEN

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

_FOREIGN_SHARE = 0.5
SUBMISSION_COLUMNS = (TOKEN, "tau_hat", "treat")
_NAME_MAX = 60


@dataclass(frozen=True)
class SubmittedATE:
    """The average-effect estimate of a submission's TOML: estimate, SE and 95 % CI."""

    estimate: float
    se: float
    ci: tuple[float, float]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form: estimate, se and ci as a list."""
        return {"estimate": self.estimate, "se": self.se, "ci": list(self.ci)}


@dataclass(frozen=True, eq=False)
class Submission:
    """A validated submission, its columns aligned to the key's token order."""

    name: str
    path: Path
    tau_hat: np.ndarray | None
    treat: np.ndarray | None
    ate: SubmittedATE | None


def submission_files(paths: Iterable[Path | str]) -> list[Path]:
    """The CSV files among ``paths``; a folder contributes its ``*.csv`` files in name order."""
    files: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            found = sorted(p for p in path.glob("*.csv") if p.is_file())
            if not found:
                raise SiteproofError(f"folder {path} holds no .csv submission",
                                     "give submission CSV files or their folder")
            files.extend(found)
        elif path.is_file():
            files.append(path)
        else:
            raise SiteproofError(f"submission {path} not found", "check the path")
    if not files:
        raise SiteproofError("no submissions given", "name at least one submission CSV or a folder of them")
    return files


def read_submission(path: Path | str, key: BenchmarkKey) -> Submission:
    """Read and validate one submission CSV (and its optional TOML beside it) against the key.

    Checks: a ``token`` column; ``tau_hat`` and/or ``treat`` and no other column (a misnamed prediction column
    must not be ignored); every token of the benchmark exactly once and no
    other token (a file whose tokens mostly do not belong to the benchmark was made for another public file);
    finite ``tau_hat``; ``treat`` in {0, 1}. Every failure raises :class:`SiteproofError` naming the file.
    """
    path = Path(path)
    frame = _read_submission_csv(path)
    if TOKEN not in frame.columns:
        raise SiteproofError(f"submission {path.name} has no '{TOKEN}' column (columns: {', '.join(frame.columns)})",
                             f"start the file with the '{TOKEN}' column of {TEMPLATE_CSV}")
    unknown = [c for c in frame.columns if c not in SUBMISSION_COLUMNS]
    if unknown:
        raise SiteproofError(
            f"submission {path.name} has column{'s' if len(unknown) > 1 else ''} {_few(unknown)} that "
            f"{'are' if len(unknown) > 1 else 'is'} not recognised",
            f"name the columns {', '.join(SUBMISSION_COLUMNS)} exactly (tau_hat and treat may be left out), "
            "and remove any other column")
    if "tau_hat" not in frame.columns and "treat" not in frame.columns:
        raise SiteproofError(f"submission {path.name} has neither a 'tau_hat' nor a 'treat' column",
                             "add tau_hat (predicted effects) and/or treat (0/1) as in the task sheet")
    position = _token_positions(frame[TOKEN], key, path.name)
    tau = _tau_column(frame, position, path.name) if "tau_hat" in frame.columns else None
    treat = _treat_column(frame, position, path.name) if "treat" in frame.columns else None
    toml_path = path.with_suffix(".toml")
    name, ate = _read_submission_toml(toml_path, key) if toml_path.is_file() else (path.stem, None)
    return Submission(name, path, tau, treat, ate)


def _read_submission_csv(path: Path) -> pd.DataFrame:
    """Every cell as stripped text (a BOM tolerated); an unreadable file raises :class:`SiteproofError`."""
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise SiteproofError(f"cannot read submission {path.name} as a UTF-8 CSV ({' '.join(str(exc).split())})",
                             "save it as CSV (comma-separated, UTF-8) like the template") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame.apply(lambda col: col.str.strip())


def _token_positions(tokens: pd.Series, key: BenchmarkKey, name: str) -> np.ndarray:
    """For each key token (in key order), its row in the submission; refuses any token problem."""
    known = pd.Index(key.tokens)
    unknown = tokens[~tokens.isin(known)]
    if len(unknown) >= _FOREIGN_SHARE * max(len(tokens), 1):
        raise SiteproofError(
            f"submission {name} was made for another public file ({len(unknown)} of its {len(tokens)} tokens do not "
            f"belong to benchmark {key.benchmark_id})",
            "make the predictions for the data.csv of this benchmark",
        )
    if len(unknown):
        raise SiteproofError(f"submission {name} has {len(unknown)} tokens not in the benchmark, e.g. {_few(unknown)}",
                             "keep the tokens exactly as in the template")
    repeated = tokens[tokens.duplicated()]
    if len(repeated):
        raise SiteproofError(
            f"submission {name} lists {repeated.nunique()} tokens more than once, e.g. {_few(repeated)}",
            "give every token exactly once",
        )
    absent = known.difference(pd.Index(tokens), sort=False)
    if len(absent):
        raise SiteproofError(f"submission {name} misses {len(absent)} of the {len(known)} tokens, e.g. {_few(absent)}",
                             "give a row for every token of the template")
    return pd.Series(np.arange(len(tokens)), index=tokens.to_numpy()).reindex(known).to_numpy()


def _few(values: Iterable[Any], k: int = 3) -> str:
    """The first ``k`` distinct values, quoted, for an error message."""
    items = list(dict.fromkeys(str(v) for v in values))
    return ", ".join(repr(v) for v in items[:k]) + (" …" if len(items) > k else "")


def _tau_column(frame: pd.DataFrame, position: np.ndarray, name: str) -> np.ndarray:
    """tau_hat in key token order; refuses an empty or non-finite cell."""
    values = pd.to_numeric(frame["tau_hat"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        raise SiteproofError(f"submission {name}: tau_hat is empty or not a finite number in {int(bad.sum())} rows "
                             f"(first for token {frame[TOKEN].iloc[int(np.argmax(bad))]!r})",
                             "give a finite number for every token")
    return values[position]


def _treat_column(frame: pd.DataFrame, position: np.ndarray, name: str) -> np.ndarray:
    """treat in key token order as int8; refuses a value other than 0 or 1."""
    values = pd.to_numeric(frame["treat"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isin(values, (0.0, 1.0))
    if bad.any():
        raise SiteproofError(f"submission {name}: treat is not 0 or 1 in {int(bad.sum())} rows "
                             f"(first for token {frame[TOKEN].iloc[int(np.argmax(bad))]!r})",
                             "write 1 to treat the unit and 0 not to")
    return values[position].astype(np.int8)


def _read_submission_toml(path: Path, key: BenchmarkKey) -> tuple[str, SubmittedATE | None]:
    """(display name, submitted ATE) from ``name``, ``benchmark`` and ``[ate] estimate, se, ci``."""
    try:
        raw = tomllib.loads(path.read_bytes().decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SiteproofError(f"{path.name} is not valid UTF-8 TOML ({exc})", "fix the line it names") from None
    unknown = sorted(set(raw) - {"name", "benchmark", "ate"})
    if unknown:
        raise SiteproofError(f"{path.name} has unknown keys {', '.join(unknown)}", "use name, benchmark and [ate]")
    if "benchmark" in raw and str(raw["benchmark"]) != key.benchmark_id:
        raise SiteproofError(f"{path.name} was made for benchmark {raw['benchmark']!r}, not {key.benchmark_id!r}",
                             "make the submission for this benchmark's data.csv")
    name = str(raw.get("name") or path.stem).strip() or path.stem
    if len(name) > _NAME_MAX or any(not ch.isprintable() for ch in name):
        raise SiteproofError(f"{path.name}: the name {name[:_NAME_MAX]!r} is longer than {_NAME_MAX} characters or "
                             "holds control characters", "give a one-line name of printable characters")
    return name, _submitted_ate(raw["ate"], path.name) if "ate" in raw else None


def _submitted_ate(table: Any, where: str) -> SubmittedATE:
    """``[ate]``: estimate and se, or estimate and ci (then se = (high − low)/(2·1.96)); both may be given."""
    fix = "write [ate] with estimate = <number> and se = <number > 0> (and optionally ci = [low, high])"
    if not isinstance(table, dict) or "estimate" not in table or not ({"se", "ci"} & set(table)):
        raise SiteproofError(f"{where}: [ate] needs an estimate and an se (or a ci)", fix)
    unknown = sorted(set(table) - {"estimate", "se", "ci"})
    if unknown:
        raise SiteproofError(f"{where}: [ate] has unknown keys {', '.join(unknown)}", fix)
    est = _finite_number(table["estimate"], f"{where}: ate.estimate", fix)
    ci = _ci_pair(table["ci"], est, where, fix) if "ci" in table else None
    se = _finite_number(table["se"], f"{where}: ate.se", fix) if "se" in table else (ci[1] - ci[0]) / (2 * Z95)
    if se <= 0:
        raise SiteproofError(f"{where}: ate.se is {se}, not positive", fix)
    return SubmittedATE(est, se, ci if ci is not None else normal_ci(est, se))


def _ci_pair(value: Any, est: float, where: str, fix: str) -> tuple[float, float]:
    """``ate.ci`` as (low, high) of finite numbers around the estimate."""
    if not isinstance(value, list) or len(value) != 2:
        raise SiteproofError(f"{where}: ate.ci is not a pair [low, high]", fix)
    low, high = (_finite_number(v, f"{where}: ate.ci", fix) for v in value)
    if not low <= est <= high:
        raise SiteproofError(f"{where}: ate.ci [{low}, {high}] does not contain the estimate {est}", fix)
    return low, high


def _finite_number(value: Any, what: str, fix: str) -> float:
    """``value`` as a float; refuses booleans, text, NaN and ±inf."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SiteproofError(f"{what} is {value!r}, not a finite number", fix)
    return float(value)
