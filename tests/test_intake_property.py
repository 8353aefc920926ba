"""Property tests: whatever table or file a user hands over, intake either succeeds or raises SiteproofError.

Random tables mix numbers, missing values, infinities, booleans, text and mixed-type columns under the
column names the study description uses (and some it does not), with random role choices, rates and
flags.  A traceback of any other exception type would be a bug.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from siteproof.core.errors import SiteproofError, SiteproofWarning
from siteproof.intake.study import StudySpec, load_study

pytestmark = pytest.mark.filterwarnings("ignore::siteproof.core.errors.SiteproofWarning")

NAMES = ["y", "w", "s", "x1", "x2", "id", "c", "g"]
SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])

cell = st.one_of(
    st.none(),
    st.integers(-3, 3),
    st.floats(allow_nan=True, allow_infinity=True, width=32),
    st.booleans(),
    st.sampled_from(["0", "1", "true", "FALSE", "a", "b", "", "?", "1.5", "é", "NA"]),
    st.text(alphabet="ab01 ,;\"\n", max_size=4),
)


@st.composite
def column(draw: st.DrawFn, n: int) -> list:
    """A column of one flavour: a constant-type column or a mixture."""
    flavour = draw(st.sampled_from(["binary", "small_int", "float", "text", "mixed", "bool"]))
    if flavour == "binary":
        values = draw(st.lists(st.sampled_from([0, 1, None]), min_size=n, max_size=n))
    elif flavour == "small_int":
        values = draw(st.lists(st.integers(0, 4), min_size=n, max_size=n))
    elif flavour == "float":
        values = draw(st.lists(st.one_of(st.floats(-1e6, 1e6), st.just(math.nan)), min_size=n, max_size=n))
    elif flavour == "text":
        values = draw(st.lists(st.sampled_from(["A", "B", "C", None, "x y"]), min_size=n, max_size=n))
    elif flavour == "bool":
        values = draw(st.lists(st.sampled_from([True, False, None]), min_size=n, max_size=n))
    else:
        values = draw(st.lists(cell, min_size=n, max_size=n))
    return values


@st.composite
def study_input(draw: st.DrawFn) -> tuple[pd.DataFrame, StudySpec]:
    n = draw(st.integers(0, 45))  # the column names y, w, s are always present, others at random
    names = ["y", "w", "s"] + draw(st.lists(st.sampled_from(NAMES[3:]), max_size=5, unique=True))
    frame = pd.DataFrame({name: pd.Series(draw(column(n)), dtype=object) for name in names})
    if draw(st.booleans()):
        frame = frame.infer_objects()
    maybe = st.one_of(st.none(), st.sampled_from(NAMES))
    rates = draw(st.one_of(
        st.none(),
        st.dictionaries(st.sampled_from(["A", "B", "C", "0", "1", "A:a", "B:b"]),
                        st.one_of(st.floats(-0.5, 1.5), st.just(math.nan)), max_size=4),
    ))
    spec = StudySpec(
        data="random-table",
        outcome=draw(st.sampled_from(["y"] * 4 + NAMES)),
        treatment=draw(st.sampled_from(["w"] * 4 + NAMES)),
        site=draw(st.sampled_from(["s"] * 4 + NAMES)),
        treated_value=draw(st.one_of(st.none(), st.sampled_from(["1", "a", "True", "0.0"]))),
        covariates=draw(st.one_of(st.none(), st.lists(st.sampled_from(NAMES), max_size=3))),
        id=draw(maybe),
        cost=draw(maybe),
        stratum=draw(maybe),
        rates=rates,
        keep_columns=draw(st.lists(st.sampled_from(NAMES), max_size=1)),
        drop_columns=draw(st.lists(st.sampled_from(NAMES), max_size=1)),
    )
    return frame, spec


def _check_loaded(study, frame: pd.DataFrame) -> None:
    blind = study.blind
    assert blind.X.shape == (blind.n, len(blind.feature_names))
    assert np.isfinite(blind.X).all() and np.isfinite(blind.y).all()
    assert set(np.unique(blind.w)) == {0, 1}
    assert blind.n + sum(blind.n_excluded.values()) == len(frame)
    assert study.site.shape == (blind.n,) and study.known_rate.shape == (blind.n,)


@SETTINGS
@given(study_input())
def test_random_tables_never_raise_anything_but_siteproof_error(data: tuple[pd.DataFrame, StudySpec]) -> None:
    frame, spec = data
    try:
        study = load_study(spec, frame=frame)
    except SiteproofError as exc:
        assert exc.what and exc.fix and "\n" not in exc.one_line()
        return
    _check_loaded(study, frame)


@st.composite
def nearly_valid(draw: st.DrawFn) -> tuple[pd.DataFrame, StudySpec]:
    """A valid-looking trial with random damage, so that the later checks are reached too."""
    n = draw(st.integers(18, 50))
    site = draw(st.lists(st.sampled_from(["A", "B", "C"]), min_size=n, max_size=n))
    w = draw(st.lists(st.sampled_from([0, 1]), min_size=n, max_size=n))
    y = draw(st.lists(st.floats(-10, 10), min_size=n, max_size=n))
    frame = pd.DataFrame({"s": site, "w": pd.Series(w, dtype=object), "y": y})
    for name in ("w", "y"):
        holes = draw(st.lists(st.integers(0, n - 1), max_size=3))
        frame.loc[holes, name] = None
    frame["x1"] = draw(column(n))
    frame["x2"] = draw(column(n))
    rates = draw(st.one_of(st.none(), st.fixed_dictionaries({k: st.floats(0.01, 0.99) for k in ["A", "B", "C"]})))
    return frame, StudySpec(data="random-table", outcome="y", treatment="w", site="s", rates=rates)


@SETTINGS
@given(nearly_valid())
def test_damaged_trials_never_raise_anything_but_siteproof_error(data: tuple[pd.DataFrame, StudySpec]) -> None:
    frame, spec = data
    try:
        study = load_study(spec, frame=frame)
    except SiteproofError:
        return
    _check_loaded(study, frame)


@settings(max_examples=60, deadline=None)
@given(st.binary(max_size=300), st.sampled_from([
    "data.csv", "data.parquet", "data.tsv", "data", "data.dta", "data.xpt", "data.sas7bdat", "data.sav", "data.feather",
]))
def test_random_files_never_raise_anything_but_siteproof_error(tmp_path_factory, payload: bytes, name: str) -> None:
    path = tmp_path_factory.mktemp("files") / name
    path.write_bytes(b"y,w,s\n" + payload if name.endswith("csv") else payload)
    spec = StudySpec(data=path, outcome="y", treatment="w", site="s")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SiteproofWarning)
        try:
            load_study(spec)
        except SiteproofError:
            pass
