"""The command line: one-line errors with exit 2 and no partial outputs; the verbs end to end."""

from __future__ import annotations

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
    """Issue 2 item 7: every bad input → `error: <what> — <how to fix>`, exit 2, nothing in --out."""
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


def test_simulate_writes_data_and_truth(tmp_path, capsys):
    out, truth = tmp_path / "d.csv", tmp_path / "t.csv"
    code, stdout, _ = _run(["simulate", "demo", "--n", "200", "--seed", "1", "--out", str(out), "--truth", str(truth)], capsys)
    assert code == 0 and out.exists() and truth.exists()
    assert "200 units" in stdout
