"""Terminal screens: the blind claims (from ``claims.json`` content) and the unmask scorecard.

Presentation only — every number comes from the claims record or the scorecard; nothing is estimated here.
"""

from __future__ import annotations

from typing import Any

from rich import box
from rich.table import Table
from rich.text import Text

from ..blind.claims import Claims
from ..core.interpret import (
    DIFFERENT,
    EQUIVALENT,
    HETEROGENEITY_MEANING,
    HETEROGENEITY_SHORT,
    INDETERMINATE,
    TRIVIALLY_DIFFERENT,
    calibration_judgement,
    estimator_label,
    model_label,
    verdict_note,
)
from ..unmask.correspondence import Comparison
from ..unmask.scorecard import Scorecard
from .formatting import fmt, fmt_ci, fmt_pbr, fmt_pct, fmt_pm, fmt_sig

SCREEN_RULES = (".threshold", ".top20", "tree")


def _header(record: dict[str, Any]) -> Text:
    data, nuis = record["data"], record["nuisance"]
    picks = ", ".join(f"{name} → {label}" for name, label in nuis["picks"].items())
    excluded = sum(data["excluded"].values())
    lines = [
        f"Blind analysis of {data['n']:,} units ({data['n_treated']:,} treated); site labels hidden. "
        f"Outcome: {data['outcome']}. {len(data['features'])} covariate features.",
        f"Excluded for a missing outcome or treatment: {excluded}. Cross-fitting: {record['settings']['folds']} folds, "
        f"seed {record['settings']['seed']}.",
        f"Learner picked by out-of-fold loss: {picks}. Propensities clipped to {nuis['clip']}: "
        f"{nuis['n_clipped']} units.",
    ]
    return Text("\n".join(lines))


def ate_table(record: dict[str, Any]) -> Table:
    """One row per average-effect estimator: estimate, SE and 95 % CI, in outcome units."""
    unit = record["data"]["outcome"]
    table = Table(title=f"Average effect of treatment on {unit} (blind)", title_justify="left")
    for col in ("estimator", "estimand", "estimate", "SE", "95% CI"):
        table.add_column(col, justify="left" if col in ("estimator", "estimand") else "right")
    for row in record["ate"]:
        table.add_row(
            estimator_label(row["estimator"]), row["estimand"],
            fmt(row["estimate"], 2), fmt(row["se"], 2), fmt_ci(row["ci"], 2),
        )
    return table


def cate_table(record: dict[str, Any]) -> Table:
    """One row per effect model: R-loss difference vs constant, BLP β₂, AUTOC and the high − low split."""
    table = Table(title="Heterogeneous effects (out-of-fold τ̂, blind AIPW scores)", title_justify="left",
                  caption="ΔR-loss < 0: the model beats a constant effect (t = Δ/SE). β₂ ≈ 1: τ̂ is well "
                          "calibrated; β₂ > 0 (one-sided p): heterogeneity detected. AUTOC > 0: ranking by τ̂ "
                          "finds units with larger effects. High − low: mean effect above minus below the median "
                          "of τ̂. All in outcome units except β₂ and t; ± is one SE.",
                  caption_justify="left")
    for col in ("model", "ΔR-loss ± SE", "t", "β₂ ± SE", "p(β₂>0)", "AUTOC ± SE", "high − low ± SE"):
        table.add_column(col, justify="left" if col == "model" else "right")
    for row in record["cate"]:
        if row["model"] == "constant":
            continue
        diff = row["r_loss"]["difference"]
        table.add_row(
            model_label(row["model"]),
            fmt_pm(diff["estimate"], diff["se"], 3), fmt(row["r_loss"]["t"], 1),
            fmt_pm(row["blp"]["beta2"]["estimate"], row["blp"]["beta2"]["se"]),
            fmt(row["blp"]["p_beta2_positive"], 3),
            fmt_pm(row["autoc"]["estimate"], row["autoc"]["se"]),
            fmt_pm(row["gates"]["high_low"]["estimate"], row["gates"]["high_low"]["se"]),
        )
    return table


