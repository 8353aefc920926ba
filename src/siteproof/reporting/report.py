"""The report: one self-contained ``report.html``, ``report.md`` with the summary tables, and ``figures/``.

Everything shown comes from ``claims.json`` (the blind analysis) and ``scorecard.json`` (unmasking); the
report computes no estimate of its own beyond formatting, counting verdicts and the binomial Wald interval
of a realized treated share.  A part whose inputs are missing (no cost column, transport not run, an older
scorecard without some key) says so instead of drawing anything.

Sections, in order: study and design · overlap · average effect · sites · heterogeneity · treatment rules ·
transport · methods and references.  Each has its figure(s), its tables (every header names its unit, every
table has footnotes) and a two-line plain-language reading generated from the numbers.  The HTML holds its CSS
and its figures (inline SVG) and fetches nothing: no fonts, scripts or images.  Section contents and how to
read them: docs/report.md.
"""

from __future__ import annotations

import html
import json
import math
import platform
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

from .. import __version__
from . import figures
from . import theme
from ..blind.claims import read_claims
from ..core.errors import SiteproofError
from .figures import Curve, Interval, Rendered
from ..core.outputs import atomic_write_bytes, atomic_write_text

REPORT_HTML = "report.html"
REPORT_MD = "report.md"
FIGURE_DIR = "figures"
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

ESTIMATOR_LABELS = {
    "naive": "naive difference in means",
    "regression": "regression adjustment",
    "ipw": "IPW (Hájek)",
    "aipw": "AIPW",
    "overlap": "overlap weights",
}
VERDICT_MEANING = {
    "equivalent": "not different and equivalent: the 95 % CI of D includes 0 and its 90 % CI lies inside ±δ",
    "different": "different and not equivalent: the 95 % CI of D excludes 0 and its 90 % CI is not inside ±δ",
    "trivially different": "different but equivalent: the 95 % CI of D excludes 0, yet its 90 % CI lies inside "
    "±δ — a real but unimportant difference",
    "indeterminate": "neither: the 95 % CI of D includes 0 but its 90 % CI reaches beyond ±δ — the data cannot "
    "tell",
}
VERDICT_ORDER = ("equivalent", "trivially different", "indeterminate", "different")
RATE_P = 0.001
TOC_ZOOM = 0.05  # TOC figures scale their y axis to the bands from this share on  # the intake's threshold for a realized share that contradicts the declared rate

CAUTION = (
    "This report is statistical evidence, not proof. Each verdict is a statement about estimates under stated "
    "assumptions and an equivalence margin, and it can be wrong. Results may feed decisions about people: "
    "ethics review, informed consent and data-use agreements apply to any data analysed with siteproof, and "
    "local regulations and qualified review take precedence over anything reported here."
)

REFERENCES = (
    ("Design-based estimates", "Neyman (1923); Horvitz & Thompson (1952); exact binomial test of the treated count"),
    ("Regression adjustment, HC2", "Lin (2013), Ann. Appl. Stat.; Imbens & Kolesár (2016)"),
    ("IPW, AIPW", "Horvitz & Thompson (1952); Robins, Rotnitzky & Zhao (1994)"),
    ("Cross-fitting", "Chernozhukov et al. (2018), double/debiased machine learning"),
    ("Overlap", "Crump, Hotz, Imbens & Mitnik (2009); Li, Morgan & Zaslavsky (2018) overlap weights; "
     "Austin (2009) standardized differences; Kish (1965) effective sample size"),
    ("CATE models", "Künzel, Sekhon, Bickel & Yu (2019) meta-learners; Nie & Wager (2021) R-learner and "
     "R-loss; Kennedy (2023) DR-learner"),
    ("BLP, GATES", "Chernozhukov, Demirer, Duflo & Fernández-Val, generic ML inference on heterogeneous effects"),
    ("TOC, AUTOC, Qini", "Yadlowsky, Fleming, Shah, Brunskill & Wager, rank-weighted average treatment effects"),
    ("Treatment rules", "Imai & Li (2023) evaluating individualized rules; Athey & Wager (2021) policy learning"),
    ("Random effects", "DerSimonian & Laird (1986); Viechtbauer (2005, 2010) REML; Higgins & Thompson (2002) "
     "I²; Higgins, Thompson & Spiegelhalter (2009) prediction intervals"),
    ("Paired comparison, verdicts", "Schuirmann (1987) two one-sided tests; Tryon & Lewis (2008) four "
     "verdict classes; Shadish, Clark & Steiner (2008) percent bias reduction"),
    ("Within-study comparisons", "Cook, Shadish & Wong (2008); Steiner & Wong (2018); Gentzel, Pruthi & Jensen "
     "(2021) observational samples from RCTs"),
    ("Colours", "Okabe & Ito (2008) colour-universal-design palette"),
)


# ----------------------------------------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------------------------------------
def write_report(out_dir: Path, claims: dict, scorecard: dict) -> dict[str, Path]:
    """Write ``report.html``, ``report.md`` and ``figures/<name>.svg|.png`` into ``out_dir`` (atomic writes).

    Returns the written paths: keys ``html``, ``markdown`` and ``figure:<name>.svg`` / ``figure:<name>.png``.
    """
    out = Path(out_dir)
    doc = build_document(claims, scorecard)
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
    claims, _ = read_claims(folder)
    card_path = folder / SCORECARD_FILE
    if not card_path.exists():
        raise SiteproofError(
            f"no {SCORECARD_FILE} in {folder}",
            "run `siteproof unmask` (or `siteproof run`) into this folder first",
        )
    try:
        scorecard = json.loads(card_path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise SiteproofError(f"cannot read {card_path}: {exc}", "rerun `siteproof unmask` to rewrite it") from exc
    if scorecard.get("schema") != "siteproof/scorecard":
        raise SiteproofError(f"{card_path} is not a siteproof scorecard", "rerun `siteproof unmask` to rewrite it")
    if scorecard.get("study", {}).get("fingerprint") not in (None, claims.get("fingerprint")):
        raise SiteproofError(
            f"{SCORECARD_FILE} and claims.json in {folder} describe different data (fingerprints differ)",
            "rerun `siteproof unmask` with these claims so that both files come from the same data",
        )
    return write_report(folder, claims, scorecard)


# ----------------------------------------------------------------------------------------------------------
# document parts: each renders to HTML and to Markdown
# ----------------------------------------------------------------------------------------------------------
def _esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


@dataclass(frozen=True)
class Verdict:
    """A verdict word in a table cell (a bordered word in HTML, never colour alone)."""

    word: str
    note: str = ""

    def html(self) -> str:
        note = f' <span class="footnote">({_esc(self.note)})</span>' if self.note else ""
        return f'<span class="verdict {self.word.replace(" ", "-")}">{_esc(self.word)}</span>{note}'

    def __str__(self) -> str:
        return f"{self.word} ({self.note})" if self.note else self.word


@dataclass
class Table:
    """A table whose headers carry units and whose footnotes explain every number."""

    caption: str
    headers: list[str]
    rows: list[list[Any]]
    notes: list[str] = field(default_factory=list)
    text: tuple[int, ...] = (0,)

    def text_columns(self) -> set[int]:
        """Left-aligned columns: the declared text columns and every column holding a verdict."""
        return set(self.text) | {j for row in self.rows for j, cell in enumerate(row) if isinstance(cell, Verdict)}

    def html(self) -> str:
        text = self.text_columns()
        head = "".join(f'<th class="text">{_esc(h)}</th>' if j in text else f"<th>{_esc(h)}</th>"
                       for j, h in enumerate(self.headers))
        body = []
        for row in self.rows:
            cells = []
            for j, cell in enumerate(row):
                content = cell.html() if isinstance(cell, Verdict) else _esc(cell)
                cls = ' class="text"' if j in text else ""
                cells.append(f"<td{cls}>{content}</td>")
            body.append("<tr>" + "".join(cells) + "</tr>")
        notes = "".join(f'<p class="footnote">{_esc(n)}</p>' for n in self.notes)
        return (f'<div class="table"><div class="scroll"><table><caption>{_esc(self.caption)}</caption>'
                f'<thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>{notes}</div>')

    def markdown(self) -> str:
        def cell(value: Any) -> str:
            return str(value).replace("|", "\\|").replace("\n", " ")

        text = self.text_columns()
        lines = [f"**{self.caption}**", "", "| " + " | ".join(cell(h) for h in self.headers) + " |",
                 "|" + "|".join("---" if j in text else "---:" for j in range(len(self.headers))) + "|"]
        lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in self.rows]
        return "\n\n".join(["\n".join(lines)] + [f"_{cell(n)}_" for n in self.notes])


