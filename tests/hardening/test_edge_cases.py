"""Numerical edge cases, each checked against statsmodels where statsmodels gives an answer.

Where statsmodels fits the same model, the potential-outcome means must agree with it; where it
cannot (separation, a propensity of 0 or 1), the row must be flagged: a status that is not ``"ok"``,
or a note or diagnostics warning saying what happened. Never a silent number.

References: reference library: statsmodels ``GLM`` (Binomial and Gaussian families, ``freq_weights``)
for the outcome and propensity models, ``stats.contingency_tables.Table2x2`` for 2x2 ratios,
``stats.proportion.confint_proportions_2indep`` for the Wald risk difference,
``stats.weightstats.DescrStatsW``/``CompareMeans`` for mean differences. The estimator formulas the
references are assembled into (g-formula averages, Hajek IPW means, AIPW) are the ones cited in the
estimators' docstrings.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hardening_helpers import assert_ok_rows_finite, method_params
from statsmodels.stats.contingency_tables import StratifiedTable, Table2x2
from statsmodels.stats.proportion import confint_proportions_2indep
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW
from statsmodels.tools.sm_exceptions import ConvergenceWarning, PerfectSeparationWarning

import stratagem as sg

MODEL_METHODS = ("standardization", "ipw", "aipw")
FLAG_WORDS = ("separat", "converge", "positivity", "not estimable", "extreme", "undefined", "collinear")


# -- references built from statsmodels ------------------------------------------------------------


class NoAnswer(Exception):
    """statsmodels could not fit a model the estimator needs."""


def _design(df: pd.DataFrame, confounders) -> np.ndarray:
    cols = []
    for name in confounders:
        s = df[name]
        if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
            cols.append(s.to_numpy(dtype=float)[:, None])
        else:
            cols.append(pd.get_dummies(s.astype(str), drop_first=True, dtype=float).to_numpy())
    return np.column_stack([np.ones(len(df))] + cols)


def _glm(y, X, family, w):
    with warnings.catch_warnings():
        warnings.simplefilter("error", PerfectSeparationWarning)
        warnings.simplefilter("error", ConvergenceWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            res = sm.GLM(y, X, family=family, freq_weights=w).fit()
        except (PerfectSeparationWarning, ConvergenceWarning, np.linalg.LinAlgError) as exc:
            raise NoAnswer(str(exc)) from None
    eta = X @ res.params
    if isinstance(family, sm.families.Binomial) and np.max(np.abs(eta[w > 0])) > 15:
        raise NoAnswer("fitted probabilities numerically 0 or 1 (separation)")
    return res


def reference_means(df, method, confounders, *, exposure="x", outcome="y", weights=None):
    """(m1, m0) of ``method`` over all rows of ``df``, from statsmodels fits; raises NoAnswer."""
    a = df[exposure].to_numpy(dtype=float)
    y = df[outcome].to_numpy(dtype=float)
    w = np.ones(len(df)) if weights is None else np.asarray(weights, dtype=float)
    C = _design(df, confounders)
    binary = set(np.unique(y)) <= {0.0, 1.0}
    family = sm.families.Binomial() if binary else sm.families.Gaussian()
    out = {}
    if method in ("standardization", "aipw"):
        X = np.column_stack([C, a])
        res = _glm(y, X, family, w)
        out["Q1"] = res.predict(np.column_stack([C, np.ones_like(a)]))
        out["Q0"] = res.predict(np.column_stack([C, np.zeros_like(a)]))
    if method in ("ipw", "aipw"):
        e = _glm(a, C, sm.families.Binomial(), w).predict(C)
    if method == "standardization":
        return np.average(out["Q1"], weights=w), np.average(out["Q0"], weights=w)
    if method == "ipw":
        return (np.sum(w * a * y / e) / np.sum(w * a / e),
                np.sum(w * (1 - a) * y / (1 - e)) / np.sum(w * (1 - a) / (1 - e)))
    q1, q0 = out["Q1"], out["Q0"]
    psi1 = q1 + a * (y - q1) / e
    psi0 = q0 + (1 - a) * (y - q0) / (1 - e)
    return np.average(psi1, weights=w), np.average(psi0, weights=w)


def flagged(a, stratum: str = "overall") -> bool:
    """Whether the analysis says something is wrong for this row (status, notes or checks)."""
    frame = a.to_frame().set_index("stratum")
    if frame.loc[stratum, "status"] != "ok":
        return True
    text = " ".join(a.notes).lower()
    if len(a.diagnostics) and "warning" in a.diagnostics:
        text += " " + " ".join(str(v) for v in a.diagnostics["warning"].dropna()).lower()
    return any(word in text for word in FLAG_WORDS)


def check_against_statsmodels(df, method, confounders, *, rtol=1e-5, atol=1e-7, **fields):
    """Our overall means equal statsmodels' where it answers; flagged where it does not."""
    a = sg.analyze(df, exposure="x", outcome="y", confounders=confounders, method=method, **fields)
    assert_ok_rows_finite(a)
    try:
        m1, m0 = reference_means(df, method, confounders, weights=df[fields["counts"]] if "counts" in fields else None)
    except NoAnswer as why:
        assert flagged(a), f"statsmodels has no answer ({why}) but the analysis is not flagged:\n{a.to_frame()}"
        return a, None
    o = a.overall
    if o["status"] == "ok":
        assert o["mean_exposed"] == pytest.approx(m1, rel=rtol, abs=atol)
        assert o["mean_unexposed"] == pytest.approx(m0, rel=rtol, abs=atol)
    else:  # we refused where statsmodels answered: say why, and it must not be for no reason
        assert o["status"].strip()
    return a, (m1, m0)


