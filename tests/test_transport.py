"""transport(): effects in a target population by standardising the study's stratum effects.

Expected values are derived by hand from a small table of counts (crude estimator): stratum A has
30/100 events among the exposed and 20/100 among the unexposed, stratum B 20/50 and 5/50, and
stratum C has only unexposed rows (not estimable).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import stratagem as sg
from stratagem.errors import (
    ColumnNotFoundError,
    DataError,
    MissingValuesError,
    ModifierError,
    SpecError,
)
from stratagem.transport import TRANSPORT_COLUMNS, TransportResult, transport

Z = stats.norm.ppf(0.975)

# Hand-derived stratum quantities (risks r1, r0; variances r(1-r)/n of each risk).
R1 = {"A": 0.30, "B": 0.40}
R0 = {"A": 0.20, "B": 0.10}
V1 = {"A": 0.30 * 0.70 / 100, "B": 0.40 * 0.60 / 50}  # 0.0021, 0.0048
V0 = {"A": 0.20 * 0.80 / 100, "B": 0.10 * 0.90 / 50}  # 0.0016, 0.0018


@pytest.fixture
def counts_table():
    rows = [
        ("A", 1, 1, 30), ("A", 1, 0, 70), ("A", 0, 1, 20), ("A", 0, 0, 80),
        ("B", 1, 1, 20), ("B", 1, 0, 30), ("B", 0, 1, 5), ("B", 0, 0, 45),
        ("C", 0, 1, 3), ("C", 0, 0, 7),
    ]  # fmt: skip
    return pd.DataFrame(rows, columns=["g", "a", "y", "count"])


def _analysis(table, measure="rd", **kw):
    return sg.analyze(
        table, exposure="a", outcome="y", strata=("g",), counts="count", method="crude",
        measure=measure, **kw,
    )


def test_risk_difference_matches_hand_derivation(counts_table):
    r = transport(_analysis(counts_table), {"A": 0.25, "B": 0.75})
    # theta = .25 * .1 + .75 * .3 = .25; Var = .25^2 (.0021 + .0016) + .75^2 (.0048 + .0018)
    var = 0.0625 * 0.0037 + 0.5625 * 0.0066
    assert r.estimate == pytest.approx(0.25, abs=1e-12)
    assert r.se == pytest.approx(math.sqrt(var), rel=1e-10)
    assert r.ci_low == pytest.approx(0.25 - Z * math.sqrt(var), rel=1e-10)
    assert r.ci_high == pytest.approx(0.25 + Z * math.sqrt(var), rel=1e-10)
    assert r.p_value == pytest.approx(2 * stats.norm.sf(0.25 / math.sqrt(var)), rel=1e-8)
    assert r.mean_exposed == pytest.approx(0.375) and r.mean_unexposed == pytest.approx(0.125)


def test_risk_ratio_standardises_the_risks_not_the_ratios(counts_table):
    r = transport(_analysis(counts_table, "rr"), {"A": 0.25, "B": 0.75})
    m1, m0 = 0.25 * 0.30 + 0.75 * 0.40, 0.25 * 0.20 + 0.75 * 0.10  # .375, .125
    v11 = 0.0625 * V1["A"] + 0.5625 * V1["B"]
    v00 = 0.0625 * V0["A"] + 0.5625 * V0["B"]
    se = math.sqrt(v11 / m1**2 + v00 / m0**2)
    assert r.estimate == pytest.approx(3.0, rel=1e-12)
    # the share-weighted average of the stratum ratios (1.5 and 4) would be 3.375: not what we want
    assert abs(r.estimate - (0.25 * 1.5 + 0.75 * 4.0)) > 0.3
    assert r.se == pytest.approx(se, rel=1e-10)
    assert r.ci_low == pytest.approx(3.0 * math.exp(-Z * se), rel=1e-10)


def test_odds_ratio_from_standardised_risks(counts_table):
    r = transport(_analysis(counts_table, "or"), {"A": 0.25, "B": 0.75})
    m1, m0 = 0.375, 0.125
    v11 = 0.0625 * V1["A"] + 0.5625 * V1["B"]
    v00 = 0.0625 * V0["A"] + 0.5625 * V0["B"]
    se = math.sqrt(v11 / (m1 * (1 - m1)) ** 2 + v00 / (m0 * (1 - m0)) ** 2)
    assert r.estimate == pytest.approx((m1 / (1 - m1)) / (m0 / (1 - m0)), rel=1e-12)
    assert r.se == pytest.approx(se, rel=1e-10)


def test_target_sample_adds_multinomial_share_variance(counts_table):
    a = _analysis(counts_table)
    target = pd.DataFrame({"g": ["A"] * 40 + ["B"] * 60})
    sample = transport(a, target)
    census = transport(a, target, sampled=False)
    strata_part = 0.16 * 0.0037 + 0.36 * 0.0066  # sum p^2 Var_k with p = (.4, .6)
    share_part = (0.4 * 0.1**2 + 0.6 * 0.3**2 - 0.22**2) / 100  # (sum p d^2 - theta^2) / N
    assert sample.estimate == pytest.approx(0.22, abs=1e-12)
    assert census.se == pytest.approx(math.sqrt(strata_part), rel=1e-10)
    assert sample.se == pytest.approx(math.sqrt(strata_part + share_part), rel=1e-10)
    assert sample.n_target == 100 and census.n_target is None
    # the same target as two rows of frequencies gives the same answer
    grouped = transport(a, pd.DataFrame({"g": ["B", "A"], "k": [60, 40]}), weights="k")
    assert grouped.se == pytest.approx(sample.se, rel=1e-12)
    by_array = transport(a, pd.DataFrame({"g": ["B", "A"]}), weights=[60.0, 40.0])
    assert by_array.estimate == pytest.approx(0.22, abs=1e-12)


def test_one_stratum_target_gives_that_stratum(counts_table):
    for measure in ("rd", "rr", "or"):
        a = _analysis(counts_table, measure)
        r = transport(a, {"B": 1.0})
        row = a.strata.set_index("g").loc["B"]
        assert r.estimate == pytest.approx(row["estimate"], rel=1e-12)
        assert r.se == pytest.approx(row["se"], rel=1e-10)


def test_unestimable_stratum_in_target_is_refused_by_name(counts_table):
    a = _analysis(counts_table)
    with pytest.raises(ModifierError, match=r"'g=C': no exposed rows"):
        transport(a, {"A": 0.5, "C": 0.5})
    with pytest.raises(ModifierError, match=r"'g=C'"):
        transport(a, pd.DataFrame({"g": ["A", "B", "C"]}))
    # a zero share for it is fine
    assert transport(a, {"A": 0.5, "B": 0.5, "C": 0.0}).estimate == pytest.approx(0.2)


def test_target_level_absent_from_study_is_refused(counts_table):
    a = _analysis(counts_table)
    with pytest.raises(ModifierError, match=r"'g=D' \(2 rows\)"):
        transport(a, pd.DataFrame({"g": ["A", "D", "D"]}))
    with pytest.raises(ModifierError, match=r"not strata of the analysis.*g=A"):
        transport(a, {"A": 0.5, "Z": 0.5})


def test_shares_normalised_with_note_and_negative_refused(counts_table):
    a = _analysis(counts_table)
    r = transport(a, {"A": 1, "B": 3})
    assert r.estimate == pytest.approx(0.25)
    assert any("summed to 4" in n for n in r.notes)
    assert not any("summed" in n for n in transport(a, {"A": 0.25, "B": 0.75}).notes)
    with pytest.raises(SpecError, match=r"share of 'A' is negative"):
        transport(a, {"A": -0.2, "B": 1.2})
    with pytest.raises(SpecError, match="all zero"):
        transport(a, {"A": 0, "B": 0})
    with pytest.raises(SpecError, match="both name stratum"):
        transport(a, {"A": 0.5, "g=A": 0.5})
    with pytest.raises(DataError, match="DataFrame.*or a mapping"):
        transport(a, [0.5, 0.5])


def test_keys_may_be_labels_levels_or_tuples():
    df = sg.demo_data(n=1500, seed=3)
    a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("sex", "insulin"),
                   method="crude")
    by_label = transport(a, {"sex=female, insulin=no": 0.6, "sex=male, insulin=yes": 0.4})
    by_tuple = transport(a, {("female", "no"): 0.6, ("male", "yes"): 0.4})
    assert by_label.estimate == by_tuple.estimate


def test_binned_modifier_uses_study_edges_and_refuses_values_outside():
    df = sg.demo_data(n=2000, seed=5)
    a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("age",), method="crude")
    edges = a.extra["bin_edges"]["age"]
    target = df[df["age"] > 60][["age"]]
    r = transport(a, target)
    # shares by hand: bins closed on the left, the last one closed on both sides
    idx = np.clip(np.searchsorted(edges, target["age"], side="right") - 1, 0, len(edges) - 2)
    expected = np.bincount(idx, minlength=len(edges) - 1) / len(target)
    assert np.allclose(r.shares["target_share"], expected)
    assert r.shares["target_share"].iloc[0] == 0  # nobody over 60 in the youngest bin
    older = pd.DataFrame({"age": [70, 80, edges[-1] + 5]})
    with pytest.raises(ModifierError, match=r"1 target row\(s\) have 'age' outside the study's bins"):
        transport(a, older)


def test_transport_to_itself_reproduces_overall_when_means_are_averages():
    """The identity holds when the overall potential-outcome means are the n-weighted averages of
    the stratum means (exact potential outcomes; any estimator averaging one fitted model over the
    rows). It does not hold for the crude estimator in confounded data (Simpson's paradox)."""
    df = sg.demo_data(n=3000, seed=11)
    for measure in ("rd", "rr", "or"):
        a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("lives_alone", "age"),
                       method="exact", potential_outcomes=("y0", "y1"), measure=measure)
        itself = transport(a, df, sampled=False)
        assert itself.estimate == pytest.approx(a.overall["estimate"], rel=1e-12)
        shares = dict(zip(a.strata["stratum"], a.strata["n"] / a.strata["n"].sum()))
        assert transport(a, shares).estimate == pytest.approx(a.overall["estimate"], rel=1e-12)


