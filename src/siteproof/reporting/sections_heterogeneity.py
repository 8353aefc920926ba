"""Report section 5: heterogeneous-effect claims (R-loss, GATES, TOC, cost curves, AUTOC/Qini, BLP)
re-scored with the known rates."""

from __future__ import annotations

import math
from typing import Any, Sequence

from ..core.interpret import CONFIRMED, HETEROGENEITY_ALPHA, HETEROGENEITY_MEANING, count_words, verdict_note
from . import figures
from .context import RunView, adjusted_word, interval, margin_note, verdict_cell
from .document import FigureBlock, Heading, Section, Table, Text
from .figures import Curve, Interval
from .formatting import as_float, finite

TOC_ZOOM = 0.05  # TOC figures scale their y axis to the bands from this share of units on


def _claims_model(run: RunView, model: str) -> dict:
    return next((c for c in run.claims.get("cate") or [] if c.get("model") == model), {})


def heterogeneity_section(run: RunView) -> Section:
    models = [c for c in run.card.get("cate") or [] if c.get("model")]
    if not models:
        return Section("heterogeneity", "Heterogeneity",
                       ("No heterogeneous-effect model was scored.", "Nothing to re-score with the known rates."),
                       [Text("Not run: scorecard.json holds no 'cate' entries.", "absent")])
    names = [str(c["model"]) for c in models]
    u = run.unit
    parts: list[Any] = [Heading("Does a model beat a constant effect? R-loss")]
    r_blind = [interval(n, (c.get("r_loss") or {}).get("blind")) for n, c in zip(names, models)]
    r_design = [interval(n, (c.get("r_loss") or {}).get("design")) for n, c in zip(names, models)]
    fig = figures.paired_rows_figure([f"model {n}" for n in names], r_blind, r_design,
                                     f"R-loss difference from the constant-effect model ({u})²; below 0 = better")
    parts.append(FigureBlock(figures.render(fig, "heterogeneity-rloss"),
                             "Mean R-loss of each model minus that of the constant-effect model, with 95 % CI: blind "
                             "(learned ê and m̂) and design-based (known rates). Below 0: the model's τ̂ is closer to "
                             "the true effects than a constant (Nie & Wager 2021)."))
    parts.append(Heading("Effects by group of predicted effect (GATES)"))
    gates_blind, gates_design = [], []
    for n, c in zip(names, models):
        claimed = ((_claims_model(run, n).get("gates") or {}).get("groups")) or []
        scored = c.get("gates") or []
        gates_blind.append([interval(str(g.get("group")), g) for g in claimed] or
                           [Interval(str(g.get("group")), as_float(g.get("blind")), math.nan, math.nan) for g in scored])
        gates_design.append([Interval(str(g.get("group")), as_float(g.get("design")), math.nan, math.nan) for g in scored])
    fig = figures.gates_figure(names, gates_blind, gates_design, u)
    parts.append(FigureBlock(figures.render(fig, "heterogeneity-gates"),
                             "Average effect in each quantile group of τ̂ (1 = lowest predicted effect): blind claim "
                             "with its 95 % CI (circles) and design-based re-scoring with the known rates (squares; "
                             "the paired difference and its CI are in the table below)."))
    parts.append(Heading("Targeting curves (TOC)"))
    parts.extend(_toc_parts(run, names, models))
    parts.append(Heading("Cost-aware gain"))
    parts.extend(_cost_parts(run, names, models))
    parts.append(_cate_table(run, names, models))
    parts.append(_gates_table(run, names, models))
    return Section("heterogeneity", "Heterogeneity", _heterogeneity_reading(run, names, models), parts)


def _curve(block: dict | None, q: Sequence[float] | None = None, key: str = "toc") -> Curve | None:
    """A curve from {'toc'|'gain': [...], 'se': [...]} with x from ``q`` or the block's own 'q'/'x'."""
    if not block or key not in block:
        return None
    x = q if q is not None else block.get("q") or block.get("x")
    if x is None or len(x) != len(block[key]):
        return None
    return Curve([as_float(v) for v in x], [as_float(v) for v in block[key]], [as_float(v) for v in block.get("se") or [0] * len(x)])


