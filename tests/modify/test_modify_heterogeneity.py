"""Heterogeneity rows: Q and I² against statsmodels, LR against direct fits, Breslow-Day, edge cases."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.contingency_tables import StratifiedTable
from statsmodels.stats.meta_analysis import combine_effects

import stratagem as sg
from stratagem.frame import prepare
from stratagem.modify.design import confounder_matrix
from stratagem.modify.heterogeneity import cochran_q, interaction_lr, wald_equal
from stratagem.spec import Spec

TESTS = ["cochran_q", "i2", "interaction_wald", "interaction_lr", "breslow_day", "gail_simon", "scale"]


def test_q_and_i2_equal_statsmodels_and_hand():
    theta = np.array([0.2, 0.5, -0.1, 0.3])
    se = np.array([0.1, 0.2, 0.15, 0.05])
    q, df, p, i2, k = cochran_q(theta, se)
    # reference library: statsmodels combine_effects
    ref = combine_effects(theta, se**2, method_re="chi2")
    assert q == pytest.approx(ref.q) and i2 == pytest.approx(ref.i2)
    w = 1 / se**2
    pooled = np.sum(w * theta) / w.sum()
    assert q == pytest.approx(np.sum(w * (theta - pooled) ** 2))
    assert (df, k) == (3, 4) and p == pytest.approx(stats.chi2.sf(q, 3))
    assert i2 == pytest.approx(max(0, (q - 3) / q))
    # diagonal-covariance Wald test of equality is algebraically Cochran's Q
    assert wald_equal(theta, np.diag(se**2))[0] == pytest.approx(q)
    assert np.isnan(cochran_q(theta[:1], se[:1])[0])


def test_wald_with_correlation_by_hand():
    theta = np.array([0.0, 1.0])
    cov = np.array([[1.0, 0.5], [0.5, 1.0]])
    stat, df, p = wald_equal(theta, cov)
    assert stat == pytest.approx(1.0 / (1 + 1 - 2 * 0.5)) and df == 1


def _crude(df, **kw):
    return sg.analyze(df, exposure="visited", outcome="on_target", strata=("lives_alone", "insulin"),
                      method="crude", **kw)


def test_analyze_rows_and_strata_columns_kept(demo):
    before = demo.copy()
    a = _crude(demo, measure="or")
    assert list(a.heterogeneity["test"]) == TESTS
    assert list(a.heterogeneity.columns) == ["test", "statistic", "df", "p_value", "note"]
    base = ["lives_alone", "insulin"] + sg.results.STRATA_COLUMNS
    assert list(a.strata.columns[: len(base)]) == base
    assert list(a.strata.columns[len(base):]) == ["p_holm", "p_bh", "ci_low_simultaneous",
                                                  "ci_high_simultaneous", "e_value", "e_value_ci"]
    pd.testing.assert_frame_equal(demo, before)
    h = a.heterogeneity.set_index("test")
    theta, se = np.log(a.strata["estimate"]), a.strata["se"]
    assert h.loc["cochran_q", "statistic"] == pytest.approx(combine_effects(theta.to_numpy(),
                                                                            se.to_numpy() ** 2).q)
    # Breslow-Day (Tarone) against statsmodels on tables made with pandas
    tabs = []
    for _, g in demo.groupby(["lives_alone", "insulin"], observed=True):
        t = pd.crosstab(g["visited"], g["on_target"]).reindex(index=[1, 0], columns=[1, 0]).to_numpy()
        tabs.append(t)
    ref = StratifiedTable(np.dstack(tabs).astype(float)).test_equal_odds(adjust=True)
    assert h.loc["breslow_day", "statistic"] == pytest.approx(ref.statistic)
    assert h.loc["breslow_day", "p_value"] == pytest.approx(ref.pvalue)
    # Bonferroni simultaneous intervals contain the pointwise ones
    assert (a.strata["ci_low_simultaneous"] < a.strata["ci_low"]).all()
    assert (a.strata["ci_high_simultaneous"] > a.strata["ci_high"]).all()


def test_breslow_day_row_is_blank_outside_or(demo):
    h = _crude(demo, measure="rd").heterogeneity.set_index("test")
    assert np.isnan(h.loc["breslow_day", "statistic"]) and "measure='or'" in h.loc["breslow_day", "note"]
    assert "risk-difference scale" in h.loc["scale", "note"] and "ratio scale" in h.loc["scale", "note"]


def test_cell_lr_equals_statsmodels_on_rows(demo):
    a = _crude(demo, measure="rd")
    lr = a.heterogeneity.set_index("test").loc["interaction_lr"]
    # reference library: statsmodels GLM Binomial on the rows, with and without product terms
    st = demo["lives_alone"].astype(str) + "/" + demo["insulin"].astype(str)
    d = pd.get_dummies(st, drop_first=True).to_numpy(dtype=float)
    x0 = np.column_stack([np.ones(len(demo)), demo["visited"], d])
    x1 = np.column_stack([x0, d * demo["visited"].to_numpy()[:, None]])
    y = demo["on_target"].to_numpy(dtype=float)
    ll0 = sm.GLM(y, x0, family=sm.families.Binomial()).fit().llf
    ll1 = sm.GLM(y, x1, family=sm.families.Binomial()).fit().llf
    assert lr["statistic"] == pytest.approx(2 * (ll1 - ll0), rel=1e-6)
    assert lr["df"] == 3


def test_adjusted_and_gaussian_lr_equal_statsmodels(demo):
    conf = ("age", "district")
    spec = Spec(exposure="visited", outcome="on_target", strata=("insulin",), confounders=conf,
                method="ipw")
    prep, spec = prepare(demo, spec)
    stat, df, p, note = interaction_lr(prep, spec, np.array([0, 1]))
    m = (demo["insulin"] == "yes").to_numpy(dtype=float)
    a = demo["visited"].to_numpy(dtype=float)
    x0 = np.column_stack([np.ones(len(demo)), a, m, confounder_matrix(demo[list(conf)])])
    x1 = np.column_stack([x0, a * m])
    y = demo["on_target"].to_numpy(dtype=float)
    ll0 = sm.GLM(y, x0, family=sm.families.Binomial()).fit().llf
    ll1 = sm.GLM(y, x1, family=sm.families.Binomial()).fit().llf
    assert stat == pytest.approx(2 * (ll1 - ll0), rel=1e-6) and df == 1 and "confounders" in note
    # numeric outcome: ML likelihood ratio of two OLS fits
    num = demo.assign(score=demo["age"] * 0.1 + demo["visited"] * (demo["insulin"] == "yes") * 2.0
                      + np.random.default_rng(0).normal(size=len(demo)))
    spec = Spec(exposure="visited", outcome="score", strata=("insulin",), method="crude")
    prep, spec = prepare(num, spec)
    stat, df, p, note = interaction_lr(prep, spec, np.array([0, 1]))
    ys = num["score"].to_numpy()
    o0 = sm.OLS(ys, np.column_stack([np.ones(len(ys)), a, m])).fit()
    o1 = sm.OLS(ys, np.column_stack([np.ones(len(ys)), a, m, a * m])).fit()
    assert stat == pytest.approx(2 * (o1.llf - o0.llf), rel=1e-9) and p < 1e-6


def test_lr_skipped_above_row_limit(demo, monkeypatch):
    from stratagem.modify import heterogeneity

    monkeypatch.setattr(heterogeneity, "LR_MAX_ROWS", 100)
    spec = Spec(exposure="visited", outcome="on_target", strata=("insulin",), confounders=("age",),
                method="ipw")
    prep, spec = prepare(demo, spec)
    stat, df, p, note = interaction_lr(prep, spec, np.array([0, 1]))
    assert np.isnan(stat) and "not computed" in note


def test_fewer_than_two_estimable_strata_give_nan_with_note(demo):
    d = demo.copy()
    d.loc[d["insulin"] == "yes", "visited"] = 1  # one stratum has no unexposed rows
    a = sg.analyze(d, exposure="visited", outcome="on_target", strata=("insulin",), method="crude")
    assert a.strata["status"].iloc[1] != "ok"
    h = a.heterogeneity
    assert list(h["test"]) == TESTS
    assert h["statistic"].isna().all() and h["note"].str.contains("fewer than two").all()
    assert np.isnan(a.strata["p_holm"].iloc[1]) and np.isfinite(a.strata["p_holm"].iloc[0])


def test_bootstrap_wald_uses_replicate_covariance_and_maxt(demo):
    a = _crude(demo, measure="rd", interval="bootstrap", n_boot=200, seed=3)
    h = a.heterogeneity.set_index("test")
    assert "bootstrap" in h.loc["interaction_wald", "note"]
    assert np.isfinite(h.loc["interaction_wald", "statistic"])
    assert any("max-|t|" in n for n in a.notes)
    s = a.strata
    assert ((s["ci_low_simultaneous"] <= s["ci_low"]) & (s["ci_high_simultaneous"] >= s["ci_high"])).all()


def test_exact_method_keeps_exact_shares_and_blank_tests(demo):
    a = sg.analyze(demo, exposure="visited", outcome="on_target", strata=("insulin",),
                   potential_outcomes=("y0", "y1"))
    assert (a.response_types["lower"] == a.response_types["upper"]).all()
    assert "count" in a.response_types.columns  # the exact frame, not bounds
    assert a.heterogeneity["statistic"].isna().all()
    assert a.strata["e_value"].isna().all()


def test_response_type_bounds_in_analysis(demo):
    a = _crude(demo, measure="rd")
    rt = a.response_types
    assert list(rt.columns) == ["stratum", "type", "lower", "upper"]
    assert set(rt["stratum"]) == set(a.strata["stratum"]) | {"overall"}
    first = a.strata.iloc[0]
    causal = rt[(rt.stratum == first["stratum"]) & (rt.type == "causal")].iloc[0]
    assert causal["lower"] == pytest.approx(max(0, first["mean_exposed"] - first["mean_unexposed"]))
    assert causal["upper"] == pytest.approx(min(first["mean_exposed"], 1 - first["mean_unexposed"]))
    mono = _crude(demo, measure="rd", monotone=True).response_types
    assert (mono["lower"] == mono["upper"]).all()


def test_numeric_outcome_has_no_response_types_and_no_evalues():
    df = sg.simulate(800, modifiers={"g": {"a": 0.5, "b": 0.5}}, outcome="numeric",
                     effects={"a": 1.0, "b": 5.0}, seed=1)
    a = sg.analyze(df, exposure="exposed", outcome="outcome", strata=("g",), method="crude")
    assert len(a.response_types) == 0
    assert a.strata["e_value"].isna().all()
    h = a.heterogeneity.set_index("test")
    assert h.loc["cochran_q", "p_value"] < 0.05
    assert "difference scale" in h.loc["interaction_lr", "note"]