def test_bootstrap_analysis_uses_replicate_covariance(counts_table):
    a = _analysis(counts_table, "rr", interval="bootstrap", n_boot=400, seed=1)
    r = transport(a, {"A": 0.25, "B": 0.75})
    m1b, m0b = a.extra["replicates"]
    M1, M0 = 0.25 * m1b[:, 0] + 0.75 * m1b[:, 1], 0.25 * m0b[:, 0] + 0.75 * m0b[:, 1]
    c = [np.cov(m1b[:, j], m0b[:, j]) for j in (0, 1)]
    v11 = 0.0625 * c[0][0, 0] + 0.5625 * c[1][0, 0]
    v00 = 0.0625 * c[0][1, 1] + 0.5625 * c[1][1, 1]
    v10 = 0.0625 * c[0][0, 1] + 0.5625 * c[1][0, 1]
    se = math.sqrt(v11 / 0.375**2 + v00 / 0.125**2 - 2 * v10 / (0.375 * 0.125))
    assert r.estimate == pytest.approx(3.0)
    assert r.se == pytest.approx(se, rel=1e-9)
    # and it is close to the spread of the transported replicates
    assert r.se == pytest.approx(np.std(np.log(M1 / M0), ddof=1), rel=0.1)


def test_ratio_refused_when_stratum_ratios_are_not_ratios_of_means(counts_table):
    a = _analysis(counts_table, "rr")
    odd = a.strata.assign(estimate=a.strata["estimate"] * 1.1)  # as a directly estimated measure
    b = dataclasses.replace(a, strata=odd)
    with pytest.raises(SpecError, match="not ratios of the stratum means.*measure='rd'"):
        transport(b, {"A": 0.5, "B": 0.5})


