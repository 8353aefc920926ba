"""Column values as intake reads them: text labels, numeric columns, and how messages quote values."""

from __future__ import annotations

import difflib
import math
import re
from typing import Any, Iterable

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ..core.errors import SiteproofError


def text_label(value: Any) -> str:
    """Text label of a value: whole numbers without ".0", booleans as True/False."""
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)) and math.isfinite(value) and float(value).is_integer():
        return str(int(value))
    return str(value)


def text_labels(series: pd.Series) -> np.ndarray:
    """Object array of text labels, None where missing."""
    missing = series.isna().to_numpy()
    values = series.to_numpy(dtype=object)
    return np.array([None if m else text_label(v) for v, m in zip(values, missing)], dtype=object)


def is_numeric(series: pd.Series) -> bool:
    """Integer or float columns (not booleans), including object columns holding only numbers."""
    if ptypes.is_bool_dtype(series.dtype):
        return False
    if ptypes.is_integer_dtype(series.dtype) or ptypes.is_float_dtype(series.dtype):
        return True
    if series.dtype == object:
        return pd.api.types.infer_dtype(series, skipna=True) in ("integer", "floating", "mixed-integer-float")
    return False


def as_float(series: pd.Series) -> np.ndarray:
    """A column as float64, NaN where missing or not a number."""
    numbers = pd.to_numeric(series.astype(object), errors="coerce")
    return np.array(numbers.to_numpy(dtype="float64", na_value=np.nan), dtype=np.float64, copy=True)


def examples(values: Iterable[Any], k: int = 3) -> str:
    """The first ``k`` distinct values, quoted and comma-separated (for messages)."""
    return ", ".join(repr(v) for v in list(dict.fromkeys(values))[:k])


def numeric_column(series: pd.Series, name: str, role: str, flag: str) -> np.ndarray:
    """A numeric column as float64 (NaN for missing); text entries that are not numbers raise."""
    if ptypes.is_bool_dtype(series.dtype):
        return series.astype(object).map(lambda v: float(v) if pd.notna(v) else np.nan).to_numpy(dtype=float)
    values = as_float(series)
    bad = series[np.isnan(values) & series.notna().to_numpy()]
    if len(bad):
        raise SiteproofError(
            f"{role} column '{name}' is not numeric (values such as {examples(bad.astype(str))})",
            f"give a numeric {role} column with {flag} (empty cells count as missing)",
        )
    if np.isinf(values).any():
        raise SiteproofError(
            f"{role} column '{name}' holds infinite values", f"replace them in the data or name another {flag}"
        )
    return values


def parses_as_number(text: str) -> bool:
    """True when ``text`` is a finite number written as text ("1.5", "2e3")."""
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def closest(name: str, options: Iterable[str]) -> str:
    """' (did you mean 'x'?)' when a close match exists."""
    match = difflib.get_close_matches(name, list(options), n=1, cutoff=0.6)
    return f" (did you mean '{match[0]}'?)" if match else ""


#: numbers beyond this magnitude are refused: their squares (variances, least squares) overflow float64
#: (√1.8e308 ≈ 1.3e154) or lose every other value to rounding
MAX_MAGNITUDE = 1e100
NESTED_TYPES = (list, tuple, dict, set, np.ndarray)


def is_nested(series: pd.Series) -> bool:
    """True for list, struct or map columns (Parquet/Arrow nested types, or Python containers as values)."""
    if isinstance(series.dtype, pd.ArrowDtype):
        import pyarrow as pa

        arrow = series.dtype.pyarrow_dtype
        return pa.types.is_nested(arrow)
    if series.dtype != object:
        return False
    return any(isinstance(v, NESTED_TYPES) for v in series.dropna().head(1000))


ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}([ T]\d{2}:\d{2}(:\d{2}(\.\d+)?)?)?(Z|[+-]\d{2}:?\d{2})?")


def _iso_text(series: pd.Series) -> bool:
    """True when every present value is ISO 8601 date text (2024-01-31, 2024-01-31T08:00, …), as dates are
    written in a CSV file."""
    present = series.dropna()
    return bool(len(present)) and all(isinstance(v, str) and ISO_DATE.fullmatch(v.strip()) for v in present)


def is_datetime(series: pd.Series) -> bool:
    """True for date and datetime columns: datetime64 (with or without a time zone), date objects, or text
    that is all ISO 8601 dates."""
    if ptypes.is_datetime64_any_dtype(series.dtype):
        return True
    if not (series.dtype == object or ptypes.is_string_dtype(series.dtype)) or not series.notna().any():
        return False
    if pd.api.types.infer_dtype(series, skipna=True) in ("datetime", "datetime64", "date"):
        return True
    return _iso_text(series)


def days_since_earliest(series: pd.Series) -> tuple[np.ndarray, str]:
    """A date column as days since its earliest value (NaN where missing), and that earliest value as text.

    Times are put on UTC first (so mixed time zones compare correctly; differences in days are unchanged)."""
    text = not ptypes.is_datetime64_any_dtype(series.dtype) and _iso_text(series)
    stamps = pd.to_datetime(series, errors="coerce", utc=True, format="ISO8601" if text else None)
    earliest = stamps.min()
    days = ((stamps - earliest) / pd.Timedelta(days=1)).to_numpy(dtype="float64", na_value=np.nan)
    return np.array(days, dtype=np.float64), str(earliest.date() if earliest == earliest.normalize() else earliest)


def check_magnitude(series: pd.Series, name: str, role: str) -> None:
    """Refuse a numeric column holding a finite value with |x| > :data:`MAX_MAGNITUDE`, naming the first row
    (data rows count from 1, the header not included)."""
    if not is_numeric(series):
        return
    values = as_float(series)
    with np.errstate(invalid="ignore"):
        huge = np.flatnonzero(np.isfinite(values) & (np.abs(values) > MAX_MAGNITUDE))
    if huge.size:
        row = int(huge[0])
        raise SiteproofError(
            f"{role} column '{name}' holds {values[row]:g} in data row {row + 1}"
            + (f" and {huge.size - 1} more value(s)" if huge.size > 1 else "")
            + f", beyond ±{MAX_MAGNITUDE:g}, too large to compute with",
            f"rescale '{name}' (e.g. to thousands or a logarithm), or correct or remove those rows",
        )
