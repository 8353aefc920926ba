"""Shared parts of the report's figures: plain inputs, the style wrapper, rendering to inline SVG and PNG, and
drawing helpers (intervals, label placement that never overprints, sorted dot plots for many sites).

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
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.text import Annotation, Text

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
    FigureCanvasAgg(fig)  # a canvas with a renderer: label placement measures text before the figure is saved
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
def intervals_h(ax: Axes, rows: Sequence[Interval], y: np.ndarray, role: str, label: str | None = None,
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


def paired_differences(ax: Axes, rows: Sequence[Interval], y: np.ndarray, verdicts: Sequence[str],
                       margin: float) -> None:
    """Paired differences D = blind − design against the equivalence band ±δ: the 95 % CI (thin; difference
    test), the 90 % CI (thick; equivalence test, Schuirmann 1987) and the verdict written at the end of each row.
    The 90 % half-width is z₀.₉₅·SE with SE recovered from the 95 % Wald interval."""
    ax.axvspan(-margin, margin, color=theme.ROLE["band"], alpha=0.14, zorder=0, label="equivalence band ±δ")
    ax.axvline(0.0, color=theme.INK, lw=0.9)
    for row, yy in zip(rows, y):
        if not row.finite:
            continue
        se = (row.high - row.low) / (2 * Z_95)
        ax.plot([row.low, row.high], [yy, yy], color=theme.ROLE["blind"], lw=1.4)
        ax.plot([row.estimate - Z_90 * se, row.estimate + Z_90 * se], [yy, yy], color=theme.ROLE["blind"], lw=5,
                solid_capstyle="butt", alpha=0.75)
        ax.plot(row.estimate, yy, "o", color=theme.ROLE["blind"], mfc="white", mew=1.4, ms=6.5, zorder=3)
    for text, yy in zip(verdicts, y):
        ax.annotate(text, (1.02, yy), xycoords=("axes fraction", "data"), va="center", ha="left",
                    fontsize=theme.BASE_FONT - 0.5, fontweight="bold" if text == DIFFERENT else "normal")


def labels_on_y(ax: Axes, labels: Sequence[str]) -> np.ndarray:
    """One row per label, top to bottom, labels as y ticks; returns the rows' heights."""
    y = np.arange(len(labels))[::-1].astype(float)
    ax.set_yticks(y, labels)
    ax.set_ylim(-0.7, len(labels) - 0.3)
    ax.grid(axis="y", visible=False)
    return y


def identity_line(ax: Axes, low: float, high: float, label: str) -> None:
    """The dashed line y = x from ``low`` to ``high``."""
    ax.plot([low, high], [low, high], ls=(0, (4, 3)), lw=1.0, color=theme.MUTED, label=label, zorder=1)


def height_for(rows: int, extra: float = 1.3) -> float:
    """Figure height (inches) for ``rows`` labelled rows plus ``extra`` for axes and legend."""
    return max(2.4, theme.ROW_HEIGHT * rows + extra)


def finite_values(values: Sequence[float]) -> np.ndarray:
    """The finite entries of ``values`` as a float array."""
    arr = np.asarray(values, dtype=float)
    return arr[np.isfinite(arr)]




def span_unit(values: np.ndarray, pad: float = 0.04) -> tuple[float, float]:
    """An axis range inside [0, 1] covering ``values`` with a margin (probabilities)."""
    values = finite_values(values)
    if values.size == 0:
        return 0.0, 1.0
    lo, hi = float(values.min()), float(values.max())
    width = max(hi - lo, 0.05)
    return max(0.0, lo - pad * width * 2), min(1.0, hi + pad * width * 2)


def pad_x(ax: Axes, values: Sequence[float], pad: float = 0.08) -> None:
    """Set the x range to cover ``values`` with a margin of ``pad`` × their spread on each side."""
    values = finite_values(values)
    if values.size:
        lo, hi = float(values.min()), float(values.max())
        width = max(hi - lo, 1e-9)
        ax.set_xlim(lo - pad * width, hi + pad * width)