def _table(rng, n=400, separation=None, outcome_rate=None):
    c1 = rng.normal(0, 1, n)
    c2 = rng.choice(["p", "q", "r"], n)
    x = (rng.random(n) < 1 / (1 + np.exp(-0.8 * c1))).astype(int)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-0.3 + 0.6 * c1 + 0.5 * x)))).astype(int)
    return pd.DataFrame({"x": x, "y": y, "c1": c1, "c2": c2})


# -- zero and all events in an arm -----------------------------------------------------------------


def _two_by_two(a, b, c, d):
    return pd.DataFrame({"x": [1, 1, 0, 0], "y": [1, 0, 1, 0], "n": [a, b, c, d]})


@pytest.mark.parametrize("cells", [(0, 50, 10, 40), (50, 0, 10, 40), (10, 40, 0, 50), (10, 40, 50, 0)])
def test_zero_or_all_events_in_an_arm_crude_risk_difference(cells):
    a, b, c, d = cells
    o = sg.analyze(_two_by_two(*cells), exposure="x", outcome="y", counts="n", measure="rd").overall
    lo, hi = confint_proportions_2indep(a, a + b, c, c + d, method="wald", compare="diff")
    assert o["status"] == "ok"
    assert o["estimate"] == pytest.approx(a / (a + b) - c / (c + d))
    assert (o["ci_low"], o["ci_high"]) == pytest.approx((lo, hi), rel=1e-9)


@pytest.mark.parametrize("measure", ["rr", "or"])
@pytest.mark.parametrize("cells", [(0, 50, 10, 40), (10, 40, 0, 50), (50, 0, 10, 40)])
def test_zero_cell_ratio_is_flagged_then_corrected_like_statsmodels(measure, cells):
    df = _two_by_two(*cells)
    o = sg.analyze(df, exposure="x", outcome="y", counts="n", measure=measure).overall
    table = Table2x2(np.array([[cells[0], cells[1]], [cells[2], cells[3]]], dtype=float), shift_zeros=False)
    ref = table.riskratio if measure == "rr" else table.oddsratio
    if np.isfinite(ref) and ref > 0:  # statsmodels answers (e.g. rr with all events exposed)
        assert o["status"] == "ok" and o["estimate"] == pytest.approx(ref)
    else:
        assert o["status"] != "ok" and "correction" in o["status"] and np.isnan(o["estimate"])
    fixed = sg.analyze(df, exposure="x", outcome="y", counts="n", measure=measure, correction=0.5).overall
    # Haldane-Anscombe: 0.5 added to every cell (statsmodels' own shift_zeros replaces only the
    # zero cells by 0.5, a different convention, so the correction is applied here by hand).
    shifted = Table2x2(np.array([[cells[0], cells[1]], [cells[2], cells[3]]], dtype=float) + 0.5,
                       shift_zeros=False)
    if measure == "or":
        assert fixed["estimate"] == pytest.approx(shifted.oddsratio, rel=1e-10)
        assert fixed["se"] == pytest.approx(shifted.log_oddsratio_se, rel=1e-10)
    elif not (np.isfinite(ref) and ref > 0):
        assert fixed["estimate"] == pytest.approx(shifted.riskratio, rel=1e-10)
        assert fixed["se"] == pytest.approx(shifted.log_riskratio_se, rel=1e-10)
    assert fixed["status"] == "ok"


