"""The report's figures: matplotlib drawings of plain numbers, rendered to SVG text and PNG bytes.

Every function here takes numbers that are already in ``claims.json`` / ``scorecard.json`` (or the per-unit
sidecar) and draws them; nothing is estimated here.  Conventions shared by every figure:

* blind estimates are blue circles, design-based ones black squares, pooled summaries vermillion diamonds;
  colour always comes with a distinct marker or line style (theme.py), and verdicts are written as words;
* an interval drawn as a thin line is a 95 % CI; a thick segment on top of it is the 90 % CI used by the
  equivalence test (two one-sided tests at α = 0.05, Schuirmann 1987);
* every axis label names its unit;
* labels never overprint: point labels are placed where they fit (or left out), and with more than
  ``MANY_SITES`` sites a per-site figure is a sorted dot plot naming only the extreme sites.

The shared machinery (inputs, rendering to inline SVG and PNG, label placement) is in :mod:`.figures_base`;
the per-model small multiples (GATES, TOC and cost curves) are in :mod:`.figures_curves`; both are
re-exported here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from . import theme
from .figures_base import (MANY_SITES, Curve, Interval, Rendered, extremes, finite_values, height_for, identity_line,
                           intervals_h, label_extremes, labels_on_y, new_figure, pad_x, paired_differences, place_labels, render,
                           sorted_dots, span_unit, styled)
from .figures_curves import curves_figure, gates_figure

__all__ = ["Curve", "Interval", "Rendered", "RulePoint", "average_effect_figure", "calibration_figure",
           "curves_figure", "forest_figure", "gates_figure", "new_figure", "paired_rows_figure",
           "propensity_histogram", "propensity_quantiles", "rates_figure", "render", "rules_figure", "styled"]


# ----------------------------------------------------------------------------------------------------------
# study and design
# ----------------------------------------------------------------------------------------------------------
@styled
def rates_figure(sites: Sequence[str], realized: Sequence[Interval], declared: Sequence[float]) -> Figure:
    """Realized treated share per site (with its 95 % binomial Wald interval) beside the declared rate.

    Up to :data:`MANY_SITES` sites one row per site; beyond, a dot plot of the sites sorted by realized share
    (declared rates as open diamonds above the same rank) naming the extreme sites."""
    dec = np.asarray(declared, dtype=float)
    if len(sites) > MANY_SITES:
        fig, axes = new_figure(theme.FIG_WIDTH, 3.8)
        ax = axes[0, 0]
        order = sorted_dots(ax, realized, "design", "realized share treated (95 % CI)")
        if np.isfinite(dec).any():
            ax.plot(np.arange(1, len(sites) + 1), dec[order], "D", ms=5, mfc="none", mec=theme.ROLE["pooled"],
                    mew=1.2, label="declared rate", zorder=4)
        ax.set_ylabel("share assigned to treatment\n(proportion)")
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
        label_extremes(ax, realized, order, extra=list(dec))
        return fig
    fig, axes = new_figure(theme.FIG_WIDTH, height_for(len(sites)))
    ax = axes[0, 0]
    y = labels_on_y(ax, sites)
    intervals_h(ax, realized, y, "design", label="realized share treated (95 % CI)")
    if np.isfinite(dec).any():
        ax.plot(dec, y, "D", ms=8, mfc="none", mec=theme.ROLE["pooled"], mew=1.6, label="declared rate", zorder=4)
    ax.set_xlabel("share of the site's units assigned to treatment (proportion)")
    ax.set_xlim(0, 1)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    return fig


# ----------------------------------------------------------------------------------------------------------
# overlap and propensity recovery
# ----------------------------------------------------------------------------------------------------------
@styled
def propensity_histogram(edges: Sequence[float], treated: Sequence[float], control: Sequence[float],
                         band: Sequence[float]) -> Figure:
    """Histogram counts of the out-of-fold ê for treated units (upper panel) and control units (lower panel)."""
    fig, axes = new_figure(theme.FIG_WIDTH, 3.8, nrows=2, sharex=True)
    edges = np.asarray(edges, dtype=float)
    for ax, counts, arm in ((axes[0, 0], treated, "treated"), (axes[1, 0], control, "control")):
        ax.stairs(np.asarray(counts, dtype=float), edges, fill=True, color=theme.ROLE[arm], alpha=0.85,
                  hatch="///" if arm == "control" else None, edgecolor=theme.INK, lw=0.6)
        for edge in band:
            ax.axvline(edge, color=theme.MUTED, ls=(0, (2, 2)), lw=1.0)
        ax.set_ylabel(f"{arm}\n(units per bin)")
        ax.grid(axis="x", visible=False)
    axes[1, 0].set_xlabel("learned propensity ê (probability of treatment, out-of-fold)")
    axes[1, 0].set_xlim(min(0.0, edges[0]), max(1.0, edges[-1]))
    return fig


@styled
def propensity_quantiles(arms: dict[str, dict[str, float]], band: Sequence[float]) -> Figure:
    """Quantile summary of ê per arm when per-unit values are not at hand: min–max (thin), 5–95 %
    (medium), 25–75 % (thick) and the median (bar)."""
    fig, axes = new_figure(theme.FIG_WIDTH, 2.2)
    ax = axes[0, 0]
    names = list(arms)
    y = labels_on_y(ax, names)
    for name, yy in zip(names, y):
        q = arms[name]
        colour = theme.ROLE.get(name, theme.INK)
        for lo, hi, width in (("min", "max", 1.0), ("p05", "p95", 3.5), ("p25", "p75", 8.0)):
            ax.plot([q[lo], q[hi]], [yy, yy], color=colour, lw=width, solid_capstyle="butt")
        ax.plot([q["p50"]] * 2, [yy - 0.25, yy + 0.25], color=theme.INK, lw=2.0)
    for edge in band:
        ax.axvline(edge, color=theme.MUTED, ls=(0, (2, 2)), lw=1.0)
    ax.set_xlim(0, 1)
    ax.set_xlabel("learned propensity ê (probability of treatment, out-of-fold)")
    return fig


@styled
def calibration_figure(bins: Sequence[Interval], bin_means: Sequence[float], sites: Sequence[Interval],
                       site_rates: Sequence[float]) -> Figure:
    """Left: mean known rate (95 % CI) against mean ê in bins of ê. Right: each site's mean ê (10th–90th
    percentile range) against its known rate. A correct ê lies on the dashed identity line in the left panel."""
    fig, axes = new_figure(theme.FIG_WIDTH, 3.9, ncols=2)
    left, right = axes[0]
    _calibration_panel(left, np.asarray(bin_means, dtype=float), bins, "design",
                       dict(fmt="s-", ms=5.5, lw=1.0, label="mean known rate in the bin"), "ideal: equal",
                       ("mean learned ê in the bin (probability)", "known assignment rate (probability)", "by bin of ê"))
    rates = np.asarray(site_rates, dtype=float)
    _calibration_panel(right, rates, sites, "blind", dict(fmt="o", ms=7, label="mean ê of the site"),
                       "ê equal to the site's rate",
                       ("known assignment rate of the site (probability)", "learned ê, site mean and 10–90 % range",
                        "by site"))
    _label_sites(right, sites, rates)
    return fig


def _calibration_panel(ax: Axes, xs: np.ndarray, rows: Sequence[Interval], role: str, point: dict,
                       identity: str, titles: tuple[str, str, str]) -> None:
    """One calibration panel: each row's interval drawn vertically at its x, the points (``point``: the
    matplotlib format and keywords), the identity line over the data's span and the axis labels and title."""
    for row, x in zip(rows, xs):
        ax.plot([x, x], [row.low, row.high], color=theme.ROLE[role], lw=1.4)
    ax.plot(xs, [r.estimate for r in rows], point["fmt"], color=theme.ROLE[role],
            **{key: value for key, value in point.items() if key != "fmt"})
    values = np.concatenate([xs, finite_values([r.low for r in rows]), finite_values([r.high for r in rows])])
    identity_line(ax, *span_unit(values), identity)
    ax.set_xlabel(titles[0])
    ax.set_ylabel(titles[1])
    ax.set_title(titles[2])
    ax.legend(loc="upper left")


