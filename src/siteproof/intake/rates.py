"""Known assignment rates: the randomization cell table, declared or realized rates, and their checks.

Each unit's known rate is the declared rate of its site (or site × stratum cell) or, when none is declared,
the realized treated share of the cell; the realized treated count of each cell is tested against its
declared rate with an exact binomial test.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .sitetrials import MIN_PER_ARM, natural_key, rate_test, site_order
from .spec import StudySpec
from .values import closest, examples
from ..core.errors import SiteproofError

RATE_WARNING_P = 0.001
NAMED_SITES = 5


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
            f"of the usable data{closest(key, sites)}",
            f"declare rates only for these sites: {examples(sites, 12)}",
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


def attach_rates(
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
    if stratum is not None:
        notes += excluded_cells(cells)
    lookup = dict(zip(zip(cells["site"], cells["stratum"]), cells[rate_column]))
    unit_strata = stratum if stratum is not None else [None] * site.size
    known = np.array([lookup[cell] for cell in zip(site, unit_strata)], dtype=float)
    columns = ["site", "stratum", "n", "n_treated", "n_control", "rate_declared", "rate_realized", "binom_p", "warning"]
    return known, cells[columns], source, notes


def _arm_shortfall(size: int, treated: int) -> str:
    """Why a group with ``treated`` of ``size`` units treated is excluded ("" when it is not)."""
    if treated in (0, size):
        return f"has all {size} units in the {'treated' if treated else 'control'} arm"
    arm, count = ("treated", treated) if treated < size - treated else ("control", size - treated)
    return f"has only {count} unit{'s' if count != 1 else ''} in the {arm} arm" if count < MIN_PER_ARM else ""


def _exclusion_notes(reasons: dict[str, str], total: int, what: str) -> list[str]:
    """One line per excluded site/cell up to :data:`NAMED_SITES`, else one summary line naming the first."""
    if len(reasons) <= NAMED_SITES:
        return [f"{what} '{label}' {why}; it is excluded from the design-based estimates"
                for label, why in reasons.items()]
    shown = ", ".join(list(reasons)[:NAMED_SITES])
    return [f"{len(reasons)} of {total} {what}s ({shown}, …) are excluded from the design-based estimates: "
            f"fewer than {MIN_PER_ARM} units in an arm (the scorecard lists them all)"]


def one_arm_sites(site: np.ndarray, w: np.ndarray) -> list[str]:
    """Warnings naming every site the design-based estimates exclude (fewer than MIN_PER_ARM units in an arm).

    Up to :data:`NAMED_SITES` sites get a line each ("site 'c' has all 20 units in the treated arm …");
    more are summarised in one line that names the first of them and counts the rest.
    """
    table = pd.DataFrame({"site": site, "w": w}).groupby("site")["w"].agg(["size", "sum"])
    reasons = {label: _arm_shortfall(int(table.at[label, "size"]), int(table.at[label, "sum"]))
               for label in site_order(table.index)}
    return _exclusion_notes({k: v for k, v in reasons.items() if v}, len(table), "site")


def excluded_cells(cells: pd.DataFrame) -> list[str]:
    """With strata: warnings naming the site × stratum cells that are excluded although their site as a whole
    has at least MIN_PER_ARM units in each arm (whole sites are named by :func:`one_arm_sites`)."""
    per_site = cells.groupby("site")[["n_treated", "n_control"]].sum()
    whole = {label for label, row in per_site.iterrows() if min(row["n_treated"], row["n_control"]) < MIN_PER_ARM}
    reasons = {f"{row.site}:{row.stratum}": _arm_shortfall(int(row.n), int(row.n_treated))
               for row in cells.itertuples() if row.site not in whole}
    return _exclusion_notes({k: v for k, v in reasons.items() if v}, len(cells), "cell")
