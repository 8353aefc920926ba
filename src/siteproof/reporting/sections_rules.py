"""Report sections 6–7: learned treatment rules (value and gain, pooled and per site) and
leave-one-site-out transport."""

from __future__ import annotations

import math
from typing import Any

from ..core.interpret import count_words, verdict_note
from . import figures
from .context import RunView, adjusted_word, interval, margin_note, verdict_cell
from .document import FigureBlock, Heading, Preformatted, Section, Table, Text
from .formatting import as_float, finite, fmt, fmt_pct


def rules_section(run: RunView) -> Section:
    rules = list(run.card.get("rules") or [])
    if not rules:
        return Section("rules", "Treatment rules", ("No treatment rule was scored.", "Nothing to re-score."),
                       [Text("Not run: scorecard.json holds no 'rules' entries.", "absent")])
    blind = [_rule_point(r, r.get("claimed")) for r in rules]
    design = [_rule_point(r, r.get("design_oracle_aipw")) for r in rules]
    fig = figures.rules_figure(blind, design, run.unit)
    parts: list[Any] = [FigureBlock(
        figures.render(fig, "rules-value"),
        "Value of each learned rule (mean outcome if the rule were applied, net of cost when there is a cost column) "
        "against the share of units it treats, with 95 % CIs: as claimed blind (left) and re-scored with the known "
        "rates (oracle AIPW, right). Lines join the rules of one CATE model; the dashed grey line is random "
        "allocation of the same share (value − gain), so a rule above it gains over random allocation.")]
    parts.append(_rules_table(run, rules))
    parts.append(_rules_by_site_table(run, rules))
    tree = next((r for r in run.claims.get("rules") or [] if r.get("kind") == "tree" and r.get("tree_text")), None)
    parts.append(Heading("The depth-2 tree rule"))
    if tree:
        parts.append(Preformatted(str(tree["tree_text"])))
        parts.append(Text("Learned on all units with the blind doubly robust scores; its value above is scored on "
                          "out-of-fold assignments (each unit assigned by a tree fit without it).", "note"))
    else:
        parts.append(Text("Not run: the claims hold no tree rule.", "absent"))
    return Section("rules", "Treatment rules", _rules_reading(run, rules), parts)


def _rule_point(rule: dict, scored: dict | None) -> figures.RulePoint:
    """A rule's value and random-allocation value (value − gain) as claimed or as re-scored."""
    scored = scored or {}
    value, gain = scored.get("value") or {}, scored.get("gain") or {}
    family = str(rule.get("model") or rule.get("kind") or rule.get("rule"))
    return figures.RulePoint(family, as_float(rule.get("treated_share")), interval(str(rule.get("rule")), value),
                             as_float(value.get("estimate")) - as_float(gain.get("estimate")))


def _rules_table(run: RunView, rules: list[dict]) -> Table:
    rows = []
    for r in rules:
        claimed = r.get("claimed") or {}
        oracle = r.get("design_oracle_aipw") or {}
        gain = r.get("gain") or {}
        rows.append([r.get("rule"), fmt_pct(r.get("treated_share")),
                     run.pair((claimed.get("value") or {}).get("estimate"), (oracle.get("value") or {}).get("estimate")),
                     run.est_ci(claimed.get("gain")), run.est_ci(oracle.get("gain")), run.est_ci(gain.get("difference")),
                     verdict_cell(run, f"rule.{r.get('rule')}", r.get("verdict"),
                                  "" if r.get("verdict_on", "gain") == "gain" else "on value"),
                     f"{r.get('sites_agreeing', '—')} of {r.get('sites_with_contrast', '—')}"])
    return Table(
        f"Learned rules: value and gain, blind against design ({run.unit})",
        ["rule", "treated (% of units)", "value, blind → design", "gain blind [95 % CI]", "gain design [95 % CI]",
         "D (gain) [95 % CI]", "verdict", "sites agreeing in sign"],
        rows,
        ["Value: mean of π·(Γ₁ − cost) + (1 − π)·Γ₀. Gain: value minus that of treating the same share at random "
         "(Imai & Li 2023). Blind uses the learned ê; design uses the known rates (oracle AIPW).",
         "Rule names: '<model>.threshold' treats units with τ̂ above their cost (or 0); '<model>.topNN' treats the NN % "
         "with the highest τ̂; 'tree' is the depth-2 tree.",
         "Sites agreeing: sites whose design-based gain has the sign of the blind pooled gain, among the sites where "
         "the rule treats some but not all units.",
         "The verdict compares the blind gain with the design-based gain; a rule that treats everyone or no one has "
         "no gain by construction, so its verdict compares values ('on value').", margin_note(run), verdict_note()],
    )


