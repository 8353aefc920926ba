"""The exit-status contract of the command line (docs/cli.md), case by case.

0 success, 1 only for a `--fail-on` finding, 2 a user mistake with one line `error: <what> — <how to fix>`
(warnings after it), 3 an internal error naming a log file, 130 Ctrl-C; no traceback ever; checks run before
any model is fitted; outputs are published whole or not at all; Monte Carlo parts are verified on resume.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import small_trial

from siteproof import pipeline
from siteproof.cli import main
from siteproof.core.outputs import MANIFEST_FILE, RETIRED_PREFIX, STAGING_PREFIX
from siteproof.simulation import montecarlo

ROLES = ["--outcome", "score", "--treatment", "treated", "--site", "site", "--id", "uid"]
FAST = ["--folds", "2", "--models", "constant"]


def run_cli(args: list[str], capsys) -> tuple[int, list[str], str]:
    """Exit status, the non-empty stderr lines and stdout of one in-process command."""
    code = main([str(a) for a in args])
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert "Traceback" not in captured.err and "Traceback" not in captured.out
    return code, lines, captured.out


def assert_user_error(code: int, lines: list[str], *fragments: str) -> None:
    """Exit 2 and exactly one error line first (`error: what — fix`), only warnings after it."""
    assert code == 2, lines
    assert lines and lines[0].startswith("error: ") and " — " in lines[0], lines
    assert all(line.startswith("warning: ") for line in lines[1:]), lines
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])


def no_scratch_left(folder: Path) -> bool:
    return not [p for p in folder.iterdir() if p.name.startswith((STAGING_PREFIX, RETIRED_PREFIX))
                or p.name.endswith(".partial")]


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict[str, Path]:
    """A small trial (CSV), one finished `run` folder and a sealed benchmark, shared by the cases."""
    folder = tmp_path_factory.mktemp("contract")
    data = folder / "trial.csv"
    small_trial(n=300, seed=3).to_csv(data, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["run", str(data), *ROLES, *FAST, "--out", str(folder / "run")]) == 0
        assert main(["seal", str(data), *ROLES, "--out", str(folder / "bench")]) == 0
    public = pd.read_csv(folder / "bench" / "public" / "data.csv")
    token = public.columns[0]
    pd.DataFrame({token: public[token], "tau_hat": public["x2"]}).to_csv(folder / "sub.csv", index=False)
    return {"folder": folder, "data": data, "run": folder / "run", "bench": folder / "bench",
            "sub": folder / "sub.csv"}


def variant(files, tmp_path: Path, change, name: str = "v.csv") -> Path:
    """The shared trial with one change applied (``change(frame)`` edits it in place or returns a new frame)."""
    frame = pd.read_csv(files["data"])
    changed = change(frame)
    frame = frame if changed is None else changed
    path = tmp_path / name
    frame.to_parquet(path) if name.endswith(".parquet") else frame.to_csv(path, index=False)
    return path


# ----------------------------------------------------------------------------------------------------------
# user mistakes that used to end in a traceback
# ----------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("verb", ["run", "seal"])
def test_a_huge_covariate_is_refused_naming_column_and_row(verb, files, tmp_path, capsys):
    def huge(frame):
        frame["x1"] = frame["x1"].astype(float)
        frame.loc[6, "x1"] = 1e308

    data = variant(files, tmp_path, huge)
    code, lines, _ = run_cli([verb, data, *ROLES, "--out", tmp_path / "o"], capsys)
    assert_user_error(code, lines, "'x1'", "1e+308", "data row 7")
    assert not (tmp_path / "o").exists()


def test_an_outcome_with_one_huge_value_is_named_not_called_singular(files, tmp_path, capsys):
    def huge(frame):
        frame["score"] = 0.0
        frame.loc[3, "score"] = 1e300

    code, lines, _ = run_cli(["run", variant(files, tmp_path, huge), *ROLES, "--out", tmp_path / "o"], capsys)
    assert_user_error(code, lines, "outcome column 'score'", "data row 4")
    assert "singular" not in lines[0]


@pytest.mark.parametrize("where", ["flag", "study file", "study verb", "simulate verb"])
def test_a_seed_of_two_to_the_32_is_refused_before_any_work(where, files, tmp_path, capsys):
    big = str(2**32)
    study_file = tmp_path / "s.toml"
    study_file.write_text(f'data = "{files["data"]}"\noutcome = "score"\ntreatment = "treated"\n'
                          f'site = "site"\nseed = {big}\n')
    args = {
        "flag": ["run", files["data"], *ROLES, "--seed", big, "--out", tmp_path / "o"],
        "study file": ["run", "--study", study_file, "--out", tmp_path / "o"],
        "study verb": ["study", "null", "--replicates", "2", "--seed", big, "--out", tmp_path / "o"],
        "simulate verb": ["simulate", "demo", "--seed", big, "--out", tmp_path / "o.csv"],
    }[where]
    code, lines, _ = run_cli(args, capsys)
    assert_user_error(code, lines, "4294967296", "< 2³²")
    assert not (tmp_path / "o").exists() and not (tmp_path / "o.csv").exists()


@pytest.mark.parametrize("kind", ["under a file", "unwritable"])
def test_a_bad_output_folder_is_refused_before_any_work(kind, files, tmp_path, capsys, monkeypatch):
    fitted = []
    monkeypatch.setattr(pipeline, "run_blind", lambda *a, **k: fitted.append(1))
    if kind == "under a file":
        out = files["data"] / "sub"
    else:
        if not Path("/proc").is_dir():
            pytest.skip("needs a read-only /proc to stand for an unwritable folder (the tests run as root)")
        out = Path("/proc/siteproof-out")
    code, lines, _ = run_cli(["run", files["data"], *ROLES, "--out", out], capsys)
    assert_user_error(code, lines, str(out))
    assert fitted == []


@pytest.mark.parametrize("damage, verb, text", [
    ("ate string", "unmask", "'ate' is not a list of claims"),
    ("ate string", "report", "'ate' is not a list of claims"),
    ("estimate string", "unmask", "is 'abc', not a number"),
    ("json list", "unmask", "is not a siteproof claims file"),
    ("json list", "report", "is not a siteproof claims file"),
    ("scorecard list", "report", "is not a siteproof scorecard"),
])
def test_damaged_result_files_are_user_errors(damage, verb, text, files, tmp_path, capsys):
    folder = tmp_path / "run"
    shutil.copytree(files["run"], folder)
    claims = json.loads((folder / "claims.json").read_text())
    if damage == "ate string":
        claims["ate"] = "abc"
    elif damage == "estimate string":
        claims["ate"][0]["estimate"] = "abc"
    if damage == "json list":
        (folder / "claims.json").write_text("[1, 2]")
    elif damage == "scorecard list":
        (folder / "scorecard.json").write_text("[]")
    else:
        (folder / "claims.json").write_text(json.dumps(claims))
    args = (["report", folder] if verb == "report"
            else ["unmask", files["data"], *ROLES, "--claims", folder, "--out", tmp_path / "u"])
    code, lines, _ = run_cli(args, capsys)
    assert_user_error(code, lines, text)
    assert not (tmp_path / "u").exists()


@pytest.mark.parametrize("damage, text", [
    ("rate abc", "rate is 'abc'"),
    ("rate 1.5", "rate is '1.5'"),
    ("renamed site", "site is 'nowhere'"),
    ("text seed", "seed is 'abc'"),
])
def test_a_damaged_teaching_key_is_a_user_error(damage, text, files, tmp_path, capsys):
    bench = tmp_path / "bench"
    shutil.copytree(files["bench"], bench)
    units = pd.read_csv(bench / "key" / "units.csv", dtype=str, keep_default_na=False)
    if damage.startswith("rate"):
        units.loc[0, "rate"] = damage.split()[1]
    if damage == "renamed site":
        units.loc[units["site"] == units["site"].iloc[0], "site"] = "nowhere"
    units.to_csv(bench / "key" / "units.csv", index=False)
    if damage == "text seed":
        meta = json.loads((bench / "key" / "key.json").read_text())
        meta["seed"] = "abc"
        (bench / "key" / "key.json").write_text(json.dumps(meta))
    code, lines, _ = run_cli(["grade", bench / "key", files["sub"], "--out", tmp_path / "board"], capsys)
    assert_user_error(code, lines, "benchmark key", text)
    assert not (tmp_path / "board").exists()


def test_fail_on_with_an_unknown_verdict_is_refused_before_any_work(files, tmp_path, capsys, monkeypatch):
    fitted = []
    monkeypatch.setattr(pipeline, "run_blind", lambda *a, **k: fitted.append(1))
    code, lines, _ = run_cli(["run", files["data"], *ROLES, "--fail-on", "xyz", "--out", tmp_path / "o"], capsys)
    assert_user_error(code, lines, "--fail-on xyz")
    assert fitted == [] and not (tmp_path / "o").exists()


def test_simulate_does_not_overwrite_without_force(tmp_path, capsys):
    target = tmp_path / "d.csv"
    target.write_text("mine\n")
    code, lines, _ = run_cli(["simulate", "demo", "--n", "200", "--out", target], capsys)
    assert_user_error(code, lines, "already exists", "--force")
    assert target.read_text() == "mine\n"
    code, _, _ = run_cli(["simulate", "demo", "--n", "200", "--out", target, "--force"], capsys)
    assert code == 0 and target.read_text().startswith(pd.read_csv(target).columns[0])


# ----------------------------------------------------------------------------------------------------------
# intake that understands its input
# ----------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("column", ["covariate", "site"])
def test_nested_parquet_columns_are_refused_by_name(column, files, tmp_path, capsys):
    def nest(frame):
        if column == "covariate":
            frame["tags"] = [[1, 2]] * len(frame)
        else:
            frame["site"] = [[s] for s in frame["site"]]

    data = variant(files, tmp_path, nest, "nested.parquet")
    code, lines, _ = run_cli(["blind", data, *ROLES, *FAST, "--out", tmp_path / "o"], capsys)
    assert_user_error(code, lines, "'tags'" if column == "covariate" else "'site'", "lists or records")


@pytest.mark.parametrize("copy, text", [
    ("treatment", "determines the treatment 'treated' exactly"),
    ("relabelled treatment", "determines the treatment 'treated' exactly"),
    ("outcome", "is the outcome 'score' in another form"),
    ("rescaled outcome", "is the outcome 'score' in another form"),
])
def test_copies_of_the_outcome_or_treatment_are_dropped_with_a_warning(copy, text, files, tmp_path, capsys):
    def add(frame):
        frame["leak"] = {"treatment": frame["treated"], "outcome": frame["score"],
                         "relabelled treatment": np.where(frame["treated"] == 1, "yes", "no"),
                         "rescaled outcome": np.exp(frame["score"] / 10)}[copy]

    out = tmp_path / "o"
    code, lines, _ = run_cli(["blind", variant(files, tmp_path, add), *ROLES, *FAST, "--out", out], capsys)
    assert code == 0
    assert any(line.startswith("warning: covariate 'leak'") and text in line for line in lines), lines
    assert "leak" not in json.loads((out / "claims.json").read_text())["data"]["covariates"]


def test_dates_enter_as_days_since_the_earliest(files, tmp_path, capsys):
    def dates(frame):
        frame["when"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(np.arange(len(frame)) % 97, unit="D")

    out = tmp_path / "o"
    code, lines, _ = run_cli(["blind", variant(files, tmp_path, dates, "d.parquet"), *ROLES, *FAST, "--out", out],
                             capsys)
    assert code == 0
    assert any("'when' holds dates" in line and "2024-01-01" in line for line in lines), lines
    features = json.loads((out / "claims.json").read_text())["data"]["features"]
    assert [f for f in features if f.startswith("when")] == ["when"]  # one numeric feature, not ~100 indicators


def test_many_excluded_small_sites_are_named_in_one_line(tmp_path, capsys):
    rng = np.random.default_rng(0)
    n_sites = 40
    site = np.repeat([f"s{i:03d}" for i in range(n_sites)], 6)
    w = np.tile([1, 1, 1, 1, 1, 0], n_sites)  # one control per site: every site is excluded but the big one
    site = np.concatenate([site, ["big1"] * 40, ["big2"] * 40])
    w = np.concatenate([w, np.tile([0, 1], 40)])
    frame = pd.DataFrame({"site": site, "w": w, "y": rng.normal(size=w.size) + w, "x": rng.normal(size=w.size)})
    data = tmp_path / "small.csv"
    frame.to_csv(data, index=False)
    code, lines, _ = run_cli(["run", data, "--outcome", "y", "--treatment", "w", "--site", "site", *FAST,
                              "--out", tmp_path / "o"], capsys)
    assert code == 0
    summary = [line for line in lines if "are excluded from the design-based estimates" in line]
    assert len(summary) == 1 and summary[0].startswith(f"warning: {n_sites} of {n_sites + 2} sites (s000, s001")


# ----------------------------------------------------------------------------------------------------------
# outputs: whole folders, never two generations, nothing left behind
# ----------------------------------------------------------------------------------------------------------
def test_blind_force_into_a_run_folder_replaces_the_whole_folder(files, tmp_path, capsys):
    folder = tmp_path / "run"
    shutil.copytree(files["run"], folder)
    assert (folder / "scorecard.json").exists() and (folder / "report.html").exists()
    code, _, _ = run_cli(["blind", files["data"], *ROLES, *FAST, "--out", folder, "--force"], capsys)
    assert code == 0
    assert sorted(p.name for p in folder.iterdir()) == [MANIFEST_FILE, "claims.json", "units.parquet"]
    assert no_scratch_left(tmp_path)


def test_scratch_folders_of_killed_runs_are_removed_by_the_next_run(files, tmp_path, capsys):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # a process id that no longer runs
    crashed = tmp_path / f"{STAGING_PREFIX}o-{dead.pid}-abcd1234"
    (crashed / "figures").mkdir(parents=True)
    legacy = tmp_path / ".o.x1y2.partial"
    legacy.mkdir()
    past = time.time() - 3600
    os.utime(legacy, (past, past))
    alive = tmp_path / f"{STAGING_PREFIX}o-{os.getppid()}-live0000"  # a running process: left alone
    alive.mkdir()
    code, _, _ = run_cli(["blind", files["data"], *ROLES, *FAST, "--out", tmp_path / "o"], capsys)
    assert code == 0
    assert not crashed.exists() and not legacy.exists() and alive.exists()


def test_ctrl_c_writes_nothing_and_exits_130(files, tmp_path, capsys, monkeypatch):
    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "write_report", interrupted)  # while the report is being written
    folder = tmp_path / "run"
    shutil.copytree(files["run"], folder)
    before = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    code, lines, _ = run_cli(["run", files["data"], *ROLES, *FAST, "--out", folder, "--force"], capsys)
    assert code == 130 and lines == ["interrupted — nothing was written"]
    assert {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()} == before  # old results intact
    assert no_scratch_left(tmp_path)


def test_a_real_sigint_gives_one_line_and_130(files, tmp_path):
    process = subprocess.Popen(
        [sys.executable, "-c", "from siteproof.cli import entry; entry()", "run", str(files["data"]), *ROLES,
         "--out", str(tmp_path / "o")], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(3)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=120)
    if process.returncode == 0:
        pytest.skip("the run finished before the signal arrived")
    assert process.returncode == 130 and err.strip() == "interrupted — nothing was written", err
    assert not (tmp_path / "o").exists() and no_scratch_left(tmp_path)


def test_an_interrupt_that_a_c_extension_turns_into_another_error_is_still_an_interrupt(files, tmp_path, capsys,
                                                                                       monkeypatch):
    # Ctrl-C while a C extension initialises (seen: matplotlib's ft2font during a slow import) surfaces as
    # "ImportError: initialization failed", not KeyboardInterrupt; it must still exit 130 with the one line.
    def interrupted_import(*args, **kwargs):
        try:
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(1)
        except KeyboardInterrupt:
            raise ImportError("initialization failed") from None

    monkeypatch.setattr(pipeline, "run_pipeline", interrupted_import)
    code, lines, _ = run_cli(["run", files["data"], *ROLES, "--out", tmp_path / "o"], capsys)
    assert code == 130 and lines == ["interrupted — nothing was written"]
    assert not (tmp_path / "o").exists()


# ----------------------------------------------------------------------------------------------------------
# stderr: one error line first, warnings after it, library noise only with --verbose; exit 3 for bugs
# ----------------------------------------------------------------------------------------------------------
def test_warnings_come_after_the_error_line(files, tmp_path, capsys):
    other = variant(files, tmp_path, lambda frame: frame.iloc[2:])
    code, lines, _ = run_cli(["unmask", other, *ROLES, "--claims", files["run"], "--out", tmp_path / "u"], capsys)
    assert_user_error(code, lines, "another dataset")
    assert any(line.startswith("warning: no assignment rates were declared") for line in lines[1:])
    assert len(lines) == len(set(lines))  # each warning once


def test_library_warnings_are_shown_only_with_verbose(files, tmp_path, capsys, monkeypatch):
    real = pipeline.run_blind

    def noisy(*args, **kwargs):
        with np.errstate(divide="warn"):
            np.float64(1.0) / np.float64(0.0)  # a NumPy RuntimeWarning
        return real(*args, **kwargs)

    monkeypatch.setattr(pipeline, "run_blind", noisy)
    args = ["blind", files["data"], *ROLES, *FAST, "--rates", "north=0.5,harbour=0.6667,upland=0.8"]
    code, lines, _ = run_cli([*args, "--out", tmp_path / "a"], capsys)
    assert code == 0 and not [line for line in lines if "divide" in line], lines
    code, lines, _ = run_cli([*args, "--out", tmp_path / "b", "--verbose"], capsys)
    assert code == 0 and any(line.startswith("note: RuntimeWarning") and "divide" in line for line in lines)


def test_an_internal_error_exits_3_naming_the_log(files, tmp_path, capsys, monkeypatch):
    def broken(*args, **kwargs):
        raise ZeroDivisionError("a bug")

    monkeypatch.setenv("SITEPROOF_LOG_DIR", str(tmp_path / "logs"))
    monkeypatch.setattr(pipeline, "run_blind", broken)
    code, lines, _ = run_cli(["blind", files["data"], *ROLES, "--out", tmp_path / "o"], capsys)
    assert code == 3 and lines[0].startswith("internal error: ZeroDivisionError: a bug — ")
    log = Path(lines[0].split("the traceback is in ")[1].split(";")[0])
    assert log.parent == tmp_path / "logs" and "Traceback" in log.read_text() and "in broken" in log.read_text()
    assert all(line.startswith("warning: ") for line in lines[1:])
    assert not (tmp_path / "o").exists()


# ----------------------------------------------------------------------------------------------------------
# Monte Carlo: verified resume, damaged study.json, unreachable scheduler
# ----------------------------------------------------------------------------------------------------------
@pytest.fixture
def stand_in(monkeypatch):
    """A replicate function that needs no estimation: two rows drawn from the replicate's seed."""
    def fake(task):
        rng = np.random.default_rng(task.seeds[0])
        rows = pd.DataFrame([{"replicate": task.replicate, "kind": "ate", "name": name, "estimate": rng.normal(),
                              "se": 1.0, "ci_low": -2.0, "ci_high": 2.0, "truth": 0.0, "truth_sample": 0.0,
                              "error": 0.0, "covered": True, "covered_sample": True, "design_based": 0.0,
                              "verdict": "equivalent", "pehe": float("nan")} for name in ("aipw", "naive")],
                            columns=list(montecarlo.COLUMNS))
        return montecarlo.ReplicateResult(task.replicate, rows, 0.0, "test")

    monkeypatch.setattr(montecarlo, "run_replicate", fake)
    monkeypatch.setattr(montecarlo, "population_ate", lambda design: 0.0)