def rules_table(record: dict[str, Any]) -> Table:
    """Each model's threshold and top-20 % rules and the tree: treated share, value, gain over random
    allocation with the same share (every rule is in claims.json)."""
    table = Table(title="Learned treatment rules (doubly robust value, blind)", title_justify="left",
                  caption="Value: mean outcome (net of cost when a cost column exists) if the rule were followed. "
                          "Gain: value minus random allocation treating the same share. ± is one SE.",
                  caption_justify="left")
    for col in ("rule", "treated", "value ± SE", "gain ± SE", "gain 95% CI"):
        table.add_column(col, justify="left" if col == "rule" else "right")
    for row in record["rules"]:
        if not row["rule"].endswith(SCREEN_RULES):
            continue
        table.add_row(
            row["rule"], fmt_pct(row["treated_share"]),
            fmt_pm(row["value"]["estimate"], row["value"]["se"]),
            fmt_pm(row["gain"]["estimate"], row["gain"]["se"]), fmt_ci(row["gain"]["ci"], 2),
        )
    return table


def claims_renderables(claims: Claims) -> list[Any]:
    """Everything the ``blind`` verb prints, top to bottom."""
    record = claims.to_dict()
    items: list[Any] = [_header(record), ate_table(record), cate_table(record), rules_table(record)]
    tree = next((r for r in record["rules"] if r["kind"] == "tree"), None)
    if tree is not None:
        items.append(Text("Depth-2 rule (fit on all units; value above is out-of-fold):\n" + tree["tree_text"]))
    for message in record["warnings"]:
        items.append(Text(f"warning: {message}", style="bold"))
    return items


# --------------------------------------------------------------------------------------------------------
# the unmask screen: one-screen scorecard summary (rich renderables; the CLI prints them)
# --------------------------------------------------------------------------------------------------------
_STYLE = {EQUIVALENT: "green", TRIVIALLY_DIFFERENT: "yellow", DIFFERENT: "bold red", INDETERMINATE: "dim"}


def _v(verdict: str) -> Text:
    return Text(verdict, style=_STYLE.get(verdict, ""))


def _verdict_cell(raw: str, adjusted: str) -> Text:
    """The verdict that counts (adjusted within the claim family); the raw verdict below it when they differ."""
    if not adjusted or adjusted == raw:
        return _v(adjusted or raw)
    cell = _v(adjusted)
    cell.append(f"\n(raw: {raw})", style="dim")
    return cell


def _pbr_cell(pbr: dict | None) -> str:
    """Percent bias reduction on one line and its 95 % CI on the next ('n.m.': naive D not distinguishable)."""
    text = fmt_pbr(pbr, "n.m.")
    return text.replace(" [", "\n[", 1) if pbr else ""


def _num(x: float | None, digits: int = 3) -> str:
    """A compact number (``digits`` significant digits) for a scorecard cell."""
    return fmt_sig(x, digits)


def _diff(c: Comparison) -> str:
    """D ± the half-width of its 95 % CI (a Wald interval, so this is the CI written compactly)."""
    d = c.difference
    half = (d.ci[1] - d.ci[0]) / 2.0
    return fmt_pm(d.estimate, half)


def _table(title: str, columns: list[tuple[str, str]]) -> Table:
    """A compact table: one line per claim (no wrapping in the cells), headers may wrap."""
    t = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, padding=(0, 0, 0, 1), pad_edge=False)
    for header, justify in columns:
        t.add_column(header, justify=justify, no_wrap=True)
    return t


def scorecard_legend(scorecard: Scorecard) -> Text:
    """The footnote that defines every number and abbreviation of the scorecard screens of several runs
    (printed once, after them)."""
    return _footnote(scorecard, scorecard.study.get("outcome") or "outcome", one_run=False)