def _toc_parts(run: RunView, names: list[str], models: list[dict]) -> list[Any]:
    blind, design = [], []
    for n, c in zip(names, models):
        claimed = _claims_model(run, n).get("autoc") or {}
        blind.append(_curve(claimed.get("curve"), claimed.get("q")))
        scored = (c.get("autoc") or {}).get("curve") or {}
        design.append(_curve(scored.get("design"), scored.get("q")))
    if any(b is None for b in blind):
        return [Text("Not drawn: the claims hold no TOC curve for some model.", "absent")]
    has_design = all(d is not None for d in design)
    fig = figures.curves_figure(names, blind, design if has_design else None,
                                "share of units treated, highest τ̂ first (proportion)", f"TOC ({run.unit})",
                                zoom_from=TOC_ZOOM)
    parts: list[Any] = [FigureBlock(figures.render(fig, "heterogeneity-toc"),
                                    "TOC(q): average effect among the q share of units with the highest τ̂ minus the "
                                    "average effect of everyone, with 95 % pointwise bands (half-sample bootstrap); "
                                    "blind (solid)" + (" and design-based with the known rates (dashed, dotted band)"
                                                       if has_design else "") +
                                    f". The vertical axis covers the bands from q = {TOC_ZOOM:g} on: below that a "
                                    "handful of units make the bands very wide.")]
    if not has_design:
        parts.append(Text("The design-based TOC curves are not in this scorecard; AUTOC and Qini re-scored with the "
                          "known rates are in the table below.", "note"))
    return parts


def _cost_parts(run: RunView, names: list[str], models: list[dict]) -> list[Any]:
    if not run.data.get("has_cost"):
        return [Text("Not run: the study has no cost column.", "absent")]
    blind, design = [], []
    for n, c in zip(names, models):
        blind.append(_curve(_claims_model(run, n).get("cost_curve"), key="gain"))
        scored = c.get("cost_curve") or {}
        design.append(_curve(scored.get("design"), scored.get("x"), key="gain"))
    if any(b is None for b in blind):
        return [Text("Not drawn: the claims hold no cost curve for some model.", "absent")]
    has_design = all(d is not None for d in design)
    fig = figures.curves_figure(names, blind, design if has_design else None,
                                "share of the total cost spent, best τ̂/cost first (proportion)",
                                f"gain per unit ({run.unit})")
    parts: list[Any] = [FigureBlock(figures.render(fig, "heterogeneity-cost"),
                                    "Cumulative gain (sum of the effect scores of the treated units / n) when units are "
                                    "treated in decreasing order of τ̂/cost, against the share of the total cost "
                                    "spent, with 95 % pointwise bands.")]
    if not has_design:
        parts.append(Text("The design-based cost curves are not in this scorecard; only the blind curves are drawn.",
                          "note"))
    return parts


def _cate_table(run: RunView, names: list[str], models: list[dict]) -> Table:
    rows = []
    for n, c in zip(names, models):
        a, q = c.get("autoc") or {}, c.get("qini") or {}
        b2 = (c.get("blp") or {}).get("beta2") or {}
        rows.append([n, run.num(c.get("tau_sd")), run.pair(a.get("blind"), a.get("design")),
                     run.est_ci(a.get("difference")), verdict_cell(run, f"cate.{c.get('model')}.autoc", a.get("verdict")),
                     run.pair(q.get("blind"), q.get("design")),
                     verdict_cell(run, f"cate.{c.get('model')}.qini", q.get("verdict")),
                     run.pair(b2.get("blind"), b2.get("design"), 2),
                     str((c.get("heterogeneity") or {}).get("status", "—"))])
    return Table(
        f"Heterogeneity claims re-scored with the known rates ({run.unit} unless stated)",
        ["model", "SD of τ̂", "AUTOC, blind → design", "D (AUTOC) [95 % CI]", "AUTOC verdict",
         "Qini, blind → design", "Qini verdict", "BLP β₂, blind → design (ratio)", "real heterogeneity?"],
        rows,
        ["AUTOC and Qini: areas under the TOC curve with weights 1 and q (Yadlowsky et al.); > 0 means the ranking "
         "by τ̂ finds units with larger effects. D = blind − design on the same half-samples.",
         "BLP β₂ (Chernozhukov, Demirer, Duflo & Fernández-Val): 1 when τ̂ is the true effect, 0 when it carries no "
         "information about heterogeneity (a ratio, no unit).",
         "'real heterogeneity?': whether the blind claim (β₂ > 0 or AUTOC > 0, one-sided "
         f"{100 * HETEROGENEITY_ALPHA:g} % test) is confirmed by the design-based values: {_status_words()}.",
         margin_note(run), verdict_note()],
        text=(0, 8),
    )