LABELLED_SITES = 12  # up to this many sites every site is named in the calibration panel; beyond, the extremes


def _label_sites(ax: Axes, sites: Sequence[Interval], rates: np.ndarray) -> None:
    """Name the sites of the calibration panel, farthest from the identity line first, where a label fits
    (up to :data:`LABELLED_SITES` sites all of them, beyond only the extremes)."""
    gap = np.asarray([s.estimate for s in sites], dtype=float) - rates
    clear = [(float(r), s.estimate) for r, s in zip(rates, sites)]
    if len(sites) <= LABELLED_SITES:
        order = [int(i) for i in np.argsort(-np.abs(np.nan_to_num(gap, nan=-1.0)), kind="stable")]
    else:  # a crowded panel: only the extremes, and only clear of every range drawn
        order = extremes(gap, 3)
        clear += [(float(r), float(v)) for r, s in zip(rates, sites) if s.finite for v in np.linspace(s.low, s.high, 7)]
    place_labels(ax, [(float(rates[i]), sites[i].estimate, sites[i].label) for i in order], keep_clear=clear)


# ----------------------------------------------------------------------------------------------------------
# average effect
# ----------------------------------------------------------------------------------------------------------
@styled
def average_effect_figure(blind: Sequence[Interval], design: Interval, differences: Sequence[Interval],
                          verdicts: Sequence[str], margin: float, unit: str,
                          own_design: Sequence[float] | None = None) -> Figure:
    """Left: each blind estimator's 95 % CI beside the design-based CI and the ±δ band around the design
    estimate. Right: the paired difference D = blind − design with its 95 % CI (thin) and 90 % CI (thick)
    against the ±δ band; the verdict is written at the end of each row.

    ``own_design`` gives, per row, the design-based value of another estimand that the row is compared with
    (NaN for rows compared with the pooled design estimate); it is drawn as a black square on the left."""
    fig, axes = new_figure(theme.FIG_WIDTH + 1.5, height_for(len(blind), 1.6), ncols=2, sharey=True,
                           gridspec_kw={"width_ratios": [1.1, 1.0]})
    left, right = axes[0]
    y = labels_on_y(left, [b.label for b in blind])
    if design.finite:
        left.axvspan(design.low, design.high, color=theme.BAND_GREY, zorder=0, label="design-based 95 % CI")
        left.axvline(design.estimate, color=theme.ROLE["design"], lw=1.4, label="design-based estimate")
        for side in (-1, 1):
            left.axvline(design.estimate + side * margin, color=theme.ROLE["band"], ls=(0, (5, 3)), lw=1.3,
                         label="design ± δ" if side < 0 else None)
    intervals_h(left, blind, y, "blind", label="blind estimate (95 % CI)")
    if own_design is not None:
        own = np.asarray(own_design, dtype=float)
        if np.isfinite(own).any():
            left.plot(own, y, "s", color=theme.ROLE["design"], ms=6.5, label="design value, same estimand", zorder=4)
    left.set_xlabel(f"average effect ({unit})")
    left.legend(loc="upper center", bbox_to_anchor=(0.5, -0.22), ncols=2)

    paired_differences(right, differences, y, verdicts, margin)
    right.set_xlabel(f"blind − design, paired ({unit})")
    handles, labels = right.get_legend_handles_labels()
    handles += [Line2D([], [], color=theme.ROLE["blind"], lw=1.4), Line2D([], [], color=theme.ROLE["blind"], lw=5, alpha=0.75)]
    labels += ["95 % CI (difference test)", "90 % CI (equivalence test)"]
    right.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, -0.22), ncols=1)
    pad_x(right, [v for r in differences for v in (r.low, r.high)] + [-margin, margin])
    return fig