def scorecard_renderables(scorecard: Scorecard, legend: bool = True) -> list:
    """The one-screen summary: headline, one line per claim with its verdict, context lines and (with
    ``legend``) the footnote that defines every number."""
    s = scorecard.study
    unit = s.get("outcome") or "outcome"
    design = scorecard.design.estimate
    out: list = [
        Text(scorecard.headline, style="bold"),
        Text(
            f"{s['n']} units in {s['n_sites']} sites ({s['n_included']} compared). Known rates: "
            f"{scorecard.rates_source}. Margin δ = {_num(scorecard.margin)} ({unit} units; {s['margin_source']}). "
            f"Design-based ATE {_num(design.estimate)} (SE {_num(design.se)}), oracle AIPW "
            f"{_num(scorecard.oracle.estimate)}, naive {_num(scorecard.naive.estimate)}.",
            style="dim",
        ),
        *[Text(f"Deviation from the locked analysis plan: {d['field']} {d['planned']} → {d['used']}.", style="bold red")
          for d in scorecard.plan.get("deviations", [])],
        _ate_table(scorecard, unit),
    ]
    if scorecard.cate:
        out.append(_cate_table(scorecard, unit))
    if scorecard.rules:
        out.append(_rules_table(scorecard, unit))
    out.append(_context_text(scorecard))
    if legend:
        out.append(_footnote(scorecard, unit))
    return out


def _ate_table(scorecard: Scorecard, unit: str) -> Table:
    t = _table(
        f"Average effect ({unit} units): each blind estimator vs the pooled design-based ATE",
        [("estimator", "left"), ("blind", "right"), ("design", "right"), ("D ± 95% CI", "right"),
         ("bias red.\n[95% CI]", "right"), ("verdict\n(adjusted)", "left")],
    )
    rows = _rows(scorecard)
    for row in scorecard.ate:
        c = row.comparison
        claim = rows.get(f"ate.{row.estimator}", {})
        name = row.estimator + (" (ATO)" if row.same_estimand is not None else "")
        if row.same_estimand is None:
            t.add_row(name, _num(c.blind), _num(c.design), _diff(c), _pbr_cell(claim.get("percent_bias_reduction")),
                      _verdict_cell(c.verdict, claim.get("verdict_adjusted", "")))
        else:
            same = row.same_estimand
            t.add_row(name, _num(c.blind), _num(c.design), _diff(c), _pbr_cell(claim.get("percent_bias_reduction")),
                      Text("— (ATO: next row)", style="dim"))
            t.add_row("  vs design ATO", _num(same.blind), _num(same.design), _diff(same), "",
                      _verdict_cell(same.verdict, claim.get("verdict_adjusted", "")))
    return t


def _rows(scorecard: Scorecard) -> dict[str, dict]:
    """The verdicts table keyed by claim id."""
    return {r["claim"]: r for r in scorecard.verdicts}


def _cate_table(scorecard: Scorecard, unit: str) -> Table:
    t = _table(
        f"Effect rankings: AUTOC ({unit} units) and BLP β₂ (ideal 1), blind vs design scores",
        [("model", "left"), ("AUTOC\nblind", "right"), ("AUTOC\ndesign", "right"), ("D ± 95% CI", "right"),
         ("verdict\n(adjusted)", "left"), ("β₂ blind/\ndesign", "right"), ("heter-\nogeneity", "left")],
    )
    rows = _rows(scorecard)
    for row in scorecard.cate:
        a, b2 = row.autoc, row.beta2
        beta = f"{_num(b2.blind, 2)}/{_num(b2.design, 2)}" if b2 is not None else "—"
        status = row.heterogeneity["status"]
        adjusted = rows.get(f"cate.{row.model}.autoc", {}).get("verdict_adjusted", "")
        t.add_row(row.model, _num(a.blind), _num(a.design), _diff(a), _verdict_cell(a.verdict, adjusted), beta,
                  HETEROGENEITY_SHORT.get(status, status))
    return t


def _rules_table(scorecard: Scorecard, unit: str) -> Table:
    """The rules a reader compares first: each model's threshold rule and top-20 % budget rule, and the tree.

    Every other budget rule is in scorecard.json and the report; the caption says how many.
    """
    shown = [row for row in scorecard.rules if row.rule.endswith(SCREEN_RULES)]
    t = _table(
        f"Treatment rules: gain over random allocation at the same treated share ({unit} units)",
        [("rule", "left"), ("treat\n%", "right"), ("gain\nblind", "right"), ("gain\ndesign", "right"),
         ("D ± 95% CI", "right"), ("verdict\n(adjusted)", "left"), ("sites\n+", "right")],
    )
    rows = _rows(scorecard)
    t.caption = (f"{len(shown)} of {len(scorecard.rules)} rules shown; the other budget rules are in "
                 "scorecard.json and the report.")
    t.caption_justify = "left"
    for row in shown:
        g = row.gain if row.has_contrast else row.value
        agree, total = row.sites_agreeing
        name = row.rule if row.has_contrast else f"{row.rule}*"
        t.add_row(name, fmt(100 * row.treated_share, 0), _num(g.blind), _num(g.design), _diff(g),
                  _verdict_cell(row.verdict, rows.get(f"rule.{row.rule}", {}).get("verdict_adjusted", "")),
                  f"{agree}/{total}")
    return t


