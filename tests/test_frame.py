"""Reading the table: every input problem gets a clear error naming the column and the fix."""

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem import errors


@pytest.fixture
def small():
    rng = np.random.default_rng(1)
    n = 200
    return pd.DataFrame(
        {
            "treated": rng.integers(0, 2, n),
            "died": rng.integers(0, 2, n),
            "weight": rng.normal(70, 10, n),
            "sex": rng.choice(["f", "m"], n),
            "age": rng.uniform(20, 80, n),
            "site": rng.choice(list("ABC"), n),
        }
    )


def test_missing_column_names_it_and_lists_columns(small):
    with pytest.raises(errors.ColumnNotFoundError, match=r"'Sex' \(given as strata\).*Did you mean 'sex'"):
        sg.analyze(small, exposure="treated", outcome="died", strata=("Sex",))


def test_exposure_with_many_levels_lists_levels(small):
    with pytest.raises(errors.ExposureError, match=r"'site' must be binary.*found 3 levels.*'A'"):
        sg.analyze(small, exposure="site", outcome="died")


def test_exposure_with_two_named_levels_asks_for_exposed_level(small):
    with pytest.raises(errors.ExposureError, match="Pass exposed_level="):
        sg.analyze(small, exposure="sex", outcome="died")
    a = sg.analyze(small, exposure="sex", outcome="died", exposed_level="m")
    assert a.overall["n_exposed"] == (small["sex"] == "m").sum()


def test_exposed_level_not_present(small):
    with pytest.raises(errors.ExposureError, match="does not occur"):
        sg.analyze(small, exposure="sex", outcome="died", exposed_level="x")


def test_constant_outcome_is_refused(small):
    df = small.assign(died=1)
    with pytest.raises(errors.OutcomeError, match="'died' is constant"):
        sg.analyze(df, exposure="treated", outcome="died")


def test_measure_must_fit_outcome(small):
    with pytest.raises(errors.MeasureError, match=r"measure='rr' needs a binary.*'weight' is numeric.*'md'"):
        sg.analyze(small, exposure="treated", outcome="weight", measure="rr")
    with pytest.raises(errors.MeasureError, match=r"measure='md' is for a numeric outcome.*'died'.*'rd'"):
        sg.analyze(small, exposure="treated", outcome="died", measure="md")


def test_missing_values_dropped_and_counted(small):
    df = small.copy()
    df.loc[[3, 5], "died"] = np.nan
    df.loc[7, "sex"] = None
    a = sg.analyze(df, exposure="treated", outcome="died", strata=("sex",), method="crude")
    assert a.n_dropped == 3
    assert a.overall["n"] == 197
    assert any("3 row(s) with missing values dropped" in n and "'died': 2" in n for n in a.notes)


def test_missing_values_raise_on_request(small):
    df = small.copy()
    df.loc[3, "died"] = np.nan
    with pytest.raises(errors.MissingValuesError, match=r"'died': 1.*missing='drop'"):
        sg.analyze(df, exposure="treated", outcome="died", missing="raise")


def test_too_many_levels_for_a_text_modifier(small):
    df = small.assign(code=[f"c{i % 30}" for i in range(len(small))])
    with pytest.raises(errors.ModifierError, match=r"'code' has 30 levels, more than max_levels=20"):
        sg.analyze(df, exposure="treated", outcome="died", strata=("code",))
    a = sg.analyze(df, exposure="treated", outcome="died", strata=("code",), max_levels=30, method="crude")
    assert len(a.strata) == 30


def test_numeric_modifier_binned_by_default_with_readable_labels(small):
    a = sg.analyze(small, exposure="treated", outcome="died", strata=("age",), method="crude")
    assert len(a.strata) == 4
    labels = list(a.strata["age"])
    assert labels[0].startswith("[") and labels[-1].endswith("]")
    assert a.strata["n"].sum() == len(small)
    assert any("cut into 4 quantile bins" in n for n in a.notes)


def test_explicit_bin_edges(small):
    a = sg.analyze(
        small, exposure="treated", outcome="died", strata=("age",), bins={"age": [0, 40, 100]}, method="crude"
    )
    assert list(a.strata["age"]) == ["[0, 40)", "[40, 100]"]
    assert a.strata["n"].tolist() == [(small.age < 40).sum(), (small.age >= 40).sum()]


def test_bin_edges_must_cover_values(small):
    with pytest.raises(errors.ModifierError, match="Widen the first or last edge"):
        sg.analyze(small, exposure="treated", outcome="died", strata=("age",), bins={"age": [30, 100]})


def test_crossed_strata_in_nesting_order(small):
    a = sg.analyze(small, exposure="treated", outcome="died", strata=("sex", "site"), method="crude")
    assert list(a.strata.columns[:3]) == ["sex", "site", "stratum"]
    assert list(zip(a.strata.sex, a.strata.site)) == [(s, t) for s in "fm" for t in "ABC"]
    assert a.strata.stratum.iloc[0] == "sex=f, site=A"


def test_boolean_and_integer_coded_modifiers(small):
    df = small.assign(flag=small["sex"] == "f", grade=(small["age"] // 20).astype(int))
    a = sg.analyze(df, exposure="treated", outcome="died", strata=("flag", "grade"), method="crude")
    assert set(a.strata.flag) == {"False", "True"}
    assert set(a.strata.grade) == {"1", "2", "3"}


def test_stratum_without_exposed_rows_has_reason_others_estimated(small):
    df = small.copy()
    df.loc[df.site == "C", "treated"] = 0
    a = sg.analyze(df, exposure="treated", outcome="died", strata=("site",), method="crude")
    row = a.strata.set_index("site").loc["C"]
    assert row["status"] == "no exposed rows in this stratum"
    assert np.isnan(row["estimate"])
    assert (a.strata.set_index("site").loc[["A", "B"], "status"] == "ok").all()


def test_input_is_never_mutated(small):
    df = small.copy()
    df.loc[3, "died"] = np.nan
    before = df.copy()
    sg.analyze(df, exposure="treated", outcome="died", strata=("age", "sex"), method="crude")
    pd.testing.assert_frame_equal(df, before)


def test_not_a_dataframe():
    with pytest.raises(errors.DataError, match="must be a pandas DataFrame"):
        sg.analyze([[1, 2]], exposure="a", outcome="y")


def test_exact_needs_potential_outcomes(small):
    with pytest.raises(errors.SpecError, match="potential_outcomes=\\('y0', 'y1'\\)"):
        sg.analyze(small, exposure="treated", outcome="died", method="exact")


def test_method_defaults(small):
    assert sg.analyze(small, exposure="treated", outcome="died").spec.method == "crude"
    assert sg.analyze(small, exposure="treated", outcome="died").spec.measure == "rd"
    assert sg.analyze(small, exposure="treated", outcome="weight").spec.measure == "md"
