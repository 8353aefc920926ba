"""Rendering the leaderboard: the terminal view, the self-contained HTML page, and the CSV/JSON/HTML files.

Cells read "estimate (SE)"; a per-site section and ``sites.csv`` appear only when grading ran with reveal;
withheld answers read "withheld". The terminal view fits a given width (80 columns by default) without breaking
a word: a narrow ranking table, then one wrapped paragraph per submission. Text cells of the CSV files are made
safe for spreadsheets (:func:`~siteproof.benchmark.layout.spreadsheet_safe`).
"""

from __future__ import annotations

import html
import textwrap
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
from rich import box
from rich.console import Group
from rich.table import Table
from rich.text import Text

from .. import __version__
from ..core.estimates import Estimate
from ..core.outputs import StagedOutput, atomic_write_text, to_json_text
from ..intake.sitetrials import natural_key
from ..reporting.theme import page_head
from .layout import FORMAT_VERSION, LEADERBOARD_FILES, refuse_earlier, spreadsheet_safe
from .standings import METRICS, TIE_RULE, GradedSubmission, Leaderboard, fmt

WITHHELD = "withheld"


def _cell(est: Estimate | None) -> str:
    """"estimate (SE)", or "–" for a missing or undefined metric."""
    return "–" if est is None or not np.isfinite(est.estimate) else f"{fmt(est.estimate)} ({fmt(est.se)})"


def _metric_cell(board: Leaderboard, entry: GradedSubmission, metric: str) -> str:
    """The cell of one metric of one submission; "withheld (SE)" for a withheld answer."""
    est = entry.metrics.get(metric)
    if est is not None and board.withheld(metric):
        return f"{WITHHELD} ({fmt(est.se)})"
    return _cell(est)


def _covers(board: Leaderboard, entry: GradedSubmission) -> str:
    """Whether the submitted CI covers the design ATE: yes, no, withheld or "–"."""
    if entry.ci_covers is None:
        return "–"
    return WITHHELD if board.withhold_answers else ("yes" if entry.ci_covers else "no")


def _display_columns(board: Leaderboard) -> list[tuple[str, Callable[[GradedSubmission], str]]]:
    """(header, cell) pairs of the HTML page's table."""
    cols: list[tuple[str, Callable[[GradedSubmission], str]]] = [
        ("rank", lambda e: "" if e.rank is None else str(e.rank)),
        ("submission", lambda e: e.name),
    ]
    for key, info in METRICS.items():
        cols.append((f"{info.label} (SE)", lambda e, k=key: _metric_cell(board, e, k)))
        if key == "rule_gain":
            cols.append(("treated share", lambda e: fmt(e.treated_share, 2)))
    cols.append(("CI covers design ATE", lambda e: _covers(board, e)))
    return cols