# ----------------------------------------------------------------------------------------------------------
# sites
# ----------------------------------------------------------------------------------------------------------
@styled
def forest_figure(sites: Sequence[Interval], excluded: Sequence[str], pooled: Interval, random_mean: Interval | None,
                  prediction: tuple[float, float] | None, unit: str) -> Figure:
    """Per-site difference in means (95 % CI), the pooled design-based estimate, the random-effects mean
    (95 % CI) and, as a dashed line, the 95 % prediction interval for the effect in a new site.  With more
    than :data:`MANY_SITES` sites: a dot plot of the sites sorted by their estimate, the summaries drawn as
    horizontal lines across it."""
    if len(sites) > MANY_SITES:
        return _forest_dots(sites, excluded, pooled, random_mean, prediction, unit)
    labels = [s.label for s in sites] + ["pooled (design-based)"]
    if random_mean is not None:
        labels.append("random-effects mean")
    fig, axes = new_figure(theme.FIG_WIDTH, height_for(len(labels), 1.6))
    ax = axes[0, 0]
    y = labels_on_y(ax, labels)
    intervals_h(ax, sites, y[: len(sites)], "design", label="site difference in means (95 % CI)")
    summaries = [(pooled, y[len(sites)], "pooled design-based estimate (95 % CI)")]
    if random_mean is not None:
        summaries.append((random_mean, y[len(sites) + 1], "random-effects mean (95 % CI)"))
    for i, (row, yy, label) in enumerate(summaries):
        if not row.finite:
            continue
        ax.fill([row.low, row.estimate, row.high, row.estimate], [yy, yy + 0.28, yy, yy - 0.28],
                color=theme.ROLE["pooled"], alpha=0.9 if i == 0 else 0.45, ec=theme.INK, lw=0.8, label=label)
    if random_mean is not None and prediction is not None and all(map(math.isfinite, prediction)):
        yy = y[len(sites) + 1]
        ax.plot(prediction, [yy - 0.38] * 2, color=theme.ROLE["pooled"], ls=(0, (4, 2)), lw=1.6,
                label="95 % prediction interval, new site")
    if pooled.finite:
        ax.axvline(pooled.estimate, color=theme.MUTED, lw=0.8, ls=":")
    ax.axvline(0.0, color=theme.INK, lw=0.8)
    ax.set_xlabel(f"difference in means, treated − control ({unit})")
    _excluded_title(ax, excluded)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    return fig


