"""Altair chart builders and their offline export."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem import charts
from stratagem.report import OKABE_ITO

CONFOUNDERS = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")


@pytest.fixture(scope="module")
def demo():
    return sg.demo_data()


@pytest.fixture(scope="module")
def crude(demo):
    return sg.analyze(demo, exposure="visited", outcome="on_target", strata=("lives_alone", "insulin"),
                      method="crude")


@pytest.fixture(scope="module")
def weighted(demo):
    return sg.analyze(demo, exposure="visited", outcome="on_target", strata=("insulin",),
                      confounders=CONFOUNDERS, method="ipw", measure="rr")


def _datasets(chart) -> list[pd.DataFrame]:
    spec = chart.to_dict()
    return [pd.DataFrame(rows) for rows in spec.get("datasets", {}).values()]


def _find(chart, column) -> pd.DataFrame:
    for frame in _datasets(chart):
        if column in frame.columns:
            return frame
    raise AssertionError(f"no dataset with column {column!r}")


def test_interval_chart_carries_the_estimates(crude):
    chart = charts.interval_chart(crude)
    drawn = _find(chart, "estimate")
    assert list(drawn["row"]) == list(crude.strata["stratum"]) + ["Overall"]
    np.testing.assert_allclose(drawn["estimate"], list(crude.strata["estimate"]) + [crude.overall["estimate"]])
    np.testing.assert_allclose(drawn["ci_low"], list(crude.strata["ci_low"]) + [crude.overall["ci_low"]])
    spec = chart.to_dict()
    text = str(spec)
    assert OKABE_ITO["blue"] in text and OKABE_ITO["vermillion"] in text
    assert "'type': 'log'" not in text  # differences on a linear axis
    assert _find(chart, "null")["null"].tolist() == [0.0]


def test_interval_chart_ratio_uses_log_axis_and_null_one(weighted):
    chart = charts.interval_chart(weighted)
    assert "'type': 'log'" in str(chart.to_dict())
    assert _find(chart, "null")["null"].tolist() == [1.0]


def test_interval_chart_keeps_unestimable_rows_on_the_axis():
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"g": rng.choice(["a", "b", "c"], 300), "x": rng.integers(0, 2, 300),
                       "y": rng.integers(0, 2, 300)})
    df.loc[df["g"] == "b", "x"] = 0
    a = sg.analyze(df, exposure="x", outcome="y", strata=("g",), method="crude")
    chart = charts.interval_chart(a)
    drawn = _find(chart, "estimate")
    assert "g=b" not in set(drawn["row"])
    rows = [f for f in _datasets(chart) if list(f.columns) == ["row"]][0]
    assert list(rows["row"]) == ["g=a", "g=b", "g=c", "Overall"]


def test_builders_return_new_charts_and_leave_the_analysis(crude):
    before = crude.strata.copy()
    first, second = charts.interval_chart(crude), charts.interval_chart(crude)
    assert first is not second
    pd.testing.assert_frame_equal(before, crude.strata)


def test_response_type_chart(demo, crude):
    truth = sg.analyze(demo, exposure="visited", outcome="on_target", strata=("insulin",),
                       method="exact", potential_outcomes=("y0", "y1"))
    chart = charts.response_type_chart(truth)
    data = _find(chart, "lower")
    np.testing.assert_allclose(data["lower"], truth.response_types["lower"].astype(float))
    assert "exact shares" in str(chart.to_dict()["title"])
    bounds = charts.response_type_chart(crude)
    assert "bounds" in str(bounds.to_dict()["title"])
    numeric = demo.assign(score=demo["age"] * 0.1 + demo["on_target"])
    md = sg.analyze(numeric, exposure="visited", outcome="score", method="crude")
    assert len(md.response_types) == 0  # numeric outcome: no response types
    with pytest.raises(sg.StratagemError, match="response types"):
        charts.response_type_chart(md)


def test_propensity_chart_shares(demo, weighted, crude):
    chart = charts.propensity_chart(weighted, demo, bins=20)
    data = _find(chart, "share")
    assert set(data["stratum"]) == set(weighted.strata["stratum"]) | {"Overall"}
    sums = data.groupby(["stratum", "arm"])["share"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0)
    # the overall exposed histogram is the histogram of the stored scores of exposed rows
    score = weighted.extra["propensity"]
    exposed = demo["visited"].to_numpy() == 1
    counts, _ = np.histogram(score[exposed], bins=np.linspace(0, 1, 21))
    got = data[(data["stratum"] == "Overall") & (data["arm"] == "exposed")]["share"].to_numpy()
    np.testing.assert_allclose(got, counts / counts.sum())
    with pytest.raises(sg.StratagemError, match="no propensity scores"):
        charts.propensity_chart(crude, demo)
    with pytest.raises(sg.StratagemError, match="'bins'"):
        charts.propensity_chart(weighted, demo, bins=1)


def test_save_chart_offline(crude, tmp_path):
    chart = charts.interval_chart(crude)
    svg = charts.save_chart(chart, tmp_path / "c.svg")
    text = svg.read_text(encoding="utf-8")
    assert text.lstrip().startswith("<svg") and "lives_alone=yes, insulin=no" in text
    png = charts.save_chart(chart, tmp_path / "c.png", scale=1)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    pdf = charts.save_chart(chart, tmp_path / "c.pdf")
    assert pdf.read_bytes()[:4] == b"%PDF"
    assert charts.chart_to_svg(chart).lstrip().startswith("<svg")
    with pytest.raises(sg.StratagemError, match=r"\.svg, \.png or \.pdf"):
        charts.save_chart(chart, tmp_path / "c.html")


def test_charts_reject_non_analysis():
    with pytest.raises(sg.StratagemError, match="Expected an Analysis"):
        charts.interval_chart(pd.DataFrame())