def leaderboard_table(board: Leaderboard, width: int = 80) -> Group:
    """The leaderboard for a terminal ``width`` columns wide (not printed): a ranking table (rank, submission,
    ranking metric) and, per submission, a paragraph with its standing, every metric, or its problem — wrapped
    at spaces only, so no word is broken."""
    info = METRICS[board.rank_by]
    name_width = max(10, min(24, width // 3))
    table = Table(box=box.SIMPLE_HEAD, pad_edge=False, show_edge=False)
    table.add_column("rank", justify="right", no_wrap=True)
    table.add_column("submission", no_wrap=True, max_width=name_width, overflow="ellipsis")
    table.add_column(f"{info.label} (SE)", justify="right", no_wrap=True, style="bold")
    for entry in board.entries:
        table.add_row("" if entry.rank is None else str(entry.rank), entry.name,
                      "–" if entry.problem else _metric_cell(board, entry, board.rank_by))
    design = "withheld" if board.withhold_answers else _cell(board.design_ate)
    head = (f"Leaderboard — {board.benchmark['name']} (ranked by {info.label}; {board.n_graded} graded "
            f"{board.graded_on})")
    foot = (f"Design ATE {design} · ties: paired difference within 1.96 SE · {board.public_check}")
    parts: list[Text | Table] = [_wrapped(head, width, "bold"), table]
    parts += [_wrapped(_paragraph(board, entry), width) for entry in board.entries]
    parts.append(_wrapped(foot, width, "dim"))
    return Group(*parts)


def _paragraph(board: Leaderboard, entry: GradedSubmission) -> str:
    """"NAME: standing. metric est (SE) · …", or "NAME (FILE): not graded — PROBLEM"."""
    if entry.problem is not None:
        return f"{entry.name} ({entry.file}): not graded — {entry.problem}"
    cells = [f"{m.label} {_metric_cell(board, entry, key)}" for key, m in METRICS.items() if key in entry.metrics]
    if entry.treated_share is not None:
        cells.append(f"treated share {fmt(entry.treated_share, 2)}")
    if entry.ci_covers is not None:
        cells.append(f"CI covers design ATE: {_covers(board, entry)}")
    return f"{entry.name}: {entry.standing}." + (" " + " · ".join(cells) if cells else "")


def _standing_line(entry: GradedSubmission) -> str:
    """The line under a submission on the HTML page: its standing, or why it was not graded."""
    return entry.standing if entry.problem is None else f"not graded ({entry.file}): {entry.problem}"


def _wrapped(text: str, width: int, style: str = "") -> Text:
    """``text`` wrapped at spaces to ``width`` (a word longer than the line is kept whole)."""
    lines = textwrap.wrap(" ".join(text.split()), width=width, break_long_words=False, break_on_hyphens=False)
    return Text("\n".join(lines), style=style, no_wrap=True, overflow="ignore")


LEADERBOARD_CSS = """
div.scroll { overflow-x: auto; }
table.board th { white-space: normal; vertical-align: bottom; }
table.board td { white-space: nowrap; border-bottom: none; }
table.board tbody tr { background: none; }
table.board tbody:nth-of-type(even) { background: var(--panel); }
table.board tr.standing td { text-align: left; white-space: normal; color: var(--muted); font-size: 13.5px;
  padding-top: 0; border-bottom: 1px solid var(--rule); }
table.board .ranked { font-weight: 700; }
"""


def leaderboard_html(board: Leaderboard) -> str:
    """The leaderboard page: self-contained HTML (inline CSS, no scripts, no external resources)."""
    e = html.escape
    cols = _display_columns(board)
    info = METRICS[board.rank_by]
    classes = {"submission": "text", f"{info.label} (SE)": "ranked"}
    head = "".join(f'<th class="{classes.get(h, "")}">{e(h)}</th>' for h, _ in cols)
    body = "".join(  # one tbody per submission: its metrics, then its standing in words across the table
        "<tbody><tr>" + "".join(f'<td class="{classes.get(h, "")}">{e(cell(entry))}</td>' for h, cell in cols)
        + f'</tr><tr class="standing"><td colspan="{len(cols)}">{e(_standing_line(entry))}</td></tr></tbody>'
        for entry in board.entries
    )
    metric_items = "".join(f"<li><b>{e(m.label)}</b>: {e(m.meaning)}.</li>" for m in METRICS.values())
    bench = board.benchmark
    check = board.public_check[:1].upper() + board.public_check[1:]
    graded_on = (f"the {board.n_graded} held-out units of {bench['n']}" if bench["holdout_share"] > 0 else
                 f"all {board.n_graded} units, whose outcomes were published: in-sample grading, which rewards "
                 "predictions built from the graded units' own outcomes")
    n_graded = sum(entry.problem is None for entry in board.entries)
    if board.withhold_answers:
        design = "withheld (the design-based answers are not shown; grade with --show-answers to see them)"
    else:
        design = (f"{_cell(board.design_ate)}, 95 % CI [{fmt(board.design_ate.ci[0])}, "
                  f"{fmt(board.design_ate.ci[1])}]")
    return page_head(f"Leaderboard — {bench['name']}", extra_css=LEADERBOARD_CSS) + f"""
<header class="masthead"><div class="kicker">siteproof holdout benchmark · id {e(bench['benchmark_id'])}</div>
<h1>Leaderboard — {e(bench['name'])}</h1>
<p>{n_graded} of {len(board.entries)} submissions graded on {e(graded_on)}, ranked by {e(info.label)}
({'larger is better' if info.higher_is_better else 'smaller absolute value is better'}).</p></header>
<section class="part"><h2>Ranking</h2>
<p class="reading">Cells read <b>estimate (standard error)</b>. {e(TIE_RULE[0].upper() + TIE_RULE[1:])}; the
line under each submission says where it stands, in words.</p>
<div class="scroll"><table class="board"><thead><tr>{head}</tr></thead>{body}</table></div>
<p class="note">Design-based ATE of the graded units: {e(design)}. {e(check)}.</p>
</section>
<section class="part"><h2>How the metrics are computed</h2>
<p>Every metric uses the sites' randomization: each unit's known assignment probability e and outcome models
fitted without the unit give doubly robust scores that are unbiased for the unit's effect, whatever model the
submission used. Standard errors come from {board.n_boot} half-samples shared by all submissions
(seed {board.seed}).</p>
<ul>{metric_items}</ul>
</section>
{_sites_html(board)}
<p class="footnote">siteproof {e(__version__)} · leaderboard format version {FORMAT_VERSION}</p>
</body></html>
"""


def _sites_html(board: Leaderboard) -> str:
    """Per-site section, only with ``reveal``: design estimate by site (unless withheld) and mean τ̂ there."""
    sites = board.shown_sites()
    if sites is None:
        return ""
    e = html.escape
    with_dim = "difference_in_means" in sites.columns
    with_tau = [entry for entry in board.entries if entry.site_means is not None]
    head = "".join(f"<th>{e(h)}</th>" for h in ["site", "n", "treated", "known rate"] + ["DiM (SE)"] * with_dim
                   + [f"mean τ̂: {entry.name}" for entry in with_tau])
    rows = []
    for row in sorted(sites.to_dict("records"), key=lambda r: natural_key(str(r["site"]))):
        cells = [str(row["site"]), str(row["n"]), str(row["n_treated"]), fmt(row["rate_known"], 2)]
        if with_dim:
            cells.append(f"{fmt(row['difference_in_means'])} ({fmt(row['se'])})")
        cells += [fmt(entry.site_means.get(str(row["site"]))) for entry in with_tau]
        rows.append("<tr>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    return f"""<section class="part"><h2>Sites (revealed)</h2>
<p class="note">Shown because grading ran with reveal. Difference in means per site with its Neyman SE (unless
the answers are withheld); mean τ̂ over each site's graded units.</p>
<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table></section>"""


def write_leaderboard_html(board: Leaderboard, path: Path | str) -> Path:
    """Write :func:`leaderboard_html` to ``path`` atomically."""
    return atomic_write_text(path, leaderboard_html(board))


def write_leaderboard(board: Leaderboard, out_dir: Path | str, *, force: bool = False) -> list[Path]:
    """Write ``leaderboard.csv``, ``leaderboard.json``, ``leaderboard.html`` (and ``sites.csv`` with reveal).

    All files appear together or not at all; a folder holding an earlier leaderboard needs ``force``.
    """
    out = Path(out_dir)
    refuse_earlier(out, LEADERBOARD_FILES, "a leaderboard", force)
    names = ["leaderboard.csv", "leaderboard.json", "leaderboard.html"]
    with StagedOutput(out, force=True) as staged:
        atomic_write_text(staged / names[0], _csv_text(board.to_frame()))
        atomic_write_text(staged / names[1], to_json_text(board.to_dict()))
        write_leaderboard_html(board, staged / names[2])
        if board.shown_sites() is not None:
            names.append("sites.csv")
            atomic_write_text(staged / names[3], _csv_text(_sites_frame(board)))
    if "sites.csv" not in names:
        (out / "sites.csv").unlink(missing_ok=True)  # an earlier revealed run's site table must not linger
    return [out / name for name in names]


def _csv_text(frame: pd.DataFrame) -> str:
    """CSV text with every text cell and header made safe for spreadsheets (no cell starts a formula)."""
    safe = frame.copy()
    safe.columns = [spreadsheet_safe(str(c)) for c in safe.columns]
    for col in safe.columns:
        if not pd.api.types.is_numeric_dtype(safe[col]):
            safe[col] = safe[col].map(lambda v: spreadsheet_safe(v) if isinstance(v, str) else v)
    return safe.to_csv(index=False, lineterminator="\n")


def _sites_frame(board: Leaderboard) -> pd.DataFrame:
    """sites.csv: the per-site design table with one mean-τ̂ column per submission that has tau_hat."""
    shown = board.shown_sites()
    frame = shown.copy() if shown is not None else pd.DataFrame()
    for entry in board.entries:
        if entry.site_means is not None:
            frame[f"tau_hat_mean:{entry.name}"] = frame["site"].astype(str).map(entry.site_means)
    return frame
