"""The report's figures: matplotlib drawings of plain numbers, rendered to SVG text and PNG bytes.

Every function here takes numbers that are already in ``claims.json`` / ``scorecard.json`` (or the per-unit
sidecar) and draws them; nothing is estimated here.  Conventions shared by every figure:

* blind estimates are blue circles, design-based ones black squares, pooled summaries vermillion diamonds;
  colour always comes with a distinct marker or line style (theme.py), and verdicts are written as words;
* an interval drawn as a thin line is a 95 % CI; a thick segment on top of it is the 90 % CI used by the
  equivalence test (two one-sided tests at α = 0.05, Schuirmann 1987);
* every axis label names its unit.

SVG output keeps text as text (``svg.fonttype = 'none'``) so the inline figures stay small, and every id in
an SVG is prefixed with the figure's name so that many figures can live in one HTML page.
"""

from __future__ import annotations

import functools
import io
import math
import re
from dataclasses import dataclass
from typing import Callable, ParamSpec, Sequence

import matplotlib
import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from ..core.interpret import DIFFERENT, Z_90, Z_95
from . import theme

P = ParamSpec("P")


# ----------------------------------------------------------------------------------------------------------
# plain inputs
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Interval:
    """A point estimate with its 95 % interval (``low``, ``high``); NaN where a value is unavailable."""

    label: str
    estimate: float
    low: float
    high: float

    @property
    def finite(self) -> bool:
        return all(math.isfinite(v) for v in (self.estimate, self.low, self.high))


@dataclass(frozen=True)
class Curve:
    """A curve y(x) with a pointwise standard error (a 95 % band is y ± 1.96·se)."""

    x: Sequence[float]
    y: Sequence[float]
    se: Sequence[float]


@dataclass(frozen=True)
class Rendered:
    """One figure as inline SVG text (ids prefixed) and as PNG bytes."""

    name: str
    svg: str
    png: bytes


# ----------------------------------------------------------------------------------------------------------
# rendering
# ----------------------------------------------------------------------------------------------------------
def styled(draw: Callable[P, Figure]) -> Callable[P, Figure]:
    """Run a figure builder inside the report's matplotlib style (rcParams are read while drawing)."""

    @functools.wraps(draw)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> Figure:
        with matplotlib.rc_context(theme.matplotlib_rc()):
            return draw(*args, **kwargs)

    return wrapper


def new_figure(width: float, height: float, ncols: int = 1, nrows: int = 1, **kwargs) -> tuple[Figure, np.ndarray]:
    """A Figure (no pyplot, no global state) with an array of axes; call it inside a :func:`styled` builder."""
    fig = Figure(figsize=(width, height), layout="constrained")
    return fig, fig.subplots(nrows, ncols, squeeze=False, **kwargs)


def render(fig: Figure, name: str) -> Rendered:
    """SVG text ready to inline in HTML (no XML prolog, no metadata, ids prefixed, scalable) and PNG bytes."""
    with matplotlib.rc_context(theme.matplotlib_rc()):
        svg_buffer = io.StringIO()
        fig.savefig(svg_buffer, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
        fig.set_layout_engine("none")  # keep the layout just computed: the PNG needs no second layout pass
        png_buffer = io.BytesIO()
        fig.savefig(png_buffer, format="png", metadata={"Software": None})
    return Rendered(name, _inline_svg(svg_buffer.getvalue(), name), png_buffer.getvalue())


def _inline_svg(svg: str, name: str) -> str:
    """Strip the XML prolog/DOCTYPE/metadata, prefix every id with ``name`` and let the SVG scale to its box."""
    svg = svg[svg.index("<svg"):]
    svg = re.sub(r"\s*<metadata>.*?</metadata>", "", svg, flags=re.S)
    svg = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{name}-{m.group(1)}"', svg)
    svg = re.sub(r'(xlink:href|href)="#([^"]+)"', lambda m: f'{m.group(1)}="#{name}-{m.group(2)}"', svg)
    svg = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{name}-{m.group(1)})", svg)
    head = re.match(r'<svg[^>]*?\swidth="([\d.]+)pt" height="([\d.]+)pt"', svg)
    if head:
        width = head.group(1)
        svg = svg.replace(f'width="{width}pt" height="{head.group(2)}pt"', f'style="max-width: {width}pt"', 1)
    return svg.replace("<svg ", f'<svg id="fig-{name}" role="img" ', 1).strip() + "\n"


