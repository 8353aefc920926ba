"""Study intake: a pooled multi-site trial (CSV or Parquet) plus the roles of its columns → :class:`Study`.

The study description says which column is the outcome, the treatment, the site, and optionally the unit
id, the per-unit cost of treating and a randomization stratum within site; every other column is a
covariate unless listed otherwise.  Intake

* reads the table (UTF-8 unless told otherwise) and checks every named column;
* turns the treatment into 0/1 (0/1 and true/false are inferred, anything else needs the treated value);
* excludes units with a missing outcome or treatment, and counts them;
* encodes covariates: numeric columns are kept with median imputation and a ``<col>:missing`` indicator;
  text/boolean columns are one-hot encoded against their most frequent level, with a ``<col>:missing``
  indicator for missing values; constant feature columns are dropped;
* screens covariates for leaks of the site (a column whose every value occurs in one site only) and for
  undeclared identifiers (text columns with (nearly) all values different);
* attaches the known assignment probability of every unit: the declared rate of its site (or site ×
  stratum cell) or, when none is declared, the realized treated share of the cell — and tests the realized
  treated count against each declared rate with an exact binomial test.

The result keeps the site away from the blind analysis by construction: :class:`BlindData` has no site
field and its fingerprint does not depend on the site column.  Every user mistake raises
``SiteproofError(what, fix)``; every warning is issued once as a ``SiteproofWarning`` and recorded in
``Study.warnings``.
"""

from __future__ import annotations

import codecs
import csv
import difflib
import hashlib
import math
import sys
from dataclasses import asdict, dataclass, field, fields
from fractions import Fraction
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from .sitetrials import MIN_PER_ARM, natural_key, rate_test, site_order
from ..core.errors import SiteproofError, warn

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

MIN_UNITS = 20
RATE_WARNING_P = 0.001
ID_UNIQUE_SHARE = 0.9
ID_MIN_VALUES = 10
PARQUET_SUFFIXES = (".parquet", ".pq")
FOREIGN_FORMATS = {
    ".xlsx": "an Excel workbook", ".xls": "an Excel workbook", ".json": "JSON", ".feather": "Feather",
    ".dta": "a Stata file", ".sav": "an SPSS file", ".sas7bdat": "a SAS file", ".rds": "an R file",
    ".rdata": "an R file", ".toml": "a study file",
}
INFERRED_TREATED = ({"0", "1"}, "1"), ({"false", "true"}, "true")


