"""The study description: :class:`StudySpec`, the TOML study file and the ``--rates`` syntax.

A study names its data (a file path or a pandas DataFrame) and which column plays which role; rates are
probabilities per site (``A=0.5``) or per site × stratum cell (``A:low=0.3``), written as decimals or
fractions.  Every mistake raises ``SiteproofError(what, fix)``.
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import MISSING, Field, asdict, dataclass, field, fields, replace
from fractions import Fraction
from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from .flags import check_seed
from .values import closest
from ..core.errors import SiteproofError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

DATAFRAME_SOURCE = "<DataFrame>"


def _default(f: Field) -> Any:
    """A dataclass field's default value (calling its factory where it has one)."""
    return f.default_factory() if f.default_factory is not MISSING else f.default


@dataclass(repr=False)
class StudySpec:
    """Where the data are and what each column means (the TOML study file or the CLI data flags)."""

    data: Path | str | pd.DataFrame
    outcome: str
    treatment: str
    site: str
    treated_value: str | None = None
    covariates: list[str] | None = None
    id: str | None = None
    cost: str | None = None
    stratum: str | None = None
    cluster: str | None = None
    rates: dict[str, float] | None = None
    margin: float | None = None
    seed: int = 2026
    encoding: str | None = None
    keep_columns: list[str] = field(default_factory=list)
    drop_columns: list[str] = field(default_factory=list)
    site_derived: list[str] = field(default_factory=list)
    name: str | None = None
    covariate_sets: dict[str, list[str]] | None = None

    def __post_init__(self) -> None:
        """Refuse a ``data`` that is neither a file path nor a pandas DataFrame."""
        if not isinstance(self.data, (str, os.PathLike, pd.DataFrame)):
            raise SiteproofError(
                f"the study data is of type {type(self.data).__name__}, not a file path or a pandas DataFrame",
                "give data as the path of the table or as a pandas DataFrame",
            )

    def __repr__(self) -> str:
        """The fields that are set, the data named by :attr:`source` (a DataFrame by its shape, never its rows)."""
        data = (f"<DataFrame {self.data.shape[0]}×{self.data.shape[1]}>" if isinstance(self.data, pd.DataFrame)
                else repr(str(self.data)))
        rest = ", ".join(f"{f.name}={getattr(self, f.name)!r}" for f in fields(self)[1:]
                         if getattr(self, f.name) != _default(f))
        return f"StudySpec(data={data}" + (f", {rest})" if rest else ")")

    @property
    def source(self) -> str:
        """How messages name the data: the path as text, or ``<DataFrame>`` for a table given in memory."""
        return DATAFRAME_SOURCE if isinstance(self.data, pd.DataFrame) else str(self.data)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready copy (the data path as text, ``<DataFrame>`` for a table given in memory)."""
        return asdict(replace(self, data=self.source))


SPEC_KEYS = tuple(f.name for f in fields(StudySpec))
REQUIRED_KEYS = ("data", "outcome", "treatment", "site")
FLAG_OF = {
    "outcome": "--outcome", "treatment": "--treatment", "site": "--site", "treated_value": "--treated-value",
    "covariates": "--covariates", "id": "--id", "cost": "--cost", "stratum": "--stratum", "cluster": "--cluster", "rates": "--rates",
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


# ----------------------------------------------------------------------------------------------------------
# TOML study file
# ----------------------------------------------------------------------------------------------------------
def _read_toml(path: Path) -> dict[str, Any]:
    """The parsed study file (UTF-8, a byte-order mark allowed)."""
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
    """A list of column names, written as a TOML list or as comma-separated text."""
    if isinstance(value, str):
        return parse_column_list(value)
    if isinstance(value, list) and all(isinstance(v, str) for v in value):
        return [v.strip() for v in value]
    raise SiteproofError(f"{where}: '{key}' must be a list of column names", f'write {key} = ["a", "b"]')


def _toml_sets(value: Any, where: str) -> dict[str, list[str]]:
    """``[covariate_sets]`` as ``NAME = ["a", "b"]`` (or ``NAME = "a,b"``): the sets of ``siteproof sets``."""
    if not isinstance(value, dict) or not value:
        raise SiteproofError(f"{where}: 'covariate_sets' must be a table of named lists",
                             'write [covariate_sets] with lines like baseline = ["age", "grade"]')
    return {str(name): _toml_names(f"covariate_sets.{name}", cols, where) for name, cols in value.items()}


def _toml_value(key: str, value: Any, where: str) -> Any:
    """Check the type of one study-file entry and convert it to the StudySpec field type."""
    if key == "covariate_sets":
        return _toml_sets(value, where)
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
                f"{where}: unknown key '{key}'{closest(key, SPEC_KEYS)}",
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


def check_spec(spec: StudySpec) -> None:
    """A positive finite margin (if any) and a whole-number seed in 0 ≤ seed < 2³²."""
    if spec.margin is not None and not (math.isfinite(spec.margin) and spec.margin > 0):
        raise SiteproofError(
            f"the equivalence margin is {spec.margin}", "give --margin a positive number in outcome units"
        )
    check_seed(spec.seed, "--seed (or seed in the study file)")