def _forest_dots(sites: Sequence[Interval], excluded: Sequence[str], pooled: Interval, random_mean: Interval | None,
                 prediction: tuple[float, float] | None, unit: str) -> Figure:
    """The many-site forest: sites sorted by estimate; pooled estimate with its 95 % CI as a shaded band,
    random-effects mean dashed, the 95 % prediction interval as two dotted lines."""
    fig, axes = new_figure(theme.FIG_WIDTH, 4.4)
    ax = axes[0, 0]
    order = sorted_dots(ax, sites, "design", "site difference in means (95 % CI)")
    if pooled.finite:
        ax.axhspan(pooled.low, pooled.high, color=theme.ROLE["pooled"], alpha=0.16, lw=0, zorder=0)
        ax.axhline(pooled.estimate, color=theme.ROLE["pooled"], lw=1.4, label="pooled design-based estimate "
                   "(band: 95 % CI)")
    if random_mean is not None and random_mean.finite:
        ax.axhline(random_mean.estimate, color=theme.ROLE["pooled"], lw=1.2, ls=(0, (6, 3)),
                   label="random-effects mean")
    if random_mean is not None and prediction is not None and all(map(math.isfinite, prediction)):
        for k, edge in enumerate(prediction):
            ax.axhline(edge, color=theme.ROLE["pooled"], lw=1.0, ls=(0, (1, 2)),
                       label="95 % prediction interval, new site" if k == 0 else None)
    ax.axhline(0.0, color=theme.INK, lw=0.8)
    ax.set_ylabel(f"difference in means,\ntreated − control ({unit})")
    _excluded_title(ax, excluded)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    label_extremes(ax, sites, order, extra=[0.0, pooled.low, pooled.high, *(prediction or ())])
    return fig


EXCLUDED_NAMED = 8  # excluded sites named above a forest plot; the rest are counted


def _excluded_title(ax: Axes, excluded: Sequence[str]) -> None:
    """Name the sites left out of the forest plot above it (the first few, then a count)."""
    if not excluded:
        return
    names = ", ".join(excluded[:EXCLUDED_NAMED])
    if len(excluded) > EXCLUDED_NAMED:
        names += f" and {len(excluded) - EXCLUDED_NAMED} more"
    ax.set_title(f"not shown (fewer than 2 units in an arm): {names}", loc="left",
                 fontsize=theme.BASE_FONT - 1, fontweight="normal", color=theme.MUTED)


# ----------------------------------------------------------------------------------------------------------
# heterogeneity
# ----------------------------------------------------------------------------------------------------------
@styled
def paired_rows_figure(labels: Sequence[str], first: Sequence[Interval], second: Sequence[Interval] | None,
                       xlabel: str, reference: float = 0.0,
                       legend: tuple[str, str] = ("blind (95 % CI)", "design-based (95 % CI)")) -> Figure:
    """One row per item: the first 95 % CI (blue circle; by default the blind claim) and, when given, the second
    one (black square; by default the design-based value) just below it; a vertical line marks ``reference``."""
    fig, axes = new_figure(theme.FIG_WIDTH, height_for(len(labels), 1.5))
    ax = axes[0, 0]
    y = labels_on_y(ax, labels)
    offset = 0.16 if second is not None else 0.0
    intervals_h(ax, first, y + offset, "blind", label=legend[0], filled=False)
    if second is not None:
        intervals_h(ax, second, y - offset, "design", label=legend[1])
    ax.axvline(reference, color=theme.INK, lw=0.9)
    ax.set_xlabel(xlabel)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    return fig


