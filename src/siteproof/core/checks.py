"""Shared input checks: each turns a user's array or number into a clean value or raises SiteproofError.

Every helper takes the ``name`` the user knows the input by, so the message says which input is wrong,
what was found, and how to fix it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .errors import SiteproofError


def finite_vector(name: str, values: Any, fix: str | None = None) -> np.ndarray:
    """A flattened float64 vector with no NaN or ±inf, else SiteproofError naming ``name``."""
    arr = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(arr)):
        raise SiteproofError(f"{name}: NaN or infinite values found",
                             fix or f"drop or impute the missing values in {name}")
    return arr


def one_dimensional(name: str, values: Any) -> np.ndarray:
    """``values`` as a float64 array that must be 1-D (no flattening), else SiteproofError."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1:
        raise SiteproofError(f"{name} must be one-dimensional, got shape {arr.shape}", f"pass a 1-D array for {name}")
    return arr


def unit_vector(name: str, values: Any, n: int | None = None, fix: str | None = None) -> np.ndarray:
    """One finite float64 value per unit: 1-D, of length ``n`` when given, no NaN or ±inf; else SiteproofError."""
    arr = one_dimensional(name, values)
    if n is not None and arr.size != n:
        raise SiteproofError(f"{name} has {arr.size} entries but {n} were expected", f"pass one value of {name} per unit")
    return finite_vector(name, arr, fix)


def unit_vector_or_scalar(name: str, values: Any, n: int, fix: str | None = None) -> np.ndarray:
    """A scalar repeated for all ``n`` units, or else :func:`unit_vector` of ``values`` with length ``n``."""
    arr = np.asarray(values, dtype=float)
    return unit_vector(name, np.full(n, float(arr)) if arr.ndim == 0 else arr, n, fix)


def finite_matrix(name: str, values: Any, n_rows: int | None = None, fix: str | None = None) -> np.ndarray:
    """A 2-D float64 array (``n_rows`` rows when given) with no NaN or ±inf, else SiteproofError."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 2 or (n_rows is not None and arr.shape[0] != n_rows):
        want = f"({n_rows}, p)" if n_rows is not None else "(n, p)"
        raise SiteproofError(f"{name} has shape {arr.shape}, expected {want}", f"pass {name} as an {want} array")
    finite_vector(name, arr, fix)
    return arr


def same_length(name_a: str, a: np.ndarray, name_b: str, b: np.ndarray, fix: str) -> None:
    """Raise SiteproofError unless ``a`` and ``b`` have the same number of entries."""
    if np.size(a) != np.size(b):
        raise SiteproofError(f"{np.size(a)} {name_a} but {np.size(b)} {name_b}", fix)


def at_least(name: str, values: np.ndarray, minimum: int, fix: str) -> None:
    """Raise SiteproofError unless ``values`` has at least ``minimum`` entries."""
    if np.size(values) < minimum:
        raise SiteproofError(f"{name} needs at least {minimum} units, got {np.size(values)}", fix)


def in_unit_interval(name: str, values: np.ndarray, fix: str, strict: bool = False) -> None:
    """Raise SiteproofError unless every value lies in [0, 1] (in (0, 1) when ``strict``)."""
    arr = np.asarray(values, dtype=float)
    bad = (arr <= 0) | (arr >= 1) if strict else (arr < 0) | (arr > 1)
    if np.any(bad):
        interval = "strictly inside (0, 1)" if strict else "in [0, 1]"
        raise SiteproofError(f"{name} must lie {interval}; {int(np.sum(bad))} value(s) do not", fix)


def standard_error(name: str, se: float) -> float:
    """A standard error that is finite and ≥ 0, else SiteproofError."""
    if not np.isfinite(se) or se < 0:
        raise SiteproofError(f"{name} must be finite and ≥ 0, got {se}", "check how it was computed")
    return float(se)


def alpha_level(alpha: float, upper: float = 1.0) -> float:
    """A significance level α in (0, ``upper``), else SiteproofError (TOST needs upper = 0.5)."""
    if not 0.0 < alpha < upper:
        raise SiteproofError(f"alpha must lie in (0, {upper:g}), got {alpha}", "use e.g. alpha=0.05")
    return float(alpha)
