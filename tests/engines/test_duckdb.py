"""DuckDB engine: the same Analysis as in memory, from aggregate queries only.

Checks: every method equals the pandas path on the same rows (counts-based methods to 1e-8,
model-based to 1e-6), through a relation and through a Parquet file; numeric outcomes, frequency
columns, missing values, binned modifiers; bad input raises the same errors as pandas; SQL text
never holds a column name or a value unquoted.
"""

import numpy as np
import pandas as pd
import pytest

duckdb = pytest.importorskip("duckdb")

import stratagem as sg  # noqa: E402
from stratagem.engines import analyze_engine, sql  # noqa: E402
from stratagem.errors import (  # noqa: E402
    ColumnNotFoundError,
    DataError,
    ExposureError,
    MeasureError,
    MissingValuesError,
    ModifierError,
    OutcomeError,
)
from stratagem.spec import Spec  # noqa: E402

NUMBERS = ["n", "n_exposed", "n_unexposed", "mean_exposed", "mean_unexposed", "estimate", "se",
           "ci_low", "ci_high", "p_value"]


def assert_same_effects(a, b, tol):
    """Same strata (labels, status) and the same numbers to ``tol`` (absolute), overall included."""
    assert list(a.strata.columns) == list(b.strata.columns)
    assert list(a.strata["stratum"]) == list(b.strata["stratum"])
    assert list(a.strata["status"]) == list(b.strata["status"])
    x, y = a.strata[NUMBERS].to_numpy(float), b.strata[NUMBERS].to_numpy(float)
    assert np.array_equal(np.isnan(x), np.isnan(y))
    np.testing.assert_allclose(y, x, rtol=0, atol=tol, equal_nan=True)
    np.testing.assert_allclose(b.overall[NUMBERS].to_numpy(float), a.overall[NUMBERS].to_numpy(float),
                               rtol=0, atol=tol, equal_nan=True)
    assert list(a.overall.index) == list(b.overall.index)


def assert_same_checks(a, b):
    """Every in-memory check (arm sizes, propensity ranges, common support, weights, balance), in the
    same order and with the same warnings, then the two rows saying where the data lives; returns the
    engine's Checks without those two rows."""
    checks = b.diagnostics
    engine_rows = checks["check"].str.contains("DuckDB")
    assert list(checks["check"][engine_rows]) == ["rows scanned in DuckDB (the data stays there)",
                                                  "full scans in DuckDB"]
    same = checks[~engine_rows].reset_index(drop=True)
    mem = a.diagnostics.reset_index(drop=True)
    assert list(zip(same["stratum"], same["check"], same["arm"])) == list(zip(mem["stratum"], mem["check"], mem["arm"]))
    np.testing.assert_allclose(same["value"].to_numpy(float), mem["value"].to_numpy(float), rtol=1e-6, atol=1e-8)
    assert list(same["warning"]) == list(mem["warning"])
    assert [n for n in b.notes if n.startswith("Checks: ")] == [n for n in a.notes if n.startswith("Checks: ")]
    return same


CONF = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")


def _both(df, rel, **kw):
    return sg.analyze(df, **kw), analyze_engine(rel, Spec(**kw))


@pytest.mark.parametrize("measure", ["rd", "rr", "or"])
@pytest.mark.parametrize("method", ["crude", "mantel-haenszel"])
def test_counts_methods_equal_pandas(demo, rel, method, measure):
    a, b = _both(demo, rel, exposure="visited", outcome="on_target", strata=("sex", "age"),
                 confounders=CONF, method=method, measure=measure)
    assert_same_effects(a, b, 1e-8)
    assert a.notes == b.notes[: len(a.notes)]  # binning notes included, then where the data was
    balance = assert_same_checks(a, b)
    assert balance["check"].str.startswith("smd before").sum() > 0
    assert "DuckDB" in b.notes[-1]
    pd.testing.assert_frame_equal(a.response_types, b.response_types)


@pytest.mark.parametrize("method", ["standardization", "ipw", "aipw"])
def test_model_methods_equal_pandas(demo, rel, method):
    a, b = _both(demo, rel, exposure="visited", outcome="on_target", strata=("sex", "lives_alone"),
                 confounders=CONF, method=method)
    assert_same_effects(a, b, 1e-6)
    het_a = a.heterogeneity.set_index("test")
    het_b = b.heterogeneity.set_index("test")
    for test in ("cochran_q", "interaction_wald", "gail_simon"):
        assert het_b.loc[test, "statistic"] == pytest.approx(het_a.loc[test, "statistic"], rel=1e-6)
    assert np.isnan(het_b.loc["interaction_lr", "statistic"])
    checks = b.diagnostics
    assert {"n", "propensity min", "propensity max", "rows scanned in DuckDB (the data stays there)",
            "full scans in DuckDB"} <= set(checks["check"])
    assert (checks.loc[checks["check"] == "full scans in DuckDB", "value"] == b.extra["engine"]["scans"]).all()
    same = assert_same_checks(a, b)
    assert "outside common support" in set(same["check"])
    smd_b = same[same["check"].str.startswith("smd")]
    assert len(smd_b) > 0
    assert any(check.startswith("smd after") for check in smd_b["check"]) == (method != "standardization")


