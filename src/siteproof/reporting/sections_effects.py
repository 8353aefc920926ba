"""Report sections 3–4: the average effect (each blind estimator against the pooled design-based
effect) and the sites (per-site design-based estimates and their random-effects meta-analysis)."""

from __future__ import annotations

import math
from typing import Any

from ..core.interpret import ALPHA, Q_ALPHA, VERDICT_READING, count_words, estimator_label, verdict_note
from . import figures
from .context import RunView, adjusted_word, interval, margin_note, paired_note, plan_note, verdict_rows
from .document import FigureBlock, Section, Table, Text, Verdict
from .figures import Interval
from .formatting import as_float, finite, fmt, fmt_ci, fmt_p, fmt_pbr
from .sections_sensitivity import sensitivity_parts


def average_section(run: RunView) -> Section:
    rows = list(run.card.get("ate") or [])
    design = run.card.get("design_ate") or {}
    if not rows:
        return Section("average-effect", "Average effect",
                       ("No average-effect comparison is in the scorecard.", "Nothing to score."),
                       [Text("Not run: scorecard.json holds no 'ate' entries.", "absent")])
    labels = [estimator_label(r.get("estimator")) for r in rows]
    blind, diffs, verdicts, own = [], [], [], []
    for label, r in zip(labels, rows):
        blind.append(interval(label, r.get("blind")))
        diffs.append(interval(label, r.get("difference")))
        same = r.get("same_estimand")
        verdicts.append(str(r.get("verdict", "")) if same else adjusted_word(run, f"ate.{r.get('estimator')}",
                                                                              r.get("verdict")))
        own.append(math.nan)
        if same:
            blind.append(interval(f"{label}, same estimand", r.get("blind")))
            diffs.append(interval(label, same.get("difference")))
            verdicts.append(adjusted_word(run, f"ate.{r.get('estimator')}", same.get("verdict")))
            own.append(as_float(same.get("design")))
    fig = figures.average_effect_figure(blind, interval("design", design), diffs, verdicts, run.margin, run.unit,
                                        own_design=own)
    parts: list[Any] = [FigureBlock(
        figures.render(fig, "average-effect"),
        "Left: each blind estimator's 95 % CI (blue) beside the design-based pooled estimate (black line, grey "
        "95 % CI) and the band design ± δ (dashed green); a row marked 'same estimand' compares the overlap-weighted "
        "estimator with the design-based overlap-weighted effect (black square). Right: the paired difference "
        "D = blind − design with its 95 % CI (thin; difference test) and 90 % CI (thick; equivalence test) against "
        "the band ±δ; the verdict is written at the end of each row.")]
    parts.append(_ate_table(run, rows, labels))
    parts += sensitivity_parts(run)
    return Section("average-effect", "Average effect", _average_reading(run, rows), parts)


