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
from siteproof.unmask.verdicts import claim_verdicts, headline
from test_report import run_copy, small_run

def _screen_text(items: list) -> str:
    console = Console(width=400, record=True)
    for item in items:
        console.print(item)
    return console.export_text()


def _headline_classes(line: str) -> dict[str, str]:
    """The headline's classes ('recovered', ...) with the text listed under each."""
    body = line.split(" — ", 1)[1].split(". ", 1)[0].rstrip(".")
    return dict(part.split(": ", 1) for part in body.split("; "))


def _row(claim: str, verdict: str, ci: tuple[float, float] = (0.1, 0.5)) -> dict:
    """A verdicts-table row with what the headline reads."""
    return {"claim": claim, "verdict_adjusted": verdict, "blind": 1.0, "design": 1.2, "margin": 0.3,
            "difference": {"estimate": sum(ci) / 2, "ci": list(ci)}, "primary": claim == "ate.aipw"}


def _fake(rows: list[dict], slope: float = float("nan"), ci=(0.0, 0.0), deviations=(), bound: float = 0.01
          ) -> SimpleNamespace:
    return SimpleNamespace(verdicts=rows, plan={"deviations": list(deviations)},
                           propensity=SimpleNamespace(calibration_slope=SimpleNamespace(estimate=slope, ci=ci),
                                                      calibration_bound=bound))


def _cells(table, column: int) -> list[str]:
    """The plain text of one column of a rich table."""
    return [str(getattr(cell, "plain", cell)) for cell in table.columns[column]._cells]


def test_the_scoring_uses_the_verdict_names_of_interpret():
    used = (correspondence.EQUIVALENT, correspondence.DIFFERENT, correspondence.TRIVIALLY_DIFFERENT,
            correspondence.INDETERMINATE)
    assert all(a is b for a, b in zip(used, (interpret.EQUIVALENT, interpret.DIFFERENT,
                                             interpret.TRIVIALLY_DIFFERENT, interpret.INDETERMINATE)))
    assert set(interpret.VERDICT_ORDER) == set(interpret.VERDICTS) == set(interpret.VERDICT_MEANING)
    # Tryon & Lewis (2008): D = 0.5 with SE 0.1 against δ = 1 is significantly non-zero and inside the margin.
    assert correspondence.verdict(0.5, 0.1, 1.0) == TRIVIALLY_DIFFERENT
    assert correspondence.verdict(0.0, 2.0, 1.0) == INDETERMINATE


def test_claim_recovery_follows_the_verdict_classes():
    """`trivially different` is a real difference inside the margin: counted apart, never as recovered."""
    assert [claim_recovery(v) for v in (EQUIVALENT, TRIVIALLY_DIFFERENT, DIFFERENT, INDETERMINATE)] == [
        RECOVERED, interpret.BIASED_WITHIN_MARGIN, interpret.NOT_RECOVERED, INDETERMINATE]


def test_screen_and_report_show_the_same_average_effect_verdicts_and_labels():
    run = small_run()
    card = run.scorecard
    md = report.build_document(*run_copy()).markdown()
    # the scorecard screen's verdict column, row by row (each estimator, then its same-estimand comparison)
    table = md[md.index("**Blind estimators against the pooled design-based effect"):]
    rows = [line for line in table.split("\n\n")[1].splitlines()[2:]]
    # the screen's one verdict column holds the adjusted verdict (the raw one below it when they differ); the
    # report's last two columns hold the raw and the adjusted verdict
    expected = []
    for line in rows:
        raw, adjusted = line.rstrip(" |").split(" | ")[-2:]
        expected.append("— (ATO: next row)" if adjusted == "—" else adjusted if adjusted == raw
                        else f"{adjusted}\n(raw: {raw})")
    assert _cells(scorecard_renderables(card)[2], 5) == expected
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


@pytest.mark.parametrize("bound, slope, ci, recovered", [
    (0.02, 1.0, (0.9, 1.1), True), (0.02, 0.7, (0.6, 0.8), True), (0.08, 1.0, (0.9, 1.1), False),
    (0.02, 0.3, (0.2, 0.4), False), (0.05, 0.5, (0.5, 0.6), True), (0.02, 1.5, (1.3, 1.7), True)])