# ----------------------------------------------------------------------------------------------------------
# the study description
# ----------------------------------------------------------------------------------------------------------
@dataclass
class StudySpec:
    """Where the data are and what each column means (the TOML study file or the CLI data flags)."""

    data: Path | str
    outcome: str
    treatment: str
    site: str
    treated_value: str | None = None
    covariates: list[str] | None = None
    id: str | None = None
    cost: str | None = None
    stratum: str | None = None
    rates: dict[str, float] | None = None
    margin: float | None = None
    seed: int = 2026
    encoding: str | None = None
    keep_columns: list[str] = field(default_factory=list)
    drop_columns: list[str] = field(default_factory=list)
    site_derived: list[str] = field(default_factory=list)
    name: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready copy (the data path as text)."""
        out = asdict(self)
        out["data"] = str(self.data)
        return out


SPEC_KEYS = tuple(f.name for f in fields(StudySpec))
REQUIRED_KEYS = ("data", "outcome", "treatment", "site")
FLAG_OF = {
    "outcome": "--outcome", "treatment": "--treatment", "site": "--site", "treated_value": "--treated-value",
    "covariates": "--covariates", "id": "--id", "cost": "--cost", "stratum": "--stratum", "rates": "--rates",
    "margin": "--margin", "seed": "--seed", "encoding": "--encoding", "keep_columns": "--keep-column",
    "drop_columns": "--drop-column", "site_derived": "--site-derived", "data": "DATA",
}


def parse_column_list(text: str) -> list[str]:
    """``"a,b,c"`` → ``["a", "b", "c"]`` (spaces around names are ignored, empty items skipped)."""
    return [item.strip() for item in text.split(",") if item.strip()]


def _rate_value(value: Any, key: str) -> float:
    """A declared rate: a number or a fraction such as ``"5/6"``; must be finite."""
    if isinstance(value, bool):
        raise SiteproofError(f"the rate for '{key}' is {value}, not a number", f"write it as {key}=0.5")
    try:
        number = float(Fraction(value.strip())) if isinstance(value, str) else float(value)
    except (TypeError, ValueError, ZeroDivisionError):
        raise SiteproofError(
            f"the rate for '{key}' is not a number ({value!r})",
            f"write it as a probability, e.g. {key}=0.5 or {key}=5/6",
        ) from None
    if not math.isfinite(number):
        raise SiteproofError(f"the rate for '{key}' is {number}", f"give {key} a probability between 0 and 1")
    return number


def parse_rates(text: str) -> dict[str, float]:
    """Parse ``--rates``: ``"A=0.5,B=0.8"`` per site or ``"A:low=0.3,A:high=0.6"`` per site × stratum.

    Values are probabilities written as decimals or fractions (``B=5/6``).  Syntax mistakes raise
    SiteproofError; the range (0, 1) and the site names are checked against the data by :func:`load_study`.
    """
    example = "write it as SITE=RATE,SITE=RATE, e.g. --rates A=0.5,B=0.8"
    items = [item.strip() for item in str(text).split(",") if item.strip()]
    if not items:
        raise SiteproofError("--rates is empty", example)
    rates: dict[str, float] = {}
    for item in items:
        key, sep, value = item.partition("=")
        key = key.strip()
        if not sep or not key or not value.strip():
            raise SiteproofError(f"--rates entry '{item}' is not of the form SITE=RATE", example)
        if key in rates:
            raise SiteproofError(f"--rates names '{key}' twice", f"give one rate for '{key}'")
        rates[key] = _rate_value(value, key)
    return rates


def _closest(name: str, options: Iterable[str]) -> str:
    """' (did you mean 'x'?)' when a close match exists."""
    match = difflib.get_close_matches(name, list(options), n=1, cutoff=0.6)
    return f" (did you mean '{match[0]}'?)" if match else ""


# ----------------------------------------------------------------------------------------------------------
# TOML study file
# ----------------------------------------------------------------------------------------------------------
def _read_toml(path: Path) -> dict[str, Any]:
    if not path.is_file():
        raise SiteproofError(f"study file {path} not found", "check the path given to --study")
    try:
        return tomllib.loads(path.read_bytes().decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise SiteproofError(f"study file {path} is not UTF-8 text", "re-save it as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise SiteproofError(f"study file {path} is not valid TOML ({exc})", "fix the line it names") from None
    except OSError as exc:
        raise SiteproofError(f"cannot read study file {path} ({exc.strerror})", "check its permissions") from None


def _toml_rates(value: Any, where: str) -> dict[str, float]:
    """``[rates]`` as ``SITE = p``, ``"SITE:STRATUM" = p`` or a sub-table ``SITE = {STRATUM = p}``; or a
    ``--rates``-style string."""
    if isinstance(value, str):
        return parse_rates(value)
    if not isinstance(value, dict):
        raise SiteproofError(f"{where}: 'rates' must be a table", "write [rates] with lines like A = 0.5")
    rates: dict[str, float] = {}
    for site, rate in value.items():
        if isinstance(rate, dict):
            for stratum, cell_rate in rate.items():
                rates[f"{site}:{stratum}"] = _rate_value(cell_rate, f"{site}:{stratum}")
        else:
            rates[str(site)] = _rate_value(rate, str(site))
    return rates


def _toml_names(key: str, value: Any, where: str) -> list[str]:
    if isinstance(value, str):
        return parse_column_list(value)
    if isinstance(value, list) and all(isinstance(v, str) for v in value):
        return [v.strip() for v in value]
    raise SiteproofError(f"{where}: '{key}' must be a list of column names", f'write {key} = ["a", "b"]')


def _toml_value(key: str, value: Any, where: str) -> Any:
    """Check the type of one study-file entry and convert it to the StudySpec field type."""
    if key == "rates":
        return _toml_rates(value, where)
    if key in ("covariates", "keep_columns", "drop_columns", "site_derived"):
        return _toml_names(key, value, where)
    if key == "treated_value" and isinstance(value, (bool, int, float)):
        return str(value).lower() if isinstance(value, bool) else str(value)
    if key == "margin":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise SiteproofError(f"{where}: 'margin' must be a number", "write margin = 2.5")
        return float(value)
    if key == "seed":
        if isinstance(value, bool) or not isinstance(value, int):
            raise SiteproofError(f"{where}: 'seed' must be a whole number", "write seed = 2026")
        return value
    if not isinstance(value, str) or not value.strip():
        raise SiteproofError(f"{where}: '{key}' must be text in quotes", f'write {key} = "..."')
    return value.strip()


def load_spec_toml(path: Path | str, overrides: Mapping[str, Any] | None = None) -> StudySpec:
    """Read a TOML study file; a relative ``data`` path is resolved against the study file's folder.

    ``overrides`` (e.g. flags given on the command line) replace the file's values; ``None`` values and empty
    lists in ``overrides`` are ignored.  Unknown keys, wrong types and missing required keys raise
    SiteproofError.
    """
    path = Path(path)
    where = f"study file {path}"
    raw = _read_toml(path)
    for key in raw:
        if key not in SPEC_KEYS:
            raise SiteproofError(
                f"{where}: unknown key '{key}'{_closest(key, SPEC_KEYS)}",
                f"use only these keys: {', '.join(SPEC_KEYS)}",
            )
    values = {key: _toml_value(key, value, where) for key, value in raw.items()}
    if "data" in values and not Path(values["data"]).is_absolute():
        values["data"] = path.parent / values["data"]
    for key, value in (overrides or {}).items():
        if key not in SPEC_KEYS:
            raise TypeError(f"unknown StudySpec field {key!r}")
        if value is not None and not (isinstance(value, list) and not value):
            values[key] = value
    missing = [key for key in REQUIRED_KEYS if key not in values]
    if missing:
        key = missing[0]
        raise SiteproofError(
            f"{where} does not say which {'data file' if key == 'data' else 'column'} is the {key}",
            f'add {key} = "..." to the study file or pass {FLAG_OF[key]}',
        )
    return StudySpec(**values)


# ----------------------------------------------------------------------------------------------------------
# reading the table
# ----------------------------------------------------------------------------------------------------------
def _check_file(path: Path) -> None:
    if not path.exists():
        raise SiteproofError(
            f"data file {path} not found",
            "check the path (a relative path in a study file is read from the study file's folder)",
        )
    if path.is_dir():
        raise SiteproofError(f"data path {path} is a folder, not a file", "name the CSV or Parquet file itself")
    try:
        with path.open("rb"):
            pass
    except OSError as exc:
        raise SiteproofError(f"cannot read data file {path} ({exc.strerror})", "check the file's permissions") from None
    if path.stat().st_size == 0:
        raise SiteproofError(f"data file {path} is empty", "give a file with a header row and one row per unit")


def _header_line(path: Path, encoding: str) -> str | None:
    """The first line of an uncompressed text file (None for compressed files or undecodable bytes)."""
    if path.suffix.lower() in (".gz", ".bz2", ".zip", ".xz", ".zst"):
        return None
    with path.open("rb") as fh:
        first = fh.readline(1 << 20)
    try:
        return first.decode(encoding).rstrip("\r\n")
    except UnicodeDecodeError:
        return None


def _delimiter(path: Path, header: str | None) -> str:
    """Tab for .tsv; otherwise whichever of , ; tab occurs most in the header line (comma on ties)."""
    if ".tsv" in path.suffixes:
        return "\t"
    if not header:
        return ","
    return max([",", ";", "\t"], key=lambda sep: (header.count(sep), sep == ","))


def _check_header(header: str | None, sep: str, path: Path) -> None:
    """Refuse repeated column names (the CSV reader would silently rename them)."""
    if header is None:
        return
    names = [name.strip() for name in next(csv.reader([header], delimiter=sep), [])]
    seen: set[str] = set()
    for name in names:
        if name in seen and name:
            raise SiteproofError(f"column '{name}' appears twice in the header of {path}", "rename one of them")
        seen.add(name)


def _first_bad_byte(path: Path, encoding: str) -> str:
    """Where a file stops being valid text in ``encoding``: "byte 0xe9 on line 7" (lines count from 1)."""
    decoder = codecs.getincrementaldecoder(encoding)()
    line = 1
    with path.open("rb") as fh:
        while chunk := fh.read(1 << 20):
            try:
                decoder.decode(chunk)
            except UnicodeDecodeError as exc:
                bad_line = line + exc.object[: exc.start].count(b"\n")
                return f"byte 0x{exc.object[exc.start]:02x} on line {bad_line}"
            line += chunk.count(b"\n")
    return "an incomplete character at the end"


def _read_csv(path: Path, encoding: str | None) -> pd.DataFrame:
    enc = encoding or "utf-8-sig"
    try:
        codecs.lookup(enc)
    except LookupError:
        raise SiteproofError(f"unknown text encoding '{enc}'", "name a standard one, e.g. --encoding latin-1") from None
    header = _header_line(path, enc)
    sep = _delimiter(path, header)
    _check_header(header, sep, path)
    try:
        return pd.read_csv(path, sep=sep, encoding=enc, low_memory=False)
    except UnicodeDecodeError:
        where = _first_bad_byte(path, enc)
        if encoding is None:
            raise SiteproofError(
                f"data file {path} is not UTF-8 text ({where})",
                "re-save it as UTF-8, or name its encoding, e.g. --encoding latin-1",
            ) from None
        raise SiteproofError(
            f"data file {path} is not valid {enc} text ({where})", "name its encoding with --encoding"
        ) from None
    except pd.errors.EmptyDataError:
        raise SiteproofError(
            f"data file {path} is empty", "give a file with a header row and one row per unit"
        ) from None
    except pd.errors.ParserError as exc:
        raise SiteproofError(
            f"cannot read {path} as CSV ({' '.join(str(exc).split())})",
            "check that every row has as many fields as the header and that quotes are closed",
        ) from None
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read {path} as CSV ({exc})", "check that it is a CSV file") from None


def _read_parquet(path: Path) -> pd.DataFrame:
    try:
        return pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises several unrelated types for damaged files
        raise SiteproofError(
            f"cannot read {path} as Parquet ({type(exc).__name__}: {' '.join(str(exc).split())[:200]})",
            "check that it is a complete Parquet file, or give the data as CSV",
        ) from None


def _tidy_columns(frame: pd.DataFrame, source: str) -> pd.DataFrame:
    """Column names as stripped text; refuse repeated names, no columns, no rows."""
    frame = frame.copy()
    frame.columns = [str(c).strip() for c in frame.columns]
    duplicated = frame.columns[frame.columns.duplicated()]
    if len(duplicated):
        raise SiteproofError(f"column '{duplicated[0]}' appears twice in {source}", "rename one of them")
    if frame.shape[1] == 0:
        raise SiteproofError(f"{source} has no columns", "give a table with a header row")
    if frame.shape[0] == 0:
        raise SiteproofError(f"{source} has a header but no rows", "give a table with one row per unit")
    return frame.reset_index(drop=True)


def read_table(path: Path | str, encoding: str | None = None) -> pd.DataFrame:
    """Read a CSV (any suffix but .parquet/.pq; delimiter , ; or tab from the header) or Parquet file.

    Text is decoded as UTF-8 (a byte-order mark is allowed) unless ``encoding`` names another codec; there
    is no silent fallback.  Every file problem raises SiteproofError.
    """
    path = Path(path)
    _check_file(path)
    suffix = path.suffix.lower()
    if suffix in FOREIGN_FORMATS:
        raise SiteproofError(
            f"data file {path} looks like {FOREIGN_FORMATS[suffix]}", "save the data as CSV or Parquet"
        )
    frame = _read_parquet(path) if suffix in PARQUET_SUFFIXES else _read_csv(path, encoding)
    return _tidy_columns(frame, f"data file {path}")


# ----------------------------------------------------------------------------------------------------------
# column values
# ----------------------------------------------------------------------------------------------------------
def _label(value: Any) -> str:
    """Text label of a value: whole numbers without ".0", booleans as True/False."""
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)) and math.isfinite(value) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _labels(series: pd.Series) -> np.ndarray:
    """Object array of text labels, None where missing."""
    missing = series.isna().to_numpy()
    values = series.to_numpy(dtype=object)
    return np.array([None if m else _label(v) for v, m in zip(values, missing)], dtype=object)


def _is_numeric(series: pd.Series) -> bool:
    """Integer or float columns (not booleans), including object columns holding only numbers."""
    if ptypes.is_bool_dtype(series.dtype):
        return False
    if ptypes.is_integer_dtype(series.dtype) or ptypes.is_float_dtype(series.dtype):
        return True
    if series.dtype == object:
        return pd.api.types.infer_dtype(series, skipna=True) in ("integer", "floating", "mixed-integer-float")
    return False


def _as_float(series: pd.Series) -> np.ndarray:
    numbers = pd.to_numeric(series.astype(object), errors="coerce")
    return np.array(numbers.to_numpy(dtype="float64", na_value=np.nan), dtype=np.float64, copy=True)


def _examples(values: Iterable[Any], k: int = 3) -> str:
    return ", ".join(repr(v) for v in list(dict.fromkeys(values))[:k])


def _numeric_column(series: pd.Series, name: str, role: str, flag: str) -> np.ndarray:
    """A numeric column as float64 (NaN for missing); text entries that are not numbers raise."""
    if ptypes.is_bool_dtype(series.dtype):
        return series.astype(object).map(lambda v: float(v) if pd.notna(v) else np.nan).to_numpy(dtype=float)
    values = _as_float(series)
    bad = series[np.isnan(values) & series.notna().to_numpy()]
    if len(bad):
        raise SiteproofError(
            f"{role} column '{name}' is not numeric (values such as {_examples(bad.astype(str))})",
            f"give a numeric {role} column with {flag} (empty cells count as missing)",
        )
    if np.isinf(values).any():
        raise SiteproofError(
            f"{role} column '{name}' holds infinite values", f"replace them in the data or name another {flag}"
        )
    return values


# ----------------------------------------------------------------------------------------------------------
# roles, treatment, usable rows
# ----------------------------------------------------------------------------------------------------------
def _need_column(frame: pd.DataFrame, name: str, flag: str, what: str) -> None:
    if name not in frame.columns:
        raise SiteproofError(
            f"{what} '{name}' (from {flag}) is not a column of the data{_closest(name, frame.columns)}",
            f"name one of its columns: {_examples(frame.columns, 12)}",
        )


def _role_columns(spec: StudySpec) -> dict[str, str]:
    """Column → the role it plays (outcome, treatment, site, id, cost, stratum); one role per column."""
    roles: dict[str, str] = {}
    for role in ("outcome", "treatment", "site", "id", "cost", "stratum"):
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


def _check_columns(spec: StudySpec, frame: pd.DataFrame) -> list[str]:
    """Every named column exists and plays one role; returns the covariate names."""
    _need_column(frame, spec.site, "--site", "site column")
    for role in ("outcome", "treatment", "id", "cost", "stratum"):
        if getattr(spec, role) is not None:
            _need_column(frame, getattr(spec, role), FLAG_OF[role], f"{role} column")
    for key in ("keep_columns", "drop_columns", "site_derived"):
        for name in getattr(spec, key):
            _need_column(frame, name, FLAG_OF[key], "column")
    return _covariate_names(spec, frame, _role_columns(spec))


def _match_treated(wanted: str, values: list[str], name: str) -> str:
    """The treatment value equal to ``wanted`` — exactly, ignoring case, or as a number ("1.0" → "1")."""
    for value in values:
        if value == wanted:
            return value
    for value in values:
        if value.lower() == wanted.lower():
            return value
    if _parses_as_number(wanted) and _label(float(wanted)) in values:
        return _label(float(wanted))
    raise SiteproofError(
        f"--treated-value {wanted!r} is not a value of treatment column '{name}' ({_examples(values)})",
        f"use --treated-value {values[0]} or --treated-value {values[1]}",
    )


def _treated_label(spec: StudySpec, labels: np.ndarray) -> str:
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
            f"treatment column '{name}' has {len(values)} distinct values ({_examples(values, 5)}); "
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
        f"cannot tell which value of treatment column '{name}' is the treated arm ({_examples(values)})",
        f"say it with --treated-value {values[0]} or --treated-value {values[1]} (treated_value in a study file)",
    )


def _usable_rows(y: np.ndarray, treatment: np.ndarray) -> tuple[np.ndarray, dict[str, int]]:
    """Rows with an outcome and a treatment; a unit missing both is counted under missing_outcome."""
    missing_y = np.isnan(y)
    missing_w = np.array([v is None for v in treatment], dtype=bool)
    keep = ~missing_y & ~missing_w
    return keep, {"missing_outcome": int(missing_y.sum()), "missing_treatment": int((missing_w & ~missing_y).sum())}


def _exclusion_note(n_excluded: dict[str, int]) -> str:
    """"3 units with a missing outcome and 1 with a missing treatment" (empty when nothing was excluded)."""
    parts = [f"{k} with a missing {key.split('_')[1]}" for key, k in n_excluded.items() if k]
    if not parts:
        return ""
    first, *rest = parts
    count, tail = first.split(" ", 1)
    return " and ".join([f"{count} unit{'s' if count != '1' else ''} {tail}", *rest])


def _check_sample(y: np.ndarray, w: np.ndarray, spec: StudySpec, n_excluded: dict[str, int]) -> None:
    """At least MIN_UNITS usable units, ≥ 2 in each arm, and an outcome that varies."""
    note = _exclusion_note(n_excluded)
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


def _design_labels(series: pd.Series, name: str, role: str, origin: np.ndarray) -> np.ndarray:
    """Site or stratum labels of the usable rows; missing values are an error (the rate would be unknown).

    ``origin`` holds the 0-based row numbers of the usable rows in the data (messages count from 1)."""
    labels = _labels(series)
    missing = np.flatnonzero([v is None for v in labels])
    if missing.size:
        raise SiteproofError(
            f"{role} column '{name}' is empty for {missing.size} usable unit(s) "
            f"(first in data row {origin[missing[0]] + 1})",
            f"fill in every unit's {role}, or remove those rows from the data",
        )
    return labels


def _row_keys(frame: pd.DataFrame, id_column: str | None) -> np.ndarray:
    """The id column's values as text (all present and distinct), else the 0-based row number."""
    if id_column is None:
        return np.arange(len(frame)).astype(str).astype(object)
    keys = _labels(frame[id_column])
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