def _ate_table(run: RunView, rows: list[dict], labels: list[str]) -> Table:
    table_rows = []
    rows_by_claim = verdict_rows(run)
    for label, r in zip(labels, rows):
        b, dif = r.get("blind") or {}, r.get("difference") or {}
        claim = f"ate.{r.get('estimator')}"
        same = r.get("same_estimand")
        row = rows_by_claim.get(claim) or {}
        adjusted = "—" if same else Verdict(adjusted_word(run, claim, r.get("verdict")))
        table_rows.append([label, str(r.get("estimand", "ATE")), run.est_ci(b), run.est_ci(dif),
                           run.ci(r.get("equivalence_ci")), fmt_p(r.get("p_value")), fmt_p(r.get("p_equivalence")),
                           "—" if same else fmt_p(row.get("p_equivalence_adjusted")), fmt_pbr(row.get("percent_bias_reduction")),
                           Verdict(str(r.get("verdict", ""))), adjusted])
        if same:
            sd = same.get("difference") or {}
            table_rows.append([f"{label} vs the design-based ATO {run.num(same.get('design'))}", "ATO", run.num(same.get("blind")), run.est_ci(sd),
                               run.ci(same.get("equivalence_ci")), fmt_p(same.get("p_value")),
                               fmt_p(same.get("p_equivalence")), fmt_p(row.get("p_equivalence_adjusted")), "—",
                               Verdict(str(same.get("verdict", ""))),
                               Verdict(adjusted_word(run, claim, same.get("verdict")))])
    design, oracle = run.card.get("design_ate") or {}, run.card.get("design_oracle_aipw") or {}
    u = run.unit
    return Table(
        f"Blind estimators against the pooled design-based effect ({u})",
        ["estimator", "estimand", f"blind estimate [95 % CI] ({u})", f"D = blind − design [95 % CI] ({u})",
         f"90 % CI of D ({u})", "p (D = 0)", "p (TOST, |D| ≥ δ)", "p (TOST) adjusted",
         "bias reduction (%) [95 % CI]", "verdict", "verdict (adjusted)"],
        table_rows,
        [f"Design-based pooled effect Σ_s (n_s/n)·DiM_s over the included sites: {run.num(design.get('estimate'))} "
         f"(SE {run.num(design.get('se'))}, 95 % CI {run.ci(design.get('ci'))}) {u}. Oracle AIPW with the known "
         f"rates (efficient design-based): {run.num(oracle.get('estimate'))} (95 % CI {run.ci(oracle.get('ci'))}).",
         paired_note(), margin_note(run),
         "p (TOST): the larger of the two one-sided p-values for |D| ≥ δ (Schuirmann 1987); equivalence when it is "
         f"below {ALPHA:g}, i.e. when the 90 % CI of D lies inside ±δ.",
         "Bias reduction = 100·(1 − |D| / |D_naive|) (Shadish, Clark & Steiner 2008): 100 = all of the naive "
         "estimator's bias removed, 0 = none, negative = worse than naive; its 95 % CI is the delta-method interval "
         "from the joint per-unit scores. It is shown as 'not meaningful' when the naive D's 95 % CI includes 0 "
         "(no naive bias to reduce).",
         plan_note(run),
         "Verdict (adjusted): from the p-values adjusted within the average-effect family (the naive estimator, the "
         "reference, is not adjusted); it is the verdict every summary counts.",
         "The overlap-weighted estimator targets the overlap-weighted effect (ATO), another estimand; its second row "
         "compares it with the design-based ATO (same estimand).",
         verdict_note()],
        text=(0, 1),
    )


def _average_reading(run: RunView, rows: list[dict]) -> tuple[str, str]:
    primary = next((r for r in rows if r.get("estimator") == "aipw"), rows[0])
    name = estimator_label(primary.get("estimator"))
    b, dif = primary.get("blind") or {}, primary.get("difference") or {}
    design = run.card.get("design_ate") or {}
    verdict = adjusted_word(run, f"ate.{primary.get('estimator')}", primary.get("verdict"))
    how = VERDICT_READING.get(verdict, "was scored").format(margin=run.num(run.margin))
    first = (f"The blind {name} estimate {run.num(b.get('estimate'))} (95 % CI {run.ci(b.get('ci'))}) against the "
             f"design-based {run.num(design.get('estimate'))}: the paired difference {run.num(dif.get('estimate'))} "
             f"(95 % CI {run.ci(dif.get('ci'))}) {how} — {verdict}.")
    words = [adjusted_word(run, f"ate.{r.get('estimator')}", r.get("verdict")) for r in rows]
    second = f"Across the {len(rows)} blind estimators (adjusted verdicts): {count_words(words)}"
    naive = next((r for r in rows if r.get("estimator") == "naive"), None)
    pbr = verdict_rows(run).get(f"ate.{primary.get('estimator')}", {}).get("percent_bias_reduction") or {}
    if naive is not None and primary is not naive:
        off = run.num((naive.get("difference") or {}).get("estimate"))
        if pbr.get("meaningful") and finite(pbr.get("estimate")):
            change = "removed" if as_float(pbr.get("estimate")) >= 0 else "changed"
            second += (f"; the naive difference in means was off by {off}, and {name} {change} "
                       f"{fmt_pbr(pbr)} of that bias (percent bias reduction with its 95 % CI; negative = "
                       "the adjustment added bias)")
        else:
            second += (f"; the naive difference in means was off by {off}, not distinguishable from 0, so no bias "
                       "reduction is reported")
    return first, second + "."


