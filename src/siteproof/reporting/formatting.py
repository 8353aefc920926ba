"""Number formatting shared by the report and the terminal screens: one text for one number everywhere.

The rule for an estimate with a standard error (the SE rule):

* the SE is rounded to 2 significant digits, d = 2 − 1 − ⌊log₁₀ SE⌋ decimals (one fewer when rounding carries
  into a new digit, 0.0996 → 0.10);
* the estimate and its CI bounds are rounded to the same decimal place d (an estimate's digits beyond its SE's
  second significant digit are noise);
* a CI bound that is not 0 never prints as 0: decimals are added (to both bounds) until every non-zero bound
  keeps its sign, so a CI that excludes 0 never reads as touching it ([0.0041, 0.75] → [0.004, 0.750]).

This is common practice in reporting: the GUM (JCGM 100:2008, §7.2.6; from memory) quotes an uncertainty "to at
most two significant digits" and the estimate to match, and Cole (2015, "Too many digits: the presentation of
numerical data", Arch Dis Child 100:608–609; from memory) recommends rounding estimates to the precision their
SE supports.

Numbers without an SE use fixed decimals (:func:`fmt`) or significant digits with the trailing zeros kept
(:func:`fmt_sig`: 14.0 beside 16.4, never 14).  Ordinary magnitudes, 10⁻⁶ ≤ |x| < 10⁹, are always written in
fixed notation (1280, not 1.28e+03).  Percentages carry a % sign, negative ones too (-766 %).  Missing values
(None, null, NaN, ±inf) are written "—", and a value that rounds to zero is written without a minus sign.
"""

from __future__ import annotations

import math
from typing import Any

from ..core.interpret import Z_95

SE_DIGITS = 2            # significant digits of an SE (GUM §7.2.6)
MAX_DECIMALS = 12        # never more decimals than this
FIXED_LOW, FIXED_HIGH = 1e-6, 1e9  # |x| in this range is written in fixed notation
MISSING = "—"


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


def _fixed(x: float, decimals: int) -> str:
    """``x`` rounded to ``decimals`` places (negative: to tens, hundreds, …), fixed notation, no "-0"."""
    decimals = min(decimals, MAX_DECIMALS)
    if decimals < 0:
        x, decimals = round(x, decimals), 0
    text = f"{x:.{decimals}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def se_decimals(se: Any, digits: int = SE_DIGITS) -> int | None:
    """The decimal place of ``se`` rounded to ``digits`` significant digits: d = digits − 1 − ⌊log₁₀|se|⌋,
    less one when the rounding carries (0.0996 → 0.10 has d = 2).  None when the SE is missing or 0."""
    if not finite(se) or as_float(se) == 0:
        return None
    se = abs(as_float(se))
    d = digits - 1 - math.floor(math.log10(se))
    rounded = round(se, d)
    if rounded > 0 and math.floor(math.log10(rounded)) > math.floor(math.log10(se)):
        d -= 1
    return min(d, MAX_DECIMALS)


def _sign_keeping(bounds: tuple[float, ...], decimals: int) -> int:
    """The fewest decimals ≥ ``decimals`` at which no non-zero bound rounds to 0 (capped at MAX_DECIMALS)."""
    for b in bounds:
        while b != 0 and round(b, decimals) == 0 and decimals < MAX_DECIMALS:
            decimals += 1
    return decimals


def fmt(value: Any, decimals: int = 3) -> str:
    """A number with fixed decimals; missing → "—"."""
    return _fixed(as_float(value), decimals) if finite(value) else MISSING


def fmt_ci(ci: Any, decimals: int = 3) -> str:
    """An interval as "[low, high]" with ``decimals`` decimals, more when a non-zero bound would round to 0;
    "—" unless both ends are finite."""
    lo, hi = (ci or [None, None])[:2]
    if not finite(lo, hi):
        return MISSING
    lo, hi = as_float(lo), as_float(hi)
    d = _sign_keeping((lo, hi), decimals)
    return f"[{_fixed(lo, d)}, {_fixed(hi, d)}]"


def fmt_p(p: Any) -> str:
    """A p-value with 3 decimals, "<0.001" below 0.001."""
    if not finite(p):
        return MISSING
    return "<0.001" if as_float(p) < 0.001 else f"{as_float(p):.3f}"


def fmt_pct(share: Any, decimals: int = 0) -> str:
    """A share (0–1) as a percentage, e.g. "42 %" (negative shares too: "-5 %")."""
    return f"{_fixed(100 * as_float(share), decimals)} %" if finite(share) else MISSING


