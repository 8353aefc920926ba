"""The short HTML summary of a Monte Carlo design study (``summary.html``), drawn from summary.csv.

Two figures and three tables, all from numbers already in ``summary.csv`` and ``study.json``:

* **coverage** of each ATE estimator's 95 % CI (population truth) and of each CATE model's AUTOC CI (true
  AUTOC of its ranking), with Monte Carlo error bars ±1.96·√(p(1−p)/R), beside the nominal 95 % and the range
  0.95 ± 1.96·√(0.95·0.05/R) in which an exactly calibrated interval's observed coverage falls 95 % of the time;
* **verdict rates**: the share of replicates in each of the four verdict classes, per ATE estimator and CATE
  model — each class has its own hatching as well as its colour, and the share of ``different`` is written
  beside every bar with its Monte Carlo SE;
* tables for the ATE estimators, the CATE models and the rules.

The page uses the report's palette and stylesheet (``theme``) and its figure helpers (``figures``).
"""

from __future__ import annotations

import html
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from .. import __version__
from ..core.interpret import DIFFERENT, EQUIVALENT, INDETERMINATE, TRIVIALLY_DIFFERENT, VERDICTS, Z_95
from ..core.outputs import atomic_write_text
from ..reporting import theme
from ..reporting.figures import new_figure, render, styled

NOMINAL = 0.95
VERDICT_STYLE = {  # stacking order, colour and hatching: each class is readable without colour
    EQUIVALENT: (theme.OKABE_ITO["bluish_green"], ""),
    TRIVIALLY_DIFFERENT: (theme.OKABE_ITO["sky_blue"], "//"),
    INDETERMINATE: ("#DDDDDD", ".."),
    DIFFERENT: (theme.OKABE_ITO["vermillion"], "xx"),
}


# ----------------------------------------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------------------------------------
def _row_axes(labels: Sequence[str], margin: float) -> tuple[Figure, Any, np.ndarray]:
    """A figure with one horizontal row per label (first label on top); ``margin``: extra height in inches."""
    fig, axes = new_figure(theme.FIG_WIDTH, max(2.4, theme.ROW_HEIGHT * len(labels) + margin))
    ax = axes[0, 0]
    y = np.arange(len(labels))[::-1].astype(float)
    ax.set_yticks(y, labels)
    ax.set_ylim(-0.7, len(labels) - 0.3)
    ax.grid(axis="y", visible=False)
    return fig, ax, y


@styled
def coverage_figure(labels: Sequence[str], coverage: Sequence[float], mcse: Sequence[float], replicates: int) -> Figure:
    """Observed coverage (circle) ± 1.96 Monte Carlo SE per row; dashed line at 95 %; grey band: the range
    0.95 ± 1.96·√(0.95·0.05/R) expected from Monte Carlo error alone when the coverage is exactly 95 %."""
    fig, ax, y = _row_axes(labels, 1.6)
    half = Z_95 * math.sqrt(NOMINAL * (1 - NOMINAL) / max(replicates, 1))
    ax.axvspan(NOMINAL - half, NOMINAL + half, color=theme.RULE, alpha=0.7, zorder=0,
               label=f"95 % ± Monte Carlo error (R = {replicates})")
    ax.axvline(NOMINAL, color=theme.INK, ls=(0, (4, 3)), lw=1.0, label="nominal 95 %")
    colour = theme.ROLE["blind"]
    for yy, p, se in zip(y, coverage, mcse):
        if not math.isfinite(p):
            continue
        low, high = max(0.0, p - Z_95 * se), min(1.0, p + Z_95 * se)
        ax.plot([low, high], [yy, yy], color=colour, lw=1.6, solid_capstyle="butt")
        ax.plot(p, yy, "o", color=colour, ms=6.5, zorder=3)
        ax.annotate(f"{100 * p:.1f} %", (1.01, yy), xycoords=("axes fraction", "data"), va="center", ha="left",
                    fontsize=theme.BASE_FONT - 0.5)
    ax.plot([], [], "o-", color=colour, label="observed coverage ± 1.96 Monte Carlo SE")
    finite = [v for v in coverage if math.isfinite(v)]
    ax.set_xlim(max(0.0, min(finite + [NOMINAL - 2 * half]) - 0.05), 1.0 + 0.005)
    ax.set_xlabel("share of replicates whose 95 % CI contains the truth")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.18), ncols=2)
    return fig


