"""Report sections 1–2: the study and its design (sizes, assignment rates, warnings) and overlap
(the learned propensity against the known rates)."""

from __future__ import annotations

import math
from typing import Any

from ..core.interpret import OVERLAP_BAND, RATE_P, Z_95, calibration_judgement, rate_contradicted
from . import figures
from .context import RunView
from .document import Facts, FigureBlock, Heading, ItemList, Section, Table, Text
from .figures import Interval
from .formatting import as_float, finite, fmt, fmt_ci, fmt_p, fmt_pct


def study_section(run: RunView) -> Section:
    sites = run.card.get("sites") or []
    s = run.study
    declared = [as_float(r.get("rate_declared")) for r in sites]
    any_declared = any(math.isfinite(v) for v in declared)
    parts: list[Any] = []
    if sites:
        realized = []
        for r in sites:
            p, n = as_float(r.get("rate_realized")), as_float(r.get("n"))
            half = Z_95 * math.sqrt(p * (1 - p) / n) if finite(p, n) and n > 0 else math.nan
            realized.append(Interval(str(r.get("site")), p, max(0.0, p - half), min(1.0, p + half)))
        fig = figures.rates_figure([str(r.get("site")) for r in sites], realized, declared)
        parts.append(FigureBlock(figures.render(fig, "study-rates"),
                                 "Realized share treated in each site (square, 95 % binomial Wald interval "
                                 "p ± 1.96·√(p(1−p)/n)) beside the declared rate (open diamond, when declared)."))
    rows = [[r.get("site"), r.get("n"), r.get("n_treated"), r.get("n_control"), fmt(r.get("rate_declared"), 3),
             fmt(r.get("rate_realized"), 3), fmt_p(r.get("binom_p")), "yes" if r.get("included") else "no"]
            for r in sites]
    parts.append(Table(
        "Sites: sizes and assignment rates",
        ["site", "units (n)", "treated (n)", "control (n)", "declared rate (proportion)",
         "realized rate (proportion)", "binomial p", "in the comparison"],
        rows,
        ["Realized rate = treated / units. Binomial p: exact two-sided test of the treated count against the "
         "declared rate (a site's count is a sum of binomials when strata have different rates); p < "
         f"{RATE_P:g} flags a site whose assignment does not look like its declared rate. '—' = no rate declared.",
         "A site is in the comparison when it has at least 2 units in each arm."],
        text=(0, 7),
    ))
    excluded = list(s.get("excluded_sites") or [])
    parts.append(Text(
        "Excluded from every comparison (fewer than 2 units in an arm): " + ", ".join(excluded) + "."
        if excluded else "No site was excluded: every site has at least 2 units in each arm.", "note"))
    facts = [
        ("units analysed", str(s.get("n", run.data.get("n", "—")))),
        ("units compared", str(s.get("n_included", "—"))),
        ("sites", str(s.get("n_sites", len(sites)))),
        ("outcome", run.outcome),
        ("treatment", f"{run.data.get('treatment', '—')} (treated value: {run.data.get('treated_value', '—')})"),
        ("covariates", f"{len(run.data.get('covariates') or [])} columns → {len(run.data.get('features') or [])} "
                       "features"),
        ("units dropped at intake", ", ".join(f"{k.replace('_', ' ')}: {v}"
                                             for k, v in (run.data.get("excluded") or {}).items()) or "none"),
        ("known rates", str(run.card.get("rates_source") or s.get("rates_source") or "—")),
        ("equivalence margin δ", f"{run.num(run.margin)} {run.unit} — {s.get('margin_source', '—')}"),
    ]
    parts.append(Facts(tuple(facts)))
    warnings = list(run.card.get("warnings") or [])
    parts.append(Heading("Warnings"))
    parts.append(ItemList(tuple(warnings)) if warnings else Text("No warnings were raised.", "note"))
    return Section("study", "Study and design", _study_reading(run, sites, any_declared), parts)


