"""RERI, AP and SI: against a direct statsmodels fit, numeric derivatives, and 2x2 arithmetic."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from stratagem.errors import ModifierError, OutcomeError
from stratagem.modify.design import confounder_matrix
from stratagem.modify.reri import interaction_gradients, interaction_measures, reri

CONF = ("age", "deprivation", "district")


@pytest.fixture
def data(demo):
    return demo.assign(alone=(demo["lives_alone"] == "yes").astype(int))


def _numeric_grad(f, b, h=1e-6):
    return np.array([(f(b + h * e) - f(b - h * e)) / (2 * h) for e in np.eye(3)])


def test_delta_method_equals_direct_fit_and_numeric_derivatives(data):
    before = data.copy()
    r = reri(data, exposure="visited", outcome="on_target", modifier="alone", confounders=CONF)
    pd.testing.assert_frame_equal(data, before)
    a, m = data["visited"].to_numpy(float), data["alone"].to_numpy(float)
    x = np.column_stack([np.ones(len(a)), a, m, a * m, confounder_matrix(data[list(CONF)])])
    # reference library: statsmodels Logit on the same design
    fit = sm.Logit(data["on_target"].to_numpy(float), x).fit(disp=0)
    b, cov = fit.params[1:4], fit.cov_params()[1:4, 1:4]
    assert r.params == pytest.approx(b, rel=1e-6)
    or10, or01, or11 = np.exp(b[0]), np.exp(b[1]), np.exp(b.sum())
    reri_hand = or11 - or10 - or01 + 1
    assert r.reri == pytest.approx(reri_hand, rel=1e-6)
    assert r.ap == pytest.approx(reri_hand / or11, rel=1e-6)
    assert r.si == pytest.approx((or11 - 1) / (or10 + or01 - 2), rel=1e-6)
    z = stats.norm.ppf(0.975)
    for name, f in {
        "reri": lambda v: interaction_measures(v)["reri"],
        "ap": lambda v: interaction_measures(v)["ap"],
        "si": lambda v: np.log(interaction_measures(v)["si"]),
    }.items():
        g = _numeric_grad(f, np.asarray(b))
        assert interaction_gradients(b)[name] == pytest.approx(g, rel=1e-5)
        se = np.sqrt(g @ cov @ g)
        assert r.table.loc[name, "se"] == pytest.approx(se, rel=1e-4)
    lo, hi = r.table.loc["reri", ["ci_low", "ci_high"]]
    assert (lo, hi) == pytest.approx((r.reri - z * r.table.loc["reri", "se"],
                                      r.reri + z * r.table.loc["reri", "se"]))
    si_lo = np.exp(np.log(r.si) - z * r.table.loc["si", "se"])
    assert r.table.loc["si", "ci_low"] == pytest.approx(si_lo)


def test_saturated_model_gives_the_2x2x2_odds_ratios(data):
    r = reri(data, exposure="visited", outcome="on_target", modifier="alone")
    odds = {}
    for (av, mv), g in data.groupby(["visited", "alone"]):
        k = g["on_target"].sum()
        odds[(av, mv)] = k / (len(g) - k)
    assert r.table.loc["or10", "estimate"] == pytest.approx(odds[(1, 0)] / odds[(0, 0)])
    assert r.table.loc["or01", "estimate"] == pytest.approx(odds[(0, 1)] / odds[(0, 0)])
    assert r.table.loc["or11", "estimate"] == pytest.approx(odds[(1, 1)] / odds[(0, 0)])


def test_modifier_level_coding_and_bootstrap(data):
    r1 = reri(data, exposure="visited", outcome="on_target", modifier="alone")
    r2 = reri(data, exposure="visited", outcome="on_target", modifier="lives_alone", modifier_level="yes")
    assert r1.reri == pytest.approx(r2.reri) and r2.modifier_level == "yes"
    b1 = reri(data, exposure="visited", outcome="on_target", modifier="alone", n_boot=60, seed=5)
    b2 = reri(data, exposure="visited", outcome="on_target", modifier="alone", n_boot=60, seed=5)
    pd.testing.assert_frame_equal(b1.table, b2.table)
    t = b1.table
    assert t["boot_low"].notna().all()
    assert ((t["boot_low"] < t["estimate"]) & (t["estimate"] < t["boot_high"])).all()


def test_errors_name_the_column(data):
    with pytest.raises(ModifierError, match="'district' must be binary"):
        reri(data, exposure="visited", outcome="on_target", modifier="district")
    with pytest.raises(ModifierError, match="'age' must be binary"):
        reri(data, exposure="visited", outcome="on_target", modifier="age")
    with pytest.raises(ModifierError, match="modifier_level="):
        reri(data, exposure="visited", outcome="on_target", modifier="lives_alone")
    with pytest.raises(OutcomeError, match="'age'"):
        reri(data, exposure="visited", outcome="age", modifier="alone")
