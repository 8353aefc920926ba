"""The report's visual identity: palette, roles of colours, typography and figure sizes.

Colours come from the Okabe–Ito palette (Okabe & Ito 2008, "Color Universal Design"), which stays
distinguishable under the common forms of colour-vision deficiency. Colour is never the only carrier of
meaning: every series also differs by marker or line style, and every verdict is written as a word.
"""

from __future__ import annotations

from typing import Any

from ..core.interpret import DIFFERENT, EQUIVALENT, INDETERMINATE, TRIVIALLY_DIFFERENT

# Okabe & Ito (2008) colour-universal-design palette.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

INK = "#1F2430"          # text and axes
MUTED = "#5B6270"        # secondary text, grid labels
RULE = "#D8D4CC"         # hairlines and grid
PAPER = "#FCFBF8"        # page background
PANEL = "#F3F1EC"        # table stripes, side boxes
BAND_GREY = "#E3DFD6"    # a design-based interval drawn as a band

# What each colour means in every figure (with a distinct marker or line style beside it).
ROLE = {
    "blind": OKABE_ITO["blue"],           # estimates of the blind analysis (site hidden)
    "design": OKABE_ITO["black"],         # design-based estimates (known rates)
    "band": OKABE_ITO["bluish_green"],    # the ±δ equivalence band
    "treated": OKABE_ITO["orange"],
    "control": OKABE_ITO["sky_blue"],
    "pooled": OKABE_ITO["vermillion"],    # pooled / random-effects summaries
    "other": OKABE_ITO["reddish_purple"],
}
MARKER = {"blind": "o", "design": "s", "pooled": "D", "treated": "^", "control": "v", "other": "P"}

# Figure geometry (inches) and type sizes (points): one column of the report is about 1000 px wide.
FIG_WIDTH = 9.0
ROW_HEIGHT = 0.42
BASE_FONT = 10.5
SVG_HASH_SALT = "siteproof"
PNG_DPI = 144

DEVIATION_RED = "#b2182b"  # a deviation from the locked analysis plan (always also said in words)
VERDICT_STYLE = {  # CSS declarations of each verdict's bordered word in report.html
    EQUIVALENT: "border-style: solid;",
    DIFFERENT: "border-width: 2px; font-weight: 700;",
    TRIVIALLY_DIFFERENT: "border-style: dashed;",
    INDETERMINATE: "border-style: dotted; color: var(--muted);",
}

SANS_STACK = ["DejaVu Sans", "Noto Sans", "Liberation Sans", "Arial"]
MONO_STACK_CSS = 'ui-monospace, "DejaVu Sans Mono", "Noto Sans Mono", Menlo, Consolas, monospace'
SANS_STACK_CSS = 'system-ui, "Noto Sans", "DejaVu Sans", "Segoe UI", "Helvetica Neue", Arial, sans-serif'


def matplotlib_rc() -> dict[str, Any]:
    """rcParams of every report figure: text kept as text in SVG (small files), our palette and type."""
    return {
        "svg.fonttype": "none",
        "svg.hashsalt": SVG_HASH_SALT,
        "font.family": "sans-serif",
        "font.sans-serif": SANS_STACK,
        "font.size": BASE_FONT,
        "axes.titlesize": BASE_FONT + 1,
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.labelsize": BASE_FONT,
        "axes.labelcolor": INK,
        "axes.edgecolor": MUTED,
        "axes.linewidth": 0.8,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "axes.axisbelow": True,
        "axes.facecolor": "#FFFFFF",
        "axes.prop_cycle": _cycler(),
        "grid.color": RULE,
        "grid.linewidth": 0.6,
        "xtick.color": MUTED,
        "ytick.color": MUTED,
        "xtick.labelcolor": INK,
        "ytick.labelcolor": INK,
        "xtick.labelsize": BASE_FONT - 1,
        "ytick.labelsize": BASE_FONT - 1,
        "legend.fontsize": BASE_FONT - 1,
        "legend.frameon": False,
        "figure.facecolor": "#FFFFFF",
        "figure.dpi": 100,
        "savefig.dpi": PNG_DPI,
        "lines.linewidth": 1.6,
        "lines.markersize": 6,
        "errorbar.capsize": 0,
    }


