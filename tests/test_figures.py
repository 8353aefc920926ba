"""The report's figures drawn from representative numbers (a handful of sites and 75 sites): no two visible
texts overprint, no text leaves the figure, large site counts become a compact sorted dot plot, and the axes
are fitted to the data (rule shares, TOC bands beyond the unstable first points).

Overlap is measured on the laid-out figure with matplotlib's own text extents (Agg renderer): every text the
figure actually draws — tick labels, axis labels, titles, legend entries, annotations — is collected while
drawing, and its window extent is compared with every other's.
"""

from __future__ import annotations

import itertools
import math
from unittest import mock

import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.text import Text

from siteproof.reporting import figures
from siteproof.reporting.figures import Curve, Interval, RulePoint
from siteproof.reporting.figures_base import MANY_SITES, text_extent

NAMES = ["Papermill Cross", "Lanternfield", "Inkwell Hollow", "Storywick", "Quillbrook", "Ashgrove Reading Room"]
TOLERANCE_PX = 0.5  # extents touching within half a pixel are not an overlap


def drawn_texts(fig) -> list[Text]:
    """Every non-empty text the figure draws (a spy on Text.draw during one full draw)."""
    seen: list[Text] = []
    original = Text.draw

    def spy(self, renderer):
        seen.append(self)
        return original(self, renderer)

    with mock.patch.object(Text, "draw", spy):
        fig.canvas.draw()
    return [t for t in seen if t.get_visible() and t.get_text().strip()]


def overlaps(fig, texts: list[Text] | None = None) -> list[tuple[str, str]]:
    """Pairs of drawn texts whose boxes overlap by more than the tolerance."""
    texts = drawn_texts(fig) if texts is None else texts
    renderer = fig.canvas.get_renderer()
    boxes = [(t.get_text(), text_extent(t, renderer)) for t in texts]
    bad = []
    for (a, box_a), (b, box_b) in itertools.combinations(boxes, 2):
        wide = min(box_a.x1, box_b.x1) - max(box_a.x0, box_b.x0)
        high = min(box_a.y1, box_b.y1) - max(box_a.y0, box_b.y0)
        if wide > TOLERANCE_PX and high > TOLERANCE_PX:
            bad.append((a, b))
    return bad


def outside(fig, texts: list[Text]) -> list[str]:
    """Drawn texts whose box sticks out of the figure by more than a pixel."""
    renderer = fig.canvas.get_renderer()
    frame = fig.bbox
    boxes = [(t.get_text(), text_extent(t, renderer)) for t in texts]
    return [text for text, b in boxes
            if b.x0 < frame.x0 - 1 or b.x1 > frame.x1 + 1 or b.y0 < frame.y0 - 1 or b.y1 > frame.y1 + 1]


def _sites(count: int, seed: int = 1) -> list[Interval]:
    rng = np.random.default_rng(seed)
    est = rng.normal(2.0, 1.5, count)
    half = rng.uniform(0.5, 2.5, count)
    names = NAMES if count <= len(NAMES) else [f"site {i:02d}" for i in range(1, count + 1)]
    return [Interval(n, e, e - h, e + h) for n, e, h in zip(names, est, half)]


def _shares(count: int, seed: int = 2) -> tuple[list[str], list[Interval], list[float]]:
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.3, 0.8, count)
    n = rng.integers(40, 400, count)
    half = 1.959964 * np.sqrt(p * (1 - p) / n)
    names = NAMES[:count] if count <= len(NAMES) else [f"site {i:02d}" for i in range(1, count + 1)]
    return names, [Interval(s, a, a - h, a + h) for s, a, h in zip(names, p, half)], list(np.round(p, 1))


def _curve(seed: int, shift: float = 0.0) -> Curve:
    q = np.linspace(0.01, 1.0, 100)
    rng = np.random.default_rng(seed)
    y = 3.0 * (1 - q) + shift + rng.normal(0, 0.2, q.size) / np.sqrt(q)
    se = 0.4 / np.sqrt(q)
    return Curve(list(q), list(y), list(se))


def _rules() -> tuple[list[RulePoint], list[RulePoint]]:
    rng = np.random.default_rng(4)
    blind, design = [], []
    for family in ("s", "t", "x", "r", "dr"):
        for share in (0.1, 0.2, 0.3, 0.4, 0.5):
            v = 0.6 + 1.5 * share + rng.normal(0, 0.1)
            blind.append(RulePoint(family, share, Interval(f"{family}-{share}", v, v - 0.6, v + 0.6), 0.1))
            design.append(RulePoint(family, share, Interval(f"{family}-{share}", v - 0.05, v - 0.6, v + 0.5), 0.12))
    tree = Interval("tree", 1.3, 0.7, 1.9)
    return blind + [RulePoint("tree", 0.48, tree, 0.1)], design + [RulePoint("tree", 0.48, tree, 0.12)]


def _calibration(count: int):
    rng = np.random.default_rng(5)
    rates = np.round(rng.uniform(0.3, 0.85, count), 2) if count > 6 else np.array([0.33, 0.5, 0.67, 0.75, 0.8, 0.83])
    mean = 0.6 + 0.3 * (rates - 0.6) + rng.normal(0, 0.02, count)
    sites = [Interval(s.label, m, m - 0.1, m + 0.1) for s, m in zip(_sites(count), mean)]
    bins = [Interval(str(i), m, m - 0.02, m + 0.02) for i, m in enumerate(np.linspace(0.48, 0.69, 10))]
    return bins, list(np.linspace(0.46, 0.75, 10)), sites, list(rates)


