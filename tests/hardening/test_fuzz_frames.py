"""Fuzzed tables: whatever the table, ``analyze`` returns a sound result or raises a stratagem error.

Random DataFrames mix nullable integers, categoricals, booleans, strings, datetimes, all-missing
columns, tiny strata, empty frames, unicode and very long column names. For every draw, ``analyze``
must either raise a :class:`stratagem.errors.StratagemError` with a message, or return an Analysis in
which every row that is not ``"ok"`` says why and no ``"ok"`` row holds a missing estimate. The
table passed in must come back unchanged.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hardening_helpers import assert_ok_rows_finite, method_available
from hypothesis import given, settings
from hypothesis import strategies as st

import stratagem as sg
from stratagem.errors import StratagemError
from stratagem.spec import METHODS

KINDS = (
    "binary_int",
    "bool",
    "nullable_bool",
    "nullable_int",
    "float",
    "float_with_nan",
    "count",
    "category",
    "string",
    "two_strings",
    "datetime",
    "all_nan",
    "constant",
    "object_mixed",
)
AVAILABLE = [m for m in METHODS if method_available(m)]
EXAMPLES = settings(max_examples=max(10, settings.default.max_examples * 2))

name_text = st.text(
    alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), min_size=1, max_size=12
)
column_names = st.one_of(
    name_text,
    st.sampled_from(["ÿçé", "年齢", "🙂 mood", "a b", "x.y", "with\nnewline", "tab\there", " "]),
    st.integers(200, 2000).map(lambda k: "long_" + "é" * k),
)


def make_column(kind: str, n: int, rng: np.random.Generator) -> pd.Series:
    """One column of ``n`` values of the given kind."""
    if kind == "binary_int":
        return pd.Series(rng.integers(0, 2, n))
    if kind == "bool":
        return pd.Series(rng.random(n) < 0.5)
    if kind == "nullable_bool":
        values = pd.array(rng.random(n) < 0.5, dtype="boolean")
        values[rng.random(n) < 0.2] = pd.NA
        return pd.Series(values)
    if kind == "nullable_int":
        values = pd.array(rng.integers(-3, 4, n), dtype="Int64")
        values[rng.random(n) < 0.2] = pd.NA
        return pd.Series(values)
    if kind == "float":
        return pd.Series(rng.normal(0, 1, n))
    if kind == "float_with_nan":
        x = rng.normal(5, 2, n)
        x[rng.random(n) < 0.25] = np.nan
        return pd.Series(x)
    if kind == "count":
        return pd.Series(rng.integers(0, 4, n))
    if kind == "category":
        return pd.Series(pd.Categorical(rng.choice(["lo", "mid", "hi"], n), categories=["lo", "mid", "hi", "unused"]))
    if kind == "string":
        return pd.Series(rng.choice(["α", "β", "<b>γ</b>", "δ δ", ""], n), dtype="string")
    if kind == "two_strings":
        return pd.Series(rng.choice(["yes", "no"], n))
    if kind == "datetime":
        return pd.Series(pd.to_datetime("2024-01-01") + pd.to_timedelta(rng.integers(0, 400, n), unit="D"))
    if kind == "all_nan":
        return pd.Series(np.full(n, np.nan))
    if kind == "constant":
        return pd.Series(np.ones(n, dtype=int))
    if kind == "object_mixed":
        pool = np.array([1, "one", 2.5, None, True], dtype=object)
        return pd.Series(pool[rng.integers(0, len(pool), n)], dtype=object)
    raise AssertionError(kind)


@st.composite
def tables(draw):
    n = draw(st.sampled_from([0, 1, 2, 3, 5, 8, 20, 60]))
    kinds = draw(st.lists(st.sampled_from(KINDS), min_size=2, max_size=6))
    # Often give the table a usable binary exposure and outcome so analyses get past the checks.
    if draw(st.booleans()):
        kinds = ["binary_int", draw(st.sampled_from(["binary_int", "float", "bool"]))] + kinds
    names = draw(st.lists(column_names, min_size=len(kinds), max_size=len(kinds), unique=True))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    df = pd.DataFrame({name: make_column(kind, n, rng) for name, kind in zip(names, kinds)})
    return df, names


@st.composite
def analyses(draw):
    df, names = draw(tables())
    exposure, outcome = names[0], names[1]
    rest = names[2:]
    fields = dict(exposure=exposure, outcome=outcome)
    fields["strata"] = tuple(draw(st.lists(st.sampled_from(rest), unique=True, max_size=2))) if rest else ()
    left = [c for c in rest if c not in fields["strata"]]
    fields["confounders"] = tuple(draw(st.lists(st.sampled_from(left), unique=True, max_size=2))) if left else ()
    fields["method"] = draw(st.sampled_from(AVAILABLE + [None]))
    fields["measure"] = draw(st.sampled_from(["rd", "rr", "or", "md", None]))
    if fields["method"] == "exact" or (fields["method"] is None and draw(st.booleans())):
        pool = [c for c in names if c not in (exposure, outcome)]
        if len(pool) >= 2:
            fields["potential_outcomes"] = tuple(draw(st.permutations(pool))[:2])
    if draw(st.integers(0, 4)) == 0:
        fields["interval"] = "bootstrap"
        fields["n_boot"] = 20
    if draw(st.integers(0, 4)) == 0:
        fields["correction"] = 0.5
    if draw(st.integers(0, 5)) == 0 and rest:
        fields["counts"] = draw(st.sampled_from(rest))
    if draw(st.integers(0, 5)) == 0:
        fields["missing"] = "raise"
    return df, fields


def check_outcome(df: pd.DataFrame, fields: dict) -> str:
    """Run one analysis; return "error" or "result" after checking the contract; fail otherwise."""
    before = df.copy(deep=True)
    try:
        a = sg.analyze(df, **fields)
    except StratagemError as exc:
        assert str(exc).strip(), f"{type(exc).__name__} raised without a message"
        outcome = "error"
    else:
        assert_ok_rows_finite(a)
        for table in (a.strata, a.heterogeneity, a.response_types, a.diagnostics):
            assert isinstance(table, pd.DataFrame)
        assert a.overall["status"] == "ok" or a.overall["status"].strip()
        a.to_markdown()
        a._repr_html_()
        a.recipe()
        outcome = "result"
    pd.testing.assert_frame_equal(df, before)  # the user's table is never changed
    return outcome


@EXAMPLES
@given(case=analyses())
def test_analyze_returns_a_sound_result_or_a_stratagem_error(case):
    df, fields = case
    check_outcome(df, fields)


def _base(n=12, random_state=0):
    rng = np.random.default_rng(random_state)
    return pd.DataFrame({
        "x": np.tile([0, 1], n // 2),
        "y": np.tile([0, 0, 1, 1], n // 4 + 1)[:n],
        "num": rng.normal(0, 1, n),
        "grp": rng.choice(["a", "b"], n),
    })


@pytest.mark.parametrize("method", AVAILABLE)
@pytest.mark.parametrize(
    "change",
    [
        "empty",
        "no_columns",
        "one_row",
        "all_nan_confounder",
        "all_nan_modifier",
        "one_row_stratum",
        "datetime_modifier",
        "datetime_confounder",
        "string_confounder",
        "nullable_int_exposure",
        "nullable_bool_outcome",
        "categorical_exposure",
        "unicode_long_names",
        "only_missing_outcome",
    ],
)
def test_named_awkward_tables(method, change):
    """Each awkward table by name: a result whose rows say why, or a stratagem error."""
    df = _base()
    fields = dict(exposure="x", outcome="y", method=method)
    if method == "exact":
        df = df.assign(y0=df["y"], y1=1 - df["y"])
        fields["potential_outcomes"] = ("y0", "y1")
    if method not in ("crude", "exact"):
        fields["confounders"] = ("num",)
    if change == "empty":
        df = df.iloc[0:0]
    elif change == "no_columns":
        df = pd.DataFrame(index=range(5))
    elif change == "one_row":
        df = df.iloc[:1]
    elif change == "all_nan_confounder":
        df = df.assign(num=np.nan)
        fields["confounders"] = ("num",)
    elif change == "all_nan_modifier":
        df = df.assign(mod=np.nan)
        fields["strata"] = ("mod",)
    elif change == "one_row_stratum":
        df = pd.concat([df, df.iloc[:1].assign(grp="lonely")], ignore_index=True)
        fields["strata"] = ("grp",)
    elif change == "datetime_modifier":
        df = df.assign(when=pd.date_range("2024-01-01", periods=len(df), freq="D"))
        fields["strata"] = ("when",)
    elif change == "datetime_confounder":
        df = df.assign(when=pd.date_range("2024-01-01", periods=len(df), freq="D"))
        fields["confounders"] = ("when",)
    elif change == "string_confounder":
        fields["confounders"] = ("grp",)
    elif change == "nullable_int_exposure":
        x = pd.array(df["x"], dtype="Int64")
        x[0] = pd.NA
        df = df.assign(x=x)
    elif change == "nullable_bool_outcome":
        y = pd.array(df["y"].astype(bool), dtype="boolean")
        y[1] = pd.NA
        df = df.assign(y=y)
    elif change == "categorical_exposure":
        df = df.assign(x=pd.Categorical(np.where(df["x"] == 1, "treated", "control")))
        fields["exposed_level"] = "treated"
    elif change == "unicode_long_names":
        long = "ü" * 5000
        df = df.rename(columns={"x": long, "grp": "群 組 🙂"})
        fields.update(exposure=long, strata=("群 組 🙂",))
    elif change == "only_missing_outcome":
        df = df.assign(y=np.nan)
    check_outcome(df, fields)


def test_empty_frame_error_names_the_problem():
    with pytest.raises(StratagemError, match="No complete rows"):
        sg.analyze(_base().iloc[0:0], exposure="x", outcome="y")


def test_one_row_stratum_is_flagged_not_estimated():
    df = pd.concat([_base(), _base().iloc[:1].assign(grp="lonely")], ignore_index=True)
    a = sg.analyze(df, exposure="x", outcome="y", strata=("grp",), method="crude")
    row = a.strata.set_index("grp").loc["lonely"]
    assert row["status"] != "ok" and "exposed rows" in row["status"]
    assert np.isnan(row["estimate"])