def _rules_by_site_table(run: RunView, rules: list[dict]) -> Table:
    sites: list[str] = []
    for r in rules:
        for row in r.get("by_site") or []:
            if str(row.get("site")) not in sites:
                sites.append(str(row.get("site")))
    rows = []
    for r in rules:
        cells = {str(row.get("site")): row for row in r.get("by_site") or []}
        line = [r.get("rule")]
        for s in sites:
            row = cells.get(s)
            if row is None:
                line.append("—")
                continue
            text = f"{run.num(row.get('gain'))} ({run.num(row.get('gain_se'))})"
            if row.get("opposite_and_significant"):
                text += " opposite"
            line.append(text)
        rows.append(line)
    return Table(
        f"Gain of each rule within each site, design-based ({run.unit}; SE in parentheses)",
        ["rule"] + [f"site {s}" for s in sites], rows,
        ["Gain over random allocation with the same treated share within the site, from the known-rate oracle AIPW "
         "scores. 'opposite' marks a site whose gain has the opposite sign of the blind pooled gain with a 95 % CI "
         "that excludes 0. A rule that treats all or none of a site has gain 0 there by construction."],
    )


def _rules_reading(run: RunView, rules: list[dict]) -> tuple[str, str]:
    def blind_gain(r: dict) -> float:
        g = as_float(((r.get("claimed") or {}).get("gain") or {}).get("estimate"))
        return g if math.isfinite(g) else -math.inf

    best = max(rules, key=blind_gain)
    claimed = (best.get("claimed") or {}).get("gain") or {}
    oracle = (best.get("design_oracle_aipw") or {}).get("gain") or {}
    first = (f"The rule with the largest blind gain is {best.get('rule')} (treats {fmt_pct(best.get('treated_share'))}; "
             f"gain {run.num(claimed.get('estimate'))}, 95 % CI {run.ci(claimed.get('ci'))}); with the known rates its "
             f"gain is {run.num(oracle.get('estimate'))} (95 % CI {run.ci(oracle.get('ci'))}) — "
             f"{adjusted_word(run, 'rule.' + str(best.get('rule')), best.get('verdict', '—'))}.")
    opposite = sum(1 for r in rules for row in r.get("by_site") or [] if row.get("opposite_and_significant"))
    second = (f"Gain verdicts over {len(rules)} rules: {count_words(adjusted_word(run, 'rule.' + str(r.get('rule')), r.get('verdict')) for r in rules)}; "
              f"{opposite} rule-site pair(s) show a significant gain of the opposite sign.")
    return first, second


