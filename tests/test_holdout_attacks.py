"""The holdout benchmark against a determined student and a careless teacher.

One demo trial (n = 1500, shipped "demo" design), sorted by site as many source files are, is sealed once per
module with the default holdout share and linear key-side learners. The attacks: regenerating the seal from the
seed, submitting each unit's own IPW pseudo-outcome, editing the key, a broken file in a batch, a spreadsheet
formula as a name.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rich.console import Console
from sklearn.linear_model import RidgeCV

from siteproof.benchmark.holdout import (
    PUBLIC_DATA,
    grade_submissions,
    leaderboard_table,
    read_key,
    seal_benchmark,
    write_leaderboard,
)
from siteproof.benchmark.layout import DEFAULT_HOLDOUT_SHARE, spreadsheet_safe
from siteproof.benchmark.seal import _tokens
from siteproof.cli import main
from siteproof.core.errors import SiteproofError, SiteproofWarning
from siteproof.intake.study import StudySpec
from siteproof.simulation.simulate import simulate

N = 1500
SEED = 2026  # the default seed, the first one an attacker tries
LEARNERS = {"mu0": RidgeCV(), "mu1": RidgeCV()}
SECRET = hashlib.sha256(b"fixed secret of the attack tests").hexdigest()


def _spec(trial, path: Path) -> StudySpec:
    roles = trial.design.roles
    return StudySpec(data=path, outcome=roles.outcome, treatment=roles.treatment, site=roles.site, id=roles.id,
                     rates=dict(trial.rates), seed=SEED, name="sorted exam")


def _seal(spec: StudySpec, out: Path, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        return seal_benchmark(spec, out, learners=LEARNERS, **kwargs)


@pytest.fixture(scope="module")
def trial():
    return simulate("demo", n=N, seed=11)


@pytest.fixture(scope="module")
def bench(trial, tmp_path_factory):
    """The trial sorted by site, sealed with the default holdout share (row order confirmed)."""
    root = tmp_path_factory.mktemp("attack")
    trial.data.sort_values(trial.design.roles.site, kind="stable").to_csv(root / "sorted.csv", index=False)
    (root / "secret.txt").write_text(SECRET)
    spec = _spec(trial, root / "sorted.csv")
    result = _seal(spec, root / "bench", secret_file=root / "secret.txt", accept_row_order=True)
    public = pd.read_csv(root / "bench" / "public" / PUBLIC_DATA)
    return spec, result, public, root


def _write(folder: Path, name: str, tokens, tau=None, toml: str | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    frame = pd.DataFrame({"token": list(tokens)})
    if tau is not None:
        frame["tau_hat"] = tau
    path = folder / f"{name}.csv"
    frame.to_csv(path, index=False)
    if toml is not None:
        path.with_suffix(".toml").write_text(toml)
    return path


def _honest_tau(public: pd.DataFrame, spec: StudySpec) -> np.ndarray:
    """A T-learner a student can fit: ridge per arm on the published (train) units, predicted for every unit."""
    X = pd.get_dummies(public.drop(columns=["token", "part", spec.outcome, spec.treatment]), dtype=float)
    X = X.fillna(X.median()).to_numpy()
    train = (public["part"] == "train").to_numpy()
    y, w = public[spec.outcome].to_numpy(), public[spec.treatment].to_numpy()
    arms = [RidgeCV().fit(X[train & (w == a)], y[train & (w == a)]) for a in (0, 1)]
    return arms[1].predict(X) - arms[0].predict(X)


def _leaky_tau(public: pd.DataFrame, spec: StudySpec) -> np.ndarray:
    """Each unit's own outcome reused: τ̂ᵢ = yᵢ(wᵢ/p − (1−wᵢ)/(1−p)); units without a published outcome get the
    mean of the others (the student has nothing else for them)."""
    y, w = public[spec.outcome].to_numpy(dtype=float), public[spec.treatment].to_numpy(dtype=float)
    p = np.nanmean(w)
    tau = y * (w / p - (1 - w) / (1 - p))
    return np.where(np.isfinite(tau), tau, np.nanmean(tau))


# ─────────────────────────── undoing the seal ───────────────────────────


def test_the_seed_does_not_regenerate_the_tokens_or_the_order(bench):
    """The attack on a seed-driven seal: for each candidate seed, redraw the shuffle and the tokens as the
    sealing code would and look for the public tokens. With the secret, no candidate matches a single token."""
    _, result, public, _ = bench
    published = set(public["token"])
    candidates = [*range(100), SEED, result.seed]
    for seed in candidates:
        rng = np.random.default_rng(seed)
        rng.permutation(N)
        after_shuffle = set(_tokens(rng, N))
        direct = set(_tokens(np.random.default_rng(seed), N))
        assert not (after_shuffle | direct) & published, seed
    key = read_key(result.out_dir / "key")
    # the public order says nothing about the source order (sorted by site): audit of the sealed file
    public_rows = {r.column: r for r in result.audit.rows}
    assert public_rows["(row order)"].flagged and public_rows["(row order)"].decision.startswith("accepted")
    for name in ("(public row order)", "token (public file)", "part (public file)"):
        assert not public_rows[name].flagged, name
    # and the key's source row numbers are no longer monotone in the public order (sorted source, shuffled file)
    sites = key.units["site"].to_numpy()
    assert (sites[1:] != sites[:-1]).mean() > 0.5


def test_a_site_sorted_source_stops_sealing_until_confirmed(bench, tmp_path):
    spec, _, _, _ = bench
    with pytest.raises(SiteproofError, match="row order.*--accept-row-order"):
        _seal(spec, tmp_path / "refused")
    assert not (tmp_path / "refused" / "public").exists()


def test_sealing_twice_gives_different_public_files(bench, tmp_path):
    spec, result, public, _ = bench
    again = _seal(spec, tmp_path / "again", accept_row_order=True)
    assert again.public_sha256 != result.public_sha256
    assert len((tmp_path / "again" / "key" / "secret.txt").read_text().strip()) == 64


def test_seal_refuses_a_single_site(trial, tmp_path):
    roles = trial.design.roles
    one = trial.data[trial.data[roles.site] == trial.data[roles.site].iloc[0]]
    one.to_csv(tmp_path / "one.csv", index=False)
    spec = _spec(trial, tmp_path / "one.csv")
    site = one[roles.site].iloc[0]
    spec = replace(spec, rates={site: trial.rates[site]})
    with pytest.raises(SiteproofError, match="at least 2 sites"):
        _seal(spec, tmp_path / "one")


# ─────────────────────────── gaming the grade ───────────────────────────


def test_reusing_published_outcomes_cannot_beat_an_honest_model(bench, tmp_path):
    spec, result, public, _ = bench
    assert result.holdout_share == DEFAULT_HOLDOUT_SHARE and result.n_graded == round(DEFAULT_HOLDOUT_SHARE * N)
    key = read_key(result.out_dir / "key")
    order = pd.Index(public["token"]).get_indexer(key.tokens)
    _write(tmp_path, "leaky", key.tokens, _leaky_tau(public, spec)[order])
    _write(tmp_path, "honest", key.tokens, _honest_tau(public, spec)[order])
    board = grade_submissions(result.out_dir / "key", [tmp_path])
    by_name = {e.name: e for e in board.entries}
    assert [e.name for e in board.entries] == ["honest", "leaky"]
    assert by_name["leaky"].rank > by_name["honest"].rank  # behind, not tied
    # the leaky τ̂ is constant on the graded units: its AUTOC is exactly 0 (ties averaged)
    assert abs(by_name["leaky"].metrics["autoc"].estimate) < 1e-9
    assert board.graded_on == "held-out units"


def test_in_sample_grading_is_labelled(bench, tmp_path):
    spec, _, _, root = bench
    result = _seal(spec, tmp_path / "insample", holdout_share=0.0, secret_file=root / "secret.txt",
                   accept_row_order=True)
    key = read_key(result.out_dir / "key")
    public = pd.read_csv(tmp_path / "insample" / "public" / PUBLIC_DATA)
    y, w = public[spec.outcome].to_numpy(), public[spec.treatment].to_numpy()
    p = w.mean()
    leaky = pd.Series(y * (w / p - (1 - w) / (1 - p)), index=public["token"]).loc[key.tokens]
    _write(tmp_path / "subs", "leaky", key.tokens, leaky.to_numpy())
    honest = pd.Series(_honest_tau(public.assign(part="train"), spec), index=public["token"]).loc[key.tokens]
    _write(tmp_path / "subs", "honest", key.tokens, honest.to_numpy())
    board = grade_submissions(result.out_dir / "key", [tmp_path / "subs"])
    paths = write_leaderboard(board, tmp_path / "board")
    # what the holdout prevents: graded on its own published outcomes, the leaky submission comes first
    assert [e.name for e in board.entries] == ["leaky", "honest"] and board.entries[1].rank == 2
    assert board.graded_on == "published units (in-sample)"
    assert pd.read_csv(paths[0])["graded_on"].tolist() == ["published units (in-sample)"] * 2
    assert "in-sample" in paths[2].read_text(encoding="utf-8")


# ─────────────────────────── the key ───────────────────────────


def _edit_units(column: str, value: str):
    def edit(key: Path) -> None:
        units = pd.read_csv(key / "units.csv", dtype=str, keep_default_na=False)
        units.loc[3, column] = value
        units.to_csv(key / "units.csv", index=False, lineterminator="\n")
    return edit


def _edit_site_rate(key: Path) -> None:
    """Every unit of one site gets the rate 0.99: a consistent, valid-looking key, caught by its SHA-256."""
    units = pd.read_csv(key / "units.csv", dtype=str, keep_default_na=False)
    units.loc[units["site"] == units.loc[3, "site"], "rate"] = "0.99"
    units.to_csv(key / "units.csv", index=False, lineterminator="\n")


def _edit_meta(change):
    def edit(key: Path) -> None:
        meta = json.loads((key / "key.json").read_text())
        change(meta)
        (key / "key.json").write_text(json.dumps(meta, indent=2))
    return edit


@pytest.mark.parametrize("edit, message", [
    (_edit_units("rate", "0.99"), r"rate differs between units of one randomization cell"),
    (_edit_site_rate, r"units\.csv was changed after sealing"),
    (_edit_units("rate", "abc"), r"rate is 'abc' in row 5 .*not a rate in \(0, 1\)"),
    (_edit_units("rate", "1.5"), r"rate is '1\.5' .*not a rate in \(0, 1\)"),
    (_edit_units("site", "Renamed Site"), r"site is 'Renamed Site' .*not one of the 6 sites"),
    (_edit_units("y", "12.5"), r"units\.csv was changed after sealing"),
    (_edit_meta(lambda m: m.pop("design_ate")), r"has no 'design_ate' field"),
    (_edit_meta(lambda m: m.update(seed="2026")), r"seed is '2026', not a whole number"),
    (_edit_meta(lambda m: m["design_ate"].update(estimate=0.0)), r"key\.json was changed after sealing"),
    (_edit_meta(lambda m: m.update(public_sha256="0" * 64, benchmark_id="0" * 12)),
     r"key\.json was changed after sealing"),
    (_edit_meta(lambda m: m.update(key_sha256="f" * 64)), r"key\.json was changed after sealing"),
], ids=["rate", "site-rate", "rate-text", "rate-range", "site", "outcome", "no-design-ate", "text-seed", "design-ate",
        "public-hash", "key-hash"])
def test_a_changed_key_is_refused_with_an_error_naming_the_key(bench, tmp_path, edit, message):
    _, result, _, _ = bench
    key = tmp_path / "key"
    shutil.copytree(result.out_dir / "key", key)
    shutil.copytree(result.out_dir / "public", tmp_path / "public")
    read_key(key)  # the copy is intact
    edit(key)
    with pytest.raises(SiteproofError, match=message) as err:
        read_key(key)
    assert "benchmark key" in str(err.value) and "public" not in err.value.what


def test_a_changed_key_stops_grading_with_one_line_and_exit_2(bench, tmp_path, capsys):
    _, result, public, _ = bench
    key = tmp_path / "key"
    shutil.copytree(result.out_dir / "key", key)
    _edit_site_rate(key)
    sub = _write(tmp_path, "s", public["token"], np.zeros(N))
    code = main(["grade", str(key), str(sub), "--out", str(tmp_path / "board")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "units.csv was changed after sealing" in err
    assert not (tmp_path / "board").exists()


# ─────────────────────────── batches, outputs ───────────────────────────


def test_a_broken_file_is_listed_and_the_rest_graded(bench, tmp_path):
    spec, result, public, _ = bench
    key = read_key(result.out_dir / "key")
    folder = tmp_path / "subs"
    _write(folder, "alice", key.tokens, _honest_tau(public, spec))
    _write(folder, "bob", key.tokens, np.zeros(N), toml="[ate]\nestimate = 2.0\nse = 0.5\n")
    (folder / "carol.csv").write_bytes(b"token,tau_hat\n\xff\xfe,\x00\n")  # not UTF-8
    pd.DataFrame({"token": key.tokens, "tau": 1.0}).to_csv(folder / "dave.csv", index=False)  # misnamed column
    (folder / "erin.csv").write_text("token,tau_hat\nabc,1\ndef,1,2,3\n")  # a ragged row
    board = grade_submissions(result.out_dir / "key", [folder])
    by_file = {e.file: e for e in board.entries}
    assert [e.file for e in board.entries[-3:]] == ["carol.csv", "dave.csv", "erin.csv"]
    assert "cannot read submission erin.csv" in by_file["erin.csv"].problem
    assert by_file["alice.csv"].rank == 1 and by_file["bob.csv"].rank is not None
    assert "UTF-8" in by_file["carol.csv"].problem
    assert "'tau'" in by_file["dave.csv"].problem and "token, tau_hat, treat" in by_file["dave.csv"].problem
    frame = pd.read_csv(write_leaderboard(board, tmp_path / "board")[0], keep_default_na=False)
    broken = frame["file"].isin(["carol.csv", "dave.csv", "erin.csv"])
    assert (frame.loc[broken, "rank"] == "").all() and (frame.loc[broken, "problem"] != "").all()
    assert (frame.loc[~broken, "problem"] == "").all() and (frame.loc[~broken, "rank"] != "").all()


def test_answers_are_withheld_unless_shown(bench, tmp_path):
    _, result, public, _ = bench
    _write(tmp_path / "subs", "bob", public["token"], np.zeros(N), toml="[ate]\nestimate = 2.0\nse = 0.5\n")
    hidden = grade_submissions(result.out_dir / "key", [tmp_path / "subs"])
    paths = write_leaderboard(hidden, tmp_path / "hidden")
    data = json.loads(paths[1].read_text())
    assert data["design_ate"] is None and data["settings"]["withhold_answers"] is True
    assert data["submissions"][0]["metrics"]["ate_error"]["estimate"] is None
    assert data["submissions"][0]["ci_covers_design_ate"] is None
    row = pd.read_csv(paths[0], keep_default_na=False).iloc[0]
    assert row["ate_error"] == "" and row["ate_ci_covers"] == "" and float(row["ate_error_se"]) > 0
    error = hidden.entries[0].metrics["ate_error"].estimate  # kept in memory for the teacher
    texts = [p.read_text(encoding="utf-8") for p in paths]
    assert not any(f"{error:.3f}" in t or f"{2.0 - error:.3f}" in t for t in texts)

    code = main(["grade", str(result.out_dir / "key"), str(tmp_path / "subs"), "--out", str(tmp_path / "shown"),
                 "--show-answers"])
    data = json.loads((tmp_path / "shown" / "leaderboard.json").read_text())
    assert code == 0 and data["design_ate"]["estimate"] == pytest.approx(2.0 - error)
    assert data["submissions"][0]["metrics"]["ate_error"]["estimate"] == pytest.approx(error)


def test_names_cannot_inject_spreadsheet_formulas(bench, tmp_path):
    _, result, public, _ = bench
    _write(tmp_path / "subs", "=1+2", public["token"], np.zeros(N))
    _write(tmp_path / "subs", "x", public["token"], np.ones(N), toml='name = "@SUM(A1:A9)"\n')
    board = grade_submissions(result.out_dir / "key", [tmp_path / "subs"])
    text = write_leaderboard(board, tmp_path / "board")[0].read_text(encoding="utf-8")
    cells = [line.split(",")[0] for line in text.splitlines()[1:]]
    assert sorted(cells) == ["'=1+2", "'@SUM(A1:A9)"]
    for trigger in ("=", "+", "-", "@", "\t", "\r"):
        assert spreadsheet_safe(trigger + "x") == "'" + trigger + "x"
    assert spreadsheet_safe("alice") == "alice"
    frame = pd.read_csv(tmp_path / "board" / "leaderboard.csv")
    assert pd.api.types.is_float_dtype(frame["autoc"])  # only text cells are prefixed; numbers stay numbers


def test_terminal_leaderboard_fits_80_columns_without_breaking_words(bench, tmp_path):
    _, result, public, _ = bench
    folder = tmp_path / "subs"
    _write(folder, "a_rather_long_team_name_for_a_column", public["token"], np.arange(N, dtype=float),
           toml="[ate]\nestimate = 2.0\nse = 0.5\n")
    _write(folder, "constant", public["token"], np.zeros(N))
    pd.DataFrame({"token": public["token"], "tau_hat_v2": 0.0}).to_csv(folder / "typo.csv", index=False)
    board = grade_submissions(result.out_dir / "key", [folder])
    console = Console(width=80, record=True)
    console.print(leaderboard_table(board))
    text = console.export_text()
    assert max(len(line) for line in text.splitlines()) <= 80
    flat = " ".join(text.split())
    for entry in board.entries:  # every standing and problem appears with its words whole
        words = entry.problem if entry.problem else entry.standing
        assert " ".join(words.split()) in flat, entry.name
