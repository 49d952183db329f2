"""DR-learner effect curve: sandwich against statsmodels, recovery of a known linear CATE, the chart."""

import altair as alt
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from stratagem.errors import DataError, ModifierError
from stratagem.modify.curve_chart import curve_chart
from stratagem.modify.effect_curve import effect_curve, sandwich_ols


def _population(n=6000, seed=11, binary=False):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    v = rng.uniform(20, 80, n)
    ps = 1 / (1 + np.exp(-(0.8 * x + 0.02 * (v - 50))))
    a = (rng.random(n) < ps).astype(int)
    cate = 0.5 + 0.04 * (v - 50)
    if binary:
        p0 = 1 / (1 + np.exp(-(-0.5 + 0.7 * x)))
        cate = 0.1 + 0.004 * (v - 50)
        y0 = (rng.random(n) < p0).astype(int)
        y1 = np.where(y0 == 1, 1, (rng.random(n) < cate / (1 - p0 + 1e-9)).astype(int))
        y = np.where(a == 1, y1, y0)
    else:
        y = 1 + 2 * x + 0.05 * v + a * cate + rng.normal(size=n)
    return pd.DataFrame({"a": a, "y": y, "x": x, "v": v})


def test_sandwich_equals_statsmodels_hc0_and_frequency_weights():
    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(200), rng.normal(size=(200, 2))])
    y = x @ [1, 2, 3] + rng.normal(size=200) * (1 + np.abs(x[:, 1]))
    beta, cov = sandwich_ols(y, x)
    # reference library: statsmodels OLS with cov_type="HC0"
    ref = sm.OLS(y, x).fit(cov_type="HC0")
    assert beta == pytest.approx(ref.params) and cov == pytest.approx(ref.cov_params())
    w = rng.integers(1, 4, 200).astype(float)
    bw, cw = sandwich_ols(y, x, w)
    rep = np.repeat(np.arange(200), w.astype(int))
    be, ce = sandwich_ols(y[rep], x[rep])
    assert bw == pytest.approx(be) and cw == pytest.approx(ce)


@pytest.mark.parametrize("knots", [0, 4])
def test_recovers_known_linear_cate(knots):
    df = _population()
    before = df.copy()
    c = effect_curve(df, exposure="a", outcome="y", modifier="v", confounders=("x",), knots=knots,
                     grid=tuple(np.linspace(25, 75, 11)))
    pd.testing.assert_frame_equal(df, before)
    truth = 0.5 + 0.04 * (c["v"] - 50)
    assert np.max(np.abs(c["estimate"] - truth)) < 0.25
    inside = (c["ci_low_simultaneous"] <= truth) & (truth <= c["ci_high_simultaneous"])
    assert inside.all()
    assert (c["ci_high_simultaneous"] - c["ci_low_simultaneous"] > c["ci_high"] - c["ci_low"]).all()
    assert c.attrs["measure"] == "md" and c.attrs["critical_value"] > 1.96
    # the slope is clearly positive: the curve rises by about 0.04 per unit
    assert (c["estimate"].iloc[-1] - c["estimate"].iloc[0]) / 50 == pytest.approx(0.04, abs=0.01)


def test_crude_curve_would_be_biased_without_confounders():
    df = _population()
    adj = effect_curve(df, exposure="a", outcome="y", modifier="v", confounders=("x",), knots=0, grid=(50.0,))
    raw = effect_curve(df, exposure="a", outcome="y", modifier="v", knots=0, grid=(50.0,))
    assert abs(adj["estimate"].iloc[0] - 0.5) < 0.15
    assert abs(raw["estimate"].iloc[0] - 0.5) > 0.5  # confounding by x is strong


def test_binary_outcome_and_reproducible():
    df = _population(binary=True)
    c1 = effect_curve(df, exposure="a", outcome="y", modifier="v", confounders=("x",), grid=5, seed=2)
    c2 = effect_curve(df, exposure="a", outcome="y", modifier="v", confounders=("x",), grid=5, seed=2)
    pd.testing.assert_frame_equal(c1, c2)
    assert c1.attrs["measure"] == "rd"
    truth = 0.1 + 0.004 * (c1["v"] - 50)
    assert np.max(np.abs(c1["estimate"] - truth)) < 0.1


def test_errors():
    df = _population(n=300)
    with pytest.raises(ModifierError, match="'g' must be numeric"):
        effect_curve(df.assign(g="a"), exposure="a", outcome="y", modifier="g")
    with pytest.raises(ModifierError, match="'b'"):
        effect_curve(df.assign(b=df["a"]), exposure="a", outcome="y", modifier="b")


def test_chart():
    df = _population(n=1500)
    c = effect_curve(df, exposure="a", outcome="y", modifier="v", confounders=("x",), grid=20)
    chart = curve_chart(c)
    assert isinstance(chart, alt.LayerChart)
    spec = chart.to_dict()
    assert len(spec["layer"]) == 4
    assert "by v" in spec["title"]
    assert "estimate" in c.columns  # the frame is not renamed in place
    with pytest.raises(DataError, match="lacks column"):
        curve_chart(c[["v", "estimate"]])
