"""Spark engine (local mode, two cores): the same numbers as pandas and DuckDB on the same rows.

Kept to a few checks, one session for the module: counts-based methods to 1e-8, AIPW to 1e-6, a
missing column and an unsupported type raise the pandas errors before any job runs.
"""

import os
import shutil

import numpy as np
import pytest

pyspark = pytest.importorskip("pyspark")
if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
    pytest.skip("PySpark needs Java (a JRE 17 or later)", allow_module_level=True)
duckdb = pytest.importorskip("duckdb")

import stratagem as sg  # noqa: E402
from stratagem.engines import analyze_engine  # noqa: E402
from stratagem.errors import ColumnNotFoundError, DataError  # noqa: E402
from stratagem.spec import Spec  # noqa: E402

NUMBERS = ["n", "n_exposed", "n_unexposed", "mean_exposed", "mean_unexposed", "estimate", "se",
           "ci_low", "ci_high", "p_value"]
CONF = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")


def _same(a, b, tol):
    assert list(a.strata["stratum"]) == list(b.strata["stratum"])
    assert list(a.strata["status"]) == list(b.strata["status"])
    np.testing.assert_allclose(b.strata[NUMBERS].to_numpy(float), a.strata[NUMBERS].to_numpy(float),
                               rtol=0, atol=tol, equal_nan=True)
    np.testing.assert_allclose(b.overall[NUMBERS].to_numpy(float), a.overall[NUMBERS].to_numpy(float),
                               rtol=0, atol=tol, equal_nan=True)


@pytest.fixture(scope="module")
def spark():
    from pyspark.sql import SparkSession

    session = (SparkSession.builder.master("local[2]").appName("stratagem-tests")
               .config("spark.ui.enabled", "false").config("spark.sql.shuffle.partitions", "2")
               .getOrCreate())
    yield session
    session.stop()


@pytest.fixture(scope="module")
def sdf(spark, demo):
    cols = ["sex", "insulin", "age", "deprivation", "clinic_visits", "years_diagnosed", "district",
            "visited", "on_target"]
    frame = demo[cols].copy()
    for c in ("sex", "insulin", "district"):
        frame[c] = frame[c].astype(str).astype(object)
    return spark.createDataFrame(frame), demo[cols]


@pytest.mark.parametrize("method,tol", [("crude", 1e-8), ("mantel-haenszel", 1e-8), ("aipw", 1e-6)])
def test_spark_equals_pandas_and_duckdb(sdf, method, tol):
    frame, df = sdf
    kw = dict(exposure="visited", outcome="on_target", strata=("sex", "age"), confounders=CONF,
              method=method, measure="rr" if method == "mantel-haenszel" else "rd")
    a = sg.analyze(df, **kw)
    s = analyze_engine(frame, Spec(**kw))
    d = analyze_engine(duckdb.connect().from_df(df), Spec(**kw))
    _same(a, s, tol)
    _same(d, s, tol)
    assert "Spark" in s.notes[-1]
    # the same Checks as DuckDB's (arm sizes, balance, propensities, weights), then Spark's own facts
    sc, dc = s.diagnostics, d.diagnostics
    sc, dc = sc[~sc["check"].str.contains("Spark")], dc[~dc["check"].str.contains("DuckDB")]
    assert list(zip(sc["stratum"], sc["check"], sc["arm"])) == list(zip(dc["stratum"], dc["check"], dc["arm"]))
    np.testing.assert_allclose(sc["value"].to_numpy(float), dc["value"].to_numpy(float), rtol=1e-6, atol=1e-8)
    assert list(sc["warning"]) == list(dc["warning"])


def test_spark_errors_before_any_job(spark, sdf):
    frame, _ = sdf
    with pytest.raises(ColumnNotFoundError, match="Column 'visits' \\(given as exposure\\)"):
        analyze_engine(frame, Spec(exposure="visits", outcome="on_target"))
    odd = spark.sql("SELECT id % 2 AS a, id % 2 AS y, map('k', id) AS m FROM range(5)")
    with pytest.raises(DataError, match="Column 'm' \\(given as strata\\) has the Spark type"):
        analyze_engine(odd, Spec(exposure="a", outcome="y", strata=("m",)))


def test_spark_poisson_bootstrap_repeats_and_agrees_with_duckdb(sdf):
    """Spark hashes with xxhash64 and DuckDB with its own hash: different draws, the same distribution."""
    frame, df = sdf
    kw = dict(exposure="visited", outcome="on_target", strata=("sex",), confounders=CONF, method="aipw",
              interval="bootstrap", n_boot=400, seed=4)
    s = analyze_engine(frame, Spec(**kw))
    again = analyze_engine(frame, Spec(**kw))
    np.testing.assert_allclose(again.extra["replicates"][0], s.extra["replicates"][0], rtol=1e-10)
    d = analyze_engine(duckdb.connect().from_df(df), Spec(**kw))
    np.testing.assert_allclose(s.strata["estimate"], d.strata["estimate"], atol=1e-6)
    np.testing.assert_allclose(s.strata["se"], d.strata["se"], rtol=0.2)