# ----------------------------------------------------------------------------------------------------------
# shared drawing helpers
# ----------------------------------------------------------------------------------------------------------
def _intervals(ax: Axes, rows: Sequence[Interval], y: np.ndarray, role: str, label: str | None = None,
               filled: bool = True) -> None:
    """Horizontal 95 % intervals at heights ``y`` (rows with NaN are skipped)."""
    colour = theme.ROLE[role]
    first = True
    for row, yy in zip(rows, y):
        if not row.finite:
            continue
        ax.plot([row.low, row.high], [yy, yy], color=colour, lw=1.6, solid_capstyle="butt")
        ax.plot(row.estimate, yy, theme.MARKER.get(role, "o"), color=colour, mfc=colour if filled else "white",
                mew=1.4, ms=6.5, label=label if first else None, zorder=3)
        first = False


def _labels_on_y(ax: Axes, labels: Sequence[str]) -> np.ndarray:
    y = np.arange(len(labels))[::-1].astype(float)
    ax.set_yticks(y, labels)
    ax.set_ylim(-0.7, len(labels) - 0.3)
    ax.grid(axis="y", visible=False)
    return y


def _identity(ax: Axes, low: float, high: float, label: str) -> None:
    ax.plot([low, high], [low, high], ls=(0, (4, 3)), lw=1.0, color=theme.MUTED, label=label, zorder=1)


def _height(rows: int, extra: float = 1.3) -> float:
    return max(2.4, theme.ROW_HEIGHT * rows + extra)


def _finite(values: Sequence[float]) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    return arr[np.isfinite(arr)]


# ----------------------------------------------------------------------------------------------------------
# study and design
# ----------------------------------------------------------------------------------------------------------
@styled
def rates_figure(sites: Sequence[str], realized: Sequence[Interval], declared: Sequence[float]) -> Figure:
    """Realized treated share per site (with its 95 % binomial Wald interval) beside the declared rate."""
    fig, axes = new_figure(theme.FIG_WIDTH, _height(len(sites)))
    ax = axes[0, 0]
    y = _labels_on_y(ax, sites)
    _intervals(ax, realized, y, "design", label="realized share treated (95 % CI)")
    dec = np.asarray(declared, dtype=float)
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
    y = _labels_on_y(ax, names)
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
    xs = np.asarray(bin_means, dtype=float)
    for row, x in zip(bins, xs):
        left.plot([x, x], [row.low, row.high], color=theme.ROLE["design"], lw=1.4)
    left.plot(xs, [b.estimate for b in bins], "s-", color=theme.ROLE["design"], ms=5.5, lw=1.0,
              label="mean known rate in the bin")
    values = np.concatenate([xs, _finite([b.low for b in bins]), _finite([b.high for b in bins])])
    lo, hi = _span(values)
    _identity(left, lo, hi, "ideal: equal")
    left.set_xlabel("mean learned ê in the bin (probability)")
    left.set_ylabel("known assignment rate (probability)")
    left.set_title("by bin of ê")
    left.legend(loc="upper left")
    rates = np.asarray(site_rates, dtype=float)
    for row, r in zip(sites, rates):
        right.plot([r, r], [row.low, row.high], color=theme.ROLE["blind"], lw=1.4)
    right.plot(rates, [s.estimate for s in sites], "o", color=theme.ROLE["blind"], ms=7, label="mean ê of the site")
    for row, r in zip(sites, rates):
        right.annotate(row.label, (r, row.estimate), xytext=(6, 0), textcoords="offset points", va="center",
                       fontsize=theme.BASE_FONT - 1.5, color=theme.INK)
    values = np.concatenate([rates, _finite([s.low for s in sites]), _finite([s.high for s in sites])])
    lo, hi = _span(values)
    _identity(right, lo, hi, "ê equal to the site's rate")
    right.set_xlabel("known assignment rate of the site (probability)")
    right.set_ylabel("learned ê, site mean and 10–90 % range")
    right.set_title("by site")
    right.legend(loc="upper left")
    return fig