# ----------------------------------------------------------------------------------------------------------
# labels that never overprint
# ----------------------------------------------------------------------------------------------------------
LABEL_OFFSETS = (  # (dx, dy) in points and the alignment that puts the text beside the point
    (6, 0, "left", "center"), (-6, 0, "right", "center"), (0, 7, "center", "bottom"), (0, -7, "center", "top"),
    (6, 7, "left", "bottom"), (-6, 7, "right", "bottom"), (6, -7, "left", "top"), (-6, -7, "right", "top"),
    (0, 16, "center", "bottom"), (0, -16, "center", "top"), (10, 16, "left", "bottom"), (-10, -16, "right", "top"),
)
FAR_OFFSET = 10    # points: a label placed farther than this from its point gets a thin leader line
MARKER_PX = 5.0  # half-size (pixels at 100 dpi) of the box kept free around every labelled point


def place_labels(ax: Axes, points: Sequence[tuple[float, float, str]], fontsize: float | None = None,
                 keep_clear: Sequence[tuple[float, float]] = ()) -> list[Annotation]:
    """Label points in the given order (most important first) without overprinting.

    Each label tries the offsets of :data:`LABEL_OFFSETS` in turn (the far ones with a leader line) and takes the first whose text box lies inside
    the axes and overlaps neither an earlier label, nor the axes' legend, nor a labelled point, nor a point of
    ``keep_clear``; a
    label that fits nowhere is left out (greedy placement; the figure lists the left-out count in no legend, so
    callers put the most telling points first).  The layout is computed once before measuring and the labels
    are kept out of it, so saving the figure does not move anything afterwards.
    """
    fig = ax.figure
    fig.draw_without_rendering()
    renderer = fig.canvas.get_renderer()
    frame = ax.get_window_extent(renderer)
    to_px = ax.transData.transform
    occupied = [_point_box(to_px((x, y))) for x, y, _ in points if math.isfinite(x) and math.isfinite(y)]
    occupied += [_point_box(to_px(p)) for p in keep_clear if all(map(math.isfinite, p))]
    legend = ax.get_legend()
    if legend is not None:
        occupied.append(legend.get_window_extent(renderer))
    placed: list[Annotation] = []
    size = fontsize or theme.BASE_FONT - 1.5
    for x, y, text in points:
        if not (math.isfinite(x) and math.isfinite(y)):
            continue
        for dx, dy, ha, va in LABEL_OFFSETS:
            leader = {"arrowstyle": "-", "color": theme.MUTED, "lw": 0.6, "shrinkA": 1, "shrinkB": 4}
            note = ax.annotate(text, (x, y), xytext=(dx, dy), textcoords="offset points", ha=ha, va=va,
                               fontsize=size, color=theme.INK, annotation_clip=False,
                               arrowprops=leader if abs(dy) > FAR_OFFSET else None)
            note.set_in_layout(False)
            box = text_extent(note, renderer)
            inside = frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1
            if inside and not any(box.overlaps(other) for other in occupied):
                occupied.append(box)
                placed.append(note)
                break
            note.remove()
    return placed


def text_extent(note: Text, renderer):
    """The display box of a text's letters only (an annotation's leader line excluded)."""
    if isinstance(note, Annotation):
        note.update_positions(renderer)
    return Text.get_window_extent(note, renderer)


def _point_box(xy: np.ndarray):
    """A small square of display space around a marker."""
    from matplotlib.transforms import Bbox

    return Bbox.from_extents(xy[0] - MARKER_PX, xy[1] - MARKER_PX, xy[0] + MARKER_PX, xy[1] + MARKER_PX)


def extremes(values: Sequence[float], count: int) -> list[int]:
    """Indices of the ``count`` smallest and ``count`` largest finite values, most extreme first, alternating
    low and high (the order in which :func:`place_labels` gives them room)."""
    arr = np.asarray(values, dtype=float)
    order = [int(i) for i in np.argsort(arr, kind="stable") if math.isfinite(arr[i])]
    low, high = order[:count], order[::-1][:count]
    chosen: list[int] = []
    for pair in zip(high, low):
        chosen += [i for i in pair if i not in chosen]
    return chosen


# ----------------------------------------------------------------------------------------------------------
# many sites: a sorted dot plot instead of one row per site
# ----------------------------------------------------------------------------------------------------------
MANY_SITES = 30     # above this many sites a per-site figure becomes a sorted dot plot
EXTREME_LABELS = 3  # sites labelled at each end of a sorted dot plot