def _study_reading(run: RunView, sites: list[dict], any_declared: bool) -> tuple[str, str]:
    s = run.study
    design = run.card.get("design_ate") or {}
    first = (f"{s.get('n', '—')} units in {s.get('n_sites', len(sites))} sites, {s.get('n_included', '—')} of them "
             f"compared; the design-based pooled effect is {run.num(design.get('estimate'))} {run.unit} "
             f"(95 % CI {run.ci(design.get('ci'))}).")
    if not any_declared:
        return first, ("No assignment rate was declared, so the realized shares stand in for the known rates and "
                       "cannot be checked against a declaration.")
    flagged = [str(r.get("site")) for r in sites if rate_contradicted(as_float(r.get("binom_p")))]
    tested = [as_float(r.get("binom_p")) for r in sites if finite(r.get("binom_p"))]
    if flagged:
        second = (f"The realized treated share contradicts the declared rate in {len(flagged)} site(s): "
                  f"{', '.join(flagged)} (exact binomial p < {RATE_P:g}); check how those sites assigned treatment.")
    else:
        second = (f"Every tested site's realized treated share is consistent with its declared rate "
                  f"(smallest exact binomial p = {fmt_p(min(tested)) if tested else '—'}).")
    return first, second


# ----------------------------------------------------------------------------------------------------------
# 2. overlap
# ----------------------------------------------------------------------------------------------------------
def overlap_section(run: RunView) -> Section:
    overlap = run.claims.get("overlap") or {}
    prop = run.card.get("propensity") or {}
    band = overlap.get("band") or list(OVERLAP_BAND)
    arms = overlap.get("by_arm") or {}
    parts: list[Any] = []
    hist = overlap.get("histogram")
    if hist:
        fig = figures.propensity_histogram(hist["edges"], hist["treated"], hist["control"], band)
        parts.append(FigureBlock(figures.render(fig, "overlap-histogram"),
                                 "Out-of-fold learned propensity ê of treated units (upper panel) and control units "
                                 f"(lower panel, hatched); dotted lines mark [{band[0]:g}, {band[1]:g}]."))
    elif arms:
        fig = figures.propensity_quantiles({k: v.get("quantiles", {}) for k, v in arms.items()}, band)
        parts.append(FigureBlock(figures.render(fig, "overlap-quantiles"),
                                 "Distribution of the out-of-fold learned propensity ê by arm: min–max (thin), "
                                 "5–95 % (medium), 25–75 % (thick) and median (bar); dotted lines mark "
                                 f"[{band[0]:g}, {band[1]:g}]. (These claims hold quantiles, not histogram counts.)"))
    else:
        parts.append(Text("Overlap summary not found in claims.json: nothing to draw.", "absent"))
    bins = prop.get("calibration_bins") or []
    by_site = prop.get("by_site") or []
    if bins and by_site:
        fig = figures.calibration_figure(
            [Interval(str(b.get("bin")), as_float(b.get("known_rate_mean")),
                      as_float(b.get("known_rate_mean")) - Z_95 * as_float(b.get("known_rate_se")),
                      as_float(b.get("known_rate_mean")) + Z_95 * as_float(b.get("known_rate_se"))) for b in bins],
            [as_float(b.get("e_hat_mean")) for b in bins],
            [Interval(str(r.get("site")), as_float(r.get("e_hat_mean")), as_float(r.get("e_hat_q10")), as_float(r.get("e_hat_q90")))
             for r in by_site],
            [as_float(r.get("known_rate")) for r in by_site],
        )
        parts.append(FigureBlock(figures.render(fig, "overlap-calibration"),
                                 "Left: mean known rate (95 % CI, mean ± 1.96·SE) in each decile bin of ê, against "
                                 "the bin's mean ê; a correct ê lies on the dashed line, because E[e_S | ê] = ê. "
                                 "Right: each site's mean ê and its 10–90 % range against the site's known rate; "
                                 "ê targets the mixture E[e_S | X], so sites are pulled toward each other."))
    else:
        parts.append(Text("Propensity recovery not found in scorecard.json: the calibration figure is not drawn.",
                          "absent"))
    parts.append(_overlap_table(run, arms, prop))
    return Section("overlap", "Overlap", overlap_reading(run, overlap, prop), parts)