def _span(values: np.ndarray, pad: float = 0.04) -> tuple[float, float]:
    values = _finite(values)
    if values.size == 0:
        return 0.0, 1.0
    lo, hi = float(values.min()), float(values.max())
    width = max(hi - lo, 0.05)
    return max(0.0, lo - pad * width * 2), min(1.0, hi + pad * width * 2)


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
    fig, axes = new_figure(theme.FIG_WIDTH + 1.5, _height(len(blind), 1.6), ncols=2, sharey=True,
                           gridspec_kw={"width_ratios": [1.1, 1.0]})
    left, right = axes[0]
    y = _labels_on_y(left, [b.label for b in blind])
    if design.finite:
        left.axvspan(design.low, design.high, color=theme.BAND_GREY, zorder=0, label="design-based 95 % CI")
        left.axvline(design.estimate, color=theme.ROLE["design"], lw=1.4, label="design-based estimate")
        for side in (-1, 1):
            left.axvline(design.estimate + side * margin, color=theme.ROLE["band"], ls=(0, (5, 3)), lw=1.3,
                         label="design ± δ" if side < 0 else None)
    _intervals(left, blind, y, "blind", label="blind estimate (95 % CI)")
    if own_design is not None:
        own = np.asarray(own_design, dtype=float)
        if np.isfinite(own).any():
            left.plot(own, y, "s", color=theme.ROLE["design"], ms=6.5, label="design value, same estimand", zorder=4)
    left.set_xlabel(f"average effect ({unit})")
    left.legend(loc="upper center", bbox_to_anchor=(0.5, -0.22), ncols=2)

    right.axvspan(-margin, margin, color=theme.ROLE["band"], alpha=0.14, zorder=0, label="equivalence band ±δ")
    right.axvline(0.0, color=theme.INK, lw=0.9)
    for row, yy in zip(differences, y):
        if not row.finite:
            continue
        se = (row.high - row.low) / (2 * Z_95)
        right.plot([row.low, row.high], [yy, yy], color=theme.ROLE["blind"], lw=1.4)
        right.plot([row.estimate - Z_90 * se, row.estimate + Z_90 * se], [yy, yy], color=theme.ROLE["blind"], lw=5,
                   solid_capstyle="butt", alpha=0.75)
        right.plot(row.estimate, yy, "o", color=theme.ROLE["blind"], mfc="white", mew=1.4, ms=6.5, zorder=3)
    for text, yy in zip(verdicts, y):
        right.annotate(text, (1.02, yy), xycoords=("axes fraction", "data"), va="center", ha="left",
                       fontsize=theme.BASE_FONT - 0.5, fontweight="bold" if text == DIFFERENT else "normal")
    right.set_xlabel(f"blind − design, paired ({unit})")
    handles, labels = right.get_legend_handles_labels()
    handles += [Line2D([], [], color=theme.ROLE["blind"], lw=1.4), Line2D([], [], color=theme.ROLE["blind"], lw=5, alpha=0.75)]
    labels += ["95 % CI (difference test)", "90 % CI (equivalence test)"]
    right.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, -0.22), ncols=1)
    _pad_x(right, [v for r in differences for v in (r.low, r.high)] + [-margin, margin])
    return fig


def _pad_x(ax: Axes, values: Sequence[float], pad: float = 0.08) -> None:
    values = _finite(values)
    if values.size:
        lo, hi = float(values.min()), float(values.max())
        width = max(hi - lo, 1e-9)
        ax.set_xlim(lo - pad * width, hi + pad * width)


# ----------------------------------------------------------------------------------------------------------
# sites
# ----------------------------------------------------------------------------------------------------------
@styled
def forest_figure(sites: Sequence[Interval], excluded: Sequence[str], pooled: Interval, random_mean: Interval | None,
                  prediction: tuple[float, float] | None, unit: str) -> Figure:
    """Per-site difference in means (95 % CI), the pooled design-based estimate, the random-effects mean
    (95 % CI) and, as a dashed line, the 95 % prediction interval for the effect in a new site."""
    labels = [s.label for s in sites] + ["pooled (design-based)"]
    if random_mean is not None:
        labels.append("random-effects mean")
    fig, axes = new_figure(theme.FIG_WIDTH, _height(len(labels), 1.6))
    ax = axes[0, 0]
    y = _labels_on_y(ax, labels)
    _intervals(ax, sites, y[: len(sites)], "design", label="site difference in means (95 % CI)")
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
    if excluded:
        ax.set_title("not shown (fewer than 2 units in an arm): " + ", ".join(excluded), loc="left",
                     fontsize=theme.BASE_FONT - 1, fontweight="normal", color=theme.MUTED)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    return fig