# ----------------------------------------------------------------------------------------------------------
# 4. sites
# ----------------------------------------------------------------------------------------------------------
def sites_section(run: RunView) -> Section:
    sites = run.card.get("sites") or []
    meta = run.card.get("heterogeneity")
    design = run.card.get("design_ate") or {}
    included = [r for r in sites if r.get("included")]
    parts: list[Any] = []
    if included:
        rows = [Interval(str(r.get("site")), as_float(r.get("difference_in_means")), as_float(r.get("ci_low")), as_float(r.get("ci_high")))
                for r in included]
        random_mean = interval("random effects", meta) if meta else None
        prediction = tuple(as_float(v) for v in (meta.get("prediction_interval") or [None, None])) if meta else None
        fig = figures.forest_figure(rows, [str(r.get("site")) for r in sites if not r.get("included")],
                                    interval("pooled", design), random_mean, prediction, run.unit)
        parts.append(FigureBlock(figures.render(fig, "sites-forest"),
                                 "Each site's difference in means with its 95 % CI (Neyman SE); the pooled "
                                 "design-based estimate (solid diamond, width = 95 % CI); the random-effects mean "
                                 "(light diamond, REML) and the 95 % prediction interval for a new site (dashed)."))
    else:
        parts.append(Text("No site has 2 units in each arm: no per-site estimate to draw.", "absent"))
    parts.append(Table(
        f"Per-site design-based estimates ({run.unit})",
        ["site", "units (n)", "difference in means", "SE", "95 % CI", "Horvitz–Thompson", "Hájek",
         "oracle AIPW"],
        [[r.get("site"), r.get("n"), run.num(r.get("difference_in_means")), run.num(r.get("se")),
          fmt_ci([r.get("ci_low"), r.get("ci_high")], run.d), run.num(r.get("ht")), run.num(r.get("hajek")),
          run.num(r.get("oracle_aipw"))] for r in sites],
        ["Difference in means: treated mean − control mean within the site, SE √(s₁²/n₁ + s₀²/n₀) (Neyman 1923). "
         "Horvitz–Thompson and Hájek use the site's known rate; oracle AIPW is the mean of the design-based scores "
         "(known rate, cross-fitted outcome models) in the site. '—' = not estimable (a site without 2 units per "
         "arm)."],
    ))
    if meta:
        parts.append(Table(
            "Between-site heterogeneity of the effect (random-effects meta-analysis of the differences in means)",
            ["sites (k)", "Cochran's Q", "df", "p (Q)", "I² (%)", f"τ² DL ({run.unit})²", f"τ² REML ({run.unit})²",
             f"random-effects mean ({run.unit})", "95 % CI", "95 % prediction interval"],
            [[meta.get("k", "—"), fmt(meta.get("q"), 2), meta.get("q_df", "—"), fmt_p(meta.get("q_pvalue")),
              fmt(meta.get("i2"), 1), fmt(meta.get("tau2_dl"), run.d + 1), fmt(meta.get("tau2_reml"), run.d + 1),
              run.num(meta.get("estimate")), run.ci(meta.get("ci")), run.ci(meta.get("prediction_interval"))]],
            ["Q = Σ w_s(y_s − ȳ_FE)² with w_s = 1/SE_s², compared with χ² on k − 1 df. τ² = between-site variance of "
             "the true effects, by DerSimonian & Laird (1986) and by REML (Viechtbauer 2005). I² = share of the "
             "variation due to heterogeneity, from the REML τ² (Higgins & Thompson 2002). Prediction interval: "
             "mean ± t_{k−2}·√(τ² + SE²) (Higgins, Thompson & Spiegelhalter 2009); undefined with k = 2. " +
             str(meta.get("note") or "")],
        ))
    else:
        parts.append(Text("Meta-analysis not run: it needs at least 2 sites with a usable estimate.", "absent"))
    return Section("sites", "Sites", _sites_reading(run, included, meta), parts)


def _sites_reading(run: RunView, included: list[dict], meta: dict | None) -> tuple[str, str]:
    usable = [r for r in included if finite(r.get("difference_in_means"))]
    if not usable:
        return "No site has an estimable difference in means.", "The between-site comparison was not run."
    low = min(usable, key=lambda r: as_float(r.get("difference_in_means")))
    high = max(usable, key=lambda r: as_float(r.get("difference_in_means")))
    first = (f"Site effects range from {run.num(low.get('difference_in_means'))} ({low.get('site')}) to "
             f"{run.num(high.get('difference_in_means'))} ({high.get('site')}) {run.unit}.")
    if not meta:
        return first, "With fewer than 2 usable sites there is no meta-analysis."
    p = as_float(meta.get("q_pvalue"))
    test = "rejects" if finite(p) and p < Q_ALPHA else "does not reject"
    pi = meta.get("prediction_interval") or [None, None]
    pi_text = (f"a new site's effect would lie in {run.ci(pi)} with 95 % probability" if finite(*pi)
               else "no prediction interval is possible with 2 sites")
    return first, (f"Cochran's Q = {fmt(meta.get('q'), 2)} (p = {fmt_p(p)}) {test} equal effects at the 5 % level; "
                   f"I² = {fmt(meta.get('i2'), 0)} %, and {pi_text}.")