@dataclass(frozen=True)
class FigureBlock:
    rendered: Rendered
    caption: str

    def html(self) -> str:
        name = self.rendered.name
        svg = self.rendered.svg.replace('role="img"', f'role="img" aria-labelledby="caption-{name}"', 1)
        return (f'<figure id="figure-{name}">{svg}'
                f'<figcaption id="caption-{name}">{_esc(self.caption)}</figcaption></figure>')

    def markdown(self) -> str:
        return f"![{self.caption}]({FIGURE_DIR}/{self.rendered.name}.png)"


@dataclass(frozen=True)
class Text:
    """A paragraph; ``kind`` is ``note`` (small print), ``absent`` (a part that was not run) or ``plain``."""

    text: str
    kind: str = "plain"

    def html(self) -> str:
        cls = f' class="{self.kind}"' if self.kind != "plain" else ""
        return f"<p{cls}>{_esc(self.text)}</p>"

    def markdown(self) -> str:
        return f"_{self.text}_" if self.kind != "plain" else self.text


@dataclass(frozen=True)
class Heading:
    text: str

    def html(self) -> str:
        return f"<h3>{_esc(self.text)}</h3>"

    def markdown(self) -> str:
        return f"### {self.text}"


@dataclass(frozen=True)
class Preformatted:
    text: str

    def html(self) -> str:
        return f"<pre>{_esc(self.text)}</pre>"

    def markdown(self) -> str:
        return "```text\n" + self.text + "\n```"


@dataclass(frozen=True)
class ItemList:
    items: tuple[str, ...]

    def html(self) -> str:
        return '<ul class="warnings">' + "".join(f"<li>{_esc(i)}</li>" for i in self.items) + "</ul>"

    def markdown(self) -> str:
        return "\n".join(f"- {i}" for i in self.items)


@dataclass(frozen=True)
class Facts:
    """Label–value pairs (software versions, seeds, fingerprint)."""

    pairs: tuple[tuple[str, str], ...]

    def html(self) -> str:
        return '<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in self.pairs) + "</dl>"

    def markdown(self) -> str:
        return "\n".join(f"- {k}: `{v}`" for k, v in self.pairs)


@dataclass(frozen=True)
class Caution:
    text: str

    def html(self) -> str:
        return f'<aside class="caution"><strong>Caution.</strong> {_esc(self.text)}</aside>'

    def markdown(self) -> str:
        return f"> **Caution.** {self.text}"


@dataclass
class Section:
    key: str
    title: str
    reading: tuple[str, str]
    parts: list[Any]

    def html(self, number: int) -> str:
        reading = "<br>".join(_esc(line) for line in self.reading)
        body = "\n".join(p.html() for p in self.parts)
        return (f'<section class="part" id="{self.key}"><h2><span class="num">{number}</span>{_esc(self.title)}</h2>\n'
                f'<p class="reading">{reading}</p>\n{body}\n</section>')

    def markdown(self, number: int) -> str:
        blocks = [f"## {number}. {self.title}", "\n".join(f"> {line}  " for line in self.reading)]
        blocks += [p.markdown() for p in self.parts]
        return "\n\n".join(blocks)


@dataclass
class Document:
    title: str
    headline: str
    summary: Table
    sections: list[Section]

    @property
    def figures(self) -> list[Rendered]:
        return [p.rendered for s in self.sections for p in s.parts if isinstance(p, FigureBlock)]

    def html(self) -> str:
        nav = "".join(f'<a href="#{s.key}">{i}. {_esc(s.title)}</a>' for i, s in enumerate(self.sections, 1))
        body = "\n".join(s.html(i) for i, s in enumerate(self.sections, 1))
        return theme.page_head(self.title) + f"""<header class="masthead">
<div class="kicker">siteproof report · a blind analysis scored against each site's randomization</div>
<h1>{_esc(self.title)}</h1>
<p>{_esc(self.headline)}</p>
</header>
<nav class="contents">{nav}</nav>
<section class="summary" id="summary">{self.summary.html()}</section>
{body}
<footer>Written by siteproof {_esc(__version__)}. This file is self-contained: its styles and figures are inside it and
it fetches nothing. Figures are also in the folder <code>{FIGURE_DIR}/</code> as SVG and PNG.</footer>
</body>
</html>
"""

    def markdown(self) -> str:
        blocks = [f"# {self.title}", self.headline, self.summary.markdown()]
        blocks += [s.markdown(i) for i, s in enumerate(self.sections, 1)]
        return "\n\n".join(blocks) + "\n"


# ----------------------------------------------------------------------------------------------------------
# numbers
# ----------------------------------------------------------------------------------------------------------
def _f(value: Any) -> float:
    """A JSON number as float (null → NaN)."""
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _ok(*values: Any) -> bool:
    return all(math.isfinite(_f(v)) for v in values)


def _decimals(margin: float) -> int:
    """Decimals for effects: enough to resolve a tenth of the margin δ (between 1 and 6)."""
    if not _ok(margin) or margin <= 0:
        return 3
    return max(1, min(6, 2 - math.floor(math.log10(margin))))


def fmt(value: Any, decimals: int = 3) -> str:
    """A number with fixed decimals; missing → "—"."""
    return f"{_f(value):.{decimals}f}" if _ok(value) else "—"


def fmt_ci(ci: Any, decimals: int = 3) -> str:
    lo, hi = (ci or [None, None])[:2]
    return f"[{fmt(lo, decimals)}, {fmt(hi, decimals)}]" if _ok(lo, hi) else "—"


def fmt_p(p: Any) -> str:
    if not _ok(p):
        return "—"
    return "<0.001" if _f(p) < 0.001 else f"{_f(p):.3f}"


def fmt_pct(share: Any, decimals: int = 0) -> str:
    return f"{100 * _f(share):.{decimals}f} %" if _ok(share) else "—"


def _interval(label: str, est: dict | None) -> Interval:
    est = est or {}
    ci = est.get("ci") or [None, None]
    return Interval(label, _f(est.get("estimate")), _f(ci[0]), _f(ci[1]))


def _count_words(words: Iterable[str]) -> str:
    words = list(words)
    counts = [(w, words.count(w)) for w in VERDICT_ORDER if w in words]
    return ", ".join(f"{c} {w}" for w, c in counts) if counts else "none scored"


# ----------------------------------------------------------------------------------------------------------
# the document
# ----------------------------------------------------------------------------------------------------------
@dataclass
class _Run:
    """The two input records and what every section needs from them."""

    claims: dict
    card: dict

    @property
    def study(self) -> dict:
        return self.card.get("study") or {}

    @property
    def data(self) -> dict:
        return self.claims.get("data") or {}

    @property
    def margin(self) -> float:
        return _f(self.study.get("margin"))

    @property
    def d(self) -> int:
        return _decimals(self.margin)

    @property
    def outcome(self) -> str:
        return str(self.study.get("outcome") or self.data.get("outcome") or "outcome")

    @property
    def unit(self) -> str:
        """The unit of every effect: differences of the outcome (a risk difference for a 0/1 outcome)."""
        if self.data.get("binary_outcome"):
            return f"risk difference in {self.outcome}"
        return f"{self.outcome} units"

    def num(self, value: Any) -> str:
        return fmt(value, self.d)

    def ci(self, ci: Any) -> str:
        return fmt_ci(ci, self.d)

    def est_ci(self, est: dict | None) -> str:
        """An {estimate, ci} record as the text 'estimate [low, high]'."""
        est = est or {}
        return f"{self.num(est.get('estimate'))} {self.ci(est.get('ci'))}" if _ok(est.get("estimate")) else "—"

    def pair(self, first: Any, second: Any, decimals: int | None = None) -> str:
        """Two values as the text 'first → second' (blind → design)."""
        d = self.d if decimals is None else decimals
        return f"{fmt(first, d)} → {fmt(second, d)}"