def test_zero_events_in_one_table_mantel_haenszel_matches_statsmodels():
    """A zero cell in one stratum's table does not stop the pooled odds ratio (statsmodels agrees)."""
    pytest.importorskip("stratagem.estimate.mantel_haenszel")
    tables = [np.array([[0, 20], [5, 25]]), np.array([[12, 18], [6, 24]]), np.array([[7, 3], [4, 6]])]
    rows = []
    for k, t in enumerate(tables):
        for (i, j), count in np.ndenumerate(t):
            rows.append({"x": 1 - i, "y": 1 - j, "site": f"s{k}", "n": count})
    df = pd.DataFrame(rows)
    st = StratifiedTable([t.astype(float) for t in tables])
    a = sg.analyze(df, exposure="x", outcome="y", confounders=("site",), counts="n",
                   method="mantel-haenszel", measure="or")
    assert a.overall["estimate"] == pytest.approx(st.oddsratio_pooled, rel=1e-10)
    assert a.overall["se"] == pytest.approx(st.logodds_pooled_se, rel=1e-8)


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
@pytest.mark.parametrize("arm_value", [0, 1])
def test_zero_or_all_events_among_exposed_adjusted(method, arm_value):
    rng = np.random.default_rng(1)
    df = _table(rng)
    df.loc[df["x"] == 1, "y"] = arm_value  # quasi-complete separation of the outcome by exposure
    a, ref = check_against_statsmodels(df, method, ("c1", "c2"), measure="rd")
    o = a.overall
    if o["status"] == "ok":  # the risk among the exposed is known: it is exactly arm_value
        assert o["mean_exposed"] == pytest.approx(arm_value, abs=1e-4)


# -- separation and propensities at 0 or 1 ---------------------------------------------------------


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
@pytest.mark.parametrize("kind", ["complete", "quasi", "near"])
def test_separation_in_the_propensity_model(method, kind):
    rng = np.random.default_rng(2)
    df = _table(rng)
    if kind == "complete":
        df["x"] = (df["c1"] > 0).astype(int)
    elif kind == "quasi":  # separated except for ties at the boundary (Albert & Anderson 1984)
        df["c1"] = df["c1"].round(1)
        df["x"] = np.where(df["c1"] > 0, 1, np.where(df["c1"] < 0, 0, rng.integers(0, 2, len(df))))
    else:
        df.loc[df["c1"] > 0.5, "x"] = 1  # e near 1 for rows with c1 > 0.5, not separated
    a, ref = check_against_statsmodels(df, method, ("c1",), measure="rd")
    if method in ("ipw", "aipw"):
        assert flagged(a), "a propensity of 0 or 1 must be flagged for a weighting method"


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
def test_a_confounder_level_where_everyone_is_exposed(method):
    """Propensity exactly 1 for one level of a categorical confounder."""
    rng = np.random.default_rng(3)
    df = _table(rng)
    df.loc[df["c2"] == "r", "x"] = 1
    a, ref = check_against_statsmodels(df, method, ("c1", "c2"), measure="rd")
    if method in ("ipw", "aipw"):
        assert flagged(a)


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
@pytest.mark.parametrize("kind", ["complete", "quasi", "near"])
def test_separation_in_the_outcome_model(method, kind):
    rng = np.random.default_rng(4)
    df = _table(rng)
    if kind == "complete":
        df["y"] = (df["c1"] > 0.2).astype(int)
    elif kind == "quasi":
        df["c1"] = df["c1"].round(1)
        df["y"] = np.where(df["c1"] > 0, 1, np.where(df["c1"] < 0, 0, rng.integers(0, 2, len(df))))
    else:
        df.loc[df["c1"] > 0.8, "y"] = 1
    a, ref = check_against_statsmodels(df, method, ("c1",), measure="rd")
    if method in ("standardization", "aipw") and ref is None:
        assert flagged(a)