def _overlap_table(run: RunView, arms: dict, prop: dict) -> Table:
    rows = []
    ess = (prop.get("weights") or {}).get("ess") or {}
    for arm in ("treated", "control"):
        a = arms.get(arm) or {}
        q = a.get("quantiles") or {}
        e = ess.get(arm) or {}
        rows.append([arm, a.get("n", "—"), fmt(a.get("mean"), 3), fmt(q.get("p05"), 3), fmt(q.get("p50"), 3),
                     fmt(q.get("p95"), 3), fmt_pct(a.get("share_outside_band"), 1), fmt(a.get("kish_ess"), 0),
                     fmt(e.get("ess_true"), 0)])
    slope, intercept = prop.get("calibration_slope") or {}, prop.get("calibration_intercept") or {}
    site_pred = prop.get("site_prediction") or {}
    notes = [
        "ê: out-of-fold learned propensity (probability). Outside band: share of the arm's units with ê outside "
        f"{_band_text()} (Crump, Hotz, Imbens & Mitnik 2009). "
        "Kish ESS = (Σa)²/Σa² of the inverse-probability weights "
        "a (units): with ê as learned, and with the known rates.",
        f"Calibration of the known rate on ê (least squares, HC2 SE): slope {fmt(slope.get('estimate'), 3)} "
        f"(95 % CI {fmt_ci(slope.get('ci'), 3)}; ideal 1), intercept {fmt(intercept.get('estimate'), 3)} "
        f"(95 % CI {fmt_ci(intercept.get('ci'), 3)}; ideal 0).",
        f"RMSE of ê against the known rate: {fmt(prop.get('rmse'), 3)} (probability), estimated floor for a perfect "
        f"ê {fmt(prop.get('rmse_floor'), 3)}. " + str(prop.get("rmse_caveat") or ""),
    ]
    if site_pred:
        acc = site_pred.get("accuracy") or {}
        notes.append(f"The covariates predict the site with cross-validated accuracy {fmt_pct(acc.get('estimate'), 1)} "
                     f"against {fmt_pct(site_pred.get('majority_share'), 1)} for always guessing the largest site: "
                     "how much of the site the blind analysis could see.")
    return Table("Learned propensity ê by arm (ê is a probability)",
                 ["arm", "units (n)", "mean ê", "5th pct ê", "median ê", "95th pct ê", "outside band (% of arm)",
                  "Kish ESS, learned ê (units)", "Kish ESS, known rates (units)"], rows, notes)


def overlap_reading(run: RunView, overlap: dict, prop: dict) -> tuple[str, str]:
    arms = overlap.get("by_arm") or {}
    med = {a: ((arms.get(a) or {}).get("quantiles") or {}).get("p50") for a in ("treated", "control")}
    first = (f"The learned propensity has median {fmt(med['treated'], 2)} among treated and {fmt(med['control'], 2)} "
             f"among control units; {fmt_pct(overlap.get('share_outside_band'), 1)} of units lie outside "
             f"{_band_text()} and {overlap.get('n_clipped', '—')} were clipped.")
    slope = prop.get("calibration_slope") or {}
    b, ci = as_float(slope.get("estimate")), slope.get("ci") or [None, None]
    if not finite(b, *ci):
        return first, "The calibration of ê against the known rates could not be estimated."
    return first, (f"The slope of the known rate on ê is {fmt(b, 2)} (95 % CI {fmt_ci(ci, 2)}; ideal 1), "
                   f"{calibration_judgement(b, [as_float(ci[0]), as_float(ci[1])])}.")


def _band_text() -> str:
    """The overlap band as text, e.g. '[0.05, 0.95]'."""
    return f"[{OVERLAP_BAND[0]:g}, {OVERLAP_BAND[1]:g}]"

