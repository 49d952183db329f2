"""Poisson bootstrap of the model-based methods inside an engine (``replicates.poisson_replicates``).

Checks: the Poisson(1) weights drawn in SQL have the Poisson(1) distribution; replicates repeat
exactly for a random state whatever order the rows are read in, and change with it; identical rows
get independent weights (a table with many duplicate rows still gets the right spread); the spread of
the replicates matches the influence-function standard errors, and the intervals match the in-memory
bootstrap (which refits the models on every replicate) within Monte Carlo error; options the engine
cannot bootstrap are refused with a message that says what to do.
"""

import numpy as np
import pandas as pd
import pytest

duckdb = pytest.importorskip("duckdb")

import stratagem as sg  # noqa: E402
from stratagem.engines import analyze_engine, replicates  # noqa: E402
from stratagem.engines.sql import DUCKDB, fmt, raw  # noqa: E402
from stratagem.errors import SpecError  # noqa: E402
from stratagem.spec import Spec  # noqa: E402

CONF = ("age", "deprivation", "district")
BASE = dict(exposure="visited", outcome="on_target", strata=("lives_alone",), confounders=CONF,
            interval="bootstrap")


def _rel(df):
    return duckdb.connect().from_df(df)


def test_poisson_weights_have_the_poisson_distribution():
    con = duckdb.connect()
    u = DUCKDB.uniform([raw("i"), raw("b")])
    w = replicates._poisson_weight(raw("u"))
    q = fmt("SELECT {} AS pw FROM (SELECT i, b, {} AS u FROM range(20000) t(i) CROSS JOIN "
            "(SELECT range AS b FROM range(10)) r) x", w, u)
    pw = con.execute(q.text, list(q.params)).df()["pw"].to_numpy()
    n = len(pw)
    assert n == 200_000
    # Poisson(1): mean 1, variance 1, P(0) = P(1) = exp(-1); tolerances are 5 standard errors
    assert abs(pw.mean() - 1.0) < 5 * np.sqrt(1.0 / n)
    assert abs(pw.var() - 1.0) < 5 * np.sqrt(3.0 / n)  # var of (W - 1)^2 is 3 for Poisson(1)
    for j in (0, 1):
        p = np.exp(-1.0)
        assert abs(np.mean(pw == j) - p) < 5 * np.sqrt(p * (1 - p) / n)
    assert abs(np.mean(pw == 2) - np.exp(-1.0) / 2) < 5 * np.sqrt(0.184 * 0.816 / n)


