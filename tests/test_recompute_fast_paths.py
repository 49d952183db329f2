"""The shortcuts that keep an Explorer recompute fast give exactly what the plain paths give."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.analysis import _text_as_categories
from stratagem.frame import prepare
from stratagem.spec import Spec
from stratagem.widgets.payload import plain, records

CONFOUNDERS = ("age", "deprivation", "district")


@pytest.fixture(scope="module")
def demo():
    df = sg.demo_data().iloc[:2500].copy()
    # levels whose order depends on how strings are compared: capitals, accents, spaces
    names = np.array(["Zeta", "alpha", "émile", "beta gamma"])
    df["place"] = pd.array(names[np.arange(len(df)) % 4], dtype="str")
    return df


def tables(a):
    return [a.to_frame(), a.heterogeneity, a.response_types, a.diagnostics]


@pytest.mark.parametrize("method", ["standardization", "ipw", "aipw"])
@pytest.mark.parametrize("measure", ["rd", "rr"])
def test_text_confounders_read_as_categories_give_the_same_numbers(demo, method, measure):
    # The same table with the text columns as plain Python objects takes the original path (no
    # categorical recoding inside analyze); every table must agree to the last digit.
    as_objects = demo.astype({"district": object, "place": object})
    kw = dict(exposure="visited", outcome="on_target", confounders=CONFOUNDERS + ("place",),
              strata=("sex", "insulin"), method=method, measure=measure)
    fast, plain_path = sg.analyze(demo, **kw), sg.analyze(as_objects, **kw)
    for mine, theirs in zip(tables(fast), tables(plain_path)):
        pd.testing.assert_frame_equal(mine, theirs, check_exact=True)
    assert fast.notes == plain_path.notes
    pd.testing.assert_series_equal(fast.overall, plain_path.overall, check_exact=True)


def test_recoding_keeps_values_and_leaves_the_input_alone(demo):
    spec = Spec.from_fields(exposure="visited", outcome="on_target", confounders=CONFOUNDERS + ("place",),
                            method="aipw")
    prep, _ = prepare(demo, spec)
    before = prep.confounders.copy()
    coded = _text_as_categories(prep)
    assert isinstance(coded.confounders["place"].dtype, pd.CategoricalDtype)
    assert list(coded.confounders["place"].cat.categories) == sorted(set(demo["place"]))
    assert coded.confounders["place"].astype(str).tolist() == before["place"].tolist()
    assert coded.confounders["age"].equals(before["age"])
    pd.testing.assert_frame_equal(prep.confounders, before)  # the Prepared given is not changed


def old_records(frame):
    """The row-wise conversion the payload used before (the reference for records())."""
    cols = [str(c) for c in frame.columns]
    return [{c: plain(v) for c, v in zip(cols, row)} for row in frame.itertuples(index=False, name=None)]


def test_records_column_wise_equals_row_wise():
    frame = pd.DataFrame({
        "f": [1.5, math.nan, math.inf],
        "i": np.array([1, 2, 3], dtype=np.int64),
        "b": [True, False, True],
        "s": pd.array(["a", None, "c"], dtype="str"),
        "o": [None, "x", 3],
        "n": pd.array([1, None, 3], dtype="Int64"),
        "c": pd.Categorical(["u", "v", "u"]),
        "t": pd.to_datetime(["2020-01-01", None, "2021-05-03"]),
    })
    got = records(frame)
    assert got == old_records(frame)
    assert [type(v) for v in got[0].values()] == [type(v) for v in old_records(frame)[0].values()]


@pytest.mark.parametrize("value, expected", [
    (1.25, 1.25), (math.nan, None), (-math.inf, None), (np.float64(2.5), 2.5), (3, 3),
    (np.int64(4), 4), (True, True), (np.bool_(False), False), ("a", "a"), (None, None),
])
def test_plain_fast_paths(value, expected):
    got = plain(value)
    assert got == expected and type(got) is type(expected)