def test_headline_screen_and_report_judge_the_propensity_alike(bound, slope, ci, recovered):
    # the rule: calibration bound ≤ 0.05 and lower end of the slope's 95 % CI ≥ 0.5 (docs/methods-unmask.md §8)
    assert propensity_recovered(bound, ci) == recovered
    line = headline(_fake([], slope, ci, bound=bound))
    assert ("the propensity" in _headline_classes(line)[RECOVERED if recovered else interpret.NOT_RECOVERED])
    # the report's overlap reading states the same slope judgement
    claims, card = run_copy()
    card["propensity"]["calibration_slope"].update(estimate=slope, ci=list(ci))
    reading = sections_design.overlap_reading(RunView(claims, card), claims["overlap"], card["propensity"])[1]
    assert calibration_judgement(slope, ci) in reading


def test_the_screen_states_the_same_calibration_judgement_as_the_report():
    run = small_run()
    slope = run.scorecard.propensity.calibration_slope
    screen = " ".join(_screen_text(scorecard_renderables(run.scorecard)).split())
    assert calibration_judgement(slope.estimate, slope.ci) in screen
    html_text = report.build_document(*run_copy()).html()
    assert calibration_judgement(slope.estimate, slope.ci) in html_text


def test_headline_uses_the_verdict_names():
    rows = [_row("ate.aipw", INDETERMINATE, (-0.5, 0.1))]
    rows += [_row(f"cate.{m}.autoc", v) for m, v in (("t", INDETERMINATE), ("r", EQUIVALENT), ("dr", DIFFERENT))]
    rows.append(_row("cate.t.qini", DIFFERENT))  # only the AUTOC row is the model's headline claim
    line = headline(_fake(rows))
    classes = list(_headline_classes(line))
    assert classes == [RECOVERED, interpret.NOT_RECOVERED, INDETERMINATE]
    assert f"{INDETERMINATE}: the average effect (blind {estimator_label('aipw')} 1 vs design 1.2), 1 of 3" in line
    assert "undetermined" not in line
    assert all(c in interpret.RECOVERY_CLASSES for c in classes)


def test_headline_counts_trivially_different_apart_and_never_the_naive_reference():
    rows = [_row("ate.aipw", TRIVIALLY_DIFFERENT), _row("ate.naive", EQUIVALENT, (-0.2, 0.3)),
            _row("rule.t.top20", EQUIVALENT), _row("rule.t.top50", TRIVIALLY_DIFFERENT)]
    line = headline(_fake(rows))
    classes = _headline_classes(line)
    assert "the average effect" in classes[interpret.BIASED_WITHIN_MARGIN]
    assert classes[RECOVERED] == "1 of 2 rule gains"
    assert "naive" not in " ".join(classes.values())
    # the naive D's 95 % CI includes 0: the benchmark cannot discriminate, and the headline says so
    assert "cannot discriminate" in line


@pytest.mark.parametrize("naive, phrase", [
    (_row("ate.naive", DIFFERENT, (0.4, 0.9)), "can discriminate"),
    (_row("ate.naive", TRIVIALLY_DIFFERENT, (0.05, 0.2)), "cannot show an adjusted estimator beating it"),
    (_row("ate.naive", INDETERMINATE, (-0.1, 0.9)), "cannot discriminate"),
])
def test_headline_says_whether_the_benchmark_can_discriminate(naive, phrase):
    assert phrase in headline(_fake([_row("ate.aipw", EQUIVALENT), naive]))


def test_headline_names_a_deviation_from_the_plan():
    line = headline(_fake([_row("ate.aipw", EQUIVALENT)], deviations=[
        {"field": "margin", "planned": 1.0, "used": 2.0}]))
    assert "deviation from the locked plan (margin 1.0 → 2.0)" in line


def test_heterogeneity_statuses_of_the_scorecard_are_the_ones_the_outputs_explain():
    run = small_run()
    assert {interpret.heterogeneity_status(c, f) for c in (True, False) for f in (True, False)} == set(
        interpret.HETEROGENEITY_SHORT)
    for row in run.scorecard.cate:
        assert row.heterogeneity["status"] in interpret.HETEROGENEITY_MEANING