# -- collinearity, one-row strata, extreme weights ------------------------------------------------


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
@pytest.mark.parametrize("binary", [True, False])
def test_perfectly_collinear_confounders(method, binary):
    rng = np.random.default_rng(5)
    df = _table(rng)
    if not binary:
        df["y"] = 3.0 * df["c1"] + 2.0 * df["x"] + rng.normal(0, 1, len(df))
    df["c3"] = 2.0 * df["c1"] - 1.0  # an exact linear function of c1
    a, ref = check_against_statsmodels(df, method, ("c1", "c3"), measure="rd" if binary else "md")
    b = sg.analyze(df, exposure="x", outcome="y", confounders=("c1",), method=method,
                   measure="rd" if binary else "md")
    # the duplicate column carries no information: same means as with c1 alone
    assert a.overall["mean_exposed"] == pytest.approx(b.overall["mean_exposed"], rel=1e-7)
    assert a.overall["estimate"] == pytest.approx(b.overall["estimate"], rel=1e-7, abs=1e-10)
    assert a.overall["se"] == pytest.approx(b.overall["se"], rel=1e-6)
    assert any("collinear" in n for n in a.notes)


@pytest.mark.parametrize("method", method_params())
def test_a_stratum_of_one_row(method):
    rng = np.random.default_rng(6)
    df = _table(rng).assign(g="big")
    df = pd.concat([df, df.iloc[:1].assign(g="single")], ignore_index=True)
    df["y0"], df["y1"] = df["y"], df["y"]
    fields = dict(exposure="x", outcome="y", strata=("g",), method=method)
    if method == "exact":
        fields["potential_outcomes"] = ("y0", "y1")
    elif method != "crude":
        fields["confounders"] = ("c1",)
    a = sg.analyze(df, **fields)
    assert_ok_rows_finite(a)
    row = a.strata.set_index("g")
    if method == "exact":
        assert row.loc["single", "status"] == "ok" and row.loc["single", "n"] == 1
    else:
        assert row.loc["single", "status"] != "ok"
        assert np.isnan(row.loc["single", "estimate"])
    assert row.loc["big", "status"] == "ok"
    assert a.overall["status"] == "ok" or flagged(a)


@pytest.mark.parametrize("method", method_params())
def test_a_stratum_of_one_row_keeps_the_overall_estimate(method):
    rng = np.random.default_rng(6)
    df = _table(rng).assign(g="big")
    df = pd.concat([df, df.iloc[:1].assign(g="single")], ignore_index=True)
    df["y0"], df["y1"] = df["y"], df["y"]
    fields = dict(exposure="x", outcome="y", strata=("g",), method=method)
    if method == "exact":
        fields["potential_outcomes"] = ("y0", "y1")
    elif method != "crude":
        fields["confounders"] = ("c1",)
    a = sg.analyze(df, **fields)
    assert a.overall["status"] == "ok" and np.isfinite(a.overall["estimate"])
    if method in MODEL_METHODS:  # the one-row stratum is left out of the overall, and a note says so
        assert a.strata["status"].iloc[1] != "ok"
        assert any("left out: 'g=single'" in n for n in a.notes)


@pytest.mark.parametrize("method", method_params(("crude",) + MODEL_METHODS))
def test_extreme_frequency_weights_match_statsmodels(method):
    rng = np.random.default_rng(7)
    df = _table(rng, n=300)
    df["n"] = np.where(rng.random(len(df)) < 0.05, 1_000_000, 1)  # a few rows stand for a million
    if method == "crude":
        a = sg.analyze(df, exposure="x", outcome="y", counts="n", measure="rd")
        w = df["n"].to_numpy(float)
        for arm, col in ((1, "mean_exposed"), (0, "mean_unexposed")):
            sel = df["x"] == arm
            assert a.overall[col] == pytest.approx(np.average(df.loc[sel, "y"], weights=w[sel]), rel=1e-12)
        return
    check_against_statsmodels(df, method, ("c1", "c2"), measure="rd", counts="n", rtol=1e-4)