@styled
def verdict_figure(labels: Sequence[str], shares: Sequence[dict[str, float]], different_mcse: Sequence[float]) -> Figure:
    """Stacked shares of the four verdict classes per row; the share of ``different`` (± Monte Carlo SE) is
    written at the end of each bar (``different`` is stacked last, at the right end)."""
    fig, ax, y = _row_axes(labels, 1.8)
    for yy, row, se in zip(y, shares, different_mcse):
        left = 0.0
        for verdict in VERDICT_STYLE:
            share = row.get(verdict, math.nan)
            if not math.isfinite(share) or share <= 0:
                continue
            colour, hatch = VERDICT_STYLE[verdict]
            ax.barh(yy, share, left=left, height=0.62, color=colour, hatch=hatch, edgecolor=theme.INK, lw=0.6)
            left += share
        diff = row.get(DIFFERENT, math.nan)
        if math.isfinite(diff):
            ax.annotate(f"different {100 * diff:.1f} % (± {100 * se:.1f})", (1.01, yy),
                        xycoords=("axes fraction", "data"), va="center", ha="left", fontsize=theme.BASE_FONT - 0.5)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of replicates")
    handles = [Patch(facecolor=VERDICT_STYLE[v][0], hatch=VERDICT_STYLE[v][1], edgecolor=theme.INK, label=v)
               for v in VERDICT_STYLE]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncols=4)
    return fig


# ----------------------------------------------------------------------------------------------------------
# the page
# ----------------------------------------------------------------------------------------------------------
def _esc(text: Any) -> str:
    """HTML-escaped text of ``text``."""
    return html.escape(str(text))


