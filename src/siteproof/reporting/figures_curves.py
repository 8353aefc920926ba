"""Small-multiple figures, one panel per CATE model: GATES by quantile group and curves over the share of units
treated (the targeting-operator curve TOC(q) and the cost-aware gain curve).

Curves have a look of their own: the blind curve is a solid blue line over a filled band, the design-based
curve a dashed black line between the two thin edges of its band (outline, no fill), so the two bands stay
apart in print and for every colour vision.  Where the first points rest on a handful of units (q below
``zoom_from``) the strip is shaded, the y axis is fitted to the bands beyond it, and curves leaving the axis
there are clipped at its edge.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..core.interpret import Z_95
from . import theme
from .figures_base import Curve, Interval, new_figure, styled

BAND_ALPHA = 0.22   # opacity of the blind band's fill
Y_PAD = 0.06        # share of the data range added above and below the fitted y axis


def panels(count: int, **kwargs) -> tuple[Figure, np.ndarray]:
    """A grid of up to 3 columns of panels sharing their y axis."""
    ncols = min(3, count)
    nrows = math.ceil(count / ncols)
    fig, axes = new_figure(theme.FIG_WIDTH, 2.6 * nrows + 1.1, ncols=ncols, nrows=nrows, sharey=True, **kwargs)
    return fig, axes.ravel()


def finish_panels(fig: Figure, flat: np.ndarray, used: int, xlabel: str, ylabel: str,
                  handles: list | None = None, labels: list[str] | None = None) -> None:
    """Hide unused panels, give the lowest shown panel of every column its x tick labels, write the shared
    axis labels and one legend above the panels."""
    for ax in flat[used:]:
        ax.set_visible(False)
    ncols = flat[0].get_gridspec().ncols
    for ax in flat[max(0, used - ncols):used]:  # the lowest panel of each column shows its x tick labels
        ax.xaxis.set_tick_params(labelbottom=True)
    fig.supxlabel(xlabel, fontsize=theme.BASE_FONT)
    fig.supylabel(ylabel, fontsize=theme.BASE_FONT)
    if handles is None:
        handles, labels = flat[0].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="outside upper center", ncols=min(3, len(handles)))


def _vertical(ax: Axes, rows: Sequence[Interval], x: np.ndarray, role: str, label: str | None) -> None:
    """Points at ``x`` with their 95 % intervals as vertical lines."""
    colour = theme.ROLE[role]
    for row, xx in zip(rows, x):
        if row.finite:
            ax.plot([xx, xx], [row.low, row.high], color=colour, lw=1.5)
    ax.plot(x, [r.estimate for r in rows], theme.MARKER[role], color=colour, ms=6, label=label,
            mfc=colour if role == "design" else "white", mew=1.4)


@styled
def gates_figure(models: Sequence[str], blind: Sequence[Sequence[Interval]],
                 design: Sequence[Sequence[Interval]] | None, unit: str) -> Figure:
    """GATES by quantile group of τ̂ (1 = lowest τ̂), one panel per model: blind (open circles, 95 % CI) beside
    the design-based re-scoring (black squares)."""
    fig, flat = panels(len(models))
    for i, model in enumerate(models):
        ax = flat[i]
        groups = np.arange(1, len(blind[i]) + 1, dtype=float)
        _vertical(ax, blind[i], groups - 0.12, "blind", "blind (95 % CI)" if i == 0 else None)
        if design is not None:
            _vertical(ax, design[i], groups + 0.12, "design", "design-based" if i == 0 else None)
        ax.axhline(0.0, color=theme.INK, lw=0.8)
        ax.set_xticks(groups)
        ax.set_title(f"model {model}")
    finish_panels(fig, flat, len(models), "quantile group of τ̂ (1 = lowest predicted effect)",
                  f"group effect ({unit})")
    return fig


@styled
def curves_figure(models: Sequence[str], blind: Sequence[Curve], design: Sequence[Curve] | None,
                  xlabel: str, ylabel: str, zoom_from: float = 0.0) -> Figure:
    """Small multiples of curves with 95 % pointwise bands (y ± 1.96·se): blind solid blue over a filled band,
    design-based dashed black between the outlines of its band.  The y axis is fitted to the bands where
    x ≥ ``zoom_from``; the strip x < ``zoom_from`` is shaded as resting on few units and clipped."""
    fig, flat = panels(len(models), sharex=True)
    spans = []
    for i, model in enumerate(models):
        ax = flat[i]
        spans.append(_band(ax, blind[i], "blind", zoom_from))
        if design is not None:
            spans.append(_band(ax, design[i], "design", zoom_from))
        ax.axhline(0.0, color=theme.INK, lw=0.8, zorder=1)
        if zoom_from > 0:
            ax.axvspan(min(_first_x(blind[i]), 0.0), zoom_from, facecolor=theme.BAND_GREY, edgecolor=theme.MUTED,
                       lw=0.6, hatch="////", zorder=0)
        ax.set_title(f"model {model}")
    _fit_y(flat[0], spans)
    handles = [(Patch(facecolor=theme.ROLE["blind"], alpha=BAND_ALPHA, lw=0),
                Line2D([], [], color=theme.ROLE["blind"], lw=1.8))]
    labels = ["blind (95 % band)"]
    if design is not None:
        handles.append((Patch(facecolor="none", edgecolor=theme.ROLE["design"], lw=0.8),
                        Line2D([], [], color=theme.ROLE["design"], lw=1.8, ls=(0, (5, 2)))))
        labels.append("design-based (95 % band)")
    if zoom_from > 0:
        handles.append(Patch(facecolor=theme.BAND_GREY, edgecolor=theme.MUTED, lw=0.6, hatch="////"))
        labels.append(f"share below {zoom_from:g}: few units, curves clipped")
    finish_panels(fig, flat, len(models), xlabel, ylabel, handles, labels)
    return fig


def _first_x(curve: Curve) -> float:
    """The smallest x of a curve (0 for an empty one)."""
    x = np.asarray(curve.x, dtype=float)
    return float(np.nanmin(x)) if x.size else 0.0


def _band(ax: Axes, curve: Curve, role: str, zoom_from: float) -> tuple[float, float]:
    """Draw the curve and its band (blind: filled; design: outline); return the band's range over
    x ≥ ``zoom_from``."""
    x = np.asarray(curve.x, dtype=float)
    y = np.asarray(curve.y, dtype=float)
    se = np.asarray(curve.se, dtype=float)
    low, high = y - Z_95 * se, y + Z_95 * se
    colour = theme.ROLE[role]
    if role == "design":
        for edge in (low, high):
            ax.plot(x, edge, color=colour, lw=0.8, alpha=0.8, zorder=2)
        ax.plot(x, y, color=colour, ls=(0, (5, 2)), lw=1.8, zorder=3)
    else:
        ax.fill_between(x, low, high, facecolor=colour, alpha=BAND_ALPHA, lw=0, zorder=1)
        ax.plot(x, y, color=colour, lw=1.8, zorder=3)
    keep = (x >= zoom_from) & np.isfinite(low) & np.isfinite(high)
    return (float(low[keep].min()), float(high[keep].max())) if keep.any() else (math.inf, -math.inf)


def _fit_y(ax: Axes, spans: list[tuple[float, float]]) -> None:
    """Set the (shared) y axis to the union of the bands' ranges and 0, with a margin of :data:`Y_PAD`."""
    lo = min((s[0] for s in spans), default=math.inf)
    hi = max((s[1] for s in spans), default=-math.inf)
    if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
        lo, hi = min(lo, 0.0), max(hi, 0.0)
        pad = Y_PAD * (hi - lo)
        ax.set_ylim(lo - pad, hi + pad)