def _gates_table(run: RunView, names: list[str], models: list[dict]) -> Table:
    rows = []
    for n, c in zip(names, models):
        for g in c.get("gates") or []:
            dif = g.get("difference") or {}
            rows.append([n, g.get("group"), run.num(g.get("blind")), run.num(g.get("design")),
                         run.num(dif.get("estimate")), run.ci(dif.get("ci")),
                         verdict_cell(run, f"cate.{c.get('model')}.gate{g.get('group')}", g.get("verdict"))])
        tb = c.get("top_minus_bottom") or {}
        if tb:
            dif = tb.get("difference") or {}
            rows.append([n, "top − bottom", run.num(tb.get("blind")), run.num(tb.get("design")),
                         run.num(dif.get("estimate")), run.ci(dif.get("ci")),
                         verdict_cell(run, f"cate.{c.get('model')}.top_bottom", tb.get("verdict"))])
    return Table(
        f"GATES: group effects, blind against design ({run.unit})",
        ["model", "group of τ̂", "blind", "design", "D = blind − design", "95 % CI of D", "verdict"], rows,
        ["Group 1 holds the units with the lowest τ̂. Blind: mean of the blind AIPW scores in the group; design: "
         "mean of the design-based scores (known rates); D is their paired difference.", verdict_note()],
        text=(0, 1),
    )


def _heterogeneity_reading(run: RunView, names: list[str], models: list[dict]) -> tuple[str, str]:
    status = {n: str((c.get("heterogeneity") or {}).get("status", "—")) for n, c in zip(names, models)}
    confirmed = [n for n, s in status.items() if s == CONFIRMED]
    found = [n for n, c in zip(names, models) if (c.get("heterogeneity") or {}).get("design_finds")]
    first = (f"Re-scored with the known rates, {len(found)} of {len(names)} models show real heterogeneity "
             f"(β₂ > 0 or AUTOC > 0 at one-sided 5 %){': ' + ', '.join(found) if found else ''}; the blind claim of "
             f"heterogeneity is confirmed for {len(confirmed)} ({', '.join(f'{n}: {s}' for n, s in status.items())}).")
    verdicts = [adjusted_word(run, f"cate.{c.get('model')}.autoc", (c.get("autoc") or {}).get("verdict")) for c in models]
    losses = {n: (c.get("r_loss") or {}).get("design") or {} for n, c in zip(names, models)}
    scored = {n: loss for n, loss in losses.items() if finite(loss.get("estimate"))}
    second = f"AUTOC blind against design: {count_words(verdicts)}"
    if scored:
        best = min(scored, key=lambda n: as_float(scored[n]["estimate"]))
        second += (f"; the lowest design-based R-loss relative to a constant effect is model {best} "
                   f"({run.num(scored[best]['estimate'])}, 95 % CI {run.ci(scored[best].get('ci'))})")
    return first, second + "."


def _status_words() -> str:
    """The heterogeneity statuses as a list in words: 'a, b, c, or d'."""
    words = list(HETEROGENEITY_MEANING)
    return ", ".join(words[:-1]) + ", or " + words[-1]
