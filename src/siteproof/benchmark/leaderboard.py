"""Rendering the leaderboard: the terminal table, the self-contained HTML page, and the CSV/JSON/HTML files.

Cells read "estimate (SE)"; a per-site section and ``sites.csv`` appear only when grading ran with reveal.
"""

from __future__ import annotations

import html
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
from rich.markup import escape as markup_escape
from rich.table import Table

from .. import __version__
from ..core.estimates import Estimate
from ..core.outputs import StagedOutput, atomic_write_text, to_json_text
from ..intake.sitetrials import natural_key
from ..reporting.theme import page_head
from .layout import FORMAT_VERSION, LEADERBOARD_FILES, refuse_earlier
from .standings import METRICS, TIE_RULE, GradedSubmission, Leaderboard, fmt


def _cell(est: Estimate | None) -> str:
    """"estimate (SE)", or "–" for a missing or undefined metric."""
    return "–" if est is None or not np.isfinite(est.estimate) else f"{fmt(est.estimate)} ({fmt(est.se)})"


def _covers(entry: GradedSubmission) -> str:
    """Whether the submitted CI covers the design ATE: yes, no or "–"."""
    return "–" if entry.ci_covers is None else ("yes" if entry.ci_covers else "no")


def _display_columns(board: Leaderboard) -> list[tuple[str, Callable[[GradedSubmission], str]]]:
    """(header, cell) pairs shared by the terminal table and the HTML page."""
    cols: list[tuple[str, Callable[[GradedSubmission], str]]] = [
        ("rank", lambda e: "" if e.rank is None else str(e.rank)),
        ("submission", lambda e: e.name),
    ]
    for key, info in METRICS.items():
        cols.append((f"{info.label} (SE)", lambda e, k=key: _cell(e.metrics.get(k))))
        if key == "rule_gain":
            cols.append(("treated share", lambda e: fmt(e.treated_share, 2)))
    cols.append(("CI covers design ATE", _covers))
    cols.append(("standing", lambda e: e.standing))
    return cols


def leaderboard_table(board: Leaderboard) -> Table:
    """The leaderboard as a rich :class:`~rich.table.Table` (not printed); the ranking column is bold."""
    rank_header = f"{METRICS[board.rank_by].label} (SE)"
    table = Table(
        title=f"Leaderboard — {markup_escape(str(board.benchmark['name']))} (ranked by {METRICS[board.rank_by].label})",
        caption=(f"{board.n_graded} graded units · design ATE {_cell(board.design_ate)} · "
                 f"ties: paired difference within 1.96 SE · {board.public_check}"),
        caption_justify="left",
    )
    for header, _ in _display_columns(board):
        text_col = header in ("submission", "standing")
        style = "bold" if header == rank_header else None
        table.add_column(header, justify="left" if text_col else "right", style=style, overflow="fold")
    for entry in board.entries:
        table.add_row(*[markup_escape(cell(entry)) for _, cell in _display_columns(board)])
    return table


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
    cols = [(h, cell) for h, cell in _display_columns(board) if h != "standing"]
    info = METRICS[board.rank_by]
    classes = {"submission": "text", f"{info.label} (SE)": "ranked"}
    head = "".join(f'<th class="{classes.get(h, "")}">{e(h)}</th>' for h, _ in cols)
    body = "".join(  # one tbody per submission: its metrics, then its standing in words across the table
        "<tbody><tr>" + "".join(f'<td class="{classes.get(h, "")}">{e(cell(entry))}</td>' for h, cell in cols)
        + f'</tr><tr class="standing"><td colspan="{len(cols)}">{e(entry.standing)}</td></tr></tbody>'
        for entry in board.entries
    )
    metric_items = "".join(f"<li><b>{e(m.label)}</b>: {e(m.meaning)}.</li>" for m in METRICS.values())
    bench = board.benchmark
    check = board.public_check[:1].upper() + board.public_check[1:]
    holdout = (f" (the {board.n_graded} held-out units of {bench['n']})" if bench["holdout_share"] > 0 else "")
    return page_head(f"Leaderboard — {bench['name']}", extra_css=LEADERBOARD_CSS) + f"""
<header class="masthead"><div class="kicker">siteproof holdout benchmark · id {e(bench['benchmark_id'])}</div>
<h1>Leaderboard — {e(bench['name'])}</h1>
<p>{len(board.entries)} submissions graded on {board.n_graded} units{e(holdout)}, ranked by {e(info.label)}
({'larger is better' if info.higher_is_better else 'smaller absolute value is better'}).</p></header>
<section class="part"><h2>Ranking</h2>
<p class="reading">Cells read <b>estimate (standard error)</b>. {e(TIE_RULE[0].upper() + TIE_RULE[1:])}; the
line under each submission says where it stands, in words.</p>
<div class="scroll"><table class="board"><thead><tr>{head}</tr></thead>{body}</table></div>
<p class="note">Design-based pooled ATE: {e(_cell(board.design_ate))}, 95 % CI
[{fmt(board.design_ate.ci[0])}, {fmt(board.design_ate.ci[1])}]. {e(check)}.</p>
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
    """Per-site section, only with ``reveal``: design estimate by site and each submission's mean τ̂ there."""
    if not board.reveal or board.sites is None:
        return ""
    e = html.escape
    with_tau = [entry for entry in board.entries if entry.site_means is not None]
    head = "".join(f"<th>{e(h)}</th>" for h in ["site", "n", "treated", "known rate", "DiM (SE)"]
                   + [f"mean τ̂: {entry.name}" for entry in with_tau])
    rows = []
    for row in sorted(board.sites.to_dict("records"), key=lambda r: natural_key(str(r["site"]))):
        cells = [str(row["site"]), str(row["n"]), str(row["n_treated"]), fmt(row["rate_known"], 2),
                 f"{fmt(row['difference_in_means'])} ({fmt(row['se'])})"]
        cells += [fmt(entry.site_means.get(str(row["site"]))) for entry in with_tau]
        rows.append("<tr>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    return f"""<section class="part"><h2>Sites (revealed)</h2>
<p class="note">Shown because grading ran with reveal. Difference in means per site with its Neyman SE; mean τ̂
over each site's graded units.</p>
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
        atomic_write_text(staged / names[0], board.to_frame().to_csv(index=False, lineterminator="\n"))
        atomic_write_text(staged / names[1], to_json_text(board.to_dict()))
        write_leaderboard_html(board, staged / names[2])
        if board.reveal and board.sites is not None:
            names.append("sites.csv")
            atomic_write_text(staged / names[3], _sites_frame(board).to_csv(index=False, lineterminator="\n"))
    if "sites.csv" not in names:
        (out / "sites.csv").unlink(missing_ok=True)  # an earlier revealed run's site table must not linger
    return [out / name for name in names]


def _sites_frame(board: Leaderboard) -> pd.DataFrame:
    """sites.csv: the per-site design table with one mean-τ̂ column per submission that has tau_hat."""
    frame = board.sites.copy() if board.sites is not None else pd.DataFrame()
    for entry in board.entries:
        if entry.site_means is not None:
            frame[f"tau_hat_mean:{entry.name}"] = frame["site"].astype(str).map(entry.site_means)
    return frame
