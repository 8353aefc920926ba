"""The locked plan, the margins of each claim family, the multiplicity adjustment and the verdicts table.

Blind runs use the linear learners of ``test_unmask`` (fast, deterministic); the demo check runs the shipped
demo's nuisances (default learners, demo seed) with the CATE models left out, which changes no ATE figure.
"""

from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from conftest import SMALL_RATES, small_trial
from siteproof.blind.analysis import BlindConfig, run_blind
from siteproof.blind.claims import Claims
from siteproof.blind.plan import capped_margin, family_of, plan_sha256, residual_sd
from siteproof.core.errors import SiteproofError
from siteproof.core.interpret import (
    ATE_MARGIN_SD_SHARE,
    CLAIM_SHARE,
    DIFFERENT,
    EQUIVALENT,
    RECOVERED,
    TRIVIALLY_DIFFERENT,
    claim_recovery,
)
from siteproof.intake.study import StudySpec, load_study
from siteproof.pipeline import DEMO_SEED, run_pipeline, write_demo_data
from siteproof.unmask.correspondence import compare
from siteproof.unmask.multiplicity import adjust, benjamini_hochberg, holm
from siteproof.unmask.scoring import run_unmask
from siteproof.unmask.verdicts import ROW_KEYS, failing_claims
from test_unmask import SPEC, linear_config, site_learner, unmasked


@pytest.fixture(scope="module")
def run():
    return unmasked(small_trial(n=1200, seed=7), linear_config())


# ----------------------------------------------------------------------------------------------- multiplicity
P_VALUES = [0.01, 0.04, 0.03, 0.005, 0.2, 0.04, 0.9, 0.0001]


@pytest.mark.parametrize("method, reference", [("holm", "holm"), ("bh", "fdr_bh")])
def test_adjusted_p_values_match_statsmodels(method, reference):
    # source: statsmodels.stats.multitest.multipletests (Holm 1979; Benjamini & Hochberg 1995)
    expected = multipletests(P_VALUES, method=reference)[1]
    np.testing.assert_allclose(adjust(P_VALUES, method), expected, rtol=1e-12)


def test_nan_p_values_stay_out_of_the_family():
    # a test that could not run is not counted in m (source for the finite ones: statsmodels multipletests)
    p = [0.01, math.nan, 0.04]
    np.testing.assert_allclose(holm(p)[[0, 2]], multipletests([0.01, 0.04], method="holm")[1], rtol=1e-12)
    assert math.isnan(benjamini_hochberg(p)[1])
    with pytest.raises(SiteproofError):
        adjust(p, "bonferroni-ish")