@pytest.mark.parametrize("method", ["crude", "mantel-haenszel", "standardization", "aipw"])
def test_numeric_outcome_and_counts_column(method):
    rng = np.random.default_rng(3)
    n = 3000
    df = pd.DataFrame({
        "group": rng.choice(["a", "b", "c"], n),
        "dose": rng.normal(50, 10, n),
        "site": rng.choice(["x", "y"], n),
        "flag": rng.random(n) < 0.3,
        "freq": rng.integers(0, 4, n).astype(float),
    })
    df["treated"] = rng.random(n) < 1 / (1 + np.exp(-(df["dose"] - 50) / 10))
    df["cost"] = 100 + 5 * df["treated"] + 0.3 * df["dose"] + rng.normal(0, 4, n)
    kw = dict(exposure="treated", outcome="cost", strata=("group", "dose"), bins={"dose": 3},
              confounders=("site", "flag", "dose"), method=method, counts="freq")
    a = sg.analyze(df, **kw)
    b = analyze_engine(duckdb.connect().from_df(df), Spec(**kw))
    assert_same_effects(a, b, 1e-8 if method in ("crude", "mantel-haenszel") else 1e-6)


def test_parquet_path_and_missing_values(demo, tmp_path):
    df = demo.copy()
    df.loc[::17, "age"] = np.nan
    df.loc[::29, "district"] = None
    path = tmp_path / "demo.parquet"
    df.to_parquet(path)
    kw = dict(exposure="visited", outcome="on_target", strata=("insulin", "age"), confounders=CONF,
              method="mantel-haenszel", measure="rr")
    a = sg.analyze(df, **kw)
    b = sg.analyze(str(path), **kw)  # analyze() hands a Parquet path to the DuckDB engine
    assert_same_effects(a, b, 1e-8)
    assert a.n_dropped == b.n_dropped > 0 and a.n_input == b.n_input
    assert a.notes[0] == b.notes[0] and "missing values dropped" in b.notes[0]
    with pytest.raises(MissingValuesError, match="Missing values in used columns"):
        analyze_engine(str(path), Spec(**kw, missing="raise"))


def test_bootstrap_through_the_table_of_counts(demo, rel):
    kw = dict(exposure="visited", outcome="on_target", strata=("sex",), method="crude",
              interval="bootstrap", n_boot=400, seed=5)
    a, b = _both(demo, rel, **kw)
    again = analyze_engine(rel, Spec(**kw))
    pd.testing.assert_frame_equal(b.strata, again.strata)  # reproducible with the seed
    # same distribution as resampling rows: intervals agree within Monte Carlo error
    width_a = (a.strata["ci_high"] - a.strata["ci_low"]).to_numpy()
    width_b = (b.strata["ci_high"] - b.strata["ci_low"]).to_numpy()
    np.testing.assert_allclose(width_b, width_a, rtol=0.2)
    numeric = analyze_engine(rel, Spec(**{**kw, "outcome": "age", "measure": "md"}))  # Poisson cells
    assert any(n.startswith("Bootstrap in DuckDB") for n in numeric.notes)


def test_errors_match_pandas(demo, rel):
    cases = [
        (dict(exposure="visited", outcome="on_targt"), ColumnNotFoundError),
        (dict(exposure="district", outcome="on_target"), ExposureError),
        (dict(exposure="visited", outcome="district"), OutcomeError),
        (dict(exposure="visited", outcome="on_target", measure="md"), MeasureError),
        (dict(exposure="visited", outcome="on_target", strata=("district",), max_levels=2), ModifierError),
        (dict(exposure="visited", outcome="on_target", strata=("age",), bins={"age": (40, 60, 80)}),
         ModifierError),
        (dict(exposure="visited", outcome="on_target", strata=("sex",), bins={"sex": 2}), ModifierError),
    ]
    for kw, error in cases:
        with pytest.raises(error) as in_memory:
            sg.analyze(demo, **kw)
        with pytest.raises(error) as in_engine:
            analyze_engine(rel, Spec(**kw))
        assert str(in_engine.value) == str(in_memory.value), kw


def test_unsupported_type_raises_before_reading_rows():
    con = duckdb.connect()
    r = con.sql("SELECT range % 2 AS a, range % 3 AS y, [range] AS listed FROM range(10)")
    with pytest.raises(DataError, match=r"Column 'listed' \(given as strata\) has the DuckDB type INTEGER\[\]|BIGINT\[\]"):
        analyze_engine(r, Spec(exposure="a", outcome="y", strata=("listed",)))


def test_awkward_column_names_are_quoted():
    rng = np.random.default_rng(0)
    n = 500
    odd = 'we"ird; DROP TABLE x; --'
    df = pd.DataFrame({odd: rng.choice(["p'q", 'r"s'], n), "a b": rng.integers(0, 2, n),
                       "y": rng.integers(0, 2, n)})
    kw = dict(exposure="a b", outcome="y", strata=(odd,), method="mantel-haenszel", confounders=())
    a = sg.analyze(df, **kw)
    b = analyze_engine(duckdb.connect().from_df(df), Spec(**kw))
    assert_same_effects(a, b, 1e-8)


def test_sql_builder_quotes_and_binds():
    frag = sql.fmt("SELECT {} FROM t WHERE {} = {}", sql.DUCKDB.ident('a"b'), sql.SPARK.ident("c`d"),
                   sql.value("it's"))
    assert frag.text == 'SELECT "a""b" FROM t WHERE `c``d` = ?'
    assert frag.params == ("it's",)
    with pytest.raises(ValueError):
        sql.fmt("{} {}", sql.raw("x"))


def test_user_relation_is_untouched(demo, rel):
    before = rel.df()
    analyze_engine(rel, Spec(exposure="visited", outcome="on_target", strata=("sex",), method="aipw",
                             confounders=CONF))
    pd.testing.assert_frame_equal(rel.df(), before)