STUDY = ["study", "null", "--replicates", "4", "--n", "400", "--seed", "3"]


@pytest.mark.parametrize("damage", ["truncated rows", "edited rows", "foreign part", "no record"])
def test_a_damaged_part_is_recomputed_and_reported_never_counted(damage, stand_in, tmp_path, capsys):
    out = tmp_path / "st"
    assert run_cli([*STUDY, "--out", out], capsys)[0] == 0
    reference = (out / "replicates.csv").read_bytes()
    part, record = out / "parts" / "rep-00002.csv", out / "parts" / "rep-00002.json"
    if damage == "truncated rows":
        part.write_bytes(part.read_bytes()[:40])
    elif damage == "edited rows":
        part.write_text(part.read_text().replace("aipw", "AIPW"))
    elif damage == "foreign part":  # a part of another study's replicate 2, checksum intact
        meta = json.loads(record.read_text())
        meta["seeds"] = [1, 2, 3]
        record.write_text(json.dumps(meta))
    else:
        record.unlink()
    code, lines, stdout = run_cli([*STUDY, "--out", out], capsys)
    assert code == 0
    assert any(line.startswith("warning: 1 part file(s)") and "replicate 2" in line for line in lines), lines
    assert "1 run now, 3 kept" in " ".join(stdout.split()) and "1 damaged or foreign parts recomputed" in stdout
    assert (out / "replicates.csv").read_bytes() == reference
    assert len(pd.read_csv(out / "summary.csv")) > 0


