"""The report: one self-contained ``report.html``, ``report.md`` with the summary tables, and ``figures/``.

Everything shown comes from ``claims.json`` (the blind analysis) and ``scorecard.json`` (unmasking); the
report computes no estimate of its own beyond formatting, counting verdicts and the binomial Wald interval
of a realized treated share.  A part whose inputs are missing (no cost column, transport not run, an older
scorecard without some key) says so instead of drawing anything.

Sections, in order: study and design · overlap · average effect · sites · heterogeneity · treatment rules ·
transport · methods and references.  Each has its figure(s), its tables (every header names its unit, every
table has footnotes) and a two-line plain-language reading generated from the numbers.  The HTML holds its CSS
and its figures (inline SVG) and fetches nothing: no fonts, scripts or images.  Section contents and how to
read them: docs/report.md.  Layout: :mod:`.document` (the parts and their HTML/Markdown), ``sections_*`` (one
builder per section), :mod:`.context` and :mod:`.formatting`; every verdict word, label and threshold comes
from :mod:`siteproof.core.interpret`.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..blind.claims import Claims, read_claims
from ..core.errors import SiteproofError
from ..core.interpret import count_words, verdict_note
from ..core.outputs import atomic_write_bytes, atomic_write_text
from ..unmask.scorecard import Scorecard, ScorecardRecord
from .context import RunView, deviation_texts, margin_note, plan_note
from .document import FIGURE_DIR, Document, Table, Text
from .sections_design import overlap_section, study_section
from .sections_effects import average_section, sites_section
from .sections_heterogeneity import heterogeneity_section
from .sections_methods import methods_section
from .sections_rules import rules_section, transport_section

REPORT_HTML = "report.html"
REPORT_MD = "report.md"
SCORECARD_FILE = "scorecard.json"

SECTIONS = (
    ("study", "Study and design"),
    ("overlap", "Overlap"),
    ("average-effect", "Average effect"),
    ("sites", "Sites"),
    ("heterogeneity", "Heterogeneity"),
    ("rules", "Treatment rules"),
    ("transport", "Transport"),
    ("methods", "Methods and references"),
)
BUILDERS = (study_section, overlap_section, average_section, sites_section, heterogeneity_section,
            rules_section, transport_section, methods_section)


def write_report(out_dir: Path | str, claims: Claims, scorecard: Scorecard | ScorecardRecord) -> dict[str, Path]:
    """Write ``report.html``, ``report.md`` and ``figures/<name>.svg|.png`` into ``out_dir`` (atomic writes).

    The report is built from the two results objects' file records (the same content as claims.json and
    scorecard.json), so a report rewritten from a run folder is the report of the run.

    Returns the written paths: keys ``html``, ``markdown`` and ``figure:<name>.svg`` / ``figure:<name>.png``.
    """
    out = Path(out_dir)
    doc = build_document(claims.to_dict(), scorecard.to_dict())
    paths: dict[str, Path] = {}
    for rendered in doc.figures:
        for suffix, data in (("svg", rendered.svg.encode("utf-8")), ("png", rendered.png)):
            paths[f"figure:{rendered.name}.{suffix}"] = atomic_write_bytes(
                out / FIGURE_DIR / f"{rendered.name}.{suffix}", data
            )
    paths["markdown"] = atomic_write_text(out / REPORT_MD, doc.markdown())
    paths["html"] = atomic_write_text(out / REPORT_HTML, doc.html())
    return paths


def report_from_folder(run_dir: Path) -> dict[str, Path]:
    """Rewrite the report of a run folder from its ``claims.json`` (+ ``units.parquet``) and ``scorecard.json``."""
    folder = Path(run_dir)
    if not folder.is_dir():
        raise SiteproofError(f"{folder} is not a folder", "point `siteproof report` at a folder written by `siteproof run`")
    claims = read_claims(folder)
    card_path = folder / SCORECARD_FILE
    if not card_path.exists():
        raise SiteproofError(
            f"no {SCORECARD_FILE} in {folder}",
            "run `siteproof unmask` (or `siteproof run`) into this folder first",
        )
    try:
        scorecard = Scorecard.from_dict(json.loads(card_path.read_text(encoding="utf-8")), where=str(card_path))
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read {card_path}: {exc}", "rerun `siteproof unmask` to rewrite it") from exc
    if (scorecard.to_dict().get("study") or {}).get("fingerprint") not in (None, claims.to_dict().get("fingerprint")):
        raise SiteproofError(
            f"{SCORECARD_FILE} and claims.json in {folder} describe different data (fingerprints differ)",
            "rerun `siteproof unmask` with these claims so that both files come from the same data",
        )
    return write_report(folder, claims, scorecard)


def build_document(claims: dict, scorecard: dict) -> Document:
    """The whole report as a :class:`Document` from the claims.json and scorecard.json records (figures
    rendered, nothing written)."""
    run = RunView(claims, scorecard)
    name = run.study.get("name")
    title = f"siteproof report — {name}" if name else f"siteproof report — {run.outcome}"
    sections = [build(run) for build in BUILDERS]
    assert [s.key for s in sections] == [k for k, _ in SECTIONS]
    deviations = [Text(text, "deviation") for text in deviation_texts(run)]
    sections[0].parts[:0] = deviations
    headline = scorecard.get("headline") or "Blind claims scored against the sites' randomization."
    return Document(title, headline, _summary_table(run), sections)


def _summary_table(run: RunView) -> Table:
    """Verdicts at a glance: every headline claim class with its count of adjusted verdicts."""
    verdicts = run.card.get("verdicts") or []

    def words(member) -> list[str]:  # noqa: ANN001
        return [str(r["verdict_adjusted"]) for r in verdicts if member(r["claim"])]

    groups = (("average effect (ATE estimators)", lambda c: c.startswith("ate.")),
              ("effect rankings (AUTOC of each CATE model)", lambda c: c.startswith("cate.") and c.endswith(".autoc")),
              ("treatment rules (gain over random allocation)", lambda c: c.startswith("rule.")),
              ("per-site effects (each CATE model, each site)", lambda c: c.startswith("site_ate.")))
    rows = [[label, len(words(member)), count_words(words(member))] for label, member in groups if words(member)]
    notes = [margin_note(run), plan_note(run), verdict_note(),
             "Counts are of the multiplicity-adjusted verdicts (scorecard.json 'verdicts'); the naive difference in "
             "means is counted with the estimators but never in the headline.",
             "The overlap-weighted estimator is counted by its comparison with the design-based overlap-weighted effect "
             "(the same estimand)."] + deviation_texts(run)
    return Table("Verdicts at a glance", ["claims", "number scored", "verdicts"], rows, notes, text=(0, 2))