def _num(value: Any, digits: int = 3) -> str:
    """``value`` to ``digits`` significant digits; missing or non-finite as a dash."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "—"
    return f"{v:.{digits}g}" if math.isfinite(v) else "—"


def _pct(value: Any, se: Any = None) -> str:
    """A share as a percentage with one decimal, optionally followed by (± SE); missing as a dash."""
    try:
        p = float(value)
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(p):
        return "—"
    text = f"{100 * p:.1f} %"
    if se is not None and math.isfinite(float(se)):
        text += f" (± {100 * float(se):.1f})"
    return text


def _table(caption: str, header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """An HTML table with a caption; every cell escaped."""
    head = "".join(f"<th>{_esc(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_esc(c)}</td>" for c in row) + "</tr>" for row in rows)
    return (f'<div class="table"><table><caption>{_esc(caption)}</caption><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table></div>")


def _ate_table(rows: pd.DataFrame) -> str:
    """The ATE rows of the summary: bias, RMSE, SD vs mean SE, both coverages, verdict shares."""
    header = ["estimator", "mean truth", "bias (± MC SE)", "RMSE", "SD of estimate", "mean SE",
              "coverage, population truth (± MC SE)", "coverage, sample truth", "equivalent", "different"]
    body = [[r["name"], _num(r["truth_mean"], 4), f"{_num(r['bias'])} (± {_num(r['bias_mcse'], 2)})", _num(r["rmse"]),
             _num(r["sd_estimate"]), _num(r["se_mean"]), _pct(r["coverage"], r["coverage_mcse"]),
             _pct(r["coverage_sample"], r["coverage_sample_mcse"]), _pct(r["equivalent"]),
             _pct(r["different"], r["different_mcse"])]
            for _, r in rows.iterrows()]
    return _table("Average effect: every blind estimator and the design-based one", header, body)


def _cate_table(rows: pd.DataFrame) -> str:
    """The CATE rows of the summary: PEHE, AUTOC bias and coverage, verdict shares."""
    header = ["model", "mean PEHE (± MC SE)", "mean true AUTOC", "AUTOC bias", "AUTOC coverage (± MC SE)",
              "equivalent", "different", "indeterminate"]
    body = [[r["name"], f"{_num(r['pehe_mean'])} (± {_num(r['pehe_mcse'], 2)})", _num(r["truth_mean"]),
             _num(r["bias"]), _pct(r["coverage"], r["coverage_mcse"]), _pct(r["equivalent"]),
             _pct(r["different"], r["different_mcse"]), _pct(r["indeterminate"])] for _, r in rows.iterrows()]
    return _table("Effect models: PEHE against the true unit effects; AUTOC against the true AUTOC of the ranking",
                  header, body)


def _rule_table(rows: pd.DataFrame) -> str:
    """The rule rows of the summary: true gain, bias, RMSE, coverage, share ``different``."""
    header = ["rule", "mean true gain", "bias of blind gain", "RMSE", "coverage (± MC SE)", "different"]
    body = [[r["name"], _num(r["truth_mean"]), _num(r["bias"]), _num(r["rmse"]), _pct(r["coverage"], r["coverage_mcse"]),
             _pct(r["different"], r["different_mcse"])] for _, r in rows.iterrows()]
    return _table("Rules: blind gain over random allocation against the true gain mean((π − q)·τ)", header, body)


def _label(kind: str, name: str, model_prefix: str) -> str:
    """Row label of a figure: the ATE estimator, or ``model_prefix`` and the model or rule name."""
    if kind == "ate":
        return "ATE design-based (known rates)" if name == "design" else f"ATE {name}"
    return f"{model_prefix} {name}"


def _figure(rendered_svg: str, caption: str) -> str:
    """An inline SVG figure with its caption."""
    return f"<figure>{rendered_svg}<figcaption>{_esc(caption)}</figcaption></figure>"


def study_html(summary: pd.DataFrame, study: dict[str, Any]) -> str:
    """The whole page as text (figures inline as SVG; no external resources)."""
    settings = study.get("settings", {})
    ate = summary[summary["kind"] == "ate"]
    cate = summary[summary["kind"] == "cate"]
    rules = summary[summary["kind"] == "rule"]
    replicates = int(summary["replicates"].max()) if not summary.empty else 0
    parts: list[str] = []
    covered = pd.concat([ate, cate[cate["coverage"].notna()]])
    if not covered.empty:
        labels = [_label(k, n, "AUTOC") for k, n in zip(covered["kind"], covered["name"])]
        fig = coverage_figure(labels, covered["coverage"].tolist(), covered["coverage_mcse"].tolist(), replicates)
        parts.append(_figure(render(fig, "study-coverage").svg,
                             "Coverage of the 95 % intervals. ATE rows: the population ATE of the design; AUTOC rows: "
                             "the true AUTOC of the model's own ranking (true unit effects as scores)."))
    judged = pd.concat([ate, cate])
    judged = judged[judged["verdict_replicates"] > 0]
    if not judged.empty:
        labels = [_label(k, n, "CATE") for k, n in zip(judged["kind"], judged["name"])]
        shares = [{v: r[v.replace(" ", "_")] for v in VERDICTS} for _, r in judged.iterrows()]
        fig = verdict_figure(labels, shares, judged["different_mcse"].tolist())
        parts.append(_figure(render(fig, "study-verdicts").svg,
                             "Unmask verdicts over the replicates (blind claim vs its design-based counterpart on the "
                             "same units; Tryon & Lewis 2008 classes)."))
    tables = [_ate_table(ate) if not ate.empty else "", _cate_table(cate) if not cate.empty else "",
              _rule_table(rules) if not rules.empty else ""]
    facts = {
        "design": settings.get("design"), "units per replicate": settings.get("n"), "replicates": replicates,
        "seed": settings.get("seed"), "population ATE": _num(study.get("population_ate"), 6),
        "blind settings": ", ".join(f"{k}={v}" for k, v in settings.get("blind", {}).items()),
    }
    dl = "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in facts.items())
    title = f"Design study: {settings.get('design', '')}"
    return theme.page_head(title) + f"""<header class="masthead">
<div class="kicker">siteproof design study · simulated multi-site trials with a known truth</div>
<h1>{_esc(title)}</h1>
<p>{replicates} replicates of {_esc(settings.get('n'))} units, each run blind and then unmasked.</p>
</header>
<section class="summary"><dl class="facts">{dl}</dl>
<p class="note">{_esc(study.get('truth_note', ''))}. Monte Carlo SE of a share p over R replicates: √(p(1−p)/R).</p>
</section>
<section class="part"><h2>Coverage and verdicts</h2>
{''.join(parts)}
</section>
<section class="part"><h2>Tables</h2>
{''.join(tables)}
</section>
<footer>Written by siteproof {_esc(__version__)} from summary.csv; per-replicate rows are in replicates.csv.
This file is self-contained and fetches nothing.</footer>
</body>
</html>
"""


def write_study_report(out_dir: Path | str, summary: pd.DataFrame, study: dict[str, Any]) -> Path:
    """Write ``summary.html`` into ``out_dir`` atomically and return its path."""
    return atomic_write_text(Path(out_dir) / "summary.html", study_html(summary, study))
