"""Study intake: bad inputs (shared cases), the study file, rates, encoding, blindness and the rate checks."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from intake_cases import CASES, base_frame
from siteproof.core.errors import SiteproofError, SiteproofWarning
from siteproof.intake.study import (
    StudySpec, fingerprint, load_spec_toml, load_study, parse_column_list, parse_rates, read_table,
)

pytestmark = pytest.mark.filterwarnings("ignore::siteproof.core.errors.SiteproofWarning")


def _load(frame: pd.DataFrame, **spec) -> "Study":  # noqa: F821 - forward reference for readers
    base = {"data": "in-memory", "outcome": "y", "treatment": "w", "site": "site"}
    return load_study(StudySpec(**{**base, **spec}), frame=frame)


# ------------------------------------------------------------------------------------------------------
# bad inputs (tests/intake_cases.py; the CLI tests reuse the same cases)
# ------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name, build", CASES, ids=[name for name, _ in CASES])
def test_bad_input_is_named_with_a_fix(name, build, tmp_path):
    case = build(tmp_path)
    if case.kind == "error":
        with pytest.raises(SiteproofError) as info:
            load_study(StudySpec(**case.spec))
        error = info.value
        assert case.expect in str(error).lower()
        assert error.fix, "every error says how to fix it"
        assert error.one_line().startswith("error: ") and "\n" not in error.one_line()
    else:
        with pytest.warns(SiteproofWarning):
            study = load_study(StudySpec(**case.spec))
        assert any(case.expect in text.lower() for text in study.warnings)


def test_cases_translate_to_cli_arguments(tmp_path):
    name, build = next((n, b) for n, b in CASES if n == "rate_above_one")
    args = build(tmp_path).cli_args
    assert args[0].endswith("data.csv")
    assert args[args.index("--rates") + 1] == "A=1.5,B=0.5,C=0.5"
    assert args[args.index("--site") + 1] == "site"


def test_unreadable_file_is_reported(tmp_path, monkeypatch):
    path = tmp_path / "data.csv"
    base_frame().to_csv(path, index=False)
    real_open = Path.open

    def deny(self, *args, **kwargs):
        if self == path:
            raise PermissionError(13, "Permission denied")
        return real_open(self, *args, **kwargs)

    monkeypatch.setattr(Path, "open", deny)
    with pytest.raises(SiteproofError, match=r"cannot read data file .*\(Permission denied\)"):
        read_table(path)


def test_spreadsheet_files_are_refused(tmp_path):
    path = tmp_path / "data.xlsx"
    path.write_bytes(b"PK\x03\x04")
    with pytest.raises(SiteproofError, match="Excel"):
        read_table(path)


def test_site_with_one_unit_in_an_arm_is_not_an_error():
    frame = base_frame()
    frame.loc[frame["site"] == "C", "w"] = [1] * 19 + [0]
    study = _load(frame, id="unit", cost="cost")
    assert study.n_sites == 3 and study.n == 60


def test_explicit_covariate_that_has_a_role_is_refused():
    with pytest.raises(SiteproofError, match="covariate 'site' is the site column"):
        _load(base_frame(), id="unit", covariates=["age", "site"])


def test_same_column_in_two_roles_is_refused():
    with pytest.raises(SiteproofError, match="'y' is named both as outcome and as cost"):
        _load(base_frame(), id="unit", cost="y")


def test_covariate_copying_site_can_be_kept_on_request():
    frame = base_frame()
    frame["branch_code"] = frame["site"].map({"A": 11, "B": 12, "C": 13})
    dropped = _load(frame, id="unit")
    assert "branch_code" not in dropped.blind.covariates
    kept = _load(frame, id="unit", keep_columns=["branch_code"])
    assert "branch_code" in kept.blind.feature_names
    assert any("was kept" in text for text in kept.warnings)


def test_continuous_covariates_are_not_mistaken_for_site_copies():
    frame = base_frame()
    frame["score"] = np.random.default_rng(3).normal(size=len(frame))  # all values different
    assert "score" in _load(frame, id="unit").blind.covariates


def test_infinite_outcome_is_refused():
    frame = base_frame()
    frame.loc[2, "y"] = np.inf
    with pytest.raises(SiteproofError, match="infinite"):
        _load(frame, id="unit")


def test_constant_outcome_is_refused():
    with pytest.raises(SiteproofError, match="single value"):
        _load(base_frame().assign(y=3.0), id="unit")


@pytest.mark.parametrize("margin, seed", [(0.0, 1), (-1.0, 1), (float("nan"), 1), (None, -3)])
def test_bad_margin_or_seed_is_refused(margin, seed):
    with pytest.raises(SiteproofError, match="--margin|--seed"):
        _load(base_frame(), id="unit", margin=margin, seed=seed)


# ------------------------------------------------------------------------------------------------------
# reading files
# ------------------------------------------------------------------------------------------------------
def test_csv_parquet_and_delimiters_read_the_same(tmp_path):
    frame = base_frame()
    frame.to_csv(tmp_path / "a.csv", index=False)
    frame.to_csv(tmp_path / "b.csv", index=False, sep=";")
    frame.to_csv(tmp_path / "c.tsv", index=False, sep="\t")
    frame.to_parquet(tmp_path / "d.parquet", index=False)
    (tmp_path / "e.csv").write_bytes(b"\xef\xbb\xbf" + (tmp_path / "a.csv").read_bytes())  # UTF-8 with BOM
    prints = {
        name: _load(read_table(tmp_path / name), id="unit", cost="cost").blind.fingerprint
        for name in ("a.csv", "b.csv", "c.tsv", "d.parquet", "e.csv")
    }
    assert len(set(prints.values())) == 1


def test_latin1_file_reads_when_the_encoding_is_named(tmp_path):
    frame = base_frame()
    frame.loc[5, "lang"] = "français"
    path = tmp_path / "data.csv"
    frame.to_csv(path, index=False, encoding="latin-1")
    with pytest.raises(SiteproofError, match="not UTF-8"):
        read_table(path)
    assert "français" in set(read_table(path, encoding="latin-1")["lang"])
    study = load_study(StudySpec(data=path, outcome="y", treatment="w", site="site", id="unit", encoding="latin-1"))
    assert "lang=français" in study.blind.feature_names


# ------------------------------------------------------------------------------------------------------
# rates syntax and the study file
# ------------------------------------------------------------------------------------------------------
def test_parse_rates_accepts_sites_cells_and_fractions():
    assert parse_rates("A=0.5, B = 5/6 ,C:low=0.25,") == {"A": 0.5, "B": 5 / 6, "C:low": 0.25}
    assert parse_column_list(" a, b ,,c") == ["a", "b", "c"]


@pytest.mark.parametrize("text, fragment", [
    ("", "empty"), ("A0.5", "SITE=RATE"), ("=0.5", "SITE=RATE"), ("A=", "SITE=RATE"),
    ("A=half", "not a number"), ("A=0.5,A=0.6", "twice"), ("A=1/0", "not a number"), ("A=nan", "nan"),
])
def test_parse_rates_rejects_bad_syntax(text, fragment):
    with pytest.raises(SiteproofError, match=fragment):
        parse_rates(text)


STUDY_TOML = """
name = "Summer reading coaching"
data = "trial.csv"
outcome = "y"
treatment = "w"
treated_value = 1
site = "site"
id = "unit"
cost = "cost"
covariates = ["age", "lang"]
margin = 0.4
seed = 7
drop_columns = []