@pytest.mark.parametrize("method", ["standardization", "ipw", "aipw"])
def test_replicates_repeat_for_a_random_state_in_any_row_order(demo, method):
    spec = Spec(**BASE, method=method, n_boot=200, seed=11)
    a = analyze_engine(_rel(demo), spec)
    shuffled = demo.sample(frac=1.0, random_state=3).reset_index(drop=True)
    b = analyze_engine(_rel(shuffled), spec)
    ra, rb = a.extra["replicates"], b.extra["replicates"]
    assert ra[0].shape == (200, 3)
    np.testing.assert_allclose(rb[0], ra[0], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(rb[1], ra[1], rtol=1e-10, atol=1e-12)
    other = analyze_engine(_rel(demo), spec.replace(seed=12)).extra["replicates"]
    assert np.max(np.abs(other[0] - ra[0])) > 1e-4


@pytest.mark.parametrize("method", ["standardization", "ipw", "aipw"])
def test_spread_matches_influence_function_standard_errors(demo, method):
    spec = Spec(**BASE, method=method, n_boot=2000, seed=1)
    res = analyze_engine(_rel(demo), spec)
    m1_b, m0_b = res.extra["replicates"]
    cov = res.extra["covariance"]
    # the standard deviation of 2000 replicates is within about 1.6% of the truth (one standard error)
    np.testing.assert_allclose(m1_b.std(axis=0, ddof=1), np.sqrt(cov["v11"]), rtol=0.08)
    np.testing.assert_allclose(m0_b.std(axis=0, ddof=1), np.sqrt(cov["v00"]), rtol=0.08)
    assert any(n.startswith("Bootstrap in DuckDB: 2,000 Poisson-weighted replicates") for n in res.notes)
    wald = analyze_engine(_rel(demo), spec.replace(interval="wald"))
    np.testing.assert_allclose(res.strata["se"], wald.strata["se"], rtol=0.1)
    assert res.overall["estimate"] == pytest.approx(wald.overall["estimate"], abs=1e-12)


@pytest.mark.parametrize("measure", ["rd", "rr"])
def test_intervals_match_the_in_memory_refitting_bootstrap(demo, measure):
    kw = dict(BASE, method="aipw", measure=measure, n_boot=1000, seed=2)
    engine = sg.analyze(_rel(demo), **kw)
    memory = sg.analyze(demo, **kw)
    for col in ("ci_low", "ci_high"):
        np.testing.assert_allclose(engine.strata[col], memory.strata[col], rtol=0.03)
    width_e = engine.strata["ci_high"] - engine.strata["ci_low"]
    width_m = memory.strata["ci_high"] - memory.strata["ci_low"]
    np.testing.assert_allclose(width_e, width_m, rtol=0.15)


def test_identical_rows_get_independent_weights():
    """Every row is repeated 40 times: if copies shared their weights the spread would be ~6x too wide."""
    rng = np.random.default_rng(4)
    n = 60
    small = pd.DataFrame({"g": rng.integers(0, 2, n), "c": rng.integers(0, 3, n)})
    small["a"] = (rng.random(n) < 0.3 + 0.2 * small["c"] / 2).astype(int)
    small["y"] = (rng.random(n) < 0.2 + 0.3 * small["a"]).astype(int)
    big = small.loc[small.index.repeat(40)].reset_index(drop=True)
    spec = Spec(exposure="a", outcome="y", strata=("g",), confounders=("c",), method="ipw",
                interval="bootstrap", n_boot=1000, seed=9)
    res = analyze_engine(_rel(big), spec)
    m1_b, _ = res.extra["replicates"]
    np.testing.assert_allclose(m1_b.std(axis=0, ddof=1), np.sqrt(res.extra["covariance"]["v11"]), rtol=0.1)


def test_options_the_engine_cannot_bootstrap_are_refused(demo):
    with pytest.raises(SpecError, match="counts=.*pass interval='wald'"):
        counts = demo.groupby(["visited", "on_target", "lives_alone", "district"]).size().rename("n").reset_index()
        analyze_engine(_rel(counts), Spec(exposure="visited", outcome="on_target", strata=("lives_alone",),
                                          confounders=("district",), method="ipw", counts="n",
                                          interval="bootstrap"))
    with pytest.raises(SpecError, match="counts=.*pass interval='wald'"):
        counts = demo.groupby(["visited", "age", "sex"]).size().rename("n").reset_index()
        analyze_engine(_rel(counts), Spec(exposure="visited", outcome="age", strata=("sex",), method="crude",
                                          counts="n", interval="bootstrap"))


@pytest.mark.parametrize("method", ["crude", "mantel-haenszel"])
def test_numeric_outcome_counts_methods_bootstrap(demo, method):
    """Each replicate's cell means are exact Poisson-bootstrap means: the spread matches the in-memory
    bootstrap and the Wald standard errors; replicates repeat in any row order."""
    kw = dict(exposure="visited", outcome="age", strata=("sex", "insulin"), confounders=("deprivation", "district"),
              method=method, measure="md", interval="bootstrap", n_boot=1000, seed=6)
    engine = sg.analyze(_rel(demo), **kw)
    memory = sg.analyze(demo, **kw)
    wald = sg.analyze(demo, **{**kw, "interval": "wald"})
    np.testing.assert_allclose(engine.strata["estimate"], wald.strata["estimate"], atol=1e-9)
    np.testing.assert_allclose(engine.strata["se"], wald.strata["se"], rtol=0.12)
    np.testing.assert_allclose(engine.strata["se"], memory.strata["se"], rtol=0.15)
    width = lambda r: (r.strata["ci_high"] - r.strata["ci_low"]).to_numpy()  # noqa: E731
    np.testing.assert_allclose(width(engine), width(memory), rtol=0.15)
    assert any(n.startswith("Bootstrap in DuckDB: 1,000 Poisson-weighted") for n in engine.notes)
    smd = lambda r: r.diagnostics[r.diagnostics["check"].str.startswith("smd")]  # noqa: E731
    assert len(smd(memory)) > 0
    np.testing.assert_allclose(smd(engine)["value"].to_numpy(float), smd(memory)["value"].to_numpy(float),
                               atol=1e-9)
    shuffled = demo.sample(frac=1.0, random_state=8).reset_index(drop=True)
    again = sg.analyze(_rel(shuffled), **kw)
    np.testing.assert_allclose(again.extra["replicates"][0], engine.extra["replicates"][0], rtol=1e-9, atol=1e-9)