def _cost(frame: pd.DataFrame, column: str | None, origin: np.ndarray) -> np.ndarray | None:
    if column is None:
        return None
    cost = _numeric_column(frame[column], column, "cost", "--cost")
    missing = np.flatnonzero(np.isnan(cost))
    if missing.size:
        raise SiteproofError(
            f"cost column '{column}' is empty for {missing.size} usable unit(s) "
            f"(first in data row {origin[missing[0]] + 1})",
            "fill in every unit's cost of treating, or leave out --cost",
        )
    return cost


# ----------------------------------------------------------------------------------------------------------
# covariate screening and encoding
# ----------------------------------------------------------------------------------------------------------
def _values(series: pd.Series) -> tuple[np.ndarray, bool]:
    """(values, numeric?) — float64 with NaN (±inf → NaN) or object labels with None."""
    if _is_numeric(series):
        values = _as_float(series)
        values[~np.isfinite(values)] = np.nan
        return values, True
    return _labels(series), False


def _present(values: np.ndarray, numeric: bool) -> np.ndarray:
    return ~np.isnan(values) if numeric else np.array([v is not None for v in values], dtype=bool)


def _check_text_column(name: str, labels: np.ndarray) -> None:
    """Refuse numbers with stray text and undeclared identifiers among text covariates."""
    present = [v for v in labels if v is not None]
    distinct = set(present)
    numeric = {v for v in distinct if _parses_as_number(v)}
    text = distinct - numeric
    if len(numeric) >= 10 and 0 < len(text) <= 3 and sum(v in numeric for v in present) >= 0.8 * len(present):
        raise SiteproofError(
            f"covariate '{name}' holds numbers but also text such as {_examples(sorted(text))}",
            "replace those entries with empty cells (they are then imputed), "
            f"or leave it out with --drop-column {name}",
        )
    if len(present) >= ID_MIN_VALUES and len(distinct) >= ID_UNIQUE_SHARE * len(present):
        raise SiteproofError(
            f"text column '{name}' looks like an identifier ({len(distinct)} of {len(present)} values are different)",
            f"declare it with --id {name}, or leave it out with --drop-column {name}",
        )


