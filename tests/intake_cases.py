"""Bad-input cases for study intake, shared by the API tests (tests/test_study.py) and the CLI tests.

Structure
---------
``CASES`` is a list of ``(name, builder)`` pairs.  A builder takes a folder (``pathlib.Path``, e.g. pytest's
``tmp_path``), writes the files of the case into it and returns an :class:`IntakeCase`:

* ``spec``     – keyword arguments for ``siteproof.intake.study.StudySpec`` (``data`` is the written file);
* ``kind``     – ``"error"``: ``load_study`` raises ``SiteproofError`` (the CLI prints one line
                 ``error: <what> — <how to fix>`` and exits with status 2), or ``"warning"``: ``load_study``
                 succeeds and records the warning in ``Study.warnings`` (the CLI goes on);
* ``expect``   – a lower-case fragment that the error or warning text contains;
* ``cli_args`` – (property) the same case as arguments of ``siteproof run`` without ``--out``.

Usage::

    name, build = CASES[0]
    case = build(tmp_path)
    load_study(StudySpec(**case.spec))          # API level
    ["siteproof", "run", *case.cli_args, "--out", str(tmp_path / "out")]   # CLI level
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class IntakeCase:
    spec: dict[str, Any]
    kind: str
    expect: str

    @property
    def cli_args(self) -> list[str]:
        """The case as command-line arguments: DATA --outcome COL --treatment COL --site COL [...]."""
        spec = self.spec
        args = [str(spec["data"])]
        for key, flag in (("outcome", "--outcome"), ("treatment", "--treatment"), ("site", "--site"),
                          ("treated_value", "--treated-value"), ("id", "--id"), ("cost", "--cost"),
                          ("stratum", "--stratum"), ("encoding", "--encoding")):
            if spec.get(key) is not None:
                args += [flag, str(spec[key])]
        if spec.get("covariates") is not None:
            args += ["--covariates", ",".join(spec["covariates"])]
        if spec.get("rates"):
            args += ["--rates", ",".join(f"{k}={v!r}" for k, v in spec["rates"].items())]
        for key, flag in (("keep_columns", "--keep-column"), ("drop_columns", "--drop-column")):
            for column in spec.get(key, []):
                args += [flag, column]
        return args


def base_frame(n: int = 60, seed: int = 0) -> pd.DataFrame:
    """A small valid pooled trial: three sites, 0/1 treatment, numeric and text covariates, ids, costs."""
    rng = np.random.default_rng(seed)
    site = np.array(["A", "B", "C"])[np.arange(n) * 3 // n]
    w = np.tile([1, 0], n // 2 + 1)[:n]
    age = rng.integers(7, 12, n)
    return pd.DataFrame({
        "unit": [f"u{i:03d}" for i in range(n)],
        "site": site,
        "w": w,
        "y": np.round(2.0 * w + 0.5 * age + rng.normal(size=n), 3),
        "age": age,
        "lang": rng.choice(["en", "es", "pl"], n),
        "cost": np.round(rng.uniform(50, 80, n), 2),
    })


BASE_SPEC = {"outcome": "y", "treatment": "w", "site": "site", "id": "unit", "cost": "cost"}


def _csv(folder: Path, frame: pd.DataFrame, name: str = "data.csv") -> Path:
    path = folder / name
    frame.to_csv(path, index=False)
    return path


def _case(path: Path, kind: str, expect: str, **spec: Any) -> IntakeCase:
    return IntakeCase({**BASE_SPEC, "data": str(path), **spec}, kind, expect)


def file_missing(folder: Path) -> IntakeCase:
    return _case(folder / "nowhere.csv", "error", "not found")


def path_is_folder(folder: Path) -> IntakeCase:
    (folder / "a_folder.csv").mkdir()
    return _case(folder / "a_folder.csv", "error", "is a folder")


def damaged_parquet(folder: Path) -> IntakeCase:
    path = folder / "data.parquet"
    path.write_bytes(b"PAR1 this is not really parquet")
    return _case(path, "error", "cannot read")


def damaged_stata(folder: Path) -> IntakeCase:
    path = folder / "data.dta"
    path.write_bytes(b"<stata_dta><header> cut off here")
    return _case(path, "error", "cannot read")


def unknown_suffix(folder: Path) -> IntakeCase:
    path = folder / "data.sqlite"
    path.write_bytes(b"SQLite format 3\x00")
    return _case(path, "error", "not a table format siteproof reads")


def empty_file(folder: Path) -> IntakeCase:
    path = folder / "data.csv"
    path.write_bytes(b"")
    return _case(path, "error", "is empty")


def header_only(folder: Path) -> IntakeCase:
    path = folder / "data.csv"
    path.write_text("unit,site,w,y,age,lang,cost\n", encoding="utf-8")
    return _case(path, "error", "no rows")


def not_utf8(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame.loc[5, "lang"] = "français"
    path = folder / "data.csv"
    frame.to_csv(path, index=False, encoding="latin-1")
    return _case(path, "error", "not utf-8")


def unknown_encoding(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "unknown text encoding", encoding="martian-1")


def ragged_csv(folder: Path) -> IntakeCase:
    path = folder / "data.csv"
    path.write_text("unit,site,w,y\nu1,A,1,2.0\nu2,A,0,1.0,9,9\n", encoding="utf-8")
    return _case(path, "error", "as csv")


def repeated_header(folder: Path) -> IntakeCase:
    path = folder / "data.csv"
    text = base_frame().to_csv(index=False).replace("age", "lang", 1)
    path.write_text(text, encoding="utf-8")
    return _case(path, "error", "appears twice")


def unknown_covariate(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "'agee'", covariates=["age", "agee"])


def unknown_outcome(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "'gain'", outcome="gain")


def site_column_missing(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "site column 'branch'", site="branch")


def treatment_one_value(folder: Path) -> IntakeCase:
    frame = base_frame().assign(w=1)
    return _case(_csv(folder, frame), "error", "only one value")


def treatment_three_values(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["w"] = np.tile([0, 1, 2], len(frame) // 3 + 1)[: len(frame)]
    return _case(_csv(folder, frame), "error", "3 distinct values")


def treatment_needs_treated_value(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["w"] = np.where(frame["w"] == 1, "coached", "waiting")
    return _case(_csv(folder, frame), "error", "--treated-value")


def wrong_treated_value(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "is not a value", treated_value="yes")


def non_numeric_outcome(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["y"] = frame["y"].astype(object)
    frame.loc[[3, 8], "y"] = "absent"
    return _case(_csv(folder, frame), "error", "not numeric")


def all_units_in_one_arm(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame.loc[frame["w"] == 1, "y"] = np.nan
    return _case(_csv(folder, frame), "error", "in the control arm")


def too_few_units(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame(n=15)), "error", "only 15 usable units")


def duplicate_ids(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame.loc[7, "unit"] = frame.loc[3, "unit"]
    return _case(_csv(folder, frame), "error", "repeated value")


def missing_site_values(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame.loc[4, "site"] = None
    return _case(_csv(folder, frame), "error", "site column 'site' is empty")


def rate_above_one(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "outside (0, 1)", rates={"A": 1.5, "B": 0.5, "C": 0.5})


def rate_zero(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "outside (0, 1)", rates={"A": 0.0, "B": 0.5, "C": 0.5})


def rate_for_unknown_site(folder: Path) -> IntakeCase:
    rates = {"A": 0.5, "B": 0.5, "C": 0.5, "Z": 0.5}
    return _case(_csv(folder, base_frame()), "error", "'z', which is not a site", rates=rates)


def rates_for_some_sites(folder: Path) -> IntakeCase:
    return _case(_csv(folder, base_frame()), "error", "not for c", rates={"A": 0.5, "B": 0.5})


def undeclared_identifier(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["nickname"] = [f"kid-{i * 7919 % 1000}" for i in range(len(frame))]
    return _case(_csv(folder, frame), "error", "'nickname' looks like an identifier")


def numbers_with_stray_text(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["books"] = frame.index.astype(str)
    frame.loc[[2, 9], "books"] = "?"
    return _case(_csv(folder, frame), "error", "holds numbers but also text")


def covariate_copies_site(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame["branch_name"] = frame["site"].map({"A": "Northgate", "B": "Riverside", "C": "Elm Park"})
    return _case(_csv(folder, frame), "warning", "'branch_name' copies the site column")


def site_with_one_arm(folder: Path) -> IntakeCase:
    frame = base_frame()
    frame.loc[frame["site"] == "C", "w"] = 1
    return _case(_csv(folder, frame), "warning", "site 'c' has all 20 units in the treated arm")


CASES: list[tuple[str, Callable[[Path], IntakeCase]]] = [
    (builder.__name__, builder)
    for builder in (
        file_missing, path_is_folder, damaged_parquet, damaged_stata, unknown_suffix, empty_file, header_only,
        not_utf8, unknown_encoding, ragged_csv, repeated_header, unknown_covariate, unknown_outcome, site_column_missing,
        treatment_one_value, treatment_three_values, treatment_needs_treated_value, wrong_treated_value,
        non_numeric_outcome, all_units_in_one_arm, too_few_units, duplicate_ids, missing_site_values,
        rate_above_one, rate_zero, rate_for_unknown_site, rates_for_some_sites, undeclared_identifier,
        numbers_with_stray_text, covariate_copies_site, site_with_one_arm,
    )
]