# ----------------------------------------------------------------------------------------------------------
# heterogeneity
# ----------------------------------------------------------------------------------------------------------
@styled
def paired_rows_figure(labels: Sequence[str], first: Sequence[Interval], second: Sequence[Interval] | None,
                       xlabel: str, reference: float = 0.0,
                       legend: tuple[str, str] = ("blind (95 % CI)", "design-based (95 % CI)")) -> Figure:
    """One row per item: the first 95 % CI (blue circle; by default the blind claim) and, when given, the second
    one (black square; by default the design-based value) just below it; a vertical line marks ``reference``."""
    fig, axes = new_figure(theme.FIG_WIDTH, _height(len(labels), 1.5))
    ax = axes[0, 0]
    y = _labels_on_y(ax, labels)
    offset = 0.16 if second is not None else 0.0
    _intervals(ax, first, y + offset, "blind", label=legend[0], filled=False)
    if second is not None:
        _intervals(ax, second, y - offset, "design", label=legend[1])
    ax.axvline(reference, color=theme.INK, lw=0.9)
    ax.set_xlabel(xlabel)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)
    return fig


@styled
def gates_figure(models: Sequence[str], blind: Sequence[Sequence[Interval]],
                 design: Sequence[Sequence[Interval]] | None, unit: str) -> Figure:
    """GATES by quantile group of τ̂ (1 = lowest τ̂), one panel per model: blind (open circles, 95 % CI) beside
    the design-based re-scoring (black squares)."""
    fig, flat = _panels(len(models))
    for i, model in enumerate(models):
        ax = flat[i]
        groups = np.arange(1, len(blind[i]) + 1, dtype=float)
        _vertical(ax, blind[i], groups - 0.12, "blind", "blind (95 % CI)" if i == 0 else None)
        if design is not None:
            _vertical(ax, design[i], groups + 0.12, "design", "design-based" if i == 0 else None)
        ax.axhline(0.0, color=theme.INK, lw=0.8)
        ax.set_xticks(groups)
        ax.set_title(f"model {model}")
    _finish_panels(fig, flat, len(models), "quantile group of τ̂ (1 = lowest predicted effect)",
                   f"group effect ({unit})")
    return fig


def _panels(count: int, **kwargs) -> tuple[Figure, np.ndarray]:
    """A grid of up to 3 columns of panels sharing their y axis."""
    ncols = min(3, count)
    nrows = math.ceil(count / ncols)
    fig, axes = new_figure(theme.FIG_WIDTH, 2.6 * nrows + 0.9, ncols=ncols, nrows=nrows, sharey=True, **kwargs)
    return fig, axes.ravel()


def _finish_panels(fig: Figure, flat: np.ndarray, used: int, xlabel: str, ylabel: str) -> None:
    for ax in flat[used:]:
        ax.set_visible(False)
    fig.supxlabel(xlabel, fontsize=theme.BASE_FONT)
    fig.supylabel(ylabel, fontsize=theme.BASE_FONT)
    handles, labels = flat[0].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="outside upper center", ncols=len(handles))


def _vertical(ax: Axes, rows: Sequence[Interval], x: np.ndarray, role: str, label: str | None) -> None:
    colour = theme.ROLE[role]
    for row, xx in zip(rows, x):
        if row.finite:
            ax.plot([xx, xx], [row.low, row.high], color=colour, lw=1.5)
    ax.plot(x, [r.estimate for r in rows], theme.MARKER[role], color=colour, ms=6, label=label,
            mfc=colour if role == "design" else "white", mew=1.4)