# ----------------------------------------------------------------------------------------------------------
# 7. transport
# ----------------------------------------------------------------------------------------------------------
def transport_section(run: RunView) -> Section:
    moved = run.card.get("transport")
    if not moved:
        return Section("transport", "Transport",
                       ("Leave-one-site-out transport was not run.",
                        "Rerun with --transport to test whether what was learned on the other sites holds in each "
                        "held-out site."),
                       [Text("Not run (transport is optional: `siteproof run … --transport`).", "absent")])
    sites = moved.get("sites") or []
    skipped = moved.get("skipped") or []
    parts: list[Any] = []
    if not sites:
        parts.append(Text("No site had enough units to be held out.", "absent"))
    else:
        models = list((sites[0].get("autoc") or {}).keys())
        labels, moved_rows, in_rows = [], [], []
        for s in sites:
            for m in models:
                labels.append(f"{s.get('site')} · {m}")
                moved_rows.append(interval(m, (s.get("autoc") or {}).get(m)))
                in_rows.append(interval(m, (s.get("autoc_in_sample") or {}).get(m)))
        fig = figures.paired_rows_figure(labels, moved_rows, in_rows, f"AUTOC in the held-out site ({run.unit})",
                                         legend=("transported (fit without the site)", "in-sample (out-of-fold, full run)"))
        parts.append(FigureBlock(figures.render(fig, "transport-autoc"),
                                 "AUTOC of each model's ranking in each held-out site, scored with the site's known "
                                 "rate: transported from a blind rerun on the other sites (circles) and from the full "
                                 "run (squares), with 95 % CIs."))
        parts.append(_transport_autoc_table(run, sites, models))
        parts.append(_transport_rules_table(run, sites))
    if skipped:
        parts.append(Text("Not held out: " + "; ".join(f"{k.get('site')} ({k.get('reason')})" for k in skipped) + ".",
                          "note"))
    return Section("transport", "Transport", _transport_reading(run, sites), parts)


def _transport_autoc_table(run: RunView, sites: list[dict], models: list[str]) -> Table:
    rows = []
    for s in sites:
        for m in models:
            est = (s.get("autoc") or {}).get(m) or {}
            ins = (s.get("autoc_in_sample") or {}).get(m) or {}
            loss = (s.get("autoc_transported_minus_in_sample") or {}).get(m) or {}
            rows.append([s.get("site"), m, s.get("n"), s.get("n_train"), fmt(s.get("known_rate"), 3),
                         run.num(est.get("estimate")), run.ci(est.get("ci")), run.num(ins.get("estimate")),
                         run.num(loss.get("estimate")), run.ci(loss.get("ci"))])
    return Table(
        f"Transported rankings by held-out site ({run.unit})",
        ["held-out site", "model", "site units (n)", "training units (n)", "known rate (proportion)",
         "AUTOC transported", "95 % CI", "AUTOC in-sample", "transported − in-sample", "95 % CI of the difference"],
        rows,
        ["Transported: the blind analysis rerun without the site, its τ̂ predicted in the site. In-sample: the full "
         "run's out-of-fold τ̂ on the same units. Both scored with the site's known rate (oracle AIPW); SEs from "
         "half-sample bootstrap, the difference on the same half-samples."],
        text=(0, 1),
    )


def _transport_rules_table(run: RunView, sites: list[dict]) -> Table:
    names: list[str] = []
    for s in sites:
        names += [rule for rule in (s.get("rules") or {}) if rule not in names]
    rows = []
    for rule in names:
        line = [rule]
        for s in sites:
            gain = ((s.get("rules") or {}).get(rule) or {}).get("gain")
            line.append(run.est_ci(gain) if gain else "—")
        rows.append(line)
    return Table(f"Gain of the transported rules in the held-out site ({run.unit}; 95 % CI)",
                 ["rule"] + [f"held out: {s.get('site')}" for s in sites], rows,
                 ["Gain over random allocation with the same treated share, scored with the held-out site's known "
                  "rate."])


def _transport_reading(run: RunView, sites: list[dict]) -> tuple[str, str]:
    if not sites:
        return "Transport ran but no site could be held out.", "Every site had too few units or an arm with fewer than 2."
    estimates = [e for s in sites for e in (s.get("autoc") or {}).values()]
    positive = sum(1 for e in estimates if finite(*(e.get("ci") or [None])[:1]) and as_float(e["ci"][0]) > 0)
    gains = [v for s in sites for v in (s.get("rules") or {}).values()]
    gaining = sum(1 for v in gains if as_float((v.get("gain") or {}).get("estimate")) > 0)
    return (f"{len(sites)} sites were held out in turn; {positive} of {len(estimates)} transported rankings have an "
            "AUTOC significantly above 0 in the held-out site (95 % CI above 0).",
            f"{gaining} of {len(gains)} transported rules have a positive estimated gain in the held-out site.")

