"""The report on a small real run: files, section order, self-containment, numbers taken from the scorecard,
readings generated from the numbers, graceful absence of optional parts, determinism and folder errors."""

from __future__ import annotations

import copy
import functools
import json
import re
import warnings
from html.parser import HTMLParser
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
import pytest

from conftest import SMALL_RATES, fast_config, small_trial
from siteproof.core.interpret import estimator_label
from siteproof.reporting import formatting, report, sections_design, sections_effects, sections_rules
from siteproof.reporting.context import RunView
from siteproof.blind.claims import Claims, write_claims
from siteproof.core.errors import SiteproofError
from siteproof.core.outputs import atomic_write_json, to_json_text
from siteproof.unmask.scorecard import Scorecard

SECTION_IDS = ["study", "overlap", "average-effect", "sites", "heterogeneity", "rules", "transport", "methods"]
MAX_BYTES = 3 * 1024 * 1024  # the demo's report stays under 3 MB (docs/report.md)


class SmallRun(NamedTuple):
    claims: dict  # as read back from claims.json
    card: dict  # as read back from scorecard.json
    raw_claims: dict  # as the pipeline hands them to write_report (numpy scalars, NaN)
    raw_card: dict
    units: pd.DataFrame
    w: np.ndarray
    scorecard: Any  # the Scorecard object the screens print


@functools.lru_cache(maxsize=1)
def small_run() -> SmallRun:
    """One small real run (n = 1500, fast learners, three CATE models besides the constant), computed once per
    test session (the browser test reuses it)."""
    from siteproof.blind.analysis import run_blind
    from siteproof.intake.study import StudySpec, load_study
    from siteproof.unmask.scoring import run_unmask

    spec = StudySpec(data="trial.csv", outcome="score", treatment="treated", site="site", id="uid", cost="cost",
                     rates=SMALL_RATES)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        study = load_study(spec, frame=small_trial(n=1500))
        claims = run_blind(study.blind, fast_config(models=("constant", "t", "r", "dr")))
        scorecard = run_unmask(study, claims, seed=3)
    card = scorecard.to_dict()
    return SmallRun(json.loads(to_json_text(claims.record)), json.loads(to_json_text(card)), claims.record, card,
                    claims.units, study.blind.w.astype(int), scorecard)


def run_copy() -> tuple[dict, dict]:
    run = small_run()
    return copy.deepcopy(run.claims), copy.deepcopy(run.card)


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    claims, card = run_copy()
    out = tmp_path_factory.mktemp("report")
    paths = report.write_report(out, Claims.from_dict(claims, small_run().units), Scorecard.from_dict(card))
    return out, paths, claims, card