def build_document(claims: dict, scorecard: dict) -> Document:
    """The whole report as a :class:`Document` (figures rendered, nothing written)."""
    run = _Run(claims, scorecard)
    name = run.study.get("name")
    title = f"siteproof report — {name}" if name else f"siteproof report — {run.outcome}"
    builders = (_study, _overlap, _average, _sites, _heterogeneity, _rules, _transport, _methods)
    sections = [build(run) for build in builders]
    assert [s.key for s in sections] == [k for k, _ in SECTIONS]
    headline = scorecard.get("headline") or "Blind claims scored against the sites' randomization."
    return Document(title, headline, _summary_table(run), sections)


def _margin_note(run: _Run) -> str:
    source = run.study.get("margin_source") or "user-set or default"
    return (f"δ = {run.num(run.margin)} {run.unit} is the equivalence margin — {source}; a difference smaller "
            "than δ is treated as unimportant.")


def _verdict_note() -> str:
    return "Verdicts (Tryon & Lewis 2008): " + "; ".join(f"{w} = {m}" for w, m in VERDICT_MEANING.items()) + "."


def _paired_note() -> str:
    return ("D = blind − design is computed on the same units; its SE is the SD of the per-unit differences of the "
            "two scores divided by √n (paired), never the two SEs added.")


def _summary_table(run: _Run) -> Table:
    """Verdicts at a glance: every headline claim class with its count of verdicts."""
    ate = [r.get("same_estimand", r) if r.get("estimator") == "overlap" and r.get("same_estimand") else r
           for r in run.card.get("ate") or []]
    rows = [
        ["average effect (ATE estimators)", len(ate), _count_words(r.get("verdict", "") for r in ate)],
        ["effect rankings (AUTOC of each CATE model)", len(run.card.get("cate") or []),
         _count_words(c.get("verdict", "") for c in run.card.get("cate") or [])],
        ["treatment rules (gain over random allocation)", len(run.card.get("rules") or []),
         _count_words(r.get("verdict", "") for r in run.card.get("rules") or [])],
    ]
    notes = [_margin_note(run), _verdict_note(),
             "The overlap-weighted estimator is counted by its comparison with the design-based overlap-weighted effect "
             "(the same estimand)."]
    return Table("Verdicts at a glance", ["claims", "number scored", "verdicts"], rows, notes, text=(0, 2))


# ----------------------------------------------------------------------------------------------------------
# 1. study and design
# ----------------------------------------------------------------------------------------------------------
def _study(run: _Run) -> Section:
    sites = run.card.get("sites") or []
    s = run.study
    declared = [_f(r.get("rate_declared")) for r in sites]
    any_declared = any(math.isfinite(v) for v in declared)
    parts: list[Any] = []
    if sites:
        realized = []
        for r in sites:
            p, n = _f(r.get("rate_realized")), _f(r.get("n"))
            half = 1.959963984540054 * math.sqrt(p * (1 - p) / n) if _ok(p, n) and n > 0 else math.nan
            realized.append(Interval(str(r.get("site")), p, max(0.0, p - half), min(1.0, p + half)))
        fig = figures.rates_figure([str(r.get("site")) for r in sites], realized, declared)
        parts.append(FigureBlock(figures.render(fig, "study-rates"),
                                 "Realized share treated in each site (square, 95 % binomial Wald interval "
                                 "p ± 1.96·√(p(1−p)/n)) beside the declared rate (open diamond, when declared)."))
    rows = [[r.get("site"), r.get("n"), r.get("n_treated"), r.get("n_control"), fmt(r.get("rate_declared"), 3),
             fmt(r.get("rate_realized"), 3), fmt_p(r.get("binom_p")), "yes" if r.get("included") else "no"]
            for r in sites]
    parts.append(Table(
        "Sites: sizes and assignment rates",
        ["site", "units (n)", "treated (n)", "control (n)", "declared rate (proportion)",
         "realized rate (proportion)", "binomial p", "in the comparison"],
        rows,
        ["Realized rate = treated / units. Binomial p: exact two-sided test of the treated count against the "
         "declared rate (a site's count is a sum of binomials when strata have different rates); p < "
         f"{RATE_P:g} flags a site whose assignment does not look like its declared rate. '—' = no rate declared.",
         "A site is in the comparison when it has at least 2 units in each arm."],
        text=(0, 7),
    ))
    excluded = list(s.get("excluded_sites") or [])
    parts.append(Text(
        "Excluded from every comparison (fewer than 2 units in an arm): " + ", ".join(excluded) + "."
        if excluded else "No site was excluded: every site has at least 2 units in each arm.", "note"))
    facts = [
        ("units analysed", str(s.get("n", run.data.get("n", "—")))),
        ("units compared", str(s.get("n_included", "—"))),
        ("sites", str(s.get("n_sites", len(sites)))),
        ("outcome", run.outcome),
        ("treatment", f"{run.data.get('treatment', '—')} (treated value: {run.data.get('treated_value', '—')})"),
        ("covariates", f"{len(run.data.get('covariates') or [])} columns → {len(run.data.get('features') or [])} "
                       "features"),
        ("units dropped at intake", ", ".join(f"{k.replace('_', ' ')}: {v}"
                                             for k, v in (run.data.get("excluded") or {}).items()) or "none"),
        ("known rates", str(run.card.get("rates_source") or s.get("rates_source") or "—")),
        ("equivalence margin δ", f"{run.num(run.margin)} {run.unit} — {s.get('margin_source', '—')}"),
    ]
    parts.append(Facts(tuple(facts)))
    warnings = list(run.card.get("warnings") or [])
    parts.append(Heading("Warnings"))
    parts.append(ItemList(tuple(warnings)) if warnings else Text("No warnings were raised.", "note"))
    return Section("study", "Study and design", _study_reading(run, sites, any_declared), parts)


def _study_reading(run: _Run, sites: list[dict], any_declared: bool) -> tuple[str, str]:
    s = run.study
    design = run.card.get("design_ate") or {}
    first = (f"{s.get('n', '—')} units in {s.get('n_sites', len(sites))} sites, {s.get('n_included', '—')} of them "
             f"compared; the design-based pooled effect is {run.num(design.get('estimate'))} {run.unit} "
             f"(95 % CI {run.ci(design.get('ci'))}).")
    if not any_declared:
        return first, ("No assignment rate was declared, so the realized shares stand in for the known rates and "
                       "cannot be checked against a declaration.")
    flagged = [str(r.get("site")) for r in sites if _ok(r.get("binom_p")) and _f(r.get("binom_p")) < RATE_P]
    tested = [_f(r.get("binom_p")) for r in sites if _ok(r.get("binom_p"))]
    if flagged:
        second = (f"The realized treated share contradicts the declared rate in {len(flagged)} site(s): "
                  f"{', '.join(flagged)} (exact binomial p < {RATE_P:g}); check how those sites assigned treatment.")
    else:
        second = (f"Every tested site's realized treated share is consistent with its declared rate "
                  f"(smallest exact binomial p = {fmt_p(min(tested)) if tested else '—'}).")
    return first, second