@pytest.mark.parametrize("method", method_params(("ipw", "aipw")))
def test_extreme_inverse_probability_weights_match_statsmodels(method):
    """Strong confounding: propensities near 0 and 1 (but not separated) give weights in the hundreds."""
    rng = np.random.default_rng(8)
    df = _table(rng, n=2000)
    df["x"] = (rng.random(len(df)) < 1 / (1 + np.exp(-3.0 * df["c1"]))).astype(int)
    a, ref = check_against_statsmodels(df, method, ("c1",), measure="rd", rtol=1e-4)
    t = sg.analyze(df, exposure="x", outcome="y", confounders=("c1",), method=method, truncate=(1, 99))
    assert t.overall["status"] == "ok" and np.isfinite(t.overall["estimate"])
    assert t.overall["estimate"] != a.overall["estimate"]  # truncation took effect


# -- huge magnitudes, tiny variance, float32 ------------------------------------------------------


def _numeric(rng, n=300, offset=0.0, scale=1.0):
    c1 = rng.normal(0, 1, n)
    x = (rng.random(n) < 1 / (1 + np.exp(-0.5 * c1))).astype(int)
    y = offset + scale * (2.0 * c1 + 1.5 * x + rng.normal(0, 1, n))
    return pd.DataFrame({"x": x, "y": y, "c1": c1})


@pytest.mark.parametrize("offset, scale", [(1e12, 1.0), (0.0, 1e-9), (5.0, 1e-9), (-1e12, 1e3)])
def test_crude_mean_difference_at_extreme_magnitudes(offset, scale):
    rng = np.random.default_rng(9)
    df = _numeric(rng, offset=offset, scale=scale)
    o = sg.analyze(df, exposure="x", outcome="y").overall
    cm = CompareMeans(DescrStatsW(df.loc[df.x == 1, "y"]), DescrStatsW(df.loc[df.x == 0, "y"]))
    ref_diff = df.loc[df.x == 1, "y"].mean() - df.loc[df.x == 0, "y"].mean()
    # float64 carries ~16 digits: at 1e12 the difference of means is good to ~1e-4 absolute
    atol = 1e-15 * abs(offset) * 100
    assert o["estimate"] == pytest.approx(ref_diff, rel=1e-9, abs=atol)
    assert o["se"] == pytest.approx(cm.std_meandiff_separatevar, rel=1e-6)
    assert o["status"] == "ok"


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
@pytest.mark.parametrize("offset, scale", [(1e12, 1.0), (0.0, 1e-9), (5.0, 1e-9)])
def test_adjusted_mean_difference_at_extreme_magnitudes(method, offset, scale):
    rng = np.random.default_rng(10)
    df = _numeric(rng, offset=offset, scale=scale)
    a = sg.analyze(df, exposure="x", outcome="y", confounders=("c1",), method=method)
    # reference: the same fit on the centred, unit-scale outcome, mapped back (scale-equivariance)
    centred = df.assign(y=(df["y"] - offset) / scale)
    m1, m0 = reference_means(centred, method, ("c1",))
    assert a.overall["status"] == "ok"
    assert a.overall["estimate"] == pytest.approx((m1 - m0) * scale, rel=1e-5, abs=1e-15 * abs(offset) * 1e3)
    b = sg.analyze(centred, exposure="x", outcome="y", confounders=("c1",), method=method)
    assert a.overall["se"] == pytest.approx(b.overall["se"] * scale, rel=1e-4)


@pytest.mark.parametrize("method", method_params())
@pytest.mark.parametrize("binary", [True, False])
def test_float32_input_equals_its_float64_values(method, binary):
    rng = np.random.default_rng(11)
    df = _table(rng) if binary else _numeric(rng).assign(c2=lambda d: rng.choice(["p", "q"], len(d)))
    df["y0"], df["y1"] = df["y"] - df["x"], df["y"] + 1 - df["x"]
    f32 = df.astype({c: "float32" for c in ("y", "c1", "y0", "y1")}).astype({"x": "float32"})
    f64 = f32.astype({c: "float64" for c in ("y", "c1", "y0", "y1", "x")})
    fields = dict(exposure="x", outcome="y", method=method, strata=("c2",))
    if method == "exact":
        fields["potential_outcomes"] = ("y0", "y1")
    elif method != "crude":
        fields["confounders"] = ("c1",)
    a = sg.analyze(f32, **fields).to_frame()
    b = sg.analyze(f64, **fields).to_frame()
    pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-12)
    if method in MODEL_METHODS:  # and equals statsmodels on one model over all rows
        one = sg.analyze(f32, **{**fields, "strata": ()}).overall
        m1, m0 = reference_means(f64, method, ("c1",))
        assert one["mean_exposed"] == pytest.approx(m1, rel=1e-5)
        assert one["mean_unexposed"] == pytest.approx(m0, rel=1e-5)


