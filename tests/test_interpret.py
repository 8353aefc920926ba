"""One set of words and rules for every output: the terminal screens, the report and the scorecard headline
agree on verdicts, verdict counts, estimator labels and whether the propensity was recovered."""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from rich.console import Console

from siteproof.blind.claims import Claims
from siteproof.core import interpret
from siteproof.core.interpret import (
    DIFFERENT,
    EQUIVALENT,
    INDETERMINATE,
    RECOVERED,
    TRIVIALLY_DIFFERENT,
    calibration_judgement,
    claim_recovery,
    count_words,
    estimator_label,
    propensity_recovered,
)
from siteproof.reporting import report, sections_design
from siteproof.reporting.context import RunView
from siteproof.reporting.screens import claims_renderables, scorecard_renderables
from siteproof.unmask import correspondence
from siteproof.unmask.scoring import claim_verdicts, headline
from test_report import run_copy, small_run

CALIBRATED = ("consistent with a calibrated", "counts as calibrated")


def _screen_text(items: list) -> str:
    console = Console(width=400, record=True)
    for item in items:
        console.print(item)
    return console.export_text()


def _headline_classes(line: str) -> dict[str, str]:
    """The headline's classes ('recovered', ...) with the text listed under each."""
    body = line.split(" — ", 1)[1].rstrip(".")
    return dict(part.split(": ", 1) for part in body.split("; "))


def _cells(table, column: int) -> list[str]:
    """The plain text of one column of a rich table."""
    return [str(getattr(cell, "plain", cell)) for cell in table.columns[column]._cells]


def test_the_scoring_uses_the_verdict_names_of_interpret():
    assert correspondence.VERDICTS is interpret.VERDICTS
    assert set(interpret.VERDICT_ORDER) == set(interpret.VERDICTS) == set(interpret.VERDICT_MEANING)
    # Tryon & Lewis (2008): D = 0.5 with SE 0.1 against δ = 1 is significantly non-zero and inside the margin.
    assert correspondence.verdict(0.5, 0.1, 1.0) == TRIVIALLY_DIFFERENT
    assert correspondence.verdict(0.0, 2.0, 1.0) == INDETERMINATE


def test_claim_recovery_follows_the_verdict_classes():
    assert [claim_recovery(v) for v in (EQUIVALENT, TRIVIALLY_DIFFERENT, DIFFERENT, INDETERMINATE)] == [
        RECOVERED, RECOVERED, interpret.NOT_RECOVERED, INDETERMINATE]


def test_screen_and_report_show_the_same_average_effect_verdicts_and_labels():
    run = small_run()
    card = run.scorecard
    md = report.build_document(*run_copy()).markdown()
    # the scorecard screen's verdict column, row by row (each estimator, then its same-estimand comparison)
    screen_verdicts = _cells(scorecard_renderables(card)[2], 5)
    table = md[md.index("**Blind estimators against the pooled design-based effect"):]
    rows = [line for line in table.split("\n\n")[1].splitlines()[2:]]
    report_verdicts = [line.rstrip(" |").rsplit("| ", 1)[1] for line in rows]
    assert screen_verdicts == report_verdicts
    # the claims screen and the report name each estimator with the same label
    labels = _cells(claims_renderables(Claims.from_dict(run.claims, run.units))[1], 0)
    assert labels == [estimator_label(r["estimator"]) for r in run.claims["ate"]]
    for label in labels:
        assert f"\n| {label} | " in md


def test_summary_counts_are_the_verdicts_every_other_output_uses():
    """The report's summary counts what claim_verdicts (the CLI's --fail-on and the Monte Carlo) counts."""
    run = small_run()
    verdicts = claim_verdicts(run.scorecard)
    md = report.build_document(*run_copy()).markdown()
    for prefix, row in (("ATE ", "average effect (ATE estimators)"), ("CATE ", "effect rankings"),
                        ("rule ", "treatment rules")):
        words = [v for label, v in verdicts if label.startswith(prefix)]
        line = next(l for l in md.splitlines() if l.startswith(f"| {row}"))
        assert line.endswith(f"| {len(words)} | {count_words(words)} |")
    screen = _screen_text(scorecard_renderables(run.scorecard))
    for word in {v for _, v in verdicts}:
        assert word in screen


@pytest.mark.parametrize("slope, ci", [(1.0, (0.9, 1.1)), (0.95, (0.93, 0.97)), (1.08, (1.05, 1.11)),
                                       (0.5, (0.4, 0.6)), (1.5, (1.3, 1.7)), (0.85, (0.82, 0.88))])
def test_headline_screen_and_report_judge_the_propensity_alike(slope, ci):
    recovered = propensity_recovered(slope, ci)
    # the headline
    fake = SimpleNamespace(ate=[], cate=[], rules=[],
                           propensity=SimpleNamespace(calibration_slope=SimpleNamespace(estimate=slope, ci=ci)))
    line = headline(fake)
    assert ("the propensity" in _headline_classes(line)[RECOVERED if recovered else interpret.NOT_RECOVERED])
    # the report's overlap reading
    claims, card = run_copy()
    card["propensity"]["calibration_slope"].update(estimate=slope, ci=list(ci))
    reading = sections_design.overlap_reading(RunView(claims, card), claims["overlap"], card["propensity"])[1]
    assert any(word in reading for word in CALIBRATED) == recovered
    assert calibration_judgement(slope, ci) in reading


def test_the_screen_states_the_same_calibration_judgement_as_the_report():
    run = small_run()
    slope = run.scorecard.propensity.calibration_slope
    screen = " ".join(_screen_text(scorecard_renderables(run.scorecard)).split())
    assert calibration_judgement(slope.estimate, slope.ci) in screen
    html_text = report.build_document(*run_copy()).html()
    assert calibration_judgement(slope.estimate, slope.ci) in html_text


def test_headline_uses_the_verdict_names():
    rows = [SimpleNamespace(verdict=v) for v in (INDETERMINATE, EQUIVALENT, DIFFERENT)]
    comparison = SimpleNamespace(blind=1.0, design=1.2, verdict=INDETERMINATE)
    fake = SimpleNamespace(ate=[SimpleNamespace(estimator="aipw", comparison=comparison)], cate=rows, rules=[],
                           propensity=SimpleNamespace(calibration_slope=SimpleNamespace(estimate=float("nan"),
                                                                                        ci=(0.0, 0.0))))
    line = headline(fake)
    classes = list(_headline_classes(line))
    assert classes == [RECOVERED, interpret.NOT_RECOVERED, INDETERMINATE]
    assert f"{INDETERMINATE}: the average effect (blind {estimator_label('aipw')} 1 vs design 1.2), 1 of 3" in line
    assert "undetermined" not in line
    assert all(c in interpret.RECOVERY_CLASSES for c in classes)


def test_heterogeneity_statuses_of_the_scorecard_are_the_ones_the_outputs_explain():
    run = small_run()
    assert {interpret.heterogeneity_status(c, f) for c in (True, False) for f in (True, False)} == set(
        interpret.HETEROGENEITY_SHORT)
    for row in run.scorecard.cate:
        assert row.heterogeneity["status"] in interpret.HETEROGENEITY_MEANING