# ----------------------------------------------------------------------------------------------------------
# 2. overlap
# ----------------------------------------------------------------------------------------------------------
def _overlap(run: _Run) -> Section:
    overlap = run.claims.get("overlap") or {}
    prop = run.card.get("propensity") or {}
    band = overlap.get("band") or [0.05, 0.95]
    arms = overlap.get("by_arm") or {}
    parts: list[Any] = []
    hist = overlap.get("histogram")
    if hist:
        fig = figures.propensity_histogram(hist["edges"], hist["treated"], hist["control"], band)
        parts.append(FigureBlock(figures.render(fig, "overlap-histogram"),
                                 "Out-of-fold learned propensity ê of treated units (upper panel) and control units "
                                 f"(lower panel, hatched); dotted lines mark [{band[0]:g}, {band[1]:g}]."))
    elif arms:
        fig = figures.propensity_quantiles({k: v.get("quantiles", {}) for k, v in arms.items()}, band)
        parts.append(FigureBlock(figures.render(fig, "overlap-quantiles"),
                                 "Distribution of the out-of-fold learned propensity ê by arm: min–max (thin), "
                                 "5–95 % (medium), 25–75 % (thick) and median (bar); dotted lines mark "
                                 f"[{band[0]:g}, {band[1]:g}]. (These claims hold quantiles, not histogram counts.)"))
    else:
        parts.append(Text("Overlap summary not found in claims.json: nothing to draw.", "absent"))
    bins = prop.get("calibration_bins") or []
    by_site = prop.get("by_site") or []
    if bins and by_site:
        fig = figures.calibration_figure(
            [Interval(str(b.get("bin")), _f(b.get("known_rate_mean")),
                      _f(b.get("known_rate_mean")) - 1.959963984540054 * _f(b.get("known_rate_se")),
                      _f(b.get("known_rate_mean")) + 1.959963984540054 * _f(b.get("known_rate_se"))) for b in bins],
            [_f(b.get("e_hat_mean")) for b in bins],
            [Interval(str(r.get("site")), _f(r.get("e_hat_mean")), _f(r.get("e_hat_q10")), _f(r.get("e_hat_q90")))
             for r in by_site],
            [_f(r.get("known_rate")) for r in by_site],
        )
        parts.append(FigureBlock(figures.render(fig, "overlap-calibration"),
                                 "Left: mean known rate (95 % CI, mean ± 1.96·SE) in each decile bin of ê, against "
                                 "the bin's mean ê; a correct ê lies on the dashed line, because E[e_S | ê] = ê. "
                                 "Right: each site's mean ê and its 10–90 % range against the site's known rate; "
                                 "ê targets the mixture E[e_S | X], so sites are pulled toward each other."))
    else:
        parts.append(Text("Propensity recovery not found in scorecard.json: the calibration figure is not drawn.",
                          "absent"))
    parts.append(_overlap_table(run, arms, prop))
    return Section("overlap", "Overlap", _overlap_reading(run, overlap, prop), parts)


def _overlap_table(run: _Run, arms: dict, prop: dict) -> Table:
    rows = []
    ess = (prop.get("weights") or {}).get("ess") or {}
    for arm in ("treated", "control"):
        a = arms.get(arm) or {}
        q = a.get("quantiles") or {}
        e = ess.get(arm) or {}
        rows.append([arm, a.get("n", "—"), fmt(a.get("mean"), 3), fmt(q.get("p05"), 3), fmt(q.get("p50"), 3),
                     fmt(q.get("p95"), 3), fmt_pct(a.get("share_outside_band"), 1), fmt(a.get("kish_ess"), 0),
                     fmt(e.get("ess_true"), 0)])
    slope, intercept = prop.get("calibration_slope") or {}, prop.get("calibration_intercept") or {}
    site_pred = prop.get("site_prediction") or {}
    notes = [
        "ê: out-of-fold learned propensity (probability). Outside band: share of the arm's units with ê outside "
        "[0.05, 0.95] (Crump, Hotz, Imbens & Mitnik 2009). Kish ESS = (Σa)²/Σa² of the inverse-probability weights "
        "a (units): with ê as learned, and with the known rates.",
        f"Calibration of the known rate on ê (least squares, HC2 SE): slope {fmt(slope.get('estimate'), 3)} "
        f"(95 % CI {fmt_ci(slope.get('ci'), 3)}; ideal 1), intercept {fmt(intercept.get('estimate'), 3)} "
        f"(95 % CI {fmt_ci(intercept.get('ci'), 3)}; ideal 0).",
        f"RMSE of ê against the known rate: {fmt(prop.get('rmse'), 3)} (probability), estimated floor for a perfect "
        f"ê {fmt(prop.get('rmse_floor'), 3)}. " + str(prop.get("rmse_caveat") or ""),
    ]
    if site_pred:
        acc = site_pred.get("accuracy") or {}
        notes.append(f"The covariates predict the site with cross-validated accuracy {fmt_pct(acc.get('estimate'), 1)} "
                     f"against {fmt_pct(site_pred.get('majority_share'), 1)} for always guessing the largest site: "
                     "how much of the site the blind analysis could see.")
    return Table("Learned propensity ê by arm (ê is a probability)",
                 ["arm", "units (n)", "mean ê", "5th pct ê", "median ê", "95th pct ê", "outside band (% of arm)",
                  "Kish ESS, learned ê (units)", "Kish ESS, known rates (units)"], rows, notes)


def _overlap_reading(run: _Run, overlap: dict, prop: dict) -> tuple[str, str]:
    arms = overlap.get("by_arm") or {}
    med = {a: ((arms.get(a) or {}).get("quantiles") or {}).get("p50") for a in ("treated", "control")}
    first = (f"The learned propensity has median {fmt(med['treated'], 2)} among treated and {fmt(med['control'], 2)} "
             f"among control units; {fmt_pct(overlap.get('share_outside_band'), 1)} of units lie outside "
             f"[0.05, 0.95] and {overlap.get('n_clipped', '—')} were clipped.")
    slope = prop.get("calibration_slope") or {}
    b, ci = _f(slope.get("estimate")), slope.get("ci") or [None, None]
    if not _ok(b, *ci):
        return first, "The calibration of ê against the known rates could not be estimated."
    if _f(ci[0]) <= 1.0 <= _f(ci[1]):
        judgement = "consistent with a calibrated ê (the 95 % CI includes 1)"
    elif b < 1:
        judgement = "below 1: ê is too spread out (over-confident) relative to the known rates"
    else:
        judgement = "above 1: ê is too compressed relative to the known rates"
    return first, (f"The slope of the known rate on ê is {fmt(b, 2)} (95 % CI {fmt_ci(ci, 2)}; ideal 1), "
                   f"{judgement}.")


# ----------------------------------------------------------------------------------------------------------
# 3. average effect
# ----------------------------------------------------------------------------------------------------------
def _average(run: _Run) -> Section:
    rows = list(run.card.get("ate") or [])
    design = run.card.get("design_ate") or {}
    if not rows:
        return Section("average-effect", "Average effect",
                       ("No average-effect comparison is in the scorecard.", "Nothing to score."),
                       [Text("Not run: scorecard.json holds no 'ate' entries.", "absent")])
    labels = [ESTIMATOR_LABELS.get(r.get("estimator"), str(r.get("estimator"))) for r in rows]
    blind, diffs, verdicts, own = [], [], [], []
    for label, r in zip(labels, rows):
        blind.append(_interval(label, r.get("blind")))
        diffs.append(_interval(label, r.get("difference")))
        verdicts.append(str(r.get("verdict", "")))
        own.append(math.nan)
        same = r.get("same_estimand")
        if same:
            blind.append(_interval(f"{label}, same estimand", r.get("blind")))
            diffs.append(_interval(label, same.get("difference")))
            verdicts.append(str(same.get("verdict", "")))
            own.append(_f(same.get("design")))
    fig = figures.average_effect_figure(blind, _interval("design", design), diffs, verdicts, run.margin, run.unit,
                                        own_design=own)
    parts: list[Any] = [FigureBlock(
        figures.render(fig, "average-effect"),
        "Left: each blind estimator's 95 % CI (blue) beside the design-based pooled estimate (black line, grey "
        "95 % CI) and the band design ± δ (dashed green); a row marked 'same estimand' compares the overlap-weighted "
        "estimator with the design-based overlap-weighted effect (black square). Right: the paired difference "
        "D = blind − design with its 95 % CI (thin; difference test) and 90 % CI (thick; equivalence test) against "
        "the band ±δ; the verdict is written at the end of each row.")]
    parts.append(_ate_table(run, rows, labels))
    return Section("average-effect", "Average effect", _average_reading(run, rows), parts)