@pytest.mark.parametrize("content", ["{not json", "[]", '{"schema": "siteproof/montecarlo-study"}'])
def test_a_damaged_study_file_is_a_clear_error(content, stand_in, tmp_path, capsys):
    out = tmp_path / "st"
    assert run_cli([*STUDY, "--out", out], capsys)[0] == 0
    (out / "study.json").write_text(content)
    code, lines, _ = run_cli([*STUDY, "--out", out], capsys)
    assert_user_error(code, lines, "study.json is damaged", "cannot be resumed")


def test_an_unreachable_scheduler_leaves_nothing_behind(stand_in, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(montecarlo, "SCHEDULER_TIMEOUT", "1s")
    out = tmp_path / "st"
    code, lines, _ = run_cli([*STUDY, "--scheduler", "tcp://127.0.0.1:9", "--out", out], capsys)
    assert_user_error(code, lines, "cannot reach a Dask scheduler")
    assert not out.exists()


# ----------------------------------------------------------------------------------------------------------
# StagedOutput itself
# ----------------------------------------------------------------------------------------------------------
def test_staged_output_swaps_a_whole_folder_and_keeps_the_old_one_until_the_end(tmp_path):
    from siteproof.core.outputs import StagedOutput

    out = tmp_path / "res"
    with StagedOutput(out) as staged:
        (staged / "claims.json").write_text("1")
        (staged / "report.md").write_text("old report")
    with StagedOutput(out, force=True) as staged:
        (staged / "claims.json").write_text("2")
        assert (out / "claims.json").read_text() == "1" and (out / "report.md").exists()  # untouched so far
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST_FILE, "claims.json"]  # no report of the old run
    assert (out / "claims.json").read_text() == "2" and no_scratch_left(tmp_path)