@styled
def curves_figure(models: Sequence[str], blind: Sequence[Curve], design: Sequence[Curve] | None,
                  xlabel: str, ylabel: str, zoom_from: float = 0.0) -> Figure:
    """Small multiples of curves with 95 % pointwise bands (y ± 1.96·se): blind solid blue with a shaded
    band, design-based dashed black with a dotted band.  The y axis covers the bands where x ≥ ``zoom_from``
    (the first points of a TOC curve rest on a handful of units and can have huge bands)."""
    fig, flat = _panels(len(models), sharex=True)
    spans = []
    for i, model in enumerate(models):
        ax = flat[i]
        spans.append(_band(ax, blind[i], "blind", "-", "blind (95 % band)" if i == 0 else None, zoom_from))
        if design is not None:
            spans.append(_band(ax, design[i], "design", (0, (5, 2)), "design-based (95 % band)" if i == 0 else None,
                               zoom_from))
        ax.axhline(0.0, color=theme.INK, lw=0.8)
        ax.set_title(f"model {model}")
    lo = min(s[0] for s in spans)
    hi = max(s[1] for s in spans)
    if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
        pad = 0.06 * (hi - lo)
        flat[0].set_ylim(min(lo, 0.0) - pad, max(hi, 0.0) + pad)
    _finish_panels(fig, flat, len(models), xlabel, ylabel)
    return fig


def _band(ax: Axes, curve: Curve, role: str, style, label: str | None, zoom_from: float) -> tuple[float, float]:
    """Draw the curve and its band; return the band's range over x ≥ ``zoom_from``."""
    x = np.asarray(curve.x, dtype=float)
    y = np.asarray(curve.y, dtype=float)
    se = np.asarray(curve.se, dtype=float)
    low, high = y - Z_95 * se, y + Z_95 * se
    colour = theme.ROLE[role]
    if role == "design":
        ax.fill_between(x, low, high, facecolor="none", edgecolor=colour, hatch="....", lw=0, alpha=0.35)
    else:
        ax.fill_between(x, low, high, color=colour, alpha=0.18, lw=0)
    ax.plot(x, y, color=colour, ls=style, lw=1.7, label=label)
    keep = (x >= zoom_from) & np.isfinite(low) & np.isfinite(high)
    return (float(low[keep].min()), float(high[keep].max())) if keep.any() else (math.inf, -math.inf)


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


@styled
def rules_figure(blind: Sequence[RulePoint], design: Sequence[RulePoint], unit: str) -> Figure:
    """Value of each rule against its treated share, blind (left) and design-based (right): one line per CATE
    model through its rules in order of treated share, a separate marker per family, 95 % CIs as thin bars,
    and random allocation at the same share as a grey dashed line (a rule above it has a positive gain)."""
    fig, axes = new_figure(theme.FIG_WIDTH, 4.3, ncols=2, sharey=True)
    families = list(dict.fromkeys(p.family for p in blind))
    colours = [theme.OKABE_ITO[k] for k in ("blue", "vermillion", "bluish_green", "orange", "reddish_purple",
                                             "sky_blue", "black")]
    markers = ["o", "s", "^", "D", "v", "P", "X"]
    for ax, points, title in ((axes[0, 0], blind, "blind (learned ê)"), (axes[0, 1], design, "design-based (known rates)")):
        random = sorted((p.share, p.random_value) for p in points if math.isfinite(p.random_value))
        if random:
            ax.plot([r[0] for r in random], [r[1] for r in random], color=theme.MUTED, ls=(0, (4, 3)), lw=1.1,
                    label="random allocation, same share", zorder=1)
        for j, family in enumerate(families):
            mine = sorted((p for p in points if p.family == family), key=lambda p: p.share)
            colour, marker = colours[j % len(colours)], markers[j % len(markers)]
            for p in mine:
                if p.value.finite:
                    ax.plot([p.share, p.share], [p.value.low, p.value.high], color=colour, lw=0.9, alpha=0.45)
            ax.plot([p.share for p in mine], [p.value.estimate for p in mine], marker=marker, color=colour, ms=6,
                    lw=1.2 if len(mine) > 1 else 0, label=family if family == "tree" else f"model {family}")
        ax.set_title(title)
        ax.set_xlabel("share of units the rule treats (proportion)")
        ax.set_xlim(-0.02, 1.02)
    axes[0, 0].set_ylabel(f"value of the rule ({unit})")
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=min(4, len(handles)))
    return fig