@pytest.mark.parametrize("measure", ["or", "rd"])
def test_mantel_haenszel_counts_table_equals_its_expanded_rows_with_a_numeric_confounder(measure):
    pytest.importorskip("stratagem.estimate.mantel_haenszel")
    rng = np.random.default_rng(0)
    n = 60
    table = pd.DataFrame({"x": np.tile([0, 1], n // 2), "y": rng.integers(0, 2, n),
                          "age": rng.integers(20, 80, n), "w": rng.integers(1, 30, n)})
    expanded = table.loc[table.index.repeat(table["w"])].drop(columns="w")
    fields = dict(exposure="x", outcome="y", confounders=("age",), method="mantel-haenszel", measure=measure)
    a = sg.analyze(table, counts="w", **fields).overall
    b = sg.analyze(expanded, **fields).overall
    assert a["estimate"] == pytest.approx(b["estimate"], rel=1e-10)


# -- categorical columns with unused categories; huge counts with warnings as errors ---------------


@pytest.mark.parametrize("method", method_params(("crude",) + MODEL_METHODS))
def test_categorical_columns_with_unused_categories_raise_no_pandas_warning(method):
    """A categorical confounder and modifier whose dtype lists categories no row has: recoding them
    must not build ``pd.Categorical`` with values outside its categories (a Pandas4Warning now, an
    error in a future pandas), and the result equals that of the same columns as plain strings."""
    rng = np.random.default_rng(12)
    df = _table(rng, n=600)
    df["m"] = rng.choice(["lo", "mid"], len(df))
    plain = df.copy()
    df["c2"] = pd.Categorical(df["c2"], categories=["p", "q", "r", "never"])
    df["m"] = pd.Categorical(df["m"], categories=["hi", "lo", "mid", "unused"])
    fields = dict(exposure="x", outcome="y", strata=("m",), method=method)
    if method != "crude":
        fields["confounders"] = ("c1", "c2")
    with warnings.catch_warnings():
        warnings.simplefilter("error", DeprecationWarning)  # Pandas4Warning is one
        warnings.simplefilter("error", FutureWarning)
        a = sg.analyze(df, **fields)
    b = sg.analyze(plain, **fields)
    assert list(a.strata["status"]) == ["ok", "ok"]
    pd.testing.assert_frame_equal(a.to_frame(), b.to_frame(), check_exact=False, rtol=1e-12)
    if method != "crude":
        pd.testing.assert_frame_equal(a.diagnostics, b.diagnostics, check_exact=False, rtol=1e-12)


@pytest.mark.parametrize("method", method_params(MODEL_METHODS))
def test_extreme_frequency_weights_run_without_runtime_warnings(method):
    """Counts of a million on a few rows: the propensity model converges (no runaway Newton steps),
    and the checks table handles the resulting huge or infinite weights without any warning. The
    row is either estimated and equal to statsmodels, or flagged for a stated reason."""
    for random_state in (3, 7):
        rng = np.random.default_rng(random_state)
        df = _table(rng, n=300)
        df["n"] = np.where(rng.random(len(df)) < 0.05, 1_000_000, 1)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            a = sg.analyze(df, exposure="x", outcome="y", confounders=("c1", "c2"), method=method,
                           counts="n", measure="rd")
        assert "did not converge" not in a.overall["status"]
        assert_ok_rows_finite(a)
        try:
            m1, m0 = reference_means(df, method, ("c1", "c2"), weights=df["n"])
        except NoAnswer:
            assert flagged(a)
            continue
        if a.overall["status"] != "ok":
            assert flagged(a)
        else:
            assert a.overall["mean_exposed"] == pytest.approx(m1, rel=1e-4)
            assert a.overall["mean_unexposed"] == pytest.approx(m0, rel=1e-4)
