"""Holdout benchmarks: leak audit, sealing, submission checks, design-based grading and the leaderboard.

One demo trial (n = 1500, the shipped "demo" design) is sealed once per module with linear learners, so the
default tests stay fast. Tolerances are theory-derived: a design-based metric is unbiased for the same metric
computed with the true unit effects, so the two must agree within 3 of its standard errors.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rich.console import Console
from sklearn.linear_model import RidgeCV

from siteproof.core.errors import SiteproofError, SiteproofWarning
from siteproof.blind.evaluation import rank_metric
from siteproof.benchmark.holdout import (
    PUBLIC_DATA,
    grade_submissions,
    leaderboard_html,
    leaderboard_table,
    read_key,
    read_submission,
    seal_benchmark,
    write_leaderboard,
)
from siteproof.benchmark.leakaudit import audit_columns, require_no_leaks
from siteproof.simulation.simulate import simulate
from siteproof.intake.study import StudySpec

N = 1500
SEED = 11
LEARNERS = {"mu0": RidgeCV(), "mu1": RidgeCV()}
SECRET = hashlib.sha256(b"a fixed sealing secret, so that the tests are reproducible").hexdigest()


# ─────────────────────────── fixtures ───────────────────────────


@pytest.fixture(scope="module")
def trial():
    return simulate("demo", n=N, seed=SEED)


def _spec(trial, path: Path, **kwargs) -> StudySpec:
    roles = trial.design.roles
    base = dict(data=path, outcome=roles.outcome, treatment=roles.treatment, site=roles.site, id=roles.id,
                rates=dict(trial.rates), seed=SEED, name="demo exam")
    base.update(kwargs)
    return StudySpec(**base)


def _seal(spec: StudySpec, out: Path, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        return seal_benchmark(spec, out, learners=LEARNERS, **kwargs)


@pytest.fixture(scope="module")
def sealed(trial, tmp_path_factory):
    """The demo trial sealed once (no cost role: coaching_cost is then an ordinary covariate)."""
    root = tmp_path_factory.mktemp("bench")
    trial.data.to_csv(root / "demo.csv", index=False)
    (root / "secret.txt").write_text(SECRET)
    spec = _spec(trial, root / "demo.csv")
    result = _seal(spec, root / "bench", secret_file=root / "secret.txt")
    return spec, result, root


def _write_sub(folder: Path, name: str, tokens, tau=None, treat=None, toml: str | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    cols = {"token": list(tokens)}
    if tau is not None:
        cols["tau_hat"] = tau
    if treat is not None:
        cols["treat"] = treat
    path = folder / f"{name}.csv"
    pd.DataFrame(cols).to_csv(path, index=False)
    if toml is not None:
        path.with_suffix(".toml").write_text(toml)
    return path


@pytest.fixture(scope="module")
def class_subs(sealed, trial):
    """Oracle (true τ, treat iff τ > 0, ATE = true mean τ), constant, random submissions."""
    _, result, root = sealed
    key = read_key(result.out_dir / "key")
    truth = trial.truth.set_index("id")
    tau = truth.loc[key.units["row_key"], "tau"].to_numpy()
    rng = np.random.default_rng(5)
    folder = root / "subs"
    toml = f'name = "oracle"\nbenchmark = "{key.benchmark_id}"\n[ate]\nestimate = {float(tau.mean())!r}\nse = 0.5\n'
    _write_sub(folder, "oracle_file", key.tokens, tau, (tau > 0).astype(int), toml)
    _write_sub(folder, "constant", key.tokens, np.full(tau.size, tau.mean()), np.ones(tau.size, dtype=int))
    _write_sub(folder, "random", key.tokens, rng.normal(size=tau.size), rng.integers(0, 2, tau.size))
    return folder, key, tau


# ─────────────────────────── leak audit ───────────────────────────


def _site_frame(n: int = 600, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    site = rng.choice(np.array(["Alder", "Birch", "Cedar", "Dogwood"]), size=n, p=[0.4, 0.3, 0.2, 0.1])
    shift = pd.Series(site).map({"Alder": 0.0, "Birch": 0.3, "Cedar": -0.3, "Dogwood": 0.5}).to_numpy()
    return pd.DataFrame({"site": site, "age": rng.normal(size=n) + shift, "noise": rng.normal(size=n)})


def test_audit_passes_ordinary_covariates_with_covariate_shift():
    frame = _site_frame()
    audit = audit_columns(frame, "site", ["age", "noise"], seed=1)
    assert not [r.column for r in audit.rows if r.flagged]
    require_no_leaks(audit)  # nothing to stop
    assert audit.majority_share == pytest.approx(frame["site"].value_counts(normalize=True).max())


def test_audit_flags_every_kind_of_site_leak():
    frame = _site_frame()
    rng = np.random.default_rng(2)
    frame["intake_code"] = [f"{s[0]}{rng.integers(10_000, 99_999)}" for s in frame["site"]]  # first letter = site's
    frame["clinic_no"] = frame["site"].map({"Alder": 3, "Birch": 7, "Cedar": 11, "Dogwood": 19})
    order = np.argsort(frame["site"].to_numpy(), kind="stable")
    block_ids = np.empty(len(frame), dtype=int)
    block_ids[order] = 1000 + np.arange(len(frame))  # ids handed out in one block per site
    frame["enrol_no"] = block_ids
    frame["is_dogwood"] = (frame["site"] == "Dogwood").astype(int)  # singles out one small site
    frame["referral"] = np.where(rng.random(len(frame)) < 0.03, "moved from " + frame["site"], "none")
    leaks = ["intake_code", "clinic_no", "enrol_no", "is_dogwood", "referral"]
    audit = audit_columns(frame, "site", ["age", *leaks], seed=1)
    flagged = {r.column: r for r in audit.rows if r.flagged}
    assert set(flagged) == set(leaks)
    assert flagged["intake_code"].identifier_like and flagged["intake_code"].accuracy == pytest.approx(1.0)
    assert flagged["enrol_no"].accuracy > 0.95
    assert flagged["is_dogwood"].sites_singled_out == 1 and flagged["is_dogwood"].name_has_site_label
    assert not flagged["clinic_no"].name_has_site_label
    assert flagged["referral"].rows_with_site_labels == int(frame["referral"].str.startswith("moved").sum())
    with pytest.raises(SiteproofError) as err:
        require_no_leaks(audit)
    line = err.value.one_line()
    assert "\n" not in line and all(name in line for name in leaks)


def test_sorted_row_order_stops_sealing_until_accepted():
    frame = _site_frame().sort_values("site", kind="stable").reset_index(drop=True)
    audit = audit_columns(frame, "site", ["noise"], seed=1)
    order = audit.rows[-1]
    assert order.column == "(row order)" and order.accuracy > 0.95
    assert order.flagged and order.decision == "unresolved"
    with pytest.raises(SiteproofError, match="--accept-row-order"):
        require_no_leaks(audit)
    accepted = audit_columns(frame, "site", ["noise"], seed=1, accept_row_order=True)
    assert accepted.rows[-1].decision.startswith("accepted")
    require_no_leaks(accepted)  # confirmed: the public rows are shuffled with a secret
    shuffled = audit_columns(frame.sample(frac=1.0, random_state=0), "site", ["noise"], seed=1)
    assert not shuffled.rows[-1].flagged


def test_audit_unknown_or_contradictory_columns_are_errors():
    frame = _site_frame()
    with pytest.raises(SiteproofError, match="unknown column"):
        audit_columns(frame, "site", ["agee"])
    with pytest.raises(SiteproofError, match="both kept and dropped"):
        audit_columns(frame, "site", ["age"], keep=["age"], drop=["age"])


# ─────────────────────────── sealing ───────────────────────────


def test_seal_stops_on_leaks_and_keep_or_drop_resolve_them(trial, tmp_path):
    data = trial.data.copy()
    rng = np.random.default_rng(3)
    data["intake_code"] = [f"{s[0]}-{rng.integers(1000, 9999)}" for s in data["branch"]]
    codes = {name: i + 1 for i, name in enumerate(sorted(data["branch"].unique()))}
    data["branch_code"] = data["branch"].map(codes)
    data.to_csv(tmp_path / "leaky.csv", index=False)
    spec = _spec(trial, tmp_path / "leaky.csv")
    with pytest.raises(SiteproofError) as err:
        _seal(spec, tmp_path / "stopped")
    assert "intake_code" in str(err.value) and "branch_code" in str(err.value)
    assert not (tmp_path / "stopped" / "public").exists()  # nothing is written when the audit stops sealing

    resolved = replace(spec, drop_columns=["intake_code"], keep_columns=["branch_code"])
    result = _seal(resolved, tmp_path / "bench")
    public = pd.read_csv(tmp_path / "bench" / "public" / PUBLIC_DATA)
    assert "branch_code" in public.columns and "intake_code" not in public.columns
    decisions = {r.column: r.decision for r in result.audit.rows}
    assert decisions["intake_code"] == "dropped" and decisions["branch_code"] == "kept (acknowledged)"
    audit_saved = pd.read_csv(tmp_path / "bench" / "key" / "leak_audit.csv")
    assert set(audit_saved["column"]) >= {"intake_code", "branch_code", "(row order)"}


def test_public_folder_holds_no_site_and_no_key(sealed, trial):
    spec, result, _ = sealed
    public_dir = result.out_dir / "public"
    assert sorted(p.name for p in public_dir.iterdir()) == [
        "data.csv", "submission_template.csv", "submission_template.toml", "task.md"]
    data = pd.read_csv(public_dir / PUBLIC_DATA, dtype=str, keep_default_na=False)
    assert spec.site not in data.columns and spec.id not in data.columns
    assert list(data.columns[:1]) == ["token"]
    labels = [str(s).lower() for s in trial.rates]
    for path in public_dir.iterdir():  # every cell of every public file, and the task sheet's text
        text = path.read_text(encoding="utf-8").lower()
        assert not [s for s in labels if s in text], path.name
    cells = data.to_numpy().ravel()
    assert not np.isin(cells, list(trial.rates)).any()
    ids = set(trial.data[spec.id].astype(str))
    assert not ids & set(cells)  # the original ids are gone too
    assert result.public_sha256 == hashlib.sha256((public_dir / PUBLIC_DATA).read_bytes()).hexdigest()
    key = read_key(result.out_dir / "key")
    assert list(key.units["token"]) == list(data["token"])  # the key follows the public row order
    sites_in_file_order = key.units["site"].to_numpy()
    assert (sites_in_file_order[1:] != sites_in_file_order[:-1]).mean() > 0.5  # rows are shuffled


def test_seal_is_reproduced_by_its_secret_and_not_by_its_seed(sealed, tmp_path):
    spec, result, _ = sealed
    secret = result.out_dir / "key" / "secret.txt"
    again = _seal(spec, tmp_path / "again", secret_file=secret)
    first = sorted(p for p in result.out_dir.rglob("*") if p.is_file())
    second = sorted(p for p in again.out_dir.rglob("*") if p.is_file())
    assert [p.relative_to(result.out_dir) for p in first] == [p.relative_to(again.out_dir) for p in second]
    for a, b in zip(first, second):
        assert a.read_bytes() == b.read_bytes(), a.name
    fresh = _seal(spec, tmp_path / "fresh")  # same table, same seed, new secret: another public file
    assert fresh.public_sha256 != result.public_sha256
    fresh_key, key = read_key(fresh.out_dir / "key"), read_key(result.out_dir / "key")
    assert not set(fresh_key.tokens) & set(key.tokens)
    # the seed still drives the statistics: the key-side outcome models are the same for every unit
    mu = key.units.set_index("row_key")[["mu0", "mu1"]].sort_index()
    fresh_mu = fresh_key.units.set_index("row_key")[["mu0", "mu1"]].sort_index()
    pd.testing.assert_frame_equal(mu, fresh_mu, rtol=1e-12, atol=1e-12)
    (tmp_path / "bad.txt").write_text("2026\n")
    with pytest.raises(SiteproofError, match="does not hold a sealing secret"):
        _seal(spec, tmp_path / "bad", secret_file=tmp_path / "bad.txt")


def test_seal_refuses_an_existing_benchmark_folder(sealed):
    spec, result, _ = sealed
    with pytest.raises(SiteproofError, match="already holds a benchmark"):
        seal_benchmark(spec, result.out_dir)


def test_holdout_share_hides_outcomes_of_graded_units_and_cost_is_published(sealed, trial, tmp_path):
    spec, _, _ = sealed
    spec = replace(spec, cost=trial.design.roles.cost)
    result = _seal(spec, tmp_path / "held", holdout_share=0.3)
    public = pd.read_csv(tmp_path / "held" / "public" / PUBLIC_DATA)
    key = read_key(tmp_path / "held" / "key")
    test_rows = (public["part"] == "test").to_numpy()
    assert result.n_graded == round(0.3 * N) == test_rows.sum()
    assert np.array_equal(test_rows, key.graded)
    assert public.loc[test_rows, [spec.outcome, spec.treatment]].isna().all().all()
    assert public.loc[~test_rows, [spec.outcome, spec.treatment]].notna().all().all()
    assert set(public[spec.treatment].dropna()) == {0, 1}
    assert result.published_columns[-1] == spec.cost and "coaching_cost" in (
        tmp_path / "held" / "public" / "task.md").read_text()
    source_cost = trial.data.set_index(spec.id).loc[key.units["row_key"], spec.cost].to_numpy()
    assert np.allclose(key.units["cost"], source_cost) and np.allclose(public[spec.cost], source_cost)
    everyone = _write_sub(tmp_path / "subs", "everyone", key.tokens, np.zeros(N), np.ones(N, dtype=int))
    board = grade_submissions(tmp_path / "held" / "key", [everyone], rank_by="rule_gain")
    assert board.n_graded == result.n_graded
    # treating everyone is what random allocation with share 1 does: the gain is 0, net of costs or not
    assert board.entries[0].metrics["rule_gain"].estimate == pytest.approx(0.0, abs=1e-12)


# ─────────────────────────── grading ───────────────────────────


def test_oracle_ranks_first_and_metrics_match_theory(sealed, class_subs):
    _, result, _ = sealed
    folder, key, tau = class_subs
    board = grade_submissions(result.out_dir / "key", [folder])
    names = [e.name for e in board.entries]
    assert names[0] == "oracle"
    oracle, rest = board.entries[0], board.entries[1:]
    assert oracle.rank == 1 and all(e.rank > 1 and e.tied_with != "oracle" for e in rest)

    graded = key.graded
    assert board.graded_on == "held-out units" and board.n_graded == graded.sum() == round(0.3 * N)
    # design-based AUTOC/Qini are unbiased for the same statistic computed with the true effects as scores
    for kind in ("autoc", "qini"):
        infeasible = float(rank_metric(tau[graded], tau[graded], kind=kind, n_boot=2).estimate[0])
        est = oracle.metrics[kind]
        assert abs(est.estimate - infeasible) < 3 * est.se, kind
    # BLP β₂ of the true CATE is 1; of pure noise 0
    assert abs(oracle.metrics["blp_beta2"].estimate - 1.0) < 3 * oracle.metrics["blp_beta2"].se
    random = next(e for e in board.entries if e.name == "random")
    assert abs(random.metrics["blp_beta2"].estimate) < 3 * random.metrics["blp_beta2"].se
    # a constant ranking has AUTOC exactly 0; treating everyone gains exactly 0 over random allocation
    constant = next(e for e in board.entries if e.name == "constant")
    assert abs(constant.metrics["autoc"].estimate) < 1e-9
    assert constant.metrics["rule_gain"].estimate == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(constant.metrics["blp_beta2"].estimate)
    # ATE error: submitted value minus the design ATE of the graded units; SE from the per-unit differences
    # d = â − Γ + (τ̂ − mean τ̂), here with τ̂ = τ: sd(Γ − τ)/√n, below the reference's own sd(Γ)/√n
    design = board.design_ate
    gamma = design.scores
    d = tau.mean() - gamma + (tau[graded] - tau[graded].mean())
    assert oracle.metrics["ate_error"].estimate == pytest.approx(tau.mean() - design.estimate, abs=1e-12)
    assert oracle.metrics["ate_error"].se == pytest.approx(d.std(ddof=1) / np.sqrt(d.size), rel=1e-12)
    assert oracle.metrics["ate_error"].se < design.se
    assert abs(design.estimate - tau[graded].mean()) < 3 * design.se  # unbiased for the graded units' ATE
    assert oracle.ci_covers == (tau.mean() - 1.96 * 0.5 <= design.estimate <= tau.mean() + 1.96 * 0.5)

    by_rule = grade_submissions(result.out_dir / "key", [folder], rank_by="rule_gain")
    assert by_rule.entries[0].name == "oracle" and by_rule.entries[0].metrics["rule_gain"].estimate > 0


def test_identical_submissions_are_tied_and_share_a_rank(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    folder, key, tau = class_subs
    twin = _write_sub(tmp_path, "twin", key.tokens, tau)
    board = grade_submissions(result.out_dir / "key", [folder / "oracle_file.csv", twin])
    first, second = board.entries
    assert first.rank == second.rank == 1
    assert second.tied_with == first.name and "tied with" in second.standing
    assert board.to_frame()["rank"].tolist() == [1, 1]


def test_unranked_when_the_metric_is_missing(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    folder, key, tau = class_subs
    rule_only = _write_sub(tmp_path, "rule_only", key.tokens, treat=(tau > 0).astype(int))
    board = grade_submissions(result.out_dir / "key", [folder / "random.csv", rule_only])
    last = board.entries[-1]
    assert last.name == "rule_only" and last.rank is None and last.standing == "not ranked: no tau_hat column"


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda f: f.iloc[1:], "misses 1 of"),
        (lambda f: pd.concat([f, f.iloc[[0]]]), "more than once"),
        (lambda f: f.assign(token="zz" + f["token"]), "another public file"),
        (lambda f: f.assign(tau_hat=f["tau_hat"].where(f.index != 3, np.inf)), "not a finite number"),
        (lambda f: f.assign(treat=f["treat"].where(f.index != 3, 2)), "not 0 or 1"),
        (lambda f: f.rename(columns={"token": "id"}), "no 'token' column"),
        (lambda f: f[["token"]], "neither a 'tau_hat' nor a 'treat'"),
        (lambda f: f.rename(columns={"treat": "treatment"}), "'treatment' that is not recognised.*token, tau_hat"),
    ],
)
def test_bad_submissions_are_refused(sealed, class_subs, tmp_path, edit, message):
    _, result, _ = sealed
    folder, _, _ = class_subs
    frame = edit(pd.read_csv(folder / "random.csv", dtype={"token": str}))
    bad = tmp_path / "bad.csv"
    frame.to_csv(bad, index=False)
    key = read_key(result.out_dir / "key")
    with pytest.raises(SiteproofError, match=message) as err:
        read_submission(bad, key)
    assert "bad.csv" in str(err.value)
    board = grade_submissions(result.out_dir / "key", [bad])  # in a batch: listed, not graded, with the reason
    entry = board.entries[0]
    assert entry.rank is None and not entry.metrics and entry.problem == " ".join(str(err.value).split())


def test_submission_toml_for_another_benchmark_is_refused(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    folder, key, tau = class_subs
    _write_sub(tmp_path, "mine", key.tokens, tau, toml='benchmark = "000000000000"\n[ate]\nestimate = 1.0\nse = 0.1\n')
    with pytest.raises(SiteproofError, match="made for benchmark"):
        read_submission(tmp_path / "mine.csv", key)


def test_tampered_public_file_is_detected(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    folder, _, _ = class_subs
    copy = tmp_path / PUBLIC_DATA
    original = (result.out_dir / "public" / PUBLIC_DATA).read_bytes()
    copy.write_bytes(original.replace(b",", b";", 1))
    with pytest.raises(SiteproofError, match="changed after sealing"):
        grade_submissions(result.out_dir / "key", [folder], public_data=copy)
    board = grade_submissions(result.out_dir / "key", [folder])  # the untouched file beside the key passes
    assert "matches the sealed SHA-256" in board.public_check


def test_grading_outputs_name_no_site_unless_revealed(sealed, class_subs, tmp_path, trial):
    _, result, _ = sealed
    folder, _, _ = class_subs
    labels = [s.lower() for s in trial.rates]
    hidden = grade_submissions(result.out_dir / "key", [folder])
    paths = write_leaderboard(hidden, tmp_path / "hidden")
    console = Console(width=250, record=True)
    console.print(leaderboard_table(hidden))
    texts = [p.read_text(encoding="utf-8").lower() for p in paths] + [console.export_text().lower()]
    assert [p.name for p in paths] == ["leaderboard.csv", "leaderboard.json", "leaderboard.html"]
    assert not any(label in text for label in labels for text in texts)
    frame = pd.read_csv(paths[0])
    assert {"submission", "rank", "autoc", "autoc_se", "rule_gain_se", "ate_error"} <= set(frame.columns)

    shown = grade_submissions(result.out_dir / "key", [folder], reveal=True)
    html = leaderboard_html(shown).lower()
    assert all(label in html for label in labels)
    revealed = write_leaderboard(shown, tmp_path / "shown")
    assert revealed[-1].name == "sites.csv"
    with pytest.raises(SiteproofError, match="already holds a leaderboard"):
        write_leaderboard(shown, tmp_path / "shown")


def test_grading_is_reproducible(sealed, class_subs):
    _, result, _ = sealed
    folder, _, _ = class_subs
    a = grade_submissions(result.out_dir / "key", [folder]).to_frame()
    b = grade_submissions(result.out_dir / "key", [folder]).to_frame()
    pd.testing.assert_frame_equal(a, b)


def test_unknown_rank_metric_and_missing_key(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    folder, _, _ = class_subs
    with pytest.raises(SiteproofError, match="unknown ranking metric"):
        grade_submissions(result.out_dir / "key", [folder], rank_by="accuracy")
    with pytest.raises(SiteproofError, match="not a benchmark key folder"):
        grade_submissions(tmp_path, [folder])


def test_rank_by_ate_error_uses_absolute_error_and_paired_ties(sealed, class_subs, tmp_path):
    _, result, _ = sealed
    _, key, tau = class_subs
    probe = _write_sub(tmp_path / "probe", "probe", key.tokens, tau, toml="[ate]\nestimate = 0.0\nse = 1.0\n")
    first = grade_submissions(result.out_dir / "key", [probe]).entries[0]
    d, se = -first.metrics["ate_error"].estimate, first.metrics["ate_error"].se  # design ATE and the error's SE
    for name, shift in (("close_above", 0.1), ("close_below", -0.2), ("far", 5.0)):
        _write_sub(tmp_path, name, key.tokens, tau, toml=f"[ate]\nestimate = {d + shift * se!r}\nse = {se!r}\n")
    board = grade_submissions(result.out_dir / "key", [tmp_path], rank_by="ate_error", withhold_answers=False)
    by_name = {e.name: e for e in board.entries}
    assert [e.name for e in board.entries] == ["close_above", "close_below", "far"]
    # |0.1·SE| vs |0.2·SE| differ by far less than the reference's own uncertainty: tied
    assert by_name["close_below"].rank == 1 and by_name["close_below"].tied_with == "close_above"
    # 4.9 SEs further away: behind, with its own rank
    assert by_name["far"].rank == 3 and by_name["far"].tied_with is None
    assert by_name["far"].metrics["ate_error"].estimate == pytest.approx(5.0 * se, rel=1e-9)
    assert by_name["far"].ci_covers is False and by_name["close_above"].ci_covers is True
