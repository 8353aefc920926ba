"""Number formatting shared by the report and the terminal screens: one text for one number everywhere.

Missing values (None, null, NaN, ±inf) are written "—".  Effects in the report use enough decimals to resolve a
tenth of the equivalence margin δ (:func:`effect_decimals`).
"""

from __future__ import annotations

import math
from typing import Any


def as_float(value: Any) -> float:
    """A JSON number as float (null → NaN)."""
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def finite(*values: Any) -> bool:
    """True when every value is a finite number."""
    return all(math.isfinite(as_float(v)) for v in values)


def effect_decimals(margin: float) -> int:
    """Decimals for effects: enough to resolve a tenth of the margin δ (between 1 and 6)."""
    if not finite(margin) or margin <= 0:
        return 3
    return max(1, min(6, 2 - math.floor(math.log10(margin))))


def fmt(value: Any, decimals: int = 3) -> str:
    """A number with fixed decimals; missing → "—"."""
    return f"{as_float(value):.{decimals}f}" if finite(value) else "—"


def fmt_ci(ci: Any, decimals: int = 3) -> str:
    """An interval as "[low, high]"; "—" unless both ends are finite."""
    lo, hi = (ci or [None, None])[:2]
    return f"[{fmt(lo, decimals)}, {fmt(hi, decimals)}]" if finite(lo, hi) else "—"


def fmt_p(p: Any) -> str:
    """A p-value with 3 decimals, "<0.001" below 0.001."""
    if not finite(p):
        return "—"
    return "<0.001" if as_float(p) < 0.001 else f"{as_float(p):.3f}"


def fmt_pct(share: Any, decimals: int = 0) -> str:
    """A share (0–1) as a percentage, e.g. "42 %"."""
    return f"{100 * as_float(share):.{decimals}f} %" if finite(share) else "—"



def fmt_sig(value: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant digits (compact terminal cells); missing → "—"."""
    return f"{as_float(value):.{digits}g}" if finite(value) else "—"


def fmt_pm(estimate: Any, se: Any, decimals: int = 2) -> str:
    """An estimate with its SE as "estimate ± SE"."""
    return f"{fmt(estimate, decimals)} ± {fmt(se, decimals)}"
