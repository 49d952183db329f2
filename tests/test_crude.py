"""Crude effects against hand-derived values.

The table used throughout (common practice, hand arithmetic)::

                 event   no event   total
    exposed        20        80       100     risk 0.20
    unexposed      10        90       100     risk 0.10

RD = 0.10, se = sqrt(.2*.8/100 + .1*.9/100) = sqrt(.0025) = 0.05
RR = 2, Var(log RR) = 1/20 - 1/100 + 1/10 - 1/100 = 0.13
OR = (20*90)/(80*10) = 2.25, Var(log OR) = 1/20 + 1/80 + 1/10 + 1/90
"""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import stratagem as sg

Z = stats.norm.ppf(0.975)


def table(a=20, b=80, c=10, d=90):
    return pd.DataFrame(
        {"x": [1, 1, 0, 0], "y": [1, 0, 1, 0], "n": [a, b, c, d]}
    )


def expand(counts: pd.DataFrame) -> pd.DataFrame:
    return counts.loc[counts.index.repeat(counts["n"])].drop(columns="n").reset_index(drop=True)


def test_risk_difference_by_hand():
    o = sg.analyze(table(), exposure="x", outcome="y", counts="n", measure="rd").overall
    assert o["estimate"] == pytest.approx(0.10)
    assert o["se"] == pytest.approx(0.05)
    assert o["ci_low"] == pytest.approx(0.10 - Z * 0.05)
    assert o["ci_high"] == pytest.approx(0.10 + Z * 0.05)
    assert o["p_value"] == pytest.approx(2 * stats.norm.sf(2.0))
    assert (o["mean_exposed"], o["mean_unexposed"]) == pytest.approx((0.2, 0.1))


def test_risk_ratio_by_hand():
    o = sg.analyze(table(), exposure="x", outcome="y", counts="n", measure="rr").overall
    se = math.sqrt(0.13)
    assert o["estimate"] == pytest.approx(2.0)
    assert o["se"] == pytest.approx(se)
    assert o["ci_low"] == pytest.approx(2.0 * math.exp(-Z * se))
    assert o["ci_high"] == pytest.approx(2.0 * math.exp(Z * se))


def test_odds_ratio_by_hand():
    o = sg.analyze(table(), exposure="x", outcome="y", counts="n", measure="or").overall
    se = math.sqrt(1 / 20 + 1 / 80 + 1 / 10 + 1 / 90)
    assert o["estimate"] == pytest.approx(2.25)
    assert o["se"] == pytest.approx(se)
    assert o["p_value"] == pytest.approx(2 * stats.norm.sf(math.log(2.25) / se))


def test_mean_difference_by_hand():
    df = pd.DataFrame({"x": [1, 1, 1, 0, 0, 0, 0], "y": [3.0, 5.0, 7.0, 1.0, 2.0, 3.0, 6.0]})
    o = sg.analyze(df, exposure="x", outcome="y").overall
    # exposed mean 5, var 4; unexposed mean 3, var 14/3; se = sqrt(4/3 + (14/3)/4)
    assert o["estimate"] == pytest.approx(2.0)
    assert o["se"] == pytest.approx(math.sqrt(4 / 3 + 14 / 12))


@pytest.mark.parametrize("measure", ["rd", "rr", "or"])
def test_counts_equal_expanded_rows(measure):
    counts = pd.concat(
        [table().assign(m="u"), table(12, 30, 7, 51).assign(m="v")], ignore_index=True
    )
    a = sg.analyze(counts, exposure="x", outcome="y", counts="n", strata=("m",), measure=measure)
    b = sg.analyze(expand(counts), exposure="x", outcome="y", strata=("m",), measure=measure)
    cols = ["n", "n_exposed", "estimate", "se", "ci_low", "ci_high", "p_value"]
    np.testing.assert_allclose(a.strata[cols].to_numpy(float), b.strata[cols].to_numpy(float), rtol=1e-12)
    np.testing.assert_allclose(a.overall[cols].to_numpy(float), b.overall[cols].to_numpy(float), rtol=1e-12)


def test_zero_cell_status_and_correction():
    t = table(a=0, b=100)
    a = sg.analyze(t, exposure="x", outcome="y", counts="n", measure="rr")
    assert "zero events among the exposed" in a.overall["status"]
    assert "correction=0.5" in a.overall["status"]
    assert np.isnan(a.overall["estimate"])
    b = sg.analyze(t, exposure="x", outcome="y", counts="n", measure="rr", correction=0.5)
    assert b.overall["status"] == "ok"
    assert b.overall["estimate"] == pytest.approx((0.5 / 101) / (10.5 / 101))
    assert any("0.5 added" in n for n in b.notes)


def test_odds_ratio_all_events_in_an_arm_is_not_estimable():
    a = sg.analyze(table(a=100, b=0), exposure="x", outcome="y", counts="n", measure="or")
    assert "zero cell" in a.overall["status"]


def test_risk_difference_is_fine_with_zero_events():
    a = sg.analyze(table(a=0, b=100), exposure="x", outcome="y", counts="n", measure="rd")
    assert a.overall["status"] == "ok"
    assert a.overall["estimate"] == pytest.approx(-0.1)


def test_level_changes_interval_width():
    a90 = sg.analyze(table(), exposure="x", outcome="y", counts="n", level=0.90).overall
    z90 = stats.norm.ppf(0.95)
    assert a90["ci_high"] - a90["estimate"] == pytest.approx(z90 * 0.05)


def test_no_strata_gives_empty_strata_table_with_columns():
    a = sg.analyze(table(), exposure="x", outcome="y", counts="n")
    assert len(a.strata) == 0
    assert "estimate" in a.strata.columns and "status" in a.strata.columns


def test_bootstrap_is_reproducible_and_close_to_wald(demo):
    kw = dict(exposure="visited", outcome="on_target", strata=("sex",), method="crude", n_boot=400)
    a = sg.analyze(demo, interval="bootstrap", seed=7, **kw)
    b = sg.analyze(demo, interval="bootstrap", seed=7, **kw)
    c = sg.analyze(demo, interval="bootstrap", seed=8, **kw)
    w = sg.analyze(demo, **kw)
    pd.testing.assert_frame_equal(a.strata, b.strata)
    assert not np.allclose(a.strata.ci_low, c.strata.ci_low)
    np.testing.assert_allclose(a.strata.estimate, w.strata.estimate)
    np.testing.assert_allclose(a.strata.se, w.strata.se, rtol=0.15)
    np.testing.assert_allclose(a.strata.ci_low, w.strata.ci_low, atol=0.02)


def test_bootstrap_progress_is_reported(demo):
    seen = []
    sg.analyze(demo, exposure="visited", outcome="on_target", interval="bootstrap", n_boot=50,
               progress=seen.append)
    assert seen and seen[-1] == pytest.approx(1.0)
    assert all(0 < p <= 1 for p in seen)