# ------------------------------------------------------------------------------------------------ the plan
def test_the_plan_is_locked_with_the_sha256_of_its_canonical_json(run):
    _, claims, card = run
    plan = claims.to_dict()["plan"]
    body = {k: v for k, v in plan.items() if k != "sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert plan["sha256"] == hashlib.sha256(text.encode("utf-8")).hexdigest() == plan_sha256(plan)
    assert plan["alpha"] == 0.05 and plan["multiplicity"] == "holm" and plan["primary"] == ["ate.aipw"]
    assert card.plan["sha256"] == plan["sha256"] and card.plan["deviations"] == []
    assert card.plan["margins"]["ate"] == pytest.approx(card.margin)


def test_an_edited_or_missing_plan_is_refused(run):
    study, claims, _ = run
    record = json.loads(json.dumps(claims.to_dict()))
    record["plan"]["margins"]["ate"] *= 3
    with pytest.raises(SiteproofError, match="does not match its SHA-256"):
        run_unmask(study, record, claims.units)
    older = {k: v for k, v in claims.to_dict().items() if k != "plan"}
    with pytest.raises(SiteproofError, match="no locked analysis plan"):
        run_unmask(study, older, claims.units)
    with pytest.raises(SiteproofError, match="version 1"):
        Claims.from_dict({**claims.to_dict(), "version": 1}, claims.units)


def test_another_margin_alpha_or_method_needs_a_declared_deviation(run):
    study, claims, card = run
    for change in ({"margin": 2 * card.margin}, {"alpha": 0.01}, {"multiplicity": "bh"}):
        with pytest.raises(SiteproofError, match="locked analysis plan"):
            run_unmask(study, claims, site_learner=site_learner(), **change)
    same = run_unmask(study, claims, site_learner=site_learner(), margin=card.margin)  # = the plan: no deviation
    assert same.plan["deviations"] == []
    moved = run_unmask(study, claims, site_learner=site_learner(), margin=2 * card.margin, multiplicity="bh",
                       deviate_from_plan=True)
    fields = {d["field"]: d for d in moved.plan["deviations"]}
    assert fields["margin"]["planned"] == pytest.approx(card.margin) and fields["margin"]["used"] == 2 * card.margin
    assert fields["multiplicity"]["used"] == "bh" and moved.plan["multiplicity"] == "bh"
    assert "deviation from the locked plan" in moved.headline
    aipw = next(r for r in moved.verdicts if r["claim"] == "ate.aipw")
    assert aipw["margin"] == pytest.approx(2 * card.margin)


def test_the_ate_margin_is_a_tenth_of_the_pooled_within_arm_residual_sd(run):
    study, claims, card = run
    u, y, w = claims.units, study.blind.y, study.blind.w.astype(bool)
    r = y - np.where(w, u["mu1"], u["mu0"])
    pooled = ((w.sum() - 1) * r[w].var(ddof=1) + ((~w).sum() - 1) * r[~w].var(ddof=1)) / (y.size - 2)
    assert card.margin == pytest.approx(ATE_MARGIN_SD_SHARE * math.sqrt(pooled), rel=1e-12)


def test_the_residual_sd_does_not_grow_with_the_confounded_arm_difference():
    """SD(Y) grows with an arm difference (effect or confounding); the within-arm residual SD does not."""
    rng = np.random.default_rng(0)
    n = 4000
    w = rng.integers(0, 2, n)
    x = rng.normal(size=n)
    noise = rng.normal(size=n)
    mu = 2 * x
    for shift in (0.0, 5.0):
        y = mu + shift * w + noise
        assert residual_sd(y, w, mu, mu + shift) == pytest.approx(np.sqrt(np.sum((noise - noise.mean()) ** 2) / (n - 2)),
                                                                  rel=0.01)
    assert np.std(mu + 5 * w + noise) > 1.5 * np.std(mu + noise)


def test_every_row_uses_the_margin_of_its_family(run):
    _, claims, card = run
    delta, record = card.margin, claims.to_dict()
    rows = {r["claim"]: r for r in card.verdicts}
    for rule in record["rules"]:
        expected = capped_margin(delta, rule["gain"]["estimate"]) if 0 < rule["treated_share"] < 1 else delta
        assert rows[f"rule.{rule['rule']}"]["margin"] == pytest.approx(expected)
    for model in record["cate"][1:]:
        m = model["model"]
        assert rows[f"cate.{m}.autoc"]["margin"] == pytest.approx(min(delta, CLAIM_SHARE * abs(model["autoc"]["estimate"])))
        assert rows[f"cate.{m}.gate1"]["margin"] == pytest.approx(delta)
        assert rows[f"cate.{m}.beta2"]["margin"] == pytest.approx(card.plan["margins"]["beta2"])
    assert all(rows[f"ate.{a['estimator']}"]["margin"] == pytest.approx(delta) for a in record["ate"])


@pytest.mark.parametrize("gain", [0.05, 0.4, 1.3, 8.0])
@pytest.mark.parametrize("se", [1e-4, 0.05, 0.5])
def test_a_rule_gain_that_misses_its_whole_design_gain_is_never_recovered(gain, se):
    """Blind gain ĝ, design gain 0: |D| = ĝ ≥ the margin min(δ, ĝ/2), so the TOST p-value is ≥ 1/2 and the claim
    can never be equivalent (Schuirmann 1987), whatever the SE or the ATE-family δ."""
    for delta in (0.1, 1.0, 10.0):
        c = compare(blind=gain, design=0.0, se_difference=se, margin=capped_margin(delta, gain))
        assert c.p_equivalence >= 0.5 and claim_recovery(c.verdict) != RECOVERED
        assert c.verdict not in (EQUIVALENT, TRIVIALLY_DIFFERENT)


# ------------------------------------------------------------------------------------------- the table
def test_the_verdicts_table_is_adjusted_within_each_family(run):
    _, _, card = run
    rows = card.verdicts
    assert all(tuple(r)[: len(ROW_KEYS)] == ROW_KEYS for r in rows)
    assert {family_of(r["claim"]) == r["family"] for r in rows} == {True}
    naive = next(r for r in rows if r["claim"] == "ate.naive")
    assert naive["family"] == "reference" and not naive["primary"]
    assert naive["p_difference_adjusted"] == naive["p_difference"]  # the reference is never adjusted
    primary = [r for r in rows if r["primary"]]
    assert [r["claim"] for r in primary] == ["ate.aipw"]  # a family of one: tested at the full α
    assert primary[0]["p_difference_adjusted"] == primary[0]["p_difference"]
    for family in {r["family"] for r in rows} - {"reference"}:
        members = [r for r in rows if r["family"] == family and not r["primary"]]
        for key in ("p_difference", "p_equivalence"):
            # source: statsmodels.stats.multitest.multipletests, Holm (the plan's default)
            expected = multipletests([m[key] for m in members], method="holm")[1]
            np.testing.assert_allclose([m[f"{key}_adjusted"] for m in members], expected, rtol=1e-12)
        for m in members:
            assert m["verdict_adjusted"] == verdict_from(m)
    pbr = next(r for r in rows if r["claim"] == "ate.aipw")["percent_bias_reduction"]
    assert pbr["ci"][0] <= pbr["estimate"] <= pbr["ci"][1] and isinstance(pbr["meaningful"], bool)


def verdict_from(row: dict) -> str:
    """Tryon & Lewis (2008) classes from the adjusted p-values at α = 0.05, written out here."""
    different, equivalent = row["p_difference_adjusted"] < 0.05, row["p_equivalence_adjusted"] < 0.05
    return {(True, True): "trivially different", (True, False): "different", (False, True): "equivalent",
            (False, False): "indeterminate"}[(different, equivalent)]


def test_bh_on_request_is_locked_in_the_plan():
    study, claims, card = unmasked(small_trial(n=600, seed=2), linear_config(
        multiplicity="bh", models=("constant",), budgets=(), tree=False, n_boot=20))
    assert claims.to_dict()["plan"]["multiplicity"] == "bh" and card.plan["multiplicity"] == "bh"
    ate = [r for r in card.verdicts if r["family"] == "ate" and not r["primary"]]
    # source: statsmodels.stats.multitest.multipletests, fdr_bh
    np.testing.assert_allclose([r["p_difference_adjusted"] for r in ate],
                               multipletests([r["p_difference"] for r in ate], method="fdr_bh")[1], rtol=1e-12)


def test_fail_on_acts_on_adjusted_verdicts_of_primary_claims_only(run):
    _, _, card = run
    rows = [dict(r) for r in card.verdicts]
    for r in rows:
        r["verdict_adjusted"] = DIFFERENT if r["claim"] in ("ate.naive", "rule.t.top20") else EQUIVALENT
    fake = type("Card", (), {"verdicts": rows})()
    assert failing_claims(fake) == []  # naive is a reference, the rule is not primary
    rows[[r["claim"] for r in rows].index("ate.aipw")]["verdict_adjusted"] = DIFFERENT
    assert failing_claims(fake) == ["ate.aipw"]


def test_a_primary_claim_must_exist():
    frame = small_trial(n=400, seed=3)
    study = load_study(StudySpec(**dict(SPEC, rates=SMALL_RATES)), frame=frame)
    config = linear_config(primary=("ate.nothing",), models=("constant",), budgets=(), tree=False, n_boot=20)
    with pytest.raises(SiteproofError, match="primary claim"):
        run_blind(study, config)


# ------------------------------------------------------------------------------------------ the shipped demo
def test_on_the_shipped_demo_the_naive_estimate_is_not_recovered(tmp_path):
    """`siteproof demo` (demo design, demo seed, default nuisance learners): the naive difference in means has a
    real bias, so by the default plan it must not count as recovered, and δ is below 0.1 × SD(outcome)."""
    spec = write_demo_data("demo", tmp_path)
    config = BlindConfig(seed=DEMO_SEED, models=("constant",), budgets=(), tree=False, n_boot=20)
    card = run_pipeline(spec, None, config, report=False).scorecard
    naive = next(r for r in card.verdicts if r["claim"] == "ate.naive")
    assert claim_recovery(naive["verdict_adjusted"]) != RECOVERED
    assert naive["difference"]["ci"][0] > 0  # detectably biased upward
    assert card.margin < 0.1 * card.study["outcome_sd"]
    assert "naive" not in card.headline.split(" — ", 1)[1].split(". ", 1)[0]


def test_the_demo_summary_says_what_each_scenario_was_built_to_show(tmp_path):
    """The closing lines of `siteproof demo`: the scenario built to hold has no primary claim `different`, the one
    built to break (hidden branch effect) has — by the primary claims' adjusted verdicts of each scorecard."""
    from siteproof.pipeline import PipelineResult, demo_summary

    results = []
    for design in ("demo", "hidden_branch"):
        folder = tmp_path / design
        folder.mkdir()
        spec = write_demo_data(design, folder)
        config = BlindConfig(seed=DEMO_SEED, models=("constant",), budgets=(), tree=False, n_boot=20)
        results.append(run_pipeline(spec, None, config, report=False))
    assert all(isinstance(r, PipelineResult) for r in results)
    hold, broken = demo_summary(results)
    assert hold.startswith("built to hold (demo") and hold.endswith("as expected.") and "NOT" not in hold
    assert broken.startswith("built to break (hidden_branch") and broken.endswith("caught as expected.")
    primary = next(r for r in results[1].scorecard.verdicts if r["primary"])
    assert f"{primary['claim']} {primary['verdict_adjusted']}" in broken