def test_staged_output_on_error_leaves_the_old_folder_and_no_scratch(tmp_path):
    from siteproof.core.errors import SiteproofError
    from siteproof.core.outputs import StagedOutput

    out = tmp_path / "res"
    out.mkdir()
    (out / "claims.json").write_text("old")
    with pytest.raises(SiteproofError, match="already holds earlier results"):
        with StagedOutput(out):
            pass
    with pytest.raises(RuntimeError):
        with StagedOutput(out, force=True) as staged:
            (staged / "claims.json").write_text("new")
            raise RuntimeError("boom")
    assert (out / "claims.json").read_text() == "old" and no_scratch_left(tmp_path)


def test_staged_output_keeps_files_it_did_not_write(tmp_path):
    from siteproof.core.outputs import StagedOutput

    out = tmp_path / "res"
    with StagedOutput(out) as staged:
        (staged / "scorecard.json").write_text("{}")
        (staged / "figures").mkdir()
        (staged / "figures" / "a.svg").write_text("<svg/>")
    (out / "notes.txt").write_text("mine")
    with StagedOutput(out, force=True) as staged:
        (staged / "claims.json").write_text("{}")
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST_FILE, "claims.json", "notes.txt"]
    assert (out / "notes.txt").read_text() == "mine"


def test_unmask_into_its_claims_folder_keeps_the_claims(files, tmp_path, capsys):
    folder = tmp_path / "run"
    shutil.copytree(files["run"], folder)
    claims = (folder / "claims.json").read_bytes()
    code, _, _ = run_cli(["unmask", files["data"], *ROLES, "--claims", folder, "--out", folder, "--force"], capsys)
    assert code == 0 and (folder / "claims.json").read_bytes() == claims
    assert (folder / "scorecard.json").exists() and (folder / "units.parquet").exists()
    assert run_cli(["report", folder], capsys)[0] == 0