def _context_text(scorecard: Scorecard) -> Text:
    p = scorecard.propensity
    slope = p.calibration_slope
    lines = [
        f"Propensity: slope of the known rate e_S on ê {_num(slope.estimate)} (SE {_num(slope.se)}; ideal 1), "
        f"{calibration_judgement(slope.estimate, slope.ci)}; "
        f"RMSE |ê − e_S| {_num(p.rmse)} vs ≈ {_num(p.rmse_floor)} for a perfect ê (ê targets the mixture "
        "E[e_S | X], not e_S)."
    ]
    if p.site_prediction is not None:
        sp = p.site_prediction
        lines.append(
            f"Site visible from the covariates: cross-validated accuracy {fmt_pct(sp.accuracy.estimate)} vs "
            f"{fmt_pct(sp.majority_share)} by always guessing the largest site."
        )
    if scorecard.meta_reml is not None:
        m, dl = scorecard.meta_reml, scorecard.meta_dl
        pi = m.prediction_interval
        lines.append(
            f"Between sites (per-site differences in means): Q = {_num(m.q)} (df {m.q_df}, "
            f"p = {_num(m.q_pvalue, 2)}), I² = {fmt(m.i2, 0)} %, τ² = {_num(dl.tau2)} (DL) / {_num(m.tau2)} (REML, "
            f"squared units); random-effects mean {_num(m.estimate)} (SE {_num(m.se)}); 95% prediction interval "
            f"for a new site [{_num(pi[0])}, {_num(pi[1])}]."
        )
    if scorecard.transport is not None:
        lines.append(scorecard.transport.summary_line())
    return Text("\n".join(lines))


def _footnote(scorecard: Scorecard, unit: str, one_run: bool = True) -> Text:
    """The legend; ``one_run=False`` leaves out the run's own δ and plan hash (a legend shared by several runs,
    whose headers give them)."""
    delta = f"δ = {_num(scorecard.margin)} {unit} units" if one_run else "δ (each run's header gives it)"
    plan = f"the locked plan (sha256 {str(scorecard.plan.get('sha256', ''))[:12]}…)" if one_run else \
        "each run's locked plan"
    return Text(
        "D = blind − design, on the same units; its 95% CI uses the SE of the paired per-unit scores (AUTOC: "
        f"shared bootstrap half-samples). {delta} is the equivalence margin of "
        "the average effects; rule gains and rankings use min(δ, half their blind value), β₂ its own margin "
        f"{_num(scorecard.plan.get('margins', {}).get('beta2'))} (slope scale) — all fixed in {plan}. "
        f"{verdict_note()} Verdict (adjusted) = the verdict from p-values "
        f"adjusted within each claim family ({scorecard.plan.get('multiplicity', '')}), with the raw verdict below it "
        "when the two differ; the naive estimate is the unadjusted reference. Bias red. = 100·(1 − |D|/|D_naive|) "
        "(Shadish, Clark & Steiner 2008) with its delta-method 95% CI; n.m. = the naive D is not distinguishable "
        "from 0. ATO = overlap-weighted effect, a different estimand from the ATE. "
        f"Heterogeneity (β₂ > 0 or AUTOC > 0, one-sided 5%): {_status_note()}. Sites + = sites "
        "whose design gain has the sign of the blind gain / sites where the rule splits the units; * = the rule "
        "treats everyone or no one (gain 0 by construction), so its value is compared. Design values use the "
        "known rates "
        f"({scorecard.rates_source}).",
        style="dim",
    )


def _status_note() -> str:
    """What each short heterogeneity status on the screen means."""
    return "; ".join(f"{HETEROGENEITY_SHORT[k]} = {meaning}" for k, meaning in HETEROGENEITY_MEANING.items())