def _ate_table(run: _Run, rows: list[dict], labels: list[str]) -> Table:
    table_rows = []
    for label, r in zip(labels, rows):
        b, dif = r.get("blind") or {}, r.get("difference") or {}
        table_rows.append([label, str(r.get("estimand", "ATE")), run.est_ci(b), run.est_ci(dif),
                           run.ci(r.get("equivalence_ci")), fmt_p(r.get("p_value")), fmt_p(r.get("p_equivalence")),
                           fmt(r.get("percent_bias_reduction"), 0), Verdict(str(r.get("verdict", "")))])
        same = r.get("same_estimand")
        if same:
            sd = same.get("difference") or {}
            table_rows.append([f"{label} vs the design-based ATO {run.num(same.get('design'))}", "ATO", run.num(same.get("blind")), run.est_ci(sd),
                               run.ci(same.get("equivalence_ci")), fmt_p(same.get("p_value")),
                               fmt_p(same.get("p_equivalence")), "—", Verdict(str(same.get("verdict", "")))])
    design, oracle = run.card.get("design_ate") or {}, run.card.get("design_oracle_aipw") or {}
    u = run.unit
    return Table(
        f"Blind estimators against the pooled design-based effect ({u})",
        ["estimator", "estimand", f"blind estimate [95 % CI] ({u})", f"D = blind − design [95 % CI] ({u})",
         f"90 % CI of D ({u})", "p (D = 0)", "p (TOST, |D| ≥ δ)", "bias reduction (%)", "verdict"],
        table_rows,
        [f"Design-based pooled effect Σ_s (n_s/n)·DiM_s over the included sites: {run.num(design.get('estimate'))} "
         f"(SE {run.num(design.get('se'))}, 95 % CI {run.ci(design.get('ci'))}) {u}. Oracle AIPW with the known "
         f"rates (efficient design-based): {run.num(oracle.get('estimate'))} (95 % CI {run.ci(oracle.get('ci'))}).",
         _paired_note(), _margin_note(run),
         "p (TOST): the larger of the two one-sided p-values for |D| ≥ δ (Schuirmann 1987); equivalence when it is "
         "below 0.05, i.e. when the 90 % CI of D lies inside ±δ.",
         "Bias reduction = 100·(1 − |D| / |D_naive|) (Shadish, Clark & Steiner 2008): 100 = all of the naive "
         "estimator's bias removed, 0 = none, negative = worse than naive.",
         "The overlap-weighted estimator targets the overlap-weighted effect (ATO), another estimand; its second row "
         "compares it with the design-based ATO (same estimand).",
         _verdict_note()],
        text=(0, 1),
    )


def _average_reading(run: _Run, rows: list[dict]) -> tuple[str, str]:
    primary = next((r for r in rows if r.get("estimator") == "aipw"), rows[0])
    name = ESTIMATOR_LABELS.get(primary.get("estimator"), str(primary.get("estimator")))
    b, dif = primary.get("blind") or {}, primary.get("difference") or {}
    design = run.card.get("design_ate") or {}
    verdict = str(primary.get("verdict", ""))
    how = {
        "equivalent": f"lies within ±δ = ±{run.num(run.margin)} of the design estimate",
        "different": "differs from the design estimate by more than the margin allows",
        "trivially different": f"differs from the design estimate, but by less than δ = {run.num(run.margin)}",
        "indeterminate": f"is too wide to tell whether it lies within ±δ = ±{run.num(run.margin)} of the design "
                         "estimate",
    }.get(verdict, "was scored")
    first = (f"The blind {name} estimate {run.num(b.get('estimate'))} (95 % CI {run.ci(b.get('ci'))}) against the "
             f"design-based {run.num(design.get('estimate'))}: the paired difference {run.num(dif.get('estimate'))} "
             f"(95 % CI {run.ci(dif.get('ci'))}) {how} — {verdict}.")
    second = f"Across the {len(rows)} blind estimators: {_count_words(str(r.get('verdict', '')) for r in rows)}"
    naive = next((r for r in rows if r.get("estimator") == "naive"), None)
    if naive is not None and _ok(primary.get("percent_bias_reduction")) and primary is not naive:
        second += (f"; the naive difference in means was off by {run.num((naive.get('difference') or {}).get('estimate'))}"
                   f" and {name} removed {fmt(primary.get('percent_bias_reduction'), 0)} % of that bias")
    return first, second + "."


# ----------------------------------------------------------------------------------------------------------
# 4. sites
# ----------------------------------------------------------------------------------------------------------
def _sites(run: _Run) -> Section:
    sites = run.card.get("sites") or []
    meta = run.card.get("heterogeneity")
    design = run.card.get("design_ate") or {}
    included = [r for r in sites if r.get("included")]
    parts: list[Any] = []
    if included:
        rows = [Interval(str(r.get("site")), _f(r.get("difference_in_means")), _f(r.get("ci_low")), _f(r.get("ci_high")))
                for r in included]
        random_mean = _interval("random effects", meta) if meta else None
        prediction = tuple(_f(v) for v in (meta.get("prediction_interval") or [None, None])) if meta else None
        fig = figures.forest_figure(rows, [str(r.get("site")) for r in sites if not r.get("included")],
                                    _interval("pooled", design), random_mean, prediction, run.unit)
        parts.append(FigureBlock(figures.render(fig, "sites-forest"),
                                 "Each site's difference in means with its 95 % CI (Neyman SE); the pooled "
                                 "design-based estimate (solid diamond, width = 95 % CI); the random-effects mean "
                                 "(light diamond, REML) and the 95 % prediction interval for a new site (dashed)."))
    else:
        parts.append(Text("No site has 2 units in each arm: no per-site estimate to draw.", "absent"))
    parts.append(Table(
        f"Per-site design-based estimates ({run.unit})",
        ["site", "units (n)", "difference in means", "SE", "95 % CI", "Horvitz–Thompson", "Hájek",
         "oracle AIPW"],
        [[r.get("site"), r.get("n"), run.num(r.get("difference_in_means")), run.num(r.get("se")),
          fmt_ci([r.get("ci_low"), r.get("ci_high")], run.d), run.num(r.get("ht")), run.num(r.get("hajek")),
          run.num(r.get("oracle_aipw"))] for r in sites],
        ["Difference in means: treated mean − control mean within the site, SE √(s₁²/n₁ + s₀²/n₀) (Neyman 1923). "
         "Horvitz–Thompson and Hájek use the site's known rate; oracle AIPW is the mean of the design-based scores "
         "(known rate, cross-fitted outcome models) in the site. '—' = not estimable (a site without 2 units per "
         "arm)."],
    ))
    if meta:
        parts.append(Table(
            "Between-site heterogeneity of the effect (random-effects meta-analysis of the differences in means)",
            ["sites (k)", "Cochran's Q", "df", "p (Q)", "I² (%)", f"τ² DL ({run.unit})²", f"τ² REML ({run.unit})²",
             f"random-effects mean ({run.unit})", "95 % CI", "95 % prediction interval"],
            [[meta.get("k", "—"), fmt(meta.get("q"), 2), meta.get("q_df", "—"), fmt_p(meta.get("q_pvalue")),
              fmt(meta.get("i2"), 1), fmt(meta.get("tau2_dl"), run.d + 1), fmt(meta.get("tau2_reml"), run.d + 1),
              run.num(meta.get("estimate")), run.ci(meta.get("ci")), run.ci(meta.get("prediction_interval"))]],
            ["Q = Σ w_s(y_s − ȳ_FE)² with w_s = 1/SE_s², compared with χ² on k − 1 df. τ² = between-site variance of "
             "the true effects, by DerSimonian & Laird (1986) and by REML (Viechtbauer 2005). I² = share of the "
             "variation due to heterogeneity, from the REML τ² (Higgins & Thompson 2002). Prediction interval: "
             "mean ± t_{k−2}·√(τ² + SE²) (Higgins, Thompson & Spiegelhalter 2009); undefined with k = 2. " +
             str(meta.get("note") or "")],
        ))
    else:
        parts.append(Text("Meta-analysis not run: it needs at least 2 sites with a usable estimate.", "absent"))
    return Section("sites", "Sites", _sites_reading(run, included, meta), parts)


def _sites_reading(run: _Run, included: list[dict], meta: dict | None) -> tuple[str, str]:
    usable = [r for r in included if _ok(r.get("difference_in_means"))]
    if not usable:
        return "No site has an estimable difference in means.", "The between-site comparison was not run."
    low = min(usable, key=lambda r: _f(r.get("difference_in_means")))
    high = max(usable, key=lambda r: _f(r.get("difference_in_means")))
    first = (f"Site effects range from {run.num(low.get('difference_in_means'))} ({low.get('site')}) to "
             f"{run.num(high.get('difference_in_means'))} ({high.get('site')}) {run.unit}.")
    if not meta:
        return first, "With fewer than 2 usable sites there is no meta-analysis."
    p = _f(meta.get("q_pvalue"))
    test = "rejects" if _ok(p) and p < 0.05 else "does not reject"
    pi = meta.get("prediction_interval") or [None, None]
    pi_text = (f"a new site's effect would lie in {run.ci(pi)} with 95 % probability" if _ok(*pi)
               else "no prediction interval is possible with 2 sites")
    return first, (f"Cochran's Q = {fmt(meta.get('q'), 2)} (p = {fmt_p(p)}) {test} equal effects at the 5 % level; "
                   f"I² = {fmt(meta.get('i2'), 0)} %, and {pi_text}.")