def test_target_table_problems(counts_table):
    a = _analysis(counts_table)
    with pytest.raises(ColumnNotFoundError, match=r"lacks modifier column\(s\) \['g'\]"):
        transport(a, pd.DataFrame({"group": ["A"]}))
    with pytest.raises(DataError, match="3 values but the target table has 2 rows"):
        transport(a, pd.DataFrame({"g": ["A", "B"]}), weights=[1, 2, 3])
    with pytest.raises(DataError, match="non-negative"):
        transport(a, pd.DataFrame({"g": ["A", "B"], "k": [1, -2]}), weights="k")
    with pytest.raises(ColumnNotFoundError, match="weights column 'kk'"):
        transport(a, pd.DataFrame({"g": ["A", "B"]}), weights="kk")
    with pytest.raises(SpecError, match="weights= applies to a target table"):
        transport(a, {"A": 1.0}, weights="k")
    with pytest.raises(SpecError, match="'level' parameter must be a float in \\(0, 1\\); got 1.5"):
        transport(a, {"A": 1.0}, level=1.5)
    with pytest.raises(SpecError, match="needs an Analysis"):
        transport(counts_table, {"A": 1.0})
    plain = sg.analyze(counts_table, exposure="a", outcome="y", counts="count", method="crude")
    with pytest.raises(SpecError, match="no strata"):
        transport(plain, {"A": 1.0})


def test_missing_target_values_dropped_with_note_or_refused(counts_table):
    a = _analysis(counts_table)
    target = pd.DataFrame({"g": ["A", "B", None, "B"]})
    before = target.copy()
    r = transport(a, target)
    assert r.n_target == 3 and r.estimate == pytest.approx((0.1 + 2 * 0.3) / 3)
    assert any("1 target row(s) with missing modifier values dropped" in n for n in r.notes)
    pd.testing.assert_frame_equal(target, before)  # the user's table is not changed
    strict = _analysis(counts_table, missing="raise")
    with pytest.raises(MissingValuesError, match="missing modifier values"):
        transport(strict, target)


def test_result_tables(counts_table):
    a = _analysis(counts_table)
    r = transport(a, {"A": 0.25, "B": 0.75}, level=0.9)
    assert isinstance(r, TransportResult)
    frame = r.to_frame()
    assert list(frame.columns) == TRANSPORT_COLUMNS
    assert list(frame["population"]) == ["study", "target"]
    assert frame.loc[0, "estimate"] == a.overall["estimate"]
    assert frame.loc[1, "ci_high"] - frame.loc[1, "estimate"] == pytest.approx(
        stats.norm.ppf(0.95) * r.se
    )
    assert list(r.shares["target_share"]) == [0.25, 0.75, 0.0]
    assert r.shares["study_share"].sum() == pytest.approx(1.0)
    assert "Transport assumes" in r.notes[-1]
    assert "target" in r._repr_html_() and "TransportResult rd" in repr(r)
