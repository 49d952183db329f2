"""E-values: the formula's arithmetic, conversions, and input errors."""

import math

import pytest

from stratagem.errors import SpecError
from stratagem.modify.evalue import evalue, evalue_rr


def test_formula_arithmetic_by_hand():
    # RR = 2: 2 + sqrt(2 * 1) = 3.41421...
    assert evalue_rr(2.0) == pytest.approx(2 + math.sqrt(2))
    # protective RR = 0.5 is inverted to 2
    assert evalue_rr(0.5) == pytest.approx(2 + math.sqrt(2))
    assert evalue_rr(1.0) == 1.0
    assert math.isnan(evalue_rr(0.0)) and math.isnan(evalue_rr(float("nan")))


def test_interval_uses_limit_closer_to_null():
    r = evalue(1.8, 1.2, 2.7)
    assert r.estimate == pytest.approx(1.8 + math.sqrt(1.8 * 0.8))  # 3.0
    assert r.ci == pytest.approx(1.2 + math.sqrt(1.2 * 0.2))
    protective = evalue(0.5, 0.3, 0.8)
    assert protective.ci == pytest.approx(evalue_rr(1 / 0.8))
    # interval holding the null
    assert evalue(1.5, 0.9, 2.5).ci == 1.0
    assert evalue(0.7, 0.4, 1.1).ci == 1.0
    # no interval given
    assert math.isnan(evalue(1.5).ci)


def test_odds_ratio_rare_and_common():
    rare = evalue(2.25, 1.44, 3.0, measure="or", baseline_risk=0.05)
    assert rare.rr == 2.25 and rare.estimate == pytest.approx(evalue_rr(2.25))
    common = evalue(2.25, 1.44, 3.0, measure="or", baseline_risk=0.3)
    assert common.rr == pytest.approx(1.5)  # sqrt(2.25)
    assert common.estimate == pytest.approx(evalue_rr(1.5))
    assert common.ci == pytest.approx(evalue_rr(1.2))  # sqrt(1.44)
    assert "sqrt" in common.note


def test_risk_difference_conversion_and_not_applicable():
    r = evalue(0.1, 0.05, 0.15, measure="rd", baseline_risk=0.2)
    assert r.rr == pytest.approx(1.5)  # (0.2 + 0.1) / 0.2
    assert r.ci == pytest.approx(evalue_rr(1.25))
    no_base = evalue(0.1, measure="rd")
    assert math.isnan(no_base.estimate) and "baseline_risk" in no_base.note
    md = evalue(3.0, 1.0, 5.0, measure="md")
    assert math.isnan(md.estimate) and "not applicable" in md.note


def test_errors_name_the_parameter():
    with pytest.raises(SpecError, match="'measure'.*'rr'"):
        evalue(2.0, measure="hr")
    with pytest.raises(SpecError, match="'baseline_risk'"):
        evalue(2.0, measure="or", baseline_risk=1.5)
    with pytest.raises(SpecError, match="ci_low"):
        evalue(2.0, 3.0, 1.0)


def test_evalue_columns_in_analysis(demo):
    import numpy as np

    import stratagem as sg

    for measure in ("rr", "rd", "or"):
        a = sg.analyze(demo, exposure="visited", outcome="on_target", strata=("insulin",),
                       method="crude", measure=measure)
        for _, row in a.strata.iterrows():
            ref = evalue(row["estimate"], row["ci_low"], row["ci_high"], measure=measure,
                         baseline_risk=row["mean_unexposed"])
            assert row["e_value"] == pytest.approx(ref.estimate)
            assert row["e_value_ci"] == pytest.approx(ref.ci)
        o = a.overall
        assert o["e_value"] == pytest.approx(evalue(o["estimate"], o["ci_low"], o["ci_high"], measure=measure,
                                                    baseline_risk=o["mean_unexposed"]).estimate)
        assert np.all(a.strata["e_value"] >= a.strata["e_value_ci"])