class _Collector(HTMLParser):
    """Every start tag with its attributes, and the text of each section's reading."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def _tags(text: str) -> list[tuple[str, dict]]:
    parser = _Collector()
    parser.feed(text)
    return parser.tags


def _section(html_text: str, key: str) -> str:
    start = html_text.index(f'<section class="part" id="{key}">')
    return html_text[start:html_text.index("</section>", start)]


def _reading(html_text: str, key: str) -> str:
    sec = _section(html_text, key)
    return re.search(r'<p class="reading">(.*?)</p>', sec, re.S).group(1)


def test_writes_html_markdown_and_every_figure_as_svg_and_png(written):
    out, paths, _, _ = written
    html_text = (out / "report.html").read_text(encoding="utf-8")
    assert paths["html"] == out / "report.html" and paths["markdown"] == out / "report.md"
    figure_names = {p.stem for p in (out / "figures").iterdir()}
    assert {"study-rates", "overlap-calibration", "average-effect", "sites-forest", "heterogeneity-rloss",
            "heterogeneity-gates", "heterogeneity-toc", "heterogeneity-cost", "rules-value"} <= figure_names
    for name in figure_names:
        svg = (out / "figures" / f"{name}.svg").read_text(encoding="utf-8")
        png = (out / "figures" / f"{name}.png").read_bytes()
        assert svg.startswith("<svg") and svg.rstrip().endswith("</svg>")
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
        assert f'id="fig-{name}"' in html_text  # the same figure is inline in the HTML
    assert (out / "report.html").stat().st_size < MAX_BYTES
    assert not list(out.glob(".*.tmp"))  # atomic writes leave no temporary files


def test_sections_come_in_the_issue_order_each_with_a_two_line_reading(written):
    out, _, _, _ = written
    html_text = (out / "report.html").read_text(encoding="utf-8")
    ids = [a["id"] for tag, a in _tags(html_text) if tag == "section" and a.get("class") == "part"]
    assert ids == SECTION_IDS
    for key in SECTION_IDS:
        lines = _reading(html_text, key).split("<br>")
        assert len(lines) == 2 and all(len(line.strip()) > 20 for line in lines)
    md = (out / "report.md").read_text(encoding="utf-8")
    headings = re.findall(r"^## \d+\. (.+)$", md, re.M)
    assert headings == [title for _, title in report.SECTIONS]


def test_html_is_self_contained_with_unique_ids(written):
    out, _, _, _ = written
    html_text = (out / "report.html").read_text(encoding="utf-8")
    tags = _tags(html_text)
    names = [t for t, _ in tags]
    for forbidden in ("script", "img", "link", "iframe", "object", "embed", "image", "audio", "video"):
        assert forbidden not in names
    for tag, attrs in tags:
        for key in ("src", "href", "xlink:href"):
            if key in attrs:
                assert attrs[key].startswith("#"), (tag, attrs)  # only links inside the page
    assert "@import" not in html_text and "url(http" not in html_text and "@font-face" not in html_text
    ids = [a["id"] for _, a in tags if "id" in a]
    assert len(ids) == len(set(ids))
    # every in-page reference points at an existing id
    refs = {a[k][1:] for _, a in tags for k in ("href", "xlink:href") if k in a}
    refs |= set(re.findall(r"url\(#([^)]+)\)", html_text))
    assert refs <= set(ids)


def test_average_effect_table_shows_the_scorecard_numbers_and_verdicts(written):
    out, _, _, card = written
    md = (out / "report.md").read_text(encoding="utf-8")
    d = formatting.effect_decimals(card["study"]["margin"])
    for row in card["ate"]:
        b, dif = row["blind"], row["difference"]
        label = estimator_label(row["estimator"])
        line = next(l for l in md.splitlines() if l.startswith(f"| {label} | "))
        assert f"{b['estimate']:.{d}f} [{b['ci'][0]:.{d}f}, {b['ci'][1]:.{d}f}]" in line
        assert f"{dif['estimate']:.{d}f} [{dif['ci'][0]:.{d}f}, {dif['ci'][1]:.{d}f}]" in line
        adjusted = next(v["verdict_adjusted"] for v in card["verdicts"] if v["claim"] == f"ate.{row['estimator']}")
        raw_cell, adjusted_cell = line.rstrip(" |").split(" | ")[-2:]
        assert raw_cell == row["verdict"]
        assert adjusted_cell == ("—" if row.get("same_estimand") else adjusted)
    # the verdict words of the figure's right panel are the scorecard's adjusted verdicts, in order (the overlap
    # estimator: its raw verdict against the ATE, then its adjusted same-estimand verdict)
    svg = (out / "figures" / "average-effect.svg").read_text(encoding="utf-8")
    adjusted = {v["claim"]: v["verdict_adjusted"] for v in card["verdicts"]}
    expected = []
    for row in card["ate"]:
        claim = f"ate.{row['estimator']}"
        expected.append(row["verdict"] if row.get("same_estimand") else adjusted[claim])
        if row.get("same_estimand"):
            expected.append(adjusted[claim])
    words = re.findall(r">(equivalent|different|trivially different|indeterminate)<", svg)
    assert words == expected


def test_study_and_sites_tables_match_the_scorecard(written):
    out, _, _, card = written
    md = (out / "report.md").read_text(encoding="utf-8")
    d = formatting.effect_decimals(card["study"]["margin"])
    for site in card["sites"]:
        rows = [l for l in md.splitlines() if l.startswith(f"| {site['site']} | {site['n']} |")]
        assert len(rows) == 2  # the rates table and the per-site estimates table
        assert f"| {site['rate_realized']:.3f} |" in rows[0]
        assert f"| {site['difference_in_means']:.{d}f} | {site['se']:.{d}f} |" in rows[1]
    meta = card["heterogeneity"]
    assert f"| {meta['k']} | {meta['q']:.2f} | {meta['q_df']} |" in md
    html_text = (out / "report.html").read_text(encoding="utf-8")
    design = card["design_ate"]
    assert f"design-based pooled effect is {design['estimate']:.{d}f}" in _reading(html_text, "study")


@pytest.mark.parametrize("verdict, phrase", [
    ("equivalent", "lies within ±δ"),
    ("different", "equivalence within ±δ"),
    ("trivially different", "but by less than δ"),
    ("indeterminate", "too wide to tell"),
])
def test_average_reading_follows_the_verdict(verdict, phrase):
    claims, card = run_copy()
    aipw = next(r for r in card["ate"] if r["estimator"] == "aipw")
    next(r for r in card["verdicts"] if r["claim"] == "ate.aipw")["verdict_adjusted"] = verdict  # what is read
    section = sections_effects.average_section(RunView(claims, card))
    first, second = section.reading
    assert phrase in first and first.rstrip(".").endswith(verdict)
    d = formatting.effect_decimals(card["study"]["margin"])
    assert f"{aipw['difference']['estimate']:.{d}f}" in first
    assert f"{len(card['ate'])} blind estimators" in second


def test_overlap_reading_judges_the_calibration_slope():
    claims, card = run_copy()
    run = RunView(claims, card)
    slope = card["propensity"]["calibration_slope"]
    for ci, word in (([0.9, 1.1], "consistent with a calibrated"), ([0.3, 0.5], "too spread out"),
                     ([1.3, 1.6], "too compressed"), ([0.6, 0.8], "below 1 by dilution")):
        slope.update(estimate=sum(ci) / 2, ci=ci)
        assert word in sections_design.overlap_reading(run, claims["overlap"], card["propensity"])[1]


def test_absent_parts_say_not_run_and_draw_nothing():
    claims, card = run_copy()
    card["transport"] = None
    card["heterogeneity"] = None
    claims["data"]["has_cost"] = False
    card["rules"] = []
    doc = report.build_document(claims, card)
    html_text = doc.html()
    assert "Not run (transport is optional" in _section(html_text, "transport")
    assert "Meta-analysis not run" in _section(html_text, "sites")
    assert "Not run: the study has no cost column." in _section(html_text, "heterogeneity")
    assert "Not run: scorecard.json holds no &#x27;rules&#x27; entries." in _section(html_text, "rules")
    names = {f.name for f in doc.figures}
    assert "heterogeneity-cost" not in names and "rules-value" not in names
    forest = next(f for f in doc.figures if f.name == "sites-forest").svg
    assert "random-effects mean" not in forest and "prediction interval" not in forest


def test_optional_inputs_are_drawn_when_present():
    """ê histogram counts in the claims and design-based TOC/cost curves in the scorecard are drawn when given."""
    claims, card = run_copy()
    edges = np.linspace(0, 1, 21)
    e, w = small_run().units["e_raw"].to_numpy(), small_run().w
    claims["overlap"]["histogram"] = {"edges": edges.tolist(),
                                      "treated": np.histogram(e[w == 1], edges)[0].tolist(),
                                      "control": np.histogram(e[w == 0], edges)[0].tolist()}
    for row in card["cate"]:
        claimed = next(c for c in claims["cate"] if c["model"] == row["model"])
        row["autoc"]["curve"] = {"q": claimed["autoc"]["q"], "design": claimed["autoc"]["curve"]}
        row["cost_curve"] = {"x": claimed["cost_curve"]["x"],
                             "design": {"gain": claimed["cost_curve"]["gain"], "se": claimed["cost_curve"]["se"]}}
    doc = report.build_document(claims, card)
    names = {f.name for f in doc.figures}
    assert "overlap-histogram" in names and "overlap-quantiles" not in names
    toc = next(f for f in doc.figures if f.name == "heterogeneity-toc").svg
    assert "design-based (95 % band)" in toc
    assert "design-based TOC curves are not in this scorecard" not in doc.html()


def test_transport_section_lists_every_held_out_site():
    claims, card = run_copy()
    est = {"estimate": 0.2, "se": 0.1, "ci": [0.004, 0.396], "estimand": "AUTOC"}
    gain = {"treated_share": 0.5, "n": 500, "value": est, "gain": est}
    card["transport"] = {
        "method": "leave one site out", "min_site_units": 50, "n_boot": 50, "seed": 3, "workers": 1,
        "sites": [{"site": s["site"], "n": s["n"], "n_train": 1500 - s["n"], "known_rate": s["rate_declared"],
                   "autoc": {"r": est, "dr": est}, "autoc_in_sample": {"r": est, "dr": est},
                   "autoc_transported_minus_in_sample": {"r": est, "dr": est},
                   "rules": {"r.threshold": gain, "tree": gain}, "seconds": 1.0} for s in card["sites"]],
        "skipped": [],
    }
    section = sections_rules.transport_section(RunView(claims, card))
    md = section.markdown(7)
    for s in card["sites"]:
        assert f"| {s['site']} | r | {s['n']} | {1500 - s['n']} |" in md
    assert section.reading[0].startswith(f"{len(card['sites'])} sites were held out")
    assert f"{2 * len(card['sites'])} of {2 * len(card['sites'])} transported rankings" in section.reading[0]


def test_report_from_folder_rewrites_the_same_report(written, tmp_path):
    out, _, claims, card = written
    write_claims(Claims.from_dict(claims, small_run().units), tmp_path)
    atomic_write_json(tmp_path / "scorecard.json", card)
    paths = report.report_from_folder(tmp_path)
    assert paths["html"].read_bytes() == (out / "report.html").read_bytes()  # same inputs, same bytes
    assert paths["markdown"].read_bytes() == (out / "report.md").read_bytes()
    for svg in (out / "figures").glob("*.svg"):
        assert (tmp_path / "figures" / svg.name).read_bytes() == svg.read_bytes()


def test_pipeline_objects_give_the_same_report_as_the_files(written):
    """write_report receives the in-memory dicts (numpy scalars, NaN) from the pipeline and the JSON-read ones
    from `siteproof report`: both give the same document."""
    out, _, _, _ = written
    run = small_run()
    doc = report.build_document(copy.deepcopy(run.raw_claims), copy.deepcopy(run.raw_card))
    assert doc.html() == (out / "report.html").read_text(encoding="utf-8")


def test_report_from_folder_errors_say_how_to_fix(tmp_path, written):
    _, _, claims, card = written
    with pytest.raises(SiteproofError, match="siteproof blind"):
        report.report_from_folder(tmp_path)
    with pytest.raises(SiteproofError, match="not a folder"):
        report.report_from_folder(tmp_path / "missing")
    write_claims(Claims.from_dict(claims, small_run().units), tmp_path)
    with pytest.raises(SiteproofError, match="unmask"):
        report.report_from_folder(tmp_path)
    other = dict(card, study=dict(card["study"], fingerprint="0" * 64))
    atomic_write_json(tmp_path / "scorecard.json", other)
    with pytest.raises(SiteproofError, match="different data"):
        report.report_from_folder(tmp_path)
    (tmp_path / "scorecard.json").write_text("{not json", encoding="utf-8")
    with pytest.raises(SiteproofError, match="cannot read"):
        report.report_from_folder(tmp_path)


def test_number_formatting():
    assert formatting.effect_decimals(0.314) == 3 and formatting.effect_decimals(2.0) == 2 and formatting.effect_decimals(15.0) == 1
    assert formatting.fmt(None) == "—" and formatting.fmt(float("nan")) == "—" and formatting.fmt(1.23456, 2) == "1.23"
    assert formatting.fmt_p(0.0004) == "<0.001" and formatting.fmt_p(0.0421) == "0.042"
    assert formatting.fmt_ci([0.1, None]) == "—" and formatting.fmt_ci([-0.5, 0.25], 2) == "[-0.50, 0.25]"