def sorted_dots(ax: Axes, rows: Sequence[Interval], role: str, label: str) -> np.ndarray:
    """Sites sorted by their estimate along x (rank 1 = smallest), each a marker with its 95 % interval as a
    vertical line; the :data:`EXTREME_LABELS` lowest and highest sites are named.  Returns the sort order."""
    est = np.asarray([r.estimate for r in rows], dtype=float)
    order = np.argsort(np.where(np.isfinite(est), est, np.inf), kind="stable")
    colour = theme.ROLE[role]
    rank = np.arange(1, len(rows) + 1, dtype=float)
    for x, i in zip(rank, order):
        if rows[i].finite:
            ax.plot([x, x], [rows[i].low, rows[i].high], color=colour, lw=1.1, alpha=0.8, solid_capstyle="butt")
    ax.plot(rank, est[order], theme.MARKER.get(role, "o"), color=colour, ms=4.5, label=label, zorder=3)
    ax.set_xlim(0, len(rows) + 1)
    ax.set_xlabel(f"site, sorted by the estimate (rank 1 to {len(rows)})")
    ax.grid(axis="x", visible=False)
    return order


STRIPE = 0.16  # share of the data range added below and above a sorted dot plot to hold the extremes' names


def label_extremes(ax: Axes, rows: Sequence[Interval], order: np.ndarray,
                   extra: Sequence[float] = ()) -> list[Annotation]:
    """Name the lowest and highest sites of a :func:`sorted_dots` panel in free stripes below and above the
    data, each name joined to its site's interval by a thin leader line.  Names are laid side by side in rank
    order (low sites from the left, high sites from the right), so leaders never cross and names never touch;
    a name that would not fit in its half of the axes is left out.  The y axis covers the intervals and the
    ``extra`` values (reference lines) plus the two stripes."""
    ends = [(r.low, r.high) if r.finite else (r.estimate, r.estimate) for r in rows]
    values = finite_values([v for pair in ends for v in pair] + list(extra))
    if values.size == 0:
        return []
    lo, hi = float(values.min()), float(values.max())
    span = max(hi - lo, 1e-9)
    ax.set_ylim(lo - 2 * STRIPE * span, hi + 2 * STRIPE * span)
    ranks = {int(i): k + 1 for k, i in enumerate(order)}
    count = min(EXTREME_LABELS, len(rows) // 2)
    low_sites = [int(i) for i in order[:count]]
    high_sites = [int(i) for i in order[::-1][:count]]
    fig = ax.figure
    fig.draw_without_rendering()
    renderer = fig.canvas.get_renderer()
    notes = _stripe(ax, renderer, rows, ranks, low_sites, lo - STRIPE * span, 1, [ends[i][0] for i in low_sites])
    notes += _stripe(ax, renderer, rows, ranks, high_sites, hi + STRIPE * span, -1, [ends[i][1] for i in high_sites])
    return notes


def _stripe(ax: Axes, renderer, rows: Sequence[Interval], ranks: dict[int, int], sites: list[int], y: float,
            direction: int, targets: list[float]) -> list[Annotation]:
    """Names of ``sites`` side by side at height ``y``, from the left (``direction`` 1) or right (−1) edge."""
    frame = ax.get_window_extent(renderer)
    gap = 14.0  # pixels between names
    cursor = frame.x0 + gap if direction > 0 else frame.x1 - gap
    middle = (frame.x0 + frame.x1) / 2
    notes: list[Annotation] = []
    to_data = ax.transData.inverted()
    y_px = ax.transData.transform((0.0, y))[1]
    for site, target in zip(sites, targets):
        x_data = to_data.transform((cursor, y_px))[0]
        note = ax.annotate(rows[site].label, (ranks[site], target), xytext=(x_data, y), textcoords="data",
                           ha="left" if direction > 0 else "right", va="center", fontsize=theme.BASE_FONT - 1.5,
                           color=theme.INK, annotation_clip=False,
                           arrowprops={"arrowstyle": "-", "color": theme.MUTED, "lw": 0.6, "shrinkA": 2, "shrinkB": 2})
        note.set_in_layout(False)
        box = text_extent(note, renderer)
        if (direction > 0 and box.x1 > middle) or (direction < 0 and box.x0 < middle):
            note.remove()
            break
        notes.append(note)
        cursor = box.x1 + gap if direction > 0 else box.x0 - gap
    return notes