# ----------------------------------------------------------------------------------------------------------
# treatment rules
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RulePoint:
    """One learned rule for :func:`rules_figure`: its family (model key or 'tree'), treated share, value
    (95 % CI) and the value of random allocation with the same treated share (value − gain)."""

    family: str
    share: float
    value: Interval
    random_value: float


FAMILY_COLOURS = ("blue", "vermillion", "bluish_green", "orange", "reddish_purple")  # dark enough on white
FAMILY_MARKERS = ("o", "s", "^", "D", "v")
TREE_STYLE = {"marker": "*", "color": theme.INK, "ms": 12, "mec": "white", "mew": 0.8}
DODGE = 0.012        # horizontal shift between families' CI bars, as a share of the x range
SHARE_PAD = 0.04     # margin around the treated shares on the x axis (proportion)


def _family_style(j: int, family: str) -> dict:
    """Colour and marker of a rule family: one per CATE model; the tree a black star."""
    if family == "tree":
        return dict(TREE_STYLE)
    return {"marker": FAMILY_MARKERS[j % len(FAMILY_MARKERS)], "color": theme.OKABE_ITO[FAMILY_COLOURS[j % len(FAMILY_COLOURS)]],
            "ms": 6.5, "mec": theme.INK, "mew": 0.6}


def _share_range(points: Sequence[RulePoint]) -> tuple[float, float]:
    """The x range: the treated shares of all rules with a margin, inside [0, 1], at least 0.2 wide."""
    shares = finite_values([p.share for p in points])
    if shares.size == 0:
        return 0.0, 1.0
    lo, hi = float(shares.min()) - SHARE_PAD, float(shares.max()) + SHARE_PAD
    if hi - lo < 0.2:
        mid = (lo + hi) / 2
        lo, hi = mid - 0.1, mid + 0.1
    return max(-0.01, lo), min(1.01, hi)


@styled
def rules_figure(blind: Sequence[RulePoint], design: Sequence[RulePoint], unit: str) -> Figure:
    """Value of each rule against its treated share, blind (left) and design-based (right): one line per CATE
    model through its rules in order of treated share, a separate marker per family (the tree a black star),
    95 % CIs as bars shifted slightly per family so they never cover each other, and random allocation at the
    same share as a grey dashed line (a rule above it has a positive gain).  The x axis covers the shares the
    rules treat, not all of [0, 1]."""
    fig, axes = new_figure(theme.FIG_WIDTH, 4.3, ncols=2, sharey=True)
    families = list(dict.fromkeys(p.family for p in blind))
    lo, hi = _share_range(list(blind) + list(design))
    for ax, points, title in ((axes[0, 0], blind, "blind (learned ê)"), (axes[0, 1], design, "design-based (known rates)")):
        random = sorted((p.share, p.random_value) for p in points if math.isfinite(p.random_value))
        if random:
            ax.plot([r[0] for r in random], [r[1] for r in random], color=theme.MUTED, ls=(0, (4, 3)), lw=1.1,
                    label="random allocation, same share", zorder=1)
        for j, family in enumerate(families):
            mine = sorted((p for p in points if p.family == family), key=lambda p: p.share)
            style = _family_style(j, family)
            shift = (j - (len(families) - 1) / 2) * DODGE * (hi - lo)
            for p in mine:
                if p.value.finite:
                    ax.plot([p.share + shift] * 2, [p.value.low, p.value.high], color=style["color"], lw=1.4,
                            alpha=0.85, solid_capstyle="butt", zorder=2)
            ax.plot([p.share + shift for p in mine], [p.value.estimate for p in mine], ls="-" if len(mine) > 1 else "",
                    lw=1.2, zorder=3, label=family if family == "tree" else f"model {family}", **style)
        ax.set_title(title)
        ax.set_xlabel("share of units the rule treats (proportion)")
        ax.set_xlim(lo, hi)
    axes[0, 0].set_ylabel(f"value of the rule ({unit})")
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=min(4, len(handles)))
    return fig