def _parses_as_number(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def _copies_site(values: np.ndarray, numeric: bool, site: np.ndarray) -> bool:
    """True when every value of the column occurs in one site only and values repeat (a site code/attribute).

    Requires ≥ 2 sites among the rows where the column is present and at most half as many distinct values
    as present rows, so that a continuous covariate with all-different values is not flagged.
    """
    present = _present(values, numeric)
    if present.sum() < 2:
        return False
    pairs = pd.DataFrame({"v": values[present], "s": site[present]})
    if pairs["s"].nunique() < 2 or pairs["v"].nunique() > present.sum() / 2:
        return False
    return bool((pairs.groupby("v")["s"].nunique() == 1).all())


def _screen_covariates(
    frame: pd.DataFrame, names: list[str], site: np.ndarray, spec: StudySpec
) -> tuple[dict[str, tuple[np.ndarray, bool]], list[str]]:
    """Values of the covariates that survive the site-copy screen, and the warnings raised on the way."""
    kept: dict[str, tuple[np.ndarray, bool]] = {}
    notes: list[str] = []
    for name in names:
        values, numeric = _values(frame[name])
        if not numeric:
            _check_text_column(name, values)
        if numeric and np.isinf(_as_float(frame[name])).any():
            notes.append(f"covariate '{name}' has infinite values; they are treated as missing")
        if _copies_site(values, numeric, site):
            if name not in spec.keep_columns:
                notes.append(
                    f"covariate '{name}' copies the site column '{spec.site}' (each of its values occurs in one "
                    f"site only), so the blind analysis would see the site; it was dropped — pass "
                    f"--keep-column {name} to keep it"
                )
                continue
            notes.append(f"covariate '{name}' copies the site column '{spec.site}' and was kept (--keep-column): "
                         "the blind analysis can see the site through it")
        if not _present(values, numeric).any():
            notes.append(f"covariate '{name}' has no values in the usable units; it is ignored")
        kept[name] = (values, numeric)
    return kept, notes


def _encode_numeric(name: str, values: np.ndarray) -> tuple[list[np.ndarray], list[str]]:
    """The column with missing values set to the median, plus ``<name>:missing`` if any are missing."""
    missing = np.isnan(values)
    if missing.all():
        return [], []
    filled = np.where(missing, np.median(values[~missing]), values)
    if not missing.any():
        return [filled], [name]
    return [filled, missing.astype(float)], [name, f"{name}:missing"]


def _encode_categorical(name: str, labels: np.ndarray) -> tuple[list[np.ndarray], list[str]]:
    """One indicator per level except the most frequent (ties: first in natural order); ``<name>:missing``."""
    present = [v for v in labels if v is not None]
    columns: list[np.ndarray] = []
    names: list[str] = []
    if present:
        counts = pd.Series(present).value_counts()
        levels = sorted(counts.index, key=lambda v: (-counts[v], natural_key(v)))
        for level in sorted(levels[1:], key=natural_key):
            columns.append((labels == level).astype(float))
            names.append(f"{name}={level}")
    if len(present) < labels.size:
        columns.append(np.array([v is None for v in labels], dtype=float))
        names.append(f"{name}:missing")
    return columns, names


def _encode(covariates: dict[str, tuple[np.ndarray, bool]], n: int) -> tuple[np.ndarray, list[str], list[str]]:
    """Feature matrix (constant columns dropped), feature names, and the covariates that contribute."""
    columns: list[np.ndarray] = []
    names: list[str] = []
    used: list[str] = []
    for name, (values, numeric) in covariates.items():
        block, block_names = (_encode_numeric if numeric else _encode_categorical)(name, values)
        varying = [(c, nm) for c, nm in zip(block, block_names) if np.ptp(c) > 0]
        if varying:
            used.append(name)
            columns.extend(c for c, _ in varying)
            names.extend(nm for _, nm in varying)
    X = np.column_stack(columns) if columns else np.empty((n, 0))
    return np.ascontiguousarray(X, dtype=np.float64), names, used


# ----------------------------------------------------------------------------------------------------------
# known assignment rates
# ----------------------------------------------------------------------------------------------------------
def _cell_table(site: np.ndarray, stratum: np.ndarray | None, w: np.ndarray) -> pd.DataFrame:
    """One row per randomization cell (site, or site × stratum) in natural order, with its counts."""
    if stratum is None:
        cells = pd.DataFrame({"site": site, "w": w}).groupby("site", sort=False)["w"]
        cells = cells.agg(n="size", n_treated="sum").reset_index()
        cells.insert(1, "stratum", None)
    else:
        cells = pd.DataFrame({"site": site, "stratum": stratum, "w": w}).groupby(["site", "stratum"], sort=False)["w"]
        cells = cells.agg(n="size", n_treated="sum").reset_index()
    order = [(natural_key(a), natural_key(b)) for a, b in zip(cells["site"], cells["stratum"])]
    cells = cells.iloc[sorted(range(len(cells)), key=order.__getitem__)].reset_index(drop=True)
    cells["n"] = cells["n"].astype(int)
    cells["n_treated"] = cells["n_treated"].astype(int)
    cells["n_control"] = cells["n"] - cells["n_treated"]
    cells["rate_realized"] = cells["n_treated"] / cells["n"]
    return cells


def _declared_cell_rates(rates: dict[str, float], cells: pd.DataFrame, has_stratum: bool) -> list[float]:
    """The declared rate of every cell from ``SITE`` / ``SITE:STRATUM`` keys; all cells must be covered."""
    sites = site_order(cells["site"])
    site_rates: dict[str, float] = {}
    cell_rates: dict[tuple[str, str], float] = {}
    known_cells = set(zip(cells["site"], cells["stratum"].astype(str)))
    for key, rate in rates.items():
        if not 0 < rate < 1:
            raise SiteproofError(
                f"the declared rate for '{key}' is {rate:g}, outside (0, 1)",
                f"give '{key}' the probability of being treated, strictly between 0 and 1",
            )
        if key in sites:
            site_rates[key] = rate
            continue
        site_part, sep, stratum_part = key.rpartition(":")
        if sep and not has_stratum and site_part in sites:
            raise SiteproofError(
                f"the rate key '{key}' names a stratum, but no stratum column was given",
                "pass --stratum COL or declare the rate for the whole site",
            )
        if sep and (site_part, stratum_part) in known_cells:
            cell_rates[(site_part, stratum_part)] = rate
            continue
        raise SiteproofError(
            f"a rate is declared for '{key}', which is not a site{' or site:stratum cell' if has_stratum else ''} "
            f"of the usable data{_closest(key, sites)}",
            f"declare rates only for these sites: {_examples(sites, 12)}",
        )
    out: list[float] = []
    undeclared: list[str] = []
    for site, stratum in zip(cells["site"], cells["stratum"].astype(str)):
        if site in site_rates and (site, stratum) in cell_rates:
            raise SiteproofError(
                f"rates for site '{site}' are declared both for the whole site and for its stratum '{stratum}'",
                "keep one of the two",
            )
        rate = cell_rates.get((site, stratum), site_rates.get(site))
        if rate is None:
            undeclared.append(site if not has_stratum else f"{site}:{stratum}")
        out.append(math.nan if rate is None else rate)
    if undeclared:
        raise SiteproofError(
            f"rates are declared for some sites but not for {', '.join(undeclared[:8])}"
            f"{' …' if len(undeclared) > 8 else ''}",
            "declare a rate for every site (e.g. --rates A=0.5,B=0.8), or none to use the realized treated shares",
        )
    return out


def _attach_rates(
    spec: StudySpec, site: np.ndarray, stratum: np.ndarray | None, w: np.ndarray
) -> tuple[np.ndarray, pd.DataFrame, str, list[str]]:
    """Per-unit known rate, the cell table with binomial tests, the rates' source and their warnings."""
    cells = _cell_table(site, stratum, w)
    notes: list[str] = []
    if spec.rates:
        cells["rate_declared"] = _declared_cell_rates(dict(spec.rates), cells, stratum is not None)
        cells["binom_p"] = [
            rate_test(k, n, p) for k, n, p in zip(cells["n_treated"], cells["n"], cells["rate_declared"])
        ]
        source, rate_column = "declared", "rate_declared"
    else:
        cells["rate_declared"] = math.nan
        cells["binom_p"] = math.nan
        source, rate_column = "realized", "rate_realized"
        notes.append(
            "no assignment rates were declared: each site's realized treated share is used as its known rate "
            "(declare them with --rates or a [rates] table)"
        )
    cells["warning"] = (cells["binom_p"] < RATE_WARNING_P).to_numpy()
    for row in cells[cells["warning"]].itertuples():
        where = f"site '{row.site}'" + (f", stratum '{row.stratum}'" if stratum is not None else "")
        notes.append(
            f"{where}: {row.n_treated} of {row.n} units treated, but the declared rate is {row.rate_declared:g} "
            f"(exact binomial p = {row.binom_p:.2g}); check the declared rate or the treatment column"
        )
    lookup = dict(zip(zip(cells["site"], cells["stratum"]), cells[rate_column]))
    unit_strata = stratum if stratum is not None else [None] * site.size
    known = np.array([lookup[cell] for cell in zip(site, unit_strata)], dtype=float)
    columns = ["site", "stratum", "n", "n_treated", "n_control", "rate_declared", "rate_realized", "binom_p", "warning"]
    return known, cells[columns], source, notes


def _one_arm_sites(site: np.ndarray, w: np.ndarray) -> list[str]:
    notes = []
    table = pd.DataFrame({"site": site, "w": w}).groupby("site")["w"].agg(["size", "sum"])
    for label in site_order(table.index):
        size, treated = int(table.at[label, "size"]), int(table.at[label, "sum"])
        if treated in (0, size):
            arm = "treated" if treated else "control"
            notes.append(f"site '{label}' has all {size} units in the {arm} arm; it is excluded from the "
                         "design-based estimates")
    return notes


# ----------------------------------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class BlindData:
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

    @property
    def n(self) -> int:
        return int(self.y.size)

    def outcome_sd(self) -> float:
        """Sample standard deviation of the outcome (n − 1 divisor)."""
        return float(np.std(self.y, ddof=1))


def fingerprint(
    row_key: np.ndarray, y: np.ndarray, w: np.ndarray, X: np.ndarray, feature_names: Iterable[str],
    cost: np.ndarray | None = None,
) -> str:
    """sha256 of the usable rows as the blind analysis sees them: feature names, row keys, y, w, X, cost.

    Numbers are hashed as little-endian float64 (w as int8) in row order; the site is not part of it.
    """
    digest = hashlib.sha256(b"siteproof-blind-v1\0")
    digest.update("\x1f".join(feature_names).encode("utf-8") + b"\0")
    digest.update("\x1f".join(map(str, row_key)).encode("utf-8") + b"\0")
    digest.update(np.ascontiguousarray(y, dtype="<f8").tobytes())
    digest.update(np.ascontiguousarray(w, dtype="i1").tobytes())
    digest.update(np.ascontiguousarray(X, dtype="<f8").tobytes())
    if cost is not None:
        digest.update(b"cost\0" + np.ascontiguousarray(cost, dtype="<f8").tobytes())
    return digest.hexdigest()


@dataclass(frozen=True, eq=False)
class Study:
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

    @property
    def n(self) -> int:
        return self.blind.n

    @property
    def n_sites(self) -> int:
        return len(set(self.site))


def _check_spec(spec: StudySpec) -> None:
    if spec.margin is not None and not (math.isfinite(spec.margin) and spec.margin > 0):
        raise SiteproofError(
            f"the equivalence margin is {spec.margin}", "give --margin a positive number in outcome units"
        )
    if isinstance(spec.seed, bool) or not isinstance(spec.seed, (int, np.integer)) or spec.seed < 0:
        raise SiteproofError(f"the seed is {spec.seed!r}", "give --seed a whole number ≥ 0")


def load_study(spec: StudySpec, frame: pd.DataFrame | None = None) -> Study:
    """Check and encode a pooled multi-site trial (see the module docstring); ``frame`` skips reading the file."""
    _check_spec(spec)
    table = read_table(spec.data, spec.encoding) if frame is None else _tidy_columns(frame, "the data table")
    covariate_names = _check_columns(spec, table)
    row_key_all = _row_keys(table, spec.id)
    treatment = _labels(table[spec.treatment])
    treated_value = _treated_label(spec, treatment)
    y_all = _numeric_column(table[spec.outcome], spec.outcome, "outcome", "--outcome")
    keep, n_excluded = _usable_rows(y_all, treatment)
    rows = table.loc[keep].reset_index(drop=True)
    y = y_all[keep]
    w = (treatment[keep] == treated_value).astype(np.int8)
    _check_sample(y, w, spec, n_excluded)
    notes = [f"excluded {_exclusion_note(n_excluded)} from the analysis"] if any(n_excluded.values()) else []
    origin = np.flatnonzero(keep)
    site = _design_labels(rows[spec.site], spec.site, "site", origin)
    stratum = None if spec.stratum is None else _design_labels(rows[spec.stratum], spec.stratum, "stratum", origin)
    cost = _cost(rows, spec.cost, origin)
    covariates, screen_notes = _screen_covariates(rows, covariate_names, site, spec)
    X, feature_names, used = _encode(covariates, y.size)
    known_rate, cells, source, rate_notes = _attach_rates(spec, site, stratum, w)
    notes += screen_notes + (["no covariates remain for the blind analysis"] if not used else [])
    notes += rate_notes + _one_arm_sites(site, w)
    for note in notes:
        warn(note)
    row_key = row_key_all[keep]
    blind = BlindData(
        X=X, feature_names=tuple(feature_names), y=y, w=w, row_key=row_key, cost=cost,
        binary_outcome=bool(np.isin(y, (0.0, 1.0)).all()), outcome=spec.outcome, treatment=spec.treatment,
        treated_value=treated_value, covariates=tuple(used), n_excluded=n_excluded,
        fingerprint=fingerprint(row_key, y, w, X, feature_names, cost),
        raw_covariates=rows[used].reset_index(drop=True),
    )
    return Study(blind, site, stratum, known_rate, source, cells, spec, tuple(notes))
