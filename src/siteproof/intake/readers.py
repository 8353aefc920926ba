"""Reading the pooled table: the reader is chosen by the file's suffix, or the table is given in memory.

* .csv .tsv .txt or no suffix (also compressed .gz .bz2 .zip .xz .zst): delimited text
  (:func:`~siteproof.intake.csvfiles.read_csv`, delimiter from the header);
* .parquet .pq: ``pandas.read_parquet``;
* .dta (Stata): ``pandas.read_stata``, value labels kept as the categories of the column;
* .sas7bdat, .xpt (SAS): ``pandas.read_sas``, text decoded as the file declares (.sas7bdat) or as UTF-8;
* .sav .zsav (SPSS): ``pandas.read_spss``, value labels kept as categories (needs the ``spss`` extra);
* .feather .arrow (Arrow IPC file): ``pandas.read_feather``, dictionary columns as categories.

Every problem with the file — missing, unreadable, damaged, an unknown suffix — raises SiteproofError.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path
from typing import Callable

import pandas as pd

from .csvfiles import COMPRESSED_SUFFIXES, check_encoding, read_csv
from .spec import DATAFRAME_SOURCE
from ..core.errors import SiteproofError

TEXT_SUFFIXES = (".csv", ".tsv", ".txt", "")
NOT_READ = {
    ".xlsx": "an Excel workbook", ".xls": "an Excel workbook", ".json": "JSON", ".rds": "an R file",
    ".rdata": "an R file", ".toml": "a study file",
}
SUPPORTED = (
    ".csv, .tsv, .txt (also compressed .gz/.bz2/.zip/.xz/.zst), .parquet, .pq, Stata .dta, SAS .sas7bdat and "
    ".xpt, SPSS .sav and .zsav, Feather/Arrow .feather and .arrow"
)
XPORT_RECORD = 80
IBM_ZERO_AS_READ = 16.0**-65
SPSS_EXTRA = 'pip install "siteproof[spss]"'


def _check_file(path: Path) -> None:
    """The path names a readable, non-empty file."""
    if not path.exists():
        raise SiteproofError(
            f"data file {path} not found",
            "check the path (a relative path in a study file is read from the study file's folder)",
        )
    if path.is_dir():
        raise SiteproofError(f"data path {path} is a folder, not a file", "name the data file itself")
    try:
        with path.open("rb"):
            pass
    except OSError as exc:
        raise SiteproofError(f"cannot read data file {path} ({exc.strerror})", "check the file's permissions") from None
    if path.stat().st_size == 0:
        raise SiteproofError(f"data file {path} is empty", "give a file with a header row and one row per unit")


def _read_sas(path: Path, encoding: str | None) -> pd.DataFrame:
    """SAS data set or transport file; text in the file's declared encoding (.sas7bdat) or UTF-8 (.xpt).

    A transport file is a sequence of 80-byte records (SAS Institute, TS-140, "The record layout of a SAS
    transport file"), so a size that is not a multiple of 80 means a truncated file.  It stores numbers as IBM
    hexadecimal floats, where zero is eight zero bytes; ``pandas.read_sas`` decodes those as 16⁻⁶⁵ (the
    smallest IBM float), so that value is set back to 0.
    """
    if encoding:
        check_encoding(encoding)
    if path.suffix.lower() == ".sas7bdat":
        return pd.read_sas(path, format="sas7bdat", encoding=encoding or "infer")
    if path.stat().st_size % XPORT_RECORD:
        raise SiteproofError(
            f"data file {path} is not a whole number of {XPORT_RECORD}-byte records, so it is truncated",
            "export the SAS transport file again, or give the data as CSV",
        )
    frame = pd.read_sas(path, format="xport", encoding=encoding or "utf-8")
    numbers = frame.select_dtypes("float").columns
    frame[numbers] = frame[numbers].mask(frame[numbers] == IBM_ZERO_AS_READ, 0.0)
    return frame


def _read_spss(path: Path, encoding: str | None) -> pd.DataFrame:
    """SPSS file with value labels as categories; needs the optional package pyreadstat."""
    if importlib.util.find_spec("pyreadstat") is None:
        raise SiteproofError(
            f"reading the SPSS file {path} needs the optional package pyreadstat, which is not installed",
            f"install it with {SPSS_EXTRA}, or save the data as CSV",
        )
    return pd.read_spss(path, convert_categoricals=True, **({"encoding": encoding} if encoding else {}))


BINARY_READERS: dict[str, tuple[str, Callable[[Path, str | None], pd.DataFrame]]] = {
    ".parquet": ("Parquet", lambda path, _: pd.read_parquet(path)),
    ".pq": ("Parquet", lambda path, _: pd.read_parquet(path)),
    ".dta": ("a Stata file", lambda path, _: pd.read_stata(path, convert_categoricals=True)),
    ".sas7bdat": ("a SAS data set", _read_sas),
    ".xpt": ("a SAS transport file", _read_sas),
    ".sav": ("an SPSS file", _read_spss),
    ".zsav": ("an SPSS file", _read_spss),
    ".feather": ("Feather", lambda path, _: pd.read_feather(path)),
    ".arrow": ("an Arrow IPC file", lambda path, _: pd.read_feather(path)),
}


def _read_binary(path: Path, suffix: str, encoding: str | None) -> pd.DataFrame:
    """Read a non-text format; any failure of the underlying reader becomes one SiteproofError."""
    what, reader = BINARY_READERS[suffix]
    try:
        return reader(path, encoding)
    except SiteproofError:
        raise
    except UnicodeDecodeError as exc:
        raise SiteproofError(
            f"text in data file {path} is not valid {exc.encoding} ({exc.reason})",
            "name its encoding, e.g. --encoding latin-1",
        ) from None
    except Exception as exc:  # the format libraries raise many unrelated types for damaged files
        raise SiteproofError(
            f"cannot read {path} as {what} ({type(exc).__name__}: {' '.join(str(exc).split())[:200]})",
            "check that the file is complete and undamaged, or give the data as CSV",
        ) from None


def _format_of(path: Path) -> str:
    """The suffix that decides the reader: a binary format's suffix, or "text" for delimited text."""
    suffix = path.suffix.lower()
    if suffix in BINARY_READERS:
        return suffix
    inner = Path(path.stem).suffix.lower() if suffix in COMPRESSED_SUFFIXES else suffix
    if inner in TEXT_SUFFIXES:
        return "text"
    if suffix in NOT_READ:
        raise SiteproofError(f"data file {path} looks like {NOT_READ[suffix]}", f"save the data as one of {SUPPORTED}")
    raise SiteproofError(
        f"data file {path} has the suffix '{path.suffix}', which is not a table format siteproof reads",
        f"save the data as one of {SUPPORTED}",
    )


def tidy_columns(frame: pd.DataFrame, source: str) -> pd.DataFrame:
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


def read_table(data: Path | str | pd.DataFrame, encoding: str | None = None) -> pd.DataFrame:
    """Read the table named by ``data`` (reader by suffix, see the module docstring), or tidy a DataFrame.

    Text is decoded as UTF-8 unless ``encoding`` names another codec.  Every file problem raises
    SiteproofError.
    """
    if isinstance(data, pd.DataFrame):
        return tidy_columns(data, f"the data table {DATAFRAME_SOURCE}")
    path = Path(data)
    _check_file(path)
    kind = _format_of(path)
    frame = read_csv(path, encoding) if kind == "text" else _read_binary(path, kind, encoding)
    return tidy_columns(frame, f"data file {path}")