def _cycler():
    from matplotlib import cycler

    order = ["blue", "vermillion", "bluish_green", "orange", "reddish_purple", "sky_blue", "black"]
    return cycler(color=[OKABE_ITO[name] for name in order])


def verdict_class(word: str) -> str:
    """The CSS class of a verdict word ('trivially different' → 'trivially-different')."""
    return word.replace(" ", "-")


def _verdict_css() -> str:
    """One rule per verdict: a distinct border, so that a verdict never relies on colour alone."""
    return "\n".join(f".verdict.{verdict_class(word)} {{ {style} }}" for word, style in VERDICT_STYLE.items())


def stylesheet() -> str:
    """The inline CSS of report.html (no web fonts, no external resources)."""
    return f"""
:root {{ --ink: {INK}; --muted: {MUTED}; --rule: {RULE}; --paper: {PAPER}; --panel: {PANEL};
  --blind: {ROLE['blind']}; --band: {ROLE['band']}; --pooled: {ROLE['pooled']}; }}
* {{ box-sizing: border-box; }}
html {{ background: var(--paper); }}
body {{ margin: 0 auto; max-width: 1180px; padding: 0 28px 64px; color: var(--ink);
  font: 16px/1.5 {SANS_STACK_CSS}; }}
header.masthead {{ border-bottom: 3px double var(--ink); padding: 28px 0 14px; margin-bottom: 8px; }}
header.masthead .kicker {{ font-size: 13px; letter-spacing: .12em; text-transform: uppercase; color: var(--muted); }}
header.masthead h1 {{ font-size: 30px; line-height: 1.15; margin: 4px 0 6px; }}
header.masthead p {{ margin: 2px 0; color: var(--muted); }}
nav.contents {{ position: sticky; top: 0; z-index: 5; font-size: 14px; margin: 10px -28px 20px; padding: 6px 28px;
  display: flex; flex-wrap: nowrap; gap: 4px 16px; overflow-x: auto; white-space: nowrap; background: var(--paper);
  border-bottom: 1px solid var(--rule); }}
nav.contents a {{ color: var(--ink); text-decoration: none; border-bottom: 1px solid var(--rule); }}
nav.contents a:first-child {{ color: var(--muted); }}
section.summary {{ margin: 6px 0 10px; }}
section.part, section.summary, #top {{ scroll-margin-top: 48px; }}
section.part {{ border-top: 1px solid var(--rule); padding-top: 10px; margin-top: 34px; }}
section.part > h2 {{ font-size: 22px; margin: 4px 0 10px; display: flex; align-items: baseline; gap: 0 4px; }}
section.part > h2 .num {{ display: inline-block; min-width: 1.8em; color: var(--muted); font-weight: normal; }}
a.to-top {{ margin-left: auto; font-size: 13px; font-weight: normal; color: var(--muted); text-decoration: none; }}
a.back-to-top {{ position: fixed; right: 14px; bottom: 14px; z-index: 6; font-size: 13px; padding: 4px 10px;
  color: var(--ink); background: #fff; border: 1px solid var(--ink); border-radius: 3px; text-decoration: none; }}
h3 {{ font-size: 17px; margin: 22px 0 6px; }}
p.reading {{ border-left: 4px solid var(--blind); background: #fff; padding: 8px 12px; margin: 8px 0 14px; }}
p.reading b {{ font-weight: 600; }}
p.note, .footnote {{ font-size: 13.5px; color: var(--muted); }}
p.absent {{ font-style: italic; color: var(--muted); background: var(--panel); padding: 8px 12px; }}
p.deviation {{ color: {DEVIATION_RED}; font-weight: 700; border-left: 4px solid {DEVIATION_RED}; padding: 6px 12px; }}
figure {{ margin: 10px 0 18px; }}
figure svg {{ width: 100%; height: auto; display: block; background: #fff; }}
figcaption {{ font-size: 13.5px; color: var(--muted); margin-top: 4px; }}
div.table {{ margin: 10px 0 16px; max-width: 100%; }}
div.scroll {{ overflow-x: auto; max-width: 100%; }}
caption {{ text-align: left; font-weight: 600; font-size: 15px; padding: 4px 0; }}
table {{ border-collapse: collapse; margin: 8px 0 6px; font-size: 13.5px; font-variant-numeric: tabular-nums; }}
th, td {{ padding: 4px 10px; border-bottom: 1px solid var(--rule); text-align: right; vertical-align: top; }}
th {{ border-bottom: 1.5px solid var(--ink); font-weight: 600; }}
th:first-child, td:first-child {{ text-align: left; }}
tbody tr {{ background: var(--paper); }}
tbody tr:nth-child(even) {{ background: var(--panel); }}
thead tr {{ background: var(--paper); }}
th.pin-start, td.pin-start {{ position: sticky; left: 0; z-index: 1; background: inherit; }}
th.pin-end, td.pin-end {{ position: sticky; right: 0; z-index: 1; background: inherit;
  border-left: 1px solid var(--rule); box-shadow: -6px 0 6px -6px rgba(31, 36, 48, .35); }}
div.table:has(> details.more:not([open])) tr.more {{ display: none; }}
details.more > summary {{ cursor: pointer; font-size: 13.5px; color: var(--ink); margin: 2px 0 6px; }}
details.more[open] > summary .closed, details.more:not([open]) > summary .opened {{ display: none; }}
td {{ white-space: nowrap; }}
th.text {{ text-align: left; }}
td.text {{ text-align: left; white-space: normal; min-width: 7em; }}
.verdict {{ display: inline-block; padding: 0 6px; border: 1px solid var(--ink); border-radius: 3px;
  font-size: 13px; white-space: nowrap; background: #fff; }}
{_verdict_css()}
pre {{ font: 13.5px/1.45 {MONO_STACK_CSS}; background: #fff; border: 1px solid var(--rule); padding: 10px 12px;
  overflow-x: auto; }}
ul.warnings li {{ margin: 2px 0; }}
aside.caution {{ border: 2px solid var(--ink); padding: 10px 14px; background: #fff; margin: 14px 0; }}
dl.facts {{ display: grid; grid-template-columns: max-content 1fr; gap: 2px 16px; font-size: 14px; }}
dl.facts dt {{ color: var(--muted); }}
dl.facts dd {{ margin: 0; font-family: {MONO_STACK_CSS}; word-break: break-all; }}
footer {{ margin-top: 40px; border-top: 3px double var(--ink); padding-top: 8px; font-size: 13px; color: var(--muted); }}
@media (max-width: 900px) {{ body {{ padding: 0 14px 56px; }} nav.contents {{ margin: 10px -14px 16px;
  padding: 6px 14px; }} td.text {{ min-width: 5em; }} }}
@media print {{ body {{ max-width: none; }} section.summary {{ margin: 6px 0 10px; }}
section.part {{ break-inside: avoid-page; }} nav.contents {{ position: static; flex-wrap: wrap; }}
a.back-to-top, a.to-top, details.more {{ display: none; }} tr.more {{ display: table-row !important; }} }}
"""


def page_head(title: str, extra_css: str = "") -> str:
    """The start of a self-contained siteproof HTML page, up to and including ``<body>``: UTF-8, viewport,
    generator, escaped title and the inline stylesheet (plus ``extra_css``); nothing is fetched."""
    from html import escape

    from .. import __version__

    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="siteproof {escape(__version__)}">
<title>{escape(title)}</title>
<style>{stylesheet()}{extra_css}</style>
</head>
<body>
"""