# ----------------------------------------------------------------------------------------------------------
# 5. heterogeneity
# ----------------------------------------------------------------------------------------------------------
def _claims_model(run: _Run, model: str) -> dict:
    return next((c for c in run.claims.get("cate") or [] if c.get("model") == model), {})


def _heterogeneity(run: _Run) -> Section:
    models = [c for c in run.card.get("cate") or [] if c.get("model")]
    if not models:
        return Section("heterogeneity", "Heterogeneity",
                       ("No heterogeneous-effect model was scored.", "Nothing to re-score with the known rates."),
                       [Text("Not run: scorecard.json holds no 'cate' entries.", "absent")])
    names = [str(c["model"]) for c in models]
    u = run.unit
    parts: list[Any] = [Heading("Does a model beat a constant effect? R-loss")]
    r_blind = [_interval(n, (c.get("r_loss") or {}).get("blind")) for n, c in zip(names, models)]
    r_design = [_interval(n, (c.get("r_loss") or {}).get("design")) for n, c in zip(names, models)]
    fig = figures.paired_rows_figure([f"model {n}" for n in names], r_blind, r_design,
                                     f"R-loss difference from the constant-effect model ({u})²; below 0 = better")
    parts.append(FigureBlock(figures.render(fig, "heterogeneity-rloss"),
                             "Mean R-loss of each model minus that of the constant-effect model, with 95 % CI: blind "
                             "(learned ê and m̂) and design-based (known rates). Below 0: the model's τ̂ is closer to "
                             "the true effects than a constant (Nie & Wager 2021)."))
    parts.append(Heading("Effects by group of predicted effect (GATES)"))
    gates_blind, gates_design = [], []
    for n, c in zip(names, models):
        claimed = ((_claims_model(run, n).get("gates") or {}).get("groups")) or []
        scored = c.get("gates") or []
        gates_blind.append([_interval(str(g.get("group")), g) for g in claimed] or
                           [Interval(str(g.get("group")), _f(g.get("blind")), math.nan, math.nan) for g in scored])
        gates_design.append([Interval(str(g.get("group")), _f(g.get("design")), math.nan, math.nan) for g in scored])
    fig = figures.gates_figure(names, gates_blind, gates_design, u)
    parts.append(FigureBlock(figures.render(fig, "heterogeneity-gates"),
                             "Average effect in each quantile group of τ̂ (1 = lowest predicted effect): blind claim "
                             "with its 95 % CI (circles) and design-based re-scoring with the known rates (squares; "
                             "the paired difference and its CI are in the table below)."))
    parts.append(Heading("Targeting curves (TOC)"))
    parts.extend(_toc_parts(run, names, models))
    parts.append(Heading("Cost-aware gain"))
    parts.extend(_cost_parts(run, names, models))
    parts.append(_cate_table(run, names, models))
    parts.append(_gates_table(run, names, models))
    return Section("heterogeneity", "Heterogeneity", _heterogeneity_reading(run, names, models), parts)


def _curve(block: dict | None, q: Sequence[float] | None = None, key: str = "toc") -> Curve | None:
    """A curve from {'toc'|'gain': [...], 'se': [...]} with x from ``q`` or the block's own 'q'/'x'."""
    if not block or key not in block:
        return None
    x = q if q is not None else block.get("q") or block.get("x")
    if x is None or len(x) != len(block[key]):
        return None
    return Curve([_f(v) for v in x], [_f(v) for v in block[key]], [_f(v) for v in block.get("se") or [0] * len(x)])


def _toc_parts(run: _Run, names: list[str], models: list[dict]) -> list[Any]:
    blind, design = [], []
    for n, c in zip(names, models):
        claimed = _claims_model(run, n).get("autoc") or {}
        blind.append(_curve(claimed.get("curve"), claimed.get("q")))
        scored = (c.get("autoc") or {}).get("curve") or {}
        design.append(_curve(scored.get("design"), scored.get("q")))
    if any(b is None for b in blind):
        return [Text("Not drawn: the claims hold no TOC curve for some model.", "absent")]
    has_design = all(d is not None for d in design)
    fig = figures.curves_figure(names, blind, design if has_design else None,
                                "share of units treated, highest τ̂ first (proportion)", f"TOC ({run.unit})",
                                zoom_from=TOC_ZOOM)
    parts: list[Any] = [FigureBlock(figures.render(fig, "heterogeneity-toc"),
                                    "TOC(q): average effect among the q share of units with the highest τ̂ minus the "
                                    "average effect of everyone, with 95 % pointwise bands (half-sample bootstrap); "
                                    "blind (solid)" + (" and design-based with the known rates (dashed, dotted band)"
                                                       if has_design else "") +
                                    f". The vertical axis covers the bands from q = {TOC_ZOOM:g} on: below that a "
                                    "handful of units make the bands very wide.")]
    if not has_design:
        parts.append(Text("The design-based TOC curves are not in this scorecard; AUTOC and Qini re-scored with the "
                          "known rates are in the table below.", "note"))
    return parts


def _cost_parts(run: _Run, names: list[str], models: list[dict]) -> list[Any]:
    if not run.data.get("has_cost"):
        return [Text("Not run: the study has no cost column.", "absent")]
    blind, design = [], []
    for n, c in zip(names, models):
        blind.append(_curve(_claims_model(run, n).get("cost_curve"), key="gain"))
        scored = c.get("cost_curve") or {}
        design.append(_curve(scored.get("design"), scored.get("x"), key="gain"))
    if any(b is None for b in blind):
        return [Text("Not drawn: the claims hold no cost curve for some model.", "absent")]
    has_design = all(d is not None for d in design)
    fig = figures.curves_figure(names, blind, design if has_design else None,
                                "share of the total cost spent, best τ̂/cost first (proportion)",
                                f"gain per unit ({run.unit})")
    parts: list[Any] = [FigureBlock(figures.render(fig, "heterogeneity-cost"),
                                    "Cumulative gain (sum of the effect scores of the treated units / n) when units are "
                                    "treated in decreasing order of τ̂/cost, against the share of the total cost "
                                    "spent, with 95 % pointwise bands.")]
    if not has_design:
        parts.append(Text("The design-based cost curves are not in this scorecard; only the blind curves are drawn.",
                          "note"))
    return parts


def _cate_table(run: _Run, names: list[str], models: list[dict]) -> Table:
    rows = []
    for n, c in zip(names, models):
        a, q = c.get("autoc") or {}, c.get("qini") or {}
        b2 = (c.get("blp") or {}).get("beta2") or {}
        rows.append([n, run.num(c.get("tau_sd")), run.pair(a.get("blind"), a.get("design")),
                     run.est_ci(a.get("difference")), Verdict(str(a.get("verdict", ""))),
                     run.pair(q.get("blind"), q.get("design")), Verdict(str(q.get("verdict", ""))),
                     run.pair(b2.get("blind"), b2.get("design"), 2),
                     str((c.get("heterogeneity") or {}).get("status", "—"))])
    return Table(
        f"Heterogeneity claims re-scored with the known rates ({run.unit} unless stated)",
        ["model", "SD of τ̂", "AUTOC, blind → design", "D (AUTOC) [95 % CI]", "AUTOC verdict",
         "Qini, blind → design", "Qini verdict", "BLP β₂, blind → design (ratio)", "real heterogeneity?"],
        rows,
        ["AUTOC and Qini: areas under the TOC curve with weights 1 and q (Yadlowsky et al.); > 0 means the ranking "
         "by τ̂ finds units with larger effects. D = blind − design on the same half-samples.",
         "BLP β₂ (Chernozhukov, Demirer, Duflo & Fernández-Val): 1 when τ̂ is the true effect, 0 when it carries no "
         "information about heterogeneity (a ratio, no unit).",
         "'real heterogeneity?': whether the blind claim (β₂ > 0 or AUTOC > 0, one-sided 5 % test) is confirmed by the "
         "design-based values: confirmed, not confirmed, missed, or none claimed, none found.",
         _margin_note(run), _verdict_note()],
        text=(0, 8),
    )


