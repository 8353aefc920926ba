"""Column values as intake reads them: text labels, numeric columns, and how messages quote values."""

from __future__ import annotations

import difflib
import math
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