[rates]
A = 0.5
B = "1/2"
C = 0.5
"""


def test_study_file_round_trip(tmp_path):
    base_frame().to_csv(tmp_path / "trial.csv", index=False)
    (tmp_path / "study.toml").write_text(STUDY_TOML, encoding="utf-8")
    spec = load_spec_toml(tmp_path / "study.toml")
    assert Path(spec.data) == tmp_path / "trial.csv"  # relative to the study file's folder
    assert spec.treated_value == "1" and spec.margin == 0.4 and spec.seed == 7
    assert spec.rates == {"A": 0.5, "B": 0.5, "C": 0.5}
    study = load_study(spec)
    assert study.rates_source == "declared" and study.blind.covariates == ("age", "lang")
    assert spec.to_dict()["data"] == str(tmp_path / "trial.csv")


def test_study_file_with_stratum_tables_and_overrides(tmp_path):
    frame = base_frame().assign(band=lambda f: np.where(f["age"] >= 9, "old", "young"))
    frame.to_csv(tmp_path / "trial.csv", index=False)
    toml = (
        'data = "trial.csv"\noutcome = "y"\ntreatment = "w"\nsite = "site"\nid = "unit"\nstratum = "band"\n'
        '[rates]\nA = 0.5\n"B:old" = 0.5\nB:young = 0.5\n'
    )
    (tmp_path / "bad.toml").write_text(toml, encoding="utf-8")
    with pytest.raises(SiteproofError, match="not valid TOML"):
        load_spec_toml(tmp_path / "bad.toml")
    toml = toml.replace("B:young = 0.5\n", "[rates.C]\nold = 0.5\nyoung = 0.5\n").replace(
        '"B:old" = 0.5', '"B:old" = 0.5\n"B:young" = 0.5')
    (tmp_path / "study.toml").write_text(toml, encoding="utf-8")
    spec = load_spec_toml(tmp_path / "study.toml", overrides={"seed": 11, "margin": None, "covariates": ["age"]})
    assert spec.rates == {"A": 0.5, "B:old": 0.5, "B:young": 0.5, "C:old": 0.5, "C:young": 0.5}
    assert spec.seed == 11 and spec.covariates == ["age"]
    study = load_study(spec)
    assert len(study.cells) == 6 and set(study.cells["stratum"]) == {"old", "young"}


@pytest.mark.parametrize("toml, fragment", [
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\nsite = "s"\noutcom = "y"\n',
     "unknown key 'outcom' .*did you mean 'outcome'"),
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\n', "which column is the site"),
    ('data = "x.csv"\noutcome = 3\ntreatment = "w"\nsite = "s"\n', "'outcome' must be text"),
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\nsite = "s"\nmargin = "big"\n', "'margin' must be a number"),
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\nsite = "s"\ncovariates = [1]\n', "list of column names"),
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\nsite = "s"\nrates = 3\n', "'rates' must be a table"),
    ('data = "x.csv"\noutcome = "y"\ntreatment = "w"\nsite = "s"\n[rates]\nA = true\n', "not a number"),
])
def test_study_file_mistakes(tmp_path, toml, fragment):
    (tmp_path / "study.toml").write_text(toml, encoding="utf-8")
    with pytest.raises(SiteproofError, match=fragment):
        load_spec_toml(tmp_path / "study.toml")


def test_missing_study_file(tmp_path):
    with pytest.raises(SiteproofError, match="study file .* not found"):
        load_spec_toml(tmp_path / "nope.toml")


def test_data_flag_overrides_a_missing_data_key(tmp_path):
    (tmp_path / "study.toml").write_text('outcome = "y"\ntreatment = "w"\nsite = "s"\n', encoding="utf-8")
    assert load_spec_toml(tmp_path / "study.toml", {"data": "elsewhere.csv"}).data == "elsewhere.csv"


# ------------------------------------------------------------------------------------------------------
# treatment, exclusions, covariates
# ------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("treated, control, given, expect", [
    (1, 0, None, "1"), (1.0, 0.0, None, "1"), (True, False, None, "True"), ("TRUE", "false", None, "TRUE"),
    ("coached", "waiting", "coached", "coached"), ("Yes", "No", "yes", "Yes"), (2, 1, "2.0", "2"),
])
def test_treatment_values_are_inferred_or_matched(treated, control, given, expect):
    frame = base_frame()
    frame["w"] = np.where(frame["w"] == 1, pd.Series([treated] * len(frame)), pd.Series([control] * len(frame)))
    study = _load(frame, id="unit", treated_value=given)
    assert study.blind.treated_value == expect
    np.testing.assert_array_equal(study.blind.w, base_frame()["w"].to_numpy())


def test_missing_outcome_or_treatment_rows_are_excluded_and_counted():
    frame = base_frame()
    frame["w"] = frame["w"].astype(object)
    frame.loc[[1, 2, 3], "y"] = np.nan
    frame.loc[[3, 10], "w"] = None  # row 3 misses both: counted once, under missing_outcome
    with pytest.warns(SiteproofWarning, match="excluded 3 units with a missing outcome and 1 with a missing treatment"):
        study = _load(frame, drop_columns=["unit"])
    assert study.blind.n_excluded == {"missing_outcome": 3, "missing_treatment": 1}
    assert study.n == 56
    assert list(study.blind.row_key[:3]) == ["0", "4", "5"]  # 0-based row numbers of the file
    assert study.blind.raw_covariates.index.tolist() == list(range(56))


def test_default_covariates_leave_out_roles_and_listed_columns():
    frame = base_frame().assign(band="x", notes=lambda f: f["lang"], branch_size=lambda f: f["age"] * 2)
    study = _load(frame, id="unit", cost="cost", stratum="band", drop_columns=["notes"], site_derived=["branch_size"])
    assert study.blind.covariates == ("age", "lang")
    np.testing.assert_array_equal(study.blind.cost, frame["cost"].to_numpy())


def test_encoding_one_hot_median_imputation_and_indicators():
    frame = base_frame(n=40)
    frame["lang"] = ["en"] * 20 + ["es"] * 12 + ["pl"] * 6 + [None] * 2
    frame["books"] = np.arange(40, dtype=float)
    frame.loc[[0, 1], "books"] = np.nan
    frame["constant"] = 5
    frame["flag"] = [True, True, False, False] * 10  # not [True, False] * 20: that would copy w (dropped)
    study = _load(frame, id="unit", cost="cost")
    blind = study.blind
    # reference level of lang = the most frequent level, "en"; missing level → lang:missing
    assert blind.feature_names == (
        "age", "lang=es", "lang=pl", "lang:missing", "books", "books:missing", "flag=True")
    X = pd.DataFrame(blind.X, columns=blind.feature_names)
    assert X.loc[0, "books"] == np.median(np.arange(2, 40))  # median of the observed values
    assert X["books:missing"].tolist() == [1.0, 1.0] + [0.0] * 38
    assert X["lang:missing"].sum() == 2 and X["lang=es"].sum() == 12
    assert "constant" not in blind.covariates  # constant columns give no feature
    assert blind.X.dtype == np.float64 and blind.X.flags.c_contiguous


def test_outcome_flags_and_sd():
    frame = base_frame()
    frame["y"] = (frame["y"] > frame["y"].median()).astype(int)
    study = _load(frame, id="unit")
    assert study.blind.binary_outcome
    assert study.blind.outcome_sd() == pytest.approx(frame["y"].std(ddof=1))
    assert not _load(base_frame(), id="unit").blind.binary_outcome


# ------------------------------------------------------------------------------------------------------
# blindness
# ------------------------------------------------------------------------------------------------------
def test_fingerprint_ignores_the_site_column():
    frame = base_frame()
    study = _load(frame, id="unit", cost="cost")
    shuffled = frame.assign(site=np.random.default_rng(5).permutation(frame["site"].to_numpy()))
    relabelled = frame.assign(site=frame["site"].map({"A": "north", "B": "south", "C": "east"}))
    for other in (shuffled, relabelled):
        assert _load(other, id="unit", cost="cost").blind.fingerprint == study.blind.fingerprint
    changed = frame.copy()
    changed.loc[0, "y"] += 1.0
    assert _load(changed, id="unit", cost="cost").blind.fingerprint != study.blind.fingerprint
    b = study.blind
    assert b.fingerprint == fingerprint(b.row_key, b.y, b.w, b.X, b.feature_names, b.cost)


def test_blind_data_has_no_site():
    study = _load(base_frame(), id="unit")
    assert not hasattr(study.blind, "site")
    assert "site" not in study.blind.covariates and "site" not in study.blind.raw_covariates.columns


# ------------------------------------------------------------------------------------------------------
# known rates and the binomial check
# ------------------------------------------------------------------------------------------------------
def test_realized_rates_are_the_cell_shares_and_say_so():
    frame = base_frame()
    frame.loc[frame["site"] == "B", "w"] = [1] * 15 + [0] * 5
    study = _load(frame, id="unit")
    assert study.rates_source == "realized"
    assert any("realized treated share" in text for text in study.warnings)
    np.testing.assert_allclose(study.known_rate[study.site == "B"], 0.75)
    assert study.cells["rate_declared"].isna().all() and study.cells["binom_p"].isna().all()


def test_binomial_check_agrees_with_scipy_and_warns_by_site():
    frame = base_frame(n=90)
    frame.loc[frame["site"] == "B", "w"] = [1] * 28 + [0] * 2  # 28 of 30 treated against a declared 0.5
    with pytest.warns(SiteproofWarning, match="site 'B'"):
        study = _load(frame, id="unit", rates={"A": 0.5, "B": 0.5, "C": 0.4})
    cells = study.cells.set_index("site")
    for site, k, n, p in (("A", 15, 30, 0.5), ("B", 28, 30, 0.5), ("C", 15, 30, 0.4)):
        assert cells.at[site, "n_treated"] == k and cells.at[site, "n"] == n
        # outside source: scipy.stats.binomtest, two-sided exact binomial test
        assert cells.at[site, "binom_p"] == pytest.approx(stats.binomtest(k, n, p).pvalue, rel=1e-12)
    assert cells["warning"].tolist() == [False, True, False]
    assert sum("site 'B'" in text and "declared rate is 0.5" in text for text in study.warnings) == 1
    np.testing.assert_allclose(study.known_rate[study.site == "C"], 0.4)


def test_cell_rates_with_a_stratum():
    frame = base_frame().assign(band=lambda f: np.where(f.index % 4 < 2, "lo", "hi"))
    rates = {"A": 0.5, "B:lo": 0.4, "B:hi": 0.6, "C": 0.5}
    study = _load(frame, id="unit", stratum="band", rates=rates)
    b_lo = (study.site == "B") & (study.stratum == "lo")
    np.testing.assert_allclose(study.known_rate[b_lo], 0.4)
    assert list(study.cells.columns) == [
        "site", "stratum", "n", "n_treated", "n_control", "rate_declared", "rate_realized", "binom_p", "warning"]
    with pytest.raises(SiteproofError, match="both for the whole site and for its stratum"):
        _load(frame, id="unit", stratum="band", rates={**rates, "B": 0.5})
    with pytest.raises(SiteproofError, match="names a stratum, but no stratum column"):
        _load(frame, id="unit", rates=rates)


def test_intake_of_a_valid_file_emits_no_python_errors(tmp_path):
    path = tmp_path / "trial.csv"
    base_frame().to_csv(path, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # no numpy warnings leak out of intake
        study = load_study(StudySpec(data=path, outcome="y", treatment="w", site="site", id="unit",
                                     rates={"A": 0.5, "B": 0.5, "C": 0.5}))
    assert study.warnings == () and study.n == 60 and study.n_sites == 3