def _gates_table(run: _Run, names: list[str], models: list[dict]) -> Table:
    rows = []
    for n, c in zip(names, models):
        for g in c.get("gates") or []:
            dif = g.get("difference") or {}
            rows.append([n, g.get("group"), run.num(g.get("blind")), run.num(g.get("design")),
                         run.num(dif.get("estimate")), run.ci(dif.get("ci")), Verdict(str(g.get("verdict", "")))])
        tb = c.get("top_minus_bottom") or {}
        if tb:
            dif = tb.get("difference") or {}
            rows.append([n, "top − bottom", run.num(tb.get("blind")), run.num(tb.get("design")),
                         run.num(dif.get("estimate")), run.ci(dif.get("ci")), Verdict(str(tb.get("verdict", "")))])
    return Table(
        f"GATES: group effects, blind against design ({run.unit})",
        ["model", "group of τ̂", "blind", "design", "D = blind − design", "95 % CI of D", "verdict"], rows,
        ["Group 1 holds the units with the lowest τ̂. Blind: mean of the blind AIPW scores in the group; design: "
         "mean of the design-based scores (known rates); D is their paired difference.", _verdict_note()],
        text=(0, 1),
    )


def _heterogeneity_reading(run: _Run, names: list[str], models: list[dict]) -> tuple[str, str]:
    status = {n: str((c.get("heterogeneity") or {}).get("status", "—")) for n, c in zip(names, models)}
    confirmed = [n for n, s in status.items() if s == "confirmed"]
    found = [n for n, c in zip(names, models) if (c.get("heterogeneity") or {}).get("design_finds")]
    first = (f"Re-scored with the known rates, {len(found)} of {len(names)} models show real heterogeneity "
             f"(β₂ > 0 or AUTOC > 0 at one-sided 5 %){': ' + ', '.join(found) if found else ''}; the blind claim of "
             f"heterogeneity is confirmed for {len(confirmed)} ({', '.join(f'{n}: {s}' for n, s in status.items())}).")
    verdicts = [str((c.get("autoc") or {}).get("verdict", "")) for c in models]
    losses = {n: (c.get("r_loss") or {}).get("design") or {} for n, c in zip(names, models)}
    scored = {n: loss for n, loss in losses.items() if _ok(loss.get("estimate"))}
    second = f"AUTOC blind against design: {_count_words(verdicts)}"
    if scored:
        best = min(scored, key=lambda n: _f(scored[n]["estimate"]))
        second += (f"; the lowest design-based R-loss relative to a constant effect is model {best} "
                   f"({run.num(scored[best]['estimate'])}, 95 % CI {run.ci(scored[best].get('ci'))})")
    return first, second + "."


# ----------------------------------------------------------------------------------------------------------
# 6. treatment rules
# ----------------------------------------------------------------------------------------------------------
def _rules(run: _Run) -> Section:
    rules = list(run.card.get("rules") or [])
    if not rules:
        return Section("rules", "Treatment rules", ("No treatment rule was scored.", "Nothing to re-score."),
                       [Text("Not run: scorecard.json holds no 'rules' entries.", "absent")])
    blind = [_rule_point(r, r.get("claimed")) for r in rules]
    design = [_rule_point(r, r.get("design_oracle_aipw")) for r in rules]
    fig = figures.rules_figure(blind, design, run.unit)
    parts: list[Any] = [FigureBlock(
        figures.render(fig, "rules-value"),
        "Value of each learned rule (mean outcome if the rule were applied, net of cost when there is a cost column) "
        "against the share of units it treats, with 95 % CIs: as claimed blind (left) and re-scored with the known "
        "rates (oracle AIPW, right). Lines join the rules of one CATE model; the dashed grey line is random "
        "allocation of the same share (value − gain), so a rule above it gains over random allocation.")]
    parts.append(_rules_table(run, rules))
    parts.append(_rules_by_site_table(run, rules))
    tree = next((r for r in run.claims.get("rules") or [] if r.get("kind") == "tree" and r.get("tree_text")), None)
    parts.append(Heading("The depth-2 tree rule"))
    if tree:
        parts.append(Preformatted(str(tree["tree_text"])))
        parts.append(Text("Learned on all units with the blind doubly robust scores; its value above is scored on "
                          "out-of-fold assignments (each unit assigned by a tree fit without it).", "note"))
    else:
        parts.append(Text("Not run: the claims hold no tree rule.", "absent"))
    return Section("rules", "Treatment rules", _rules_reading(run, rules), parts)


def _rule_point(rule: dict, scored: dict | None) -> figures.RulePoint:
    """A rule's value and random-allocation value (value − gain) as claimed or as re-scored."""
    scored = scored or {}
    value, gain = scored.get("value") or {}, scored.get("gain") or {}
    family = str(rule.get("model") or rule.get("kind") or rule.get("rule"))
    return figures.RulePoint(family, _f(rule.get("treated_share")), _interval(str(rule.get("rule")), value),
                             _f(value.get("estimate")) - _f(gain.get("estimate")))


def _rules_table(run: _Run, rules: list[dict]) -> Table:
    rows = []
    for r in rules:
        claimed = r.get("claimed") or {}
        oracle = r.get("design_oracle_aipw") or {}
        gain = r.get("gain") or {}
        rows.append([r.get("rule"), fmt_pct(r.get("treated_share")),
                     run.pair((claimed.get("value") or {}).get("estimate"), (oracle.get("value") or {}).get("estimate")),
                     run.est_ci(claimed.get("gain")), run.est_ci(oracle.get("gain")), run.est_ci(gain.get("difference")),
                     Verdict(str(r.get("verdict", "")), "" if r.get("verdict_on", "gain") == "gain" else "on value"),
                     f"{r.get('sites_agreeing', '—')} of {r.get('sites_with_contrast', '—')}"])
    return Table(
        f"Learned rules: value and gain, blind against design ({run.unit})",
        ["rule", "treated (% of units)", "value, blind → design", "gain blind [95 % CI]", "gain design [95 % CI]",
         "D (gain) [95 % CI]", "verdict", "sites agreeing in sign"],
        rows,
        ["Value: mean of π·(Γ₁ − cost) + (1 − π)·Γ₀. Gain: value minus that of treating the same share at random "
         "(Imai & Li 2023). Blind uses the learned ê; design uses the known rates (oracle AIPW).",
         "Rule names: '<model>.threshold' treats units with τ̂ above their cost (or 0); '<model>.topNN' treats the NN % "
         "with the highest τ̂; 'tree' is the depth-2 tree.",
         "Sites agreeing: sites whose design-based gain has the sign of the blind pooled gain, among the sites where "
         "the rule treats some but not all units.",
         "The verdict compares the blind gain with the design-based gain; a rule that treats everyone or no one has "
         "no gain by construction, so its verdict compares values ('on value').", _margin_note(run), _verdict_note()],
    )


def _rules_by_site_table(run: _Run, rules: list[dict]) -> Table:
    sites: list[str] = []
    for r in rules:
        for row in r.get("by_site") or []:
            if str(row.get("site")) not in sites:
                sites.append(str(row.get("site")))
    rows = []
    for r in rules:
        cells = {str(row.get("site")): row for row in r.get("by_site") or []}
        line = [r.get("rule")]
        for s in sites:
            row = cells.get(s)
            if row is None:
                line.append("—")
                continue
            text = f"{run.num(row.get('gain'))} ({run.num(row.get('gain_se'))})"
            if row.get("opposite_and_significant"):
                text += " opposite"
            line.append(text)
        rows.append(line)
    return Table(
        f"Gain of each rule within each site, design-based ({run.unit}; SE in parentheses)",
        ["rule"] + [f"site {s}" for s in sites], rows,
        ["Gain over random allocation with the same treated share within the site, from the known-rate oracle AIPW "
         "scores. 'opposite' marks a site whose gain has the opposite sign of the blind pooled gain with a 95 % CI "
         "that excludes 0. A rule that treats all or none of a site has gain 0 there by construction."],
    )


