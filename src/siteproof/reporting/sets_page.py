"""The covariate-set page (``sets.html``) and the sensitivity contour figure: drawings of numbers already in
``sets.json`` and in the ``sensitivity`` record (nothing is estimated here), and the terminal table of
``siteproof sets``.

* Bias by set: each set's paired difference blind − design (95 % CI thin, 90 % CI thick) against the ±δ band,
  with its Holm-adjusted verdict written beside it, and the difference in means as the first row.
* Sensitivity contours: the omitted-variable-bias bound B(r_D, r_Y) = S·√(r_Y·r_D/(1 − r_D)) (Chernozhukov,
  Cinelli, Newey, Sharma & Syrgkanis 2022) over the two partial R²s, the benchmarks as labelled points, the
  contour of |θ̂| (where a confounder explains the estimate away) and the realized bias |θ̂ − θ_design| as a
  dashed contour (it has a size, not a position: every point on it would have produced that bias).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import numpy as np
from matplotlib.figure import Figure

from ..core.outputs import atomic_write_bytes, atomic_write_text
from . import theme
from .document import FIGURE_DIR, Document, FigureBlock, Section, Table, Text, Verdict
from .figures_base import Interval, height_for, labels_on_y, new_figure, pad_x, paired_differences, render, styled
from .formatting import fmt, fmt_ci

PAGE_TITLE = "What did it take to recover the trial?"
LABELLED_BENCHMARKS = 4  # the benchmarks with the largest bounds are named in the contour figure


@styled
def bias_by_set_figure(rows: Sequence[Interval], verdicts: Sequence[str], margin: float, unit: str) -> Figure:
    """Paired difference blind − design per covariate set with 95 % (thin) and 90 % (thick) CIs and ±δ band."""
    fig, axes = new_figure(theme.FIG_WIDTH, height_for(len(rows), 1.2))
    ax = axes[0, 0]
    y = labels_on_y(ax, [r.label for r in rows])
    paired_differences(ax, rows, y, verdicts, margin)
    ax.set_xlabel(f"bias: blind − design, paired ({unit})")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.25), ncols=2)
    pad_x(ax, [v for r in rows for v in (r.low, r.high)] + [-margin, margin])
    return fig


@styled
def sensitivity_figure(record: dict[str, Any], unit: str = "outcome units") -> Figure:
    """Contours of the bias bound over (r_D, r_Y) with benchmark points, the |θ̂| contour and the realized bias."""
    scale = float(record["scale"])
    bench = record.get("benchmarks", [])
    top = max([0.05] + [2 * max(b["r2_treatment"], b["r2_outcome"]) for b in bench]
              + [1.3 * (record.get("robustness_value") or 0)])
    top = min(top, 0.95)
    grid = np.linspace(0.0, top, 161)
    r_d, r_y = np.meshgrid(grid, grid)
    bound = scale * np.sqrt(r_y * r_d / (1.0 - r_d))
    fig, axes = new_figure(theme.FIG_WIDTH * 0.72, theme.FIG_WIDTH * 0.6)
    ax = axes[0, 0]
    ax.grid(False)
    filled = ax.contourf(r_d, r_y, bound, levels=12, cmap="Blues", alpha=0.55)
    lines = ax.contour(r_d, r_y, bound, levels=filled.levels[1::2], colors=theme.MUTED, linewidths=0.6)
    ax.clabel(lines, fmt=lambda v: f"{v:.2g}", fontsize=theme.BASE_FONT - 2)
    estimate = abs(float(record["estimate"]["estimate"]))
    if 0 < estimate < bound.max():
        ax.contour(r_d, r_y, bound, levels=[estimate], colors=theme.ROLE["pooled"], linewidths=1.8)
        ax.plot([], [], color=theme.ROLE["pooled"], lw=1.8, label=f"bound = |estimate| ({estimate:.3g})")
    realized = (record.get("realized_bias") or {}).get("estimate")
    if realized is not None and 0 < abs(realized) < bound.max():
        ax.contour(r_d, r_y, bound, levels=[abs(realized)], colors=theme.ROLE["design"], linewidths=1.6,
                   linestyles="dashed")
        ax.plot([], [], color=theme.ROLE["design"], lw=1.6, ls="--", label=f"realized bias |blind − design| ({abs(realized):.3g})")
        rv = record.get("robustness_value_to_design")
        if rv is not None and rv <= top:
            ax.plot(rv, rv, "s", color=theme.ROLE["design"], ms=6.5, zorder=4,
                    label=f"realized bias at equal strengths (r_D = r_Y = {rv:.3g})")
    labelled = sorted(bench, key=lambda b: -b["bias_bound"])[:LABELLED_BENCHMARKS]
    for b in bench:
        ax.plot(b["r2_treatment"], b["r2_outcome"], "D", color=theme.ROLE["other"], ms=5.5, zorder=3)
    for b in labelled:
        ax.annotate(f"{b['k']:g}× {b['covariate']}", (b["r2_treatment"], b["r2_outcome"]), xytext=(4, 4),
                    textcoords="offset points", fontsize=theme.BASE_FONT - 2)
    if bench:
        ax.plot([], [], "D", color=theme.ROLE["other"], ms=5.5, label="benchmark covariates")
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.set_xlabel("r_D: share of the Riesz representer's variance due to the confounder")
    ax.set_ylabel("r_Y: partial R² of the confounder with the outcome")
    ax.set_title(f"bias bound ({unit})")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.14), ncols=1)
    return fig


def _set_rows(record: dict[str, Any]) -> tuple[list[Interval], list[str]]:
    naive = record["naive_difference"]
    rows = [Interval("difference in means", naive["estimate"], naive["ci"][0], naive["ci"][1])]
    words = [naive["verdict"]]
    for s in record["sets"]:
        d = s["difference"]
        rows.append(Interval(s["name"], d["estimate"], d["ci"][0], d["ci"][1]))
        words.append(s["verdict_adjusted"])
    return rows, words


def sets_document(record: dict[str, Any]) -> Document:
    """The page as a :class:`Document`: summary table, bias-by-set figure, pairwise differences."""
    design = record["design"]
    summary = Table(
        f"Blind AIPW by covariate set against the design-based ATE {fmt(design['estimate'])} "
        f"{fmt_ci(design['ci'])} (n = {record['n_included']:,} included units)",
        ["set", "covariates", "blind AIPW", "blind − design", "95 % CI", "verdict", "Holm-adjusted", "PBR (%)", "PBR 95 % CI"],
        [[s["name"], ", ".join(s["covariates"]), fmt(s["blind"]["estimate"]), fmt(s["difference"]["estimate"]),
          fmt_ci(s["difference"]["ci"]), Verdict(s["verdict"]), Verdict(s["verdict_adjusted"]),
          fmt(s["percent_bias_reduction"]["estimate"]), fmt_ci(s["percent_bias_reduction"]["ci"])]
         for s in record["sets"]],
        notes=[f"Equivalence margin δ = {fmt(record['margin'])}; differences are paired on the same units. "
               "PBR = percent bias reduction against the difference in means (Shadish, Clark & Steiner 2008), "
               "delta-method CI. Holm (1979) adjustment across the sets."],
        text=(0, 1),
    )
    rows, words = _set_rows(record)
    fig = render(bias_by_set_figure(rows, words, record["margin"], record["outcome"]), "sets-bias")
    pairs = Table(
        "Paired differences between sets (same units, same folds)",
        ["set a", "set b", "a − b", "SE", "95 % CI"],
        [[p["a"], p["b"], fmt(p["estimate"]), fmt(p["se"]), fmt_ci(p["ci"])] for p in record["pairwise"]],
        text=(0, 1),
    )
    sections = [
        Section("bias", "Bias by covariate set",
                ("Each row: the blind AIPW built on one covariate set minus the design-based ATE.",
                 "Inside the green band and a tight interval: that set recovered the trial."),
                [FigureBlock(fig, "Paired bias blind − design per covariate set; 95 % CI thin, 90 % CI thick; "
                                  "the first row is the difference in means (no covariates; unadjusted verdict)."),
                 Text("Sets share folds and seed, so differences between rows come from the covariates alone.", "note")]),
        Section("pairs", "Sets against each other", ("What adding or dropping covariates moved.", ""), [pairs]),
    ]
    with_sens = [s for s in record["sets"] if s.get("sensitivity")]
    if with_sens:
        sections.append(_sensitivity_section(with_sens, record["outcome"]))
    return Document(PAGE_TITLE, "Covariate sets scored against the sites' randomization.", summary, sections)


def sets_table(record: dict[str, Any]) -> Any:
    """The terminal table of ``siteproof sets``: one row per set (rich renderable)."""
    from rich import box
    from rich.table import Table as RichTable

    table = RichTable(title=f"Blind AIPW by covariate set vs design-based ATE {fmt(record['design']['estimate'])} "
                            f"{fmt_ci(record['design']['ci'])} ({record['outcome']})",
                      title_justify="left", box=box.SIMPLE_HEAD)
    for name in ("set", "blind", "blind − design", "95 % CI", "verdict", "Holm-adjusted", "PBR %"):
        table.add_column(name, justify="left" if name in ("set", "verdict", "Holm-adjusted") else "right")
    naive = record["naive_difference"]
    table.add_row("difference in means", fmt(record["naive"]["estimate"]), fmt(naive["estimate"]),
                  fmt_ci(naive["ci"]), naive["verdict"], "", "0")
    for s in record["sets"]:
        table.add_row(s["name"], fmt(s["blind"]["estimate"]), fmt(s["difference"]["estimate"]),
                      fmt_ci(s["difference"]["ci"]), s["verdict"], s["verdict_adjusted"],
                      fmt(s["percent_bias_reduction"]["estimate"], 0))
    return table


def _sensitivity_section(sets: list[dict[str, Any]], unit: str) -> Section:
    """Per set: robustness values, the strongest benchmark's bound, the realized bias and whether it warned;
    the contour figure of the first set."""
    rows = []
    for s in sets:
        r = s["sensitivity"]
        realized = (r.get("realized_bias") or {}).get("estimate")
        rows.append([s["name"], fmt(r["robustness_value"]), fmt(r["robustness_value_alpha"]),
                     fmt(r["robustness_value_to_design"]), r.get("strongest") or "—", fmt(r.get("bound_at_strongest")),
                     fmt(None if realized is None else abs(realized)),
                     {True: "yes", False: "no", None: "—"}[r.get("warned")]])
    table = Table(
        "Omitted-variable-bias sensitivity of each set's AIPW (Chernozhukov, Cinelli, Newey, Sharma & Syrgkanis 2022)",
        ["set", "RV", f"RV (α = {sets[0]['sensitivity']['alpha']:g})", "RV to design", "strongest benchmark",
         "bound at strongest", "|realized bias|", "warned"], rows, text=(0, 4, 7),
        notes=["RV: the equal partial R² of a confounder with treatment (Riesz representer) and outcome that moves "
               "the estimate to 0 (Cinelli & Hazlett 2020). 'warned': the realized bias lies inside the bound of a "
               "confounder as strong as the strongest covariate of the set."],
    )
    fig = render(sensitivity_figure(sets[0]["sensitivity"], unit), "sensitivity")
    return Section("sensitivity", "Would a sensitivity analysis have warned?",
                   ("The bound is what an analyst could compute blind; the realized bias is what the sites revealed.",
                    "Warned = a confounder no stronger than an observed covariate could have produced that bias."),
                   [table, FigureBlock(fig, f"Bias bound over the two partial R²s for set '{sets[0]['name']}', with "
                                            "the benchmark covariates and the realized bias.")])


def write_sets_page(folder: Path, record: dict[str, Any]) -> Path:
    """Write ``sets.html`` and ``figures/sets-bias.svg|png`` into ``folder`` (atomic writes)."""
    doc = sets_document(record)
    for rendered in doc.figures:
        atomic_write_text(folder / FIGURE_DIR / f"{rendered.name}.svg", rendered.svg)
        atomic_write_bytes(folder / FIGURE_DIR / f"{rendered.name}.png", rendered.png)
    return atomic_write_text(folder / "sets.html", doc.html())


def write_sensitivity_figure(folder: Path, record: dict[str, Any], unit: str = "outcome units") -> Path:
    """Write ``figures/sensitivity.svg|png`` from a ``sensitivity`` record; returns the SVG path."""
    rendered = render(sensitivity_figure(record, unit), "sensitivity")
    atomic_write_bytes(folder / FIGURE_DIR / "sensitivity.png", rendered.png)
    return atomic_write_text(folder / FIGURE_DIR / "sensitivity.svg", rendered.svg)