FIGURES = {
    "rates-6": lambda: figures.rates_figure(*_shares(6)),
    "rates-75": lambda: figures.rates_figure(*_shares(75)),
    "rates-75-undeclared": lambda: figures.rates_figure(*_shares(75)[:2], [math.nan] * 75),
    "calibration-6": lambda: figures.calibration_figure(*_calibration(6)),
    "calibration-75": lambda: figures.calibration_figure(*_calibration(75)),
    "histogram": lambda: figures.propensity_histogram(list(np.linspace(0, 1, 21)), list(range(20)),
                                                      list(range(20, 0, -1)), [0.05, 0.95]),
    "quantiles": lambda: figures.propensity_quantiles(
        {arm: {"min": 0.1, "p05": 0.2, "p25": 0.4, "p50": 0.5, "p75": 0.6, "p95": 0.8, "max": 0.9}
         for arm in ("treated", "control")}, [0.05, 0.95]),
    "average-effect": lambda: figures.average_effect_figure(
        [Interval(n, 1.5 + 0.1 * i, 1.2 + 0.1 * i, 1.8 + 0.1 * i) for i, n in enumerate(
            ["difference in means", "IPW", "Hájek", "AIPW", "overlap-weighted", "same estimand"])],
        Interval("design", 1.8, 1.6, 2.0),
        [Interval(str(i), -0.3 + 0.1 * i, -0.55 + 0.1 * i, -0.05 + 0.1 * i) for i in range(6)],
        ["different", "indeterminate", "equivalent", "trivially different", "equivalent", "equivalent"],
        0.3, "score units", [math.nan] * 5 + [1.7]),
    "forest-6": lambda: figures.forest_figure(_sites(6), ["Tiny Branch"], Interval("p", 2.0, 1.6, 2.4),
                                              Interval("re", 2.1, 1.5, 2.7), (0.2, 4.0), "score units"),
    "forest-75": lambda: figures.forest_figure(_sites(75), [f"x{i}" for i in range(12)], Interval("p", 2.0, 1.8, 2.2),
                                               Interval("re", 2.1, 1.8, 2.4), (-0.8, 5.0), "score units"),
    "rloss": lambda: figures.paired_rows_figure([f"model {m}" for m in "s t x r dr".split()], _sites(5), _sites(5, 3),
                                                "R-loss difference (score units)²"),
    "gates": lambda: figures.gates_figure(["s", "t", "x", "r", "dr"], [_sites(5)[:5]] * 5, [_sites(5, 7)[:5]] * 5,
                                          "score units"),
    "toc": lambda: figures.curves_figure(["s", "t", "x", "r", "dr"], [_curve(i) for i in range(5)],
                                         [_curve(i + 10, 0.1) for i in range(5)], "share of units treated (proportion)",
                                         "TOC (score units)", zoom_from=0.05),
    "rules": lambda: figures.rules_figure(*_rules(), "score units"),
}


@pytest.mark.parametrize("name", sorted(FIGURES))
def test_no_text_overprints_or_leaves_the_figure(name):
    fig = FIGURES[name]()
    texts = drawn_texts(fig)
    assert len(texts) >= 8  # tick labels, axis labels and legend entries were drawn and measured
    assert overlaps(fig, texts) == []
    assert outside(fig, texts) == []


def test_the_overlap_check_catches_overprinted_labels():
    # the check itself: two annotations at one point do overlap
    fig, axes = figures.new_figure(4, 3)
    axes[0, 0].annotate("Papermill Cross", (0.5, 0.5))
    axes[0, 0].annotate("Lanternfield", (0.5, 0.5))
    assert overlaps(fig) == [("Papermill Cross", "Lanternfield")]


@pytest.mark.parametrize("name", ["rates-75", "rates-75-undeclared", "forest-75"])
def test_many_sites_are_a_compact_sorted_dot_plot_naming_the_extremes(name):
    fig = FIGURES[name]()
    assert fig.get_size_inches()[1] <= 5.0  # not one row per site (≈ 32 in for 75 rows)
    ax = fig.axes[0]
    named = {t.get_text() for t in ax.texts}
    assert 2 <= len(named) <= 6  # a few extremes, never all 75
    assert len(ax.get_yticklabels()) < 20  # the y axis is a value axis, not 75 site names
    assert 75 > MANY_SITES


def test_calibration_labels_every_site_that_fits_and_avoids_overprinting():
    fig = FIGURES["calibration-6"]()
    right = fig.axes[1]
    assert len(right.texts) >= 4  # most of the 6 sites are named


def test_rule_axis_is_fitted_to_the_shares_the_rules_treat():
    fig = FIGURES["rules"]()
    lo, hi = fig.axes[0].get_xlim()
    assert 0.0 <= lo < 0.1 and 0.5 < hi < 0.6  # shares run 0.1–0.5 (plus the tree at 0.48); margin 0.04


def test_ranking_curves_fit_the_axis_beyond_the_unstable_start_and_draw_the_bands_differently():
    blind = [_curve(i) for i in range(5)]
    fig = FIGURES["toc"]()
    ax = fig.axes[0]
    top = ax.get_ylim()[1]
    q = np.asarray(blind[0].x)
    upper = np.asarray(blind[0].y) + 1.959964 * np.asarray(blind[0].se)
    assert top >= upper[q >= 0.05].max()          # every band beyond the strip fits
    assert top < upper[q < 0.05].max()            # the first points are clipped, not allowed to stretch the axis
    fills = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(fills) == 1  # the blind band is filled; the design band is an outline only
    strip = [p for p in ax.patches if p.get_hatch()]
    assert len(strip) == 1 and strip[0].get_x() + strip[0].get_width() == pytest.approx(0.05)  # q < 0.05 marked
    assert len({tuple(line.get_linestyle()) if isinstance(line.get_linestyle(), tuple) else line.get_linestyle()
                for line in ax.lines if line.get_linewidth() > 1.5}) == 2  # solid blind, dashed design
