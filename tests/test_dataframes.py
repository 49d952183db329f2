"""Frames from other libraries (polars, pyarrow) give exactly what the same table in pandas gives.

analyze() and the Explorer convert them once to pandas (stratagem.dataframes.to_pandas_input); the
numbers, the messages and the strata order must not depend on which library held the table.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.dataframes import to_pandas_input
from stratagem.errors import DataError, MissingValuesError

pl = pytest.importorskip("polars")
pytest.importorskip("narwhals")
pa = pytest.importorskip("pyarrow")

BASE = dict(exposure="visited", outcome="on_target")
CASES = {
    "crude": dict(method="crude", strata=("sex", "lives_alone")),
    "mantel-haenszel": dict(
        method="mantel-haenszel", measure="or", strata=("insulin",), confounders=("district", "sex")
    ),
    "aipw": dict(
        method="aipw",
        strata=("lives_alone", "age"),
        bins={"age": 3},
        confounders=("age", "deprivation", "clinic_visits", "years_diagnosed", "district"),
    ),
}


@pytest.fixture(scope="module")
def demo():
    return sg.demo_data()


def assert_same_analysis(got: sg.Analysis, want: sg.Analysis) -> None:
    assert got.spec == want.spec
    pd.testing.assert_series_equal(got.overall, want.overall, check_exact=True)
    pd.testing.assert_frame_equal(got.strata, want.strata, check_exact=True)
    pd.testing.assert_frame_equal(got.heterogeneity, want.heterogeneity, check_exact=True)
    pd.testing.assert_frame_equal(got.diagnostics, want.diagnostics, check_exact=True)
    assert got.notes == want.notes
    assert (got.n_input, got.n_dropped) == (want.n_input, want.n_dropped)


@pytest.mark.parametrize("method", list(CASES))
@pytest.mark.parametrize("library", ["polars", "polars-lazy", "pyarrow"])
def test_other_frames_give_exactly_the_pandas_result(demo, method, library):
    other = {
        "polars": lambda: pl.from_pandas(demo),
        "polars-lazy": lambda: pl.from_pandas(demo).lazy(),
        "pyarrow": lambda: pa.Table.from_pandas(demo, preserve_index=False),
    }[library]()
    want = sg.analyze(demo, **BASE, **CASES[method])
    got = sg.analyze(other, **BASE, **CASES[method])
    assert len(want.strata) > 1 and want.strata["status"].eq("ok").all()
    assert_same_analysis(got, want)


def test_polars_categorical_levels_follow_polars_order(demo):
    """polars orders Categorical values lexically, so strata come in the order pandas gives them."""
    shuffled = demo.assign(sex=demo["sex"].astype(str)).iloc[::-1].reset_index(drop=True)
    assert shuffled["sex"].iloc[0] == "male"  # first seen: what polars' own export would list first
    frame = pl.from_pandas(shuffled).with_columns(pl.col("sex").cast(pl.Categorical))
    got = sg.analyze(frame, **BASE, method="crude", strata=("sex",))
    assert list(got.strata["sex"]) == ["female", "male"]
    want = sg.analyze(shuffled, **BASE, method="crude", strata=("sex",))
    pd.testing.assert_frame_equal(got.strata, want.strata, check_exact=True)


def test_polars_enum_keeps_its_level_order(demo):
    levels = ["yes", "no"]  # not alphabetical: the Enum's order must be the strata order
    frame = pl.from_pandas(demo).with_columns(pl.col("lives_alone").cast(pl.String).cast(pl.Enum(levels)))
    got = sg.analyze(frame, **BASE, method="crude", strata=("lives_alone",))
    assert list(got.strata["lives_alone"]) == levels
    reference = demo.assign(lives_alone=pd.Categorical(demo["lives_alone"].astype(str), categories=levels))
    want = sg.analyze(reference, **BASE, method="crude", strata=("lives_alone",))
    pd.testing.assert_frame_equal(got.strata, want.strata, check_exact=True)
    pd.testing.assert_series_equal(got.overall, want.overall, check_exact=True)


def with_gaps(demo: pd.DataFrame) -> pd.DataFrame:
    df = demo.copy()
    df["age"] = df["age"].astype(float)
    df.loc[[3, 10, 11], "age"] = np.nan
    df["district"] = df["district"].astype(object)
    df.loc[[5], "district"] = None
    return df


def test_nulls_give_the_pandas_message_and_the_same_dropped_rows(demo):
    gappy = with_gaps(demo)
    frame = pl.from_pandas(gappy)
    assert frame["age"].null_count() == 3 and frame["district"].null_count() == 1
    fields = dict(**BASE, method="crude", strata=("sex",), confounders=("age", "district"))
    with pytest.raises(MissingValuesError) as from_pandas:
        sg.analyze(gappy, **fields, missing="raise")
    with pytest.raises(MissingValuesError) as from_polars:
        sg.analyze(frame, **fields, missing="raise")
    assert str(from_polars.value) == str(from_pandas.value)
    assert "'age': 3" in str(from_polars.value) and "'district': 1" in str(from_polars.value)
    want = sg.analyze(gappy, **fields, missing="drop")
    got = sg.analyze(frame, **fields, missing="drop")
    assert got.n_dropped == 4
    assert_same_analysis(got, want)


def test_boolean_exposure_with_nulls_stays_boolean(demo):
    frame = pl.from_pandas(demo).with_columns(
        pl.when(pl.int_range(pl.len()) == 0).then(None).otherwise(pl.col("visited") == 1).alias("visited")
    )
    assert frame.schema["visited"] == pl.Boolean and frame["visited"].null_count() == 1
    converted = to_pandas_input(frame)
    assert converted["visited"].dtype == "boolean"
    got = sg.analyze(frame, **BASE, method="crude", missing="drop")
    want = sg.analyze(demo.iloc[1:].reset_index(drop=True), **BASE, method="crude")
    pd.testing.assert_series_equal(got.overall, want.overall, check_exact=True)
    assert got.n_dropped == 1


def test_the_users_frame_is_unchanged(demo):
    frame = pl.from_pandas(with_gaps(demo)).with_columns(pl.col("sex").cast(pl.String).cast(pl.Categorical))
    before = frame.clone()
    sg.analyze(frame, **BASE, **CASES["aipw"], missing="drop")
    sg.analyze(frame, **BASE, **CASES["crude"], missing="drop")
    converted = to_pandas_input(frame)
    converted.loc[0, "age"] = -1.0  # the copy is the caller's to change; the polars frame is not shared
    assert frame.equals(before)
    assert frame.schema == before.schema


def test_only_the_used_columns_are_converted_when_all_are_present(demo):
    frame = pl.from_pandas(demo)
    assert list(to_pandas_input(frame, columns=["on_target", "sex"]).columns) == ["sex", "on_target"]
    # a missing column: everything is converted so the error can list the real columns
    assert list(to_pandas_input(frame, columns=["nope"]).columns) == list(demo.columns)
    with pytest.raises(sg.errors.ColumnNotFoundError, match="Columns are: \\['sex', 'lives_alone'"):
        sg.analyze(frame, exposure="visited", outcome="nope")


def test_pandas_input_is_returned_as_is(demo):
    assert to_pandas_input(demo) is demo


@pytest.mark.parametrize(
    "data",
    [[{"visited": 1, "on_target": 0}], {"visited": [1, 0]}, "not-a-table.csv", 3.0],
    ids=["list-of-dicts", "dict", "csv-path", "number"],
)
def test_unsupported_input_names_what_is_accepted(data):
    with pytest.raises(DataError, match="must be a pandas DataFrame, or a polars DataFrame") as info:
        sg.analyze(data, **BASE)
    message = str(info.value)
    assert f"got {type(data).__name__}" in message
    assert "pyarrow Table" in message and "Parquet path" in message


def test_a_series_is_not_a_table(demo):
    with pytest.raises(DataError, match="got Series"):
        sg.analyze(pl.from_pandas(demo["visited"]), **BASE)


def test_repeated_column_names_are_named():
    table = pa.table([[0, 1, 0, 1], [0, 1, 1, 0], [1, 1, 0, 0]], names=["visited", "on_target", "visited"])
    with pytest.raises(DataError, match=r"Column names \['visited'\] appear more than once"):
        sg.analyze(table, **BASE)


def test_explorer_on_polars_shows_what_analyze_gives(demo):
    from stratagem.widgets.explorer import Explorer
    from stratagem.widgets.payload import analysis_payload

    frame = pl.from_pandas(demo)
    before = frame.clone()
    ex = Explorer(frame, **BASE, method="aipw", confounders=CASES["aipw"]["confounders"], strata=["sex"])
    assert isinstance(ex.data, pd.DataFrame)
    assert ex._result == analysis_payload(sg.analyze(demo, **ex.spec.to_dict()))
    assert [r["stratum"] for r in ex._result["rows"]][:2] == ["sex=female", "sex=male"]
    ex.strata = ["lives_alone", "insulin"]  # as the front end does when a chip is dropped
    ex.measure = "rr"
    ex.wait(60)
    assert ex._status["state"] == "idle", ex._status
    assert list(ex.spec.strata) == ["lives_alone", "insulin"]
    assert ex._result == analysis_payload(sg.analyze(demo, **ex.spec.to_dict()))
    assert ex._result == analysis_payload(sg.analyze(frame, **ex.spec.to_dict()))
    reference = Explorer(
        demo, **BASE, method="aipw", confounders=CASES["aipw"]["confounders"], strata=["sex"]
    )
    assert ex._variables == reference._variables  # the chips and their tags
    assert frame.equals(before)


def test_explorer_rejects_what_it_cannot_read():
    from stratagem.widgets.explorer import Explorer

    with pytest.raises(DataError, match="must be a pandas DataFrame, or a polars DataFrame"):
        Explorer([{"visited": 1, "on_target": 0}], **BASE)