def fmt_percent_change(percent: Any, decimals: int = 0) -> str:
    """A value already in percent (e.g. a percent bias reduction 100·(1 − |D|/|D_naive|)) with its sign and a %
    sign: -766 → "-766 %", 85.2 → "85 %"."""
    return f"{_fixed(as_float(percent), decimals)} %" if finite(percent) else MISSING


def fmt_pbr(pbr: dict | None, not_meaningful: str = "not meaningful") -> str:
    """A percent bias reduction record {estimate, ci, meaningful} as "85 % [40, 130]"; ``not_meaningful`` when
    the naive bias is not distinguishable from 0 (then the ratio has no stable meaning); "—" when absent."""
    pbr = pbr or {}
    if not finite(pbr.get("estimate")):
        return MISSING
    if not pbr.get("meaningful"):
        return not_meaningful
    return f"{fmt_percent_change(pbr.get('estimate'))} {fmt_ci(pbr.get('ci'), 0)}"


def fmt_sig(value: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant digits, trailing zeros kept (14 → "14.0", -1.7 → "-1.70") and
    fixed notation for ordinary magnitudes (1283 → "1280"); missing → "—"."""
    if not finite(value):
        return MISSING
    x = as_float(value)
    if x == 0:
        return _fixed(0.0, digits - 1)
    if not FIXED_LOW <= abs(x) < FIXED_HIGH:
        return f"{x:.{digits - 1}e}"
    d = digits - 1 - math.floor(math.log10(abs(x)))
    rounded = round(x, d)
    if rounded != 0 and math.floor(math.log10(abs(rounded))) > math.floor(math.log10(abs(x))):
        d -= 1
    return _fixed(x, d)


def fmt_se(se: Any, digits: int = SE_DIGITS) -> str:
    """An SE with ``digits`` significant digits (0.1234 → "0.12", 1283 → "1300"); missing → "—"."""
    d = se_decimals(se, digits)
    if d is None:
        return fmt_sig(se, digits)
    return _fixed(abs(as_float(se)), d)


def fmt_est(estimate: Any, se: Any, digits: int = SE_DIGITS) -> str:
    """An estimate rounded to the decimal place of its SE at ``digits`` significant digits (0.3791 with SE
    0.1912 → "0.38"); without a usable SE, 3 significant digits."""
    if not finite(estimate):
        return MISSING
    d = se_decimals(se, digits)
    return fmt_sig(estimate, 3) if d is None else _fixed(as_float(estimate), d)


def fmt_pm(estimate: Any, se: Any, decimals: int | None = None) -> str:
    """An estimate with its SE as "estimate ± SE"; by default by the SE rule (0.3791, 0.1912 → "0.38 ± 0.19"),
    with ``decimals`` fixed decimals for both when given."""
    if decimals is not None:
        return f"{fmt(estimate, decimals)} ± {fmt(se, decimals)}"
    return f"{fmt_est(estimate, se)} ± {fmt_se(se)}"


def ci_se(ci: Any) -> float:
    """The SE implied by a Wald 95 % interval: (high − low) / (2·z₀.₉₇₅); NaN when an end is missing."""
    lo, hi = (ci or [None, None])[:2]
    return (as_float(hi) - as_float(lo)) / (2 * Z_95) if finite(lo, hi) else math.nan


def fmt_ci_se(ci: Any, se: Any = None, digits: int = SE_DIGITS) -> str:
    """A 95 % CI rounded by the SE rule, with decimals added while a non-zero bound would round to 0:
    [0.0041, 0.75] with SE 0.19 → "[0.004, 0.750]".  Without ``se`` the SE is taken from the interval's width
    (a Wald interval); "—" unless both ends are finite."""
    lo, hi = (ci or [None, None])[:2]
    if not finite(lo, hi):
        return MISSING
    d = se_decimals(se if finite(se) else ci_se(ci), digits)
    if d is None:
        return f"[{fmt_sig(lo)}, {fmt_sig(hi)}]"
    return fmt_ci([lo, hi], d)


def fmt_est_ci(estimate: Any, ci: Any, se: Any = None, digits: int = SE_DIGITS) -> str:
    """"estimate [low, high]" by the SE rule (the SE taken from the interval when not given)."""
    if not finite(estimate):
        return MISSING
    se = se if finite(se) else ci_se(ci)
    return f"{fmt_est(estimate, se, digits)} {fmt_ci_se(ci, se, digits)}"