def _rules_reading(run: _Run, rules: list[dict]) -> tuple[str, str]:
    def blind_gain(r: dict) -> float:
        g = _f(((r.get("claimed") or {}).get("gain") or {}).get("estimate"))
        return g if math.isfinite(g) else -math.inf

    best = max(rules, key=blind_gain)
    claimed = (best.get("claimed") or {}).get("gain") or {}
    oracle = (best.get("design_oracle_aipw") or {}).get("gain") or {}
    first = (f"The rule with the largest blind gain is {best.get('rule')} (treats {fmt_pct(best.get('treated_share'))}; "
             f"gain {run.num(claimed.get('estimate'))}, 95 % CI {run.ci(claimed.get('ci'))}); with the known rates its "
             f"gain is {run.num(oracle.get('estimate'))} (95 % CI {run.ci(oracle.get('ci'))}) — {best.get('verdict', '—')}.")
    opposite = sum(1 for r in rules for row in r.get("by_site") or [] if row.get("opposite_and_significant"))
    second = (f"Gain verdicts over {len(rules)} rules: {_count_words(str(r.get('verdict', '')) for r in rules)}; "
              f"{opposite} rule-site pair(s) show a significant gain of the opposite sign.")
    return first, second


# ----------------------------------------------------------------------------------------------------------
# 7. transport
# ----------------------------------------------------------------------------------------------------------
def _transport(run: _Run) -> Section:
    moved = run.card.get("transport")
    if not moved:
        return Section("transport", "Transport",
                       ("Leave-one-site-out transport was not run.",
                        "Rerun with --transport to test whether what was learned on the other sites holds in each "
                        "held-out site."),
                       [Text("Not run (transport is optional: `siteproof run … --transport`).", "absent")])
    sites = moved.get("sites") or []
    skipped = moved.get("skipped") or []
    parts: list[Any] = []
    if not sites:
        parts.append(Text("No site had enough units to be held out.", "absent"))
    else:
        models = list((sites[0].get("autoc") or {}).keys())
        labels, moved_rows, in_rows = [], [], []
        for s in sites:
            for m in models:
                labels.append(f"{s.get('site')} · {m}")
                moved_rows.append(_interval(m, (s.get("autoc") or {}).get(m)))
                in_rows.append(_interval(m, (s.get("autoc_in_sample") or {}).get(m)))
        fig = figures.paired_rows_figure(labels, moved_rows, in_rows, f"AUTOC in the held-out site ({run.unit})",
                                         legend=("transported (fit without the site)", "in-sample (out-of-fold, full run)"))
        parts.append(FigureBlock(figures.render(fig, "transport-autoc"),
                                 "AUTOC of each model's ranking in each held-out site, scored with the site's known "
                                 "rate: transported from a blind rerun on the other sites (circles) and from the full "
                                 "run (squares), with 95 % CIs."))
        parts.append(_transport_autoc_table(run, sites, models))
        parts.append(_transport_rules_table(run, sites))
    if skipped:
        parts.append(Text("Not held out: " + "; ".join(f"{k.get('site')} ({k.get('reason')})" for k in skipped) + ".",
                          "note"))
    return Section("transport", "Transport", _transport_reading(run, sites), parts)


def _transport_autoc_table(run: _Run, sites: list[dict], models: list[str]) -> Table:
    rows = []
    for s in sites:
        for m in models:
            est = (s.get("autoc") or {}).get(m) or {}
            ins = (s.get("autoc_in_sample") or {}).get(m) or {}
            loss = (s.get("autoc_transported_minus_in_sample") or {}).get(m) or {}
            rows.append([s.get("site"), m, s.get("n"), s.get("n_train"), fmt(s.get("known_rate"), 3),
                         run.num(est.get("estimate")), run.ci(est.get("ci")), run.num(ins.get("estimate")),
                         run.num(loss.get("estimate")), run.ci(loss.get("ci"))])
    return Table(
        f"Transported rankings by held-out site ({run.unit})",
        ["held-out site", "model", "site units (n)", "training units (n)", "known rate (proportion)",
         "AUTOC transported", "95 % CI", "AUTOC in-sample", "transported − in-sample", "95 % CI of the difference"],
        rows,
        ["Transported: the blind analysis rerun without the site, its τ̂ predicted in the site. In-sample: the full "
         "run's out-of-fold τ̂ on the same units. Both scored with the site's known rate (oracle AIPW); SEs from "
         "half-sample bootstrap, the difference on the same half-samples."],
        text=(0, 1),
    )


def _transport_rules_table(run: _Run, sites: list[dict]) -> Table:
    names: list[str] = []
    for s in sites:
        names += [rule for rule in (s.get("rules") or {}) if rule not in names]
    rows = []
    for rule in names:
        line = [rule]
        for s in sites:
            gain = ((s.get("rules") or {}).get(rule) or {}).get("gain")
            line.append(run.est_ci(gain) if gain else "—")
        rows.append(line)
    return Table(f"Gain of the transported rules in the held-out site ({run.unit}; 95 % CI)",
                 ["rule"] + [f"held out: {s.get('site')}" for s in sites], rows,
                 ["Gain over random allocation with the same treated share, scored with the held-out site's known "
                  "rate."])


def _transport_reading(run: _Run, sites: list[dict]) -> tuple[str, str]:
    if not sites:
        return "Transport ran but no site could be held out.", "Every site had too few units or an arm with fewer than 2."
    estimates = [e for s in sites for e in (s.get("autoc") or {}).values()]
    positive = sum(1 for e in estimates if _ok(*(e.get("ci") or [None])[:1]) and _f(e["ci"][0]) > 0)
    gains = [v for s in sites for v in (s.get("rules") or {}).values()]
    gaining = sum(1 for v in gains if _f((v.get("gain") or {}).get("estimate")) > 0)
    return (f"{len(sites)} sites were held out in turn; {positive} of {len(estimates)} transported rankings have an "
            "AUTOC significantly above 0 in the held-out site (95 % CI above 0).",
            f"{gaining} of {len(gains)} transported rules have a positive estimated gain in the held-out site.")


# ----------------------------------------------------------------------------------------------------------
# 8. methods and references
# ----------------------------------------------------------------------------------------------------------
def _software() -> tuple[tuple[str, str], ...]:
    import matplotlib
    import numpy
    import pandas
    import scipy
    import sklearn
    import statsmodels

    return (("Python", platform.python_version()), ("numpy", numpy.__version__), ("pandas", pandas.__version__),
            ("scikit-learn", sklearn.__version__), ("scipy", scipy.__version__),
            ("statsmodels", statsmodels.__version__), ("matplotlib", matplotlib.__version__))


def _methods(run: _Run) -> Section:
    settings = run.claims.get("settings") or {}
    timings = run.claims.get("timings") or {}
    methods = Table(
        "Methods and their sources",
        ["what", "sources"], [[what, src] for what, src in REFERENCES],
        ["Formulas: docs/methods.md and the methods pages it links; this report's sections: docs/report.md."],
        text=(0, 1),
    )
    facts = (
        ("siteproof (claims)", str(run.claims.get("siteproof_version", "—"))),
        ("siteproof (scorecard)", str(run.card.get("siteproof_version", "—"))),
        ("siteproof (report)", __version__),
        *_software(),
        ("seed of the blind analysis", str(settings.get("seed", "—"))),
        ("seed of unmasking", str(run.study.get("seed", "—"))),
        ("cross-fitting folds", str(settings.get("folds", "—"))),
        ("bootstrap draws (half-samples)", str(settings.get("n_boot", "—"))),
        ("propensity clipping", str(settings.get("clip", "—"))),
        ("CATE models", ", ".join(settings.get("models") or []) or "—"),
        ("input fingerprint (SHA-256)", str(run.claims.get("fingerprint", "—"))),
    )
    timing_table = Table(
        "Time spent by the blind analysis (seconds)",
        ["stage", "seconds"], [[k, fmt(v, 2)] for k, v in timings.items()],
        ["Wall-clock seconds of each stage on the machine that ran it; they vary from run to run."],
    )
    parts = [Caution(CAUTION), methods, Heading("Software, seeds and input"), Facts(facts), timing_table]
    reading = (
        f"Every verdict above uses the margin δ = {run.num(run.margin)} {run.unit} and paired differences on the same "
        "units; the methods and their sources are listed below.",
        f"Rerunning with the same input (fingerprint {str(run.claims.get('fingerprint', '—'))[:12]}…) and seed "
        f"{settings.get('seed', '—')} reproduces every number except the timings.",
    )
    return Section("methods", "Methods and references", reading, parts)
