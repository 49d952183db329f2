"""Model-based adjusted estimators: standardization, IPW, AIPW (per stratum and overall).

Known truth comes from :func:`stratagem.simulate` (confounded exposure, both potential outcomes
drawn). Standard errors are checked against an independent sandwich computed here from the stacked
estimating equations with numerical derivatives, and against statsmodels' HC0 robust covariance.
"""

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.special import expit

import stratagem as sg
from stratagem.errors import StratagemError
from stratagem.estimate import get_estimator
from stratagem.estimate.base import OK
from stratagem.estimate.bootstrap import replicate_weights
from stratagem.frame import prepare
from stratagem.spec import Spec

ADJUSTED = ("standardization", "ipw", "aipw")
CONF = ("x1", "x2", "x3")


def simulated(random_state, n=20000, confounding=0.7):
    shares = {
        "f": {"doomed": 0.2, "causal": 0.25, "preventive": 0.05, "immune": 0.5},
        "m": {"doomed": 0.3, "causal": 0.05, "preventive": 0.05, "immune": 0.6},
    }
    return sg.simulate(
        n,
        modifiers={"sex": {"f": 0.5, "m": 0.5}},
        shares=shares,
        covariates={
            "x1": ("normal", 0.0, 1.0),
            "x2": ("binary", 0.4),
            "x3": ("categorical", {"a": 0.3, "b": 0.3, "c": 0.4}),
        },
        confounding=confounding,
        seed=random_state,
    )


def means(df, method, **fields):
    spec = Spec(exposure=fields.pop("exposure", "exposed"), outcome=fields.pop("outcome", "outcome"),
                method=method, **fields)
    prep, spec = prepare(df, spec)
    return prep, spec, get_estimator(method)(prep, spec)


def rd(gm):
    return gm.m1 - gm.m0, np.sqrt(gm.v11 + gm.v00 - 2 * gm.v10)


@pytest.fixture(scope="module")
def sim():
    return simulated(1)


@pytest.mark.parametrize("method", ADJUSTED)
def test_adjusted_methods_recover_the_true_cate_where_crude_is_biased(sim, method):
    truth = sim.groupby("sex", observed=True)[["y1", "y0"]].mean()
    cate = (truth["y1"] - truth["y0"]).to_numpy()
    ate = (sim["y1"] - sim["y0"]).mean()
    _, _, crude = means(sim, "crude", strata=("sex",))
    c, c_se = rd(crude)
    assert np.all(np.abs(c[:2] - cate) > 10 * c_se[:2])  # crude is far off
    _, _, gm = means(sim, method, confounders=CONF, strata=("sex",))
    est, se = rd(gm)
    assert gm.status == [OK, OK, OK]
    assert np.all(np.abs(est[:2] - cate) < 3 * se[:2])
    assert abs(est[2] - ate) < 3 * se[2]
    assert np.all(se < 0.02)


@pytest.mark.parametrize("method", ADJUSTED)
def test_overall_is_the_n_weighted_combination_of_strata(sim, method):
    _, _, gm = means(sim, method, confounders=CONF, strata=("sex",))
    share = gm.n[:2] / gm.n[2]
    assert gm.m1[2] == pytest.approx(np.sum(share * gm.m1[:2]), rel=1e-12)
    assert gm.m0[2] == pytest.approx(np.sum(share * gm.m0[:2]), rel=1e-12)
    # strata are independent samples: overall variance at least the share-weighted sum
    assert gm.v11[2] >= np.sum(share**2 * gm.v11[:2]) * 0.999


@pytest.mark.parametrize("method", ADJUSTED)
def test_no_strata_equals_one_stratum(sim, method):
    _, _, whole = means(sim, method, confounders=CONF)
    one = sim.assign(all_="x")
    _, _, strat = means(one, method, confounders=CONF, strata=("all_",))
    np.testing.assert_allclose(whole.m1, strat.m1, rtol=1e-12)
    np.testing.assert_allclose(whole.v11, strat.v11, rtol=1e-10)


# -- standard errors against independent computations ----------------------------------------------


def _design(df):
    x3 = df["x3"].astype(str)
    return np.column_stack(
        [np.ones(len(df)), df["x1"], df["x2"], x3 == "b", x3 == "c"]
    ).astype(float)


def _sandwich(ufun, theta, w):
    """Stacked estimating-equation covariance A^-1 B A^-T / N with a numerical Jacobian."""
    U = ufun(theta)
    N = w.sum()
    q = len(theta)
    A = np.empty((q, q))
    for j in range(q):
        h = 1e-6 * max(1.0, abs(theta[j]))
        tp, tm = theta.copy(), theta.copy()
        tp[j] += h
        tm[j] -= h
        A[:, j] = -(w @ ufun(tp) - w @ ufun(tm)) / (2 * h) / N
    Bm = (U * w[:, None]).T @ U / N
    Ai = np.linalg.inv(A)
    return Ai @ Bm @ Ai.T / N


def test_ipw_variance_equals_stacked_sandwich():
    df = simulated(4, n=3000)
    df["freq"] = np.random.default_rng(0).integers(1, 4, len(df))
    _, _, gm = means(df, "ipw", confounders=CONF, counts="freq")
    X, a, y, w = _design(df), df["exposed"].to_numpy(float), df["outcome"].to_numpy(float), df["freq"].to_numpy(float)
    beta = sm.GLM(a, X, family=sm.families.Binomial(), freq_weights=w).fit(tol=1e-12).params
    p = X.shape[1]

    def u(theta):
        b, m1, m0 = theta[:p], theta[p], theta[p + 1]
        e = expit(X @ b)
        return np.column_stack([X * (a - e)[:, None], a * (y - m1) / e, (1 - a) * (y - m0) / (1 - e)])

    e = expit(X @ beta)
    m1 = np.sum(w * a * y / e) / np.sum(w * a / e)
    m0 = np.sum(w * (1 - a) * y / (1 - e)) / np.sum(w * (1 - a) / (1 - e))
    V = _sandwich(u, np.r_[beta, m1, m0], w)
    assert gm.m1[0] == pytest.approx(m1, rel=1e-8) and gm.m0[0] == pytest.approx(m0, rel=1e-8)
    np.testing.assert_allclose([gm.v11[0], gm.v00[0], gm.v10[0]], [V[p, p], V[p + 1, p + 1], V[p, p + 1]],
                               rtol=1e-5, atol=1e-12)


def test_standardization_variance_equals_stacked_sandwich():
    df = simulated(5, n=3000)
    _, _, gm = means(df, "standardization", confounders=CONF)
    L, a, y = _design(df), df["exposed"].to_numpy(float), df["outcome"].to_numpy(float)
    X = np.column_stack([L, a])
    w = np.ones(len(df))
    beta = sm.GLM(y, X, family=sm.families.Binomial()).fit(tol=1e-12).params
    X1, X0 = np.column_stack([L, np.ones_like(a)]), np.column_stack([L, np.zeros_like(a)])
    p = X.shape[1]

    def u(theta):
        b, m1, m0 = theta[:p], theta[p], theta[p + 1]
        return np.column_stack([X * (y - expit(X @ b))[:, None], expit(X1 @ b) - m1, expit(X0 @ b) - m0])

    m1, m0 = expit(X1 @ beta).mean(), expit(X0 @ beta).mean()
    V = _sandwich(u, np.r_[beta, m1, m0], w)
    np.testing.assert_allclose([gm.m1[0], gm.m0[0]], [m1, m0], rtol=1e-8)
    np.testing.assert_allclose([gm.v11[0], gm.v00[0], gm.v10[0]], [V[p, p], V[p + 1, p + 1], V[p, p + 1]],
                               rtol=1e-5)


def test_standardization_of_a_linear_model_is_its_coefficient_with_hc0_se():
    # reference library: statsmodels OLS with cov_type="HC0" (the sandwich of the exposure coefficient)
    df = sg.simulate(2000, outcome="numeric", effects=4.0, covariates={"x1": ("normal", 0, 1), "x2": ("binary", .5)},
                     confounding=0.6, seed=3)
    a = sg.analyze(df, exposure="exposed", outcome="outcome", confounders=("x1", "x2"), method="standardization")
    X = sm.add_constant(df[["x1", "x2", "exposed"]].astype(float))
    ref = sm.OLS(df["outcome"], X).fit(cov_type="HC0")
    assert a.overall["estimate"] == pytest.approx(ref.params["exposed"], rel=1e-8)
    assert a.overall["se"] == pytest.approx(ref.bse["exposed"], rel=1e-6)


@pytest.mark.parametrize("method", ADJUSTED)
def test_numeric_outcome_mean_difference(method):
    df = sg.simulate(4000, modifiers={"g": {"u": .5, "v": .5}}, outcome="numeric", effects={"u": 2.0, "v": 8.0},
                     covariates={"x1": ("normal", 0, 1), "x2": ("poisson", 3)}, confounding=0.7, seed=8)
    a = sg.analyze(df, exposure="exposed", outcome="outcome", confounders=("x1", "x2"), strata=("g",), method=method)
    assert a.spec.measure == "md"
    est, se = a.strata["estimate"].to_numpy(), a.strata["se"].to_numpy()
    assert np.all(np.abs(est - [2.0, 8.0]) < 4 * se)


@pytest.mark.parametrize("measure", ["rr", "or"])
def test_ratio_measures_run_on_adjusted_means(sim, measure):
    a = sg.analyze(sim, exposure="exposed", outcome="outcome", confounders=CONF, strata=("sex",),
                   method="aipw", measure=measure)
    gm = a.strata
    if measure == "rr":
        expected = gm["mean_exposed"] / gm["mean_unexposed"]
    else:
        odds = lambda p: p / (1 - p)  # noqa: E731
        expected = odds(gm["mean_exposed"]) / odds(gm["mean_unexposed"])
    np.testing.assert_allclose(gm["estimate"], expected, rtol=1e-10)
    assert (gm["ci_low"] < gm["estimate"]).all() and (gm["estimate"] < gm["ci_high"]).all()


# -- weights, truncation, extras ---------------------------------------------------------------------


def test_propensity_and_weights_are_returned_in_row_order(sim):
    prep, spec, gm = means(sim, "ipw", confounders=CONF, strata=("sex",))
    e = gm.extra["propensity"]
    assert e.shape == (len(sim),) and np.all((e > 0) & (e < 1))
    # per-stratum logistic fit of exposure on the confounders
    rows = (sim["sex"] == "m").to_numpy()
    X = _design(sim[rows])
    ref = sm.GLM(sim["exposed"][rows].to_numpy(float), X, family=sm.families.Binomial()).fit(tol=1e-12)
    np.testing.assert_allclose(e[rows], ref.fittedvalues, rtol=1e-7)
    sw = gm.extra["weights"]
    p1 = sim["exposed"][rows].mean()
    a = sim["exposed"].to_numpy()[rows]
    np.testing.assert_allclose(sw[rows], np.where(a == 1, p1 / e[rows], (1 - p1) / (1 - e[rows])), rtol=1e-10)
    _, _, st = means(sim, "standardization", confounders=CONF, strata=("sex",))
    np.testing.assert_allclose(st.extra["propensity"], e, rtol=1e-10)
    assert "weights" not in st.extra


def test_truncation_clips_weights_at_percentiles(sim):
    _, _, plain = means(sim, "ipw", confounders=CONF, strata=("sex",))
    _, _, cut = means(sim, "ipw", confounders=CONF, strata=("sex",), truncate=(5, 95))
    sw = plain.extra["weights"]
    lo, hi = np.quantile(sw, [0.05, 0.95], method="inverted_cdf")
    np.testing.assert_allclose(cut.extra["weights"], np.clip(sw, lo, hi), rtol=1e-12)
    assert not np.allclose(cut.m1, plain.m1)
    assert np.all(np.isfinite(cut.v11))


# -- bootstrap -----------------------------------------------------------------------------------------


@pytest.mark.parametrize("method", ADJUSTED)
@pytest.mark.parametrize("truncate", [None, (2, 98)])
def test_vectorised_bootstrap_equals_a_plain_loop(method, truncate):
    df = simulated(2, n=600)
    spec = Spec(exposure="exposed", outcome="outcome", confounders=CONF, strata=("sex",), method=method,
                n_boot=12, seed=5, truncate=truncate)
    prep, spec = prepare(df, spec)
    est = get_estimator(method)
    W = next(replicate_weights(prep, spec))
    m1, m0 = est.boot(prep, spec, W)
    for b in range(W.shape[0]):
        gm = est(replace(prep, w=W[b]), spec)
        np.testing.assert_allclose(m1[b], gm.m1, rtol=1e-7)
        np.testing.assert_allclose(m0[b], gm.m0, rtol=1e-7)


@pytest.mark.parametrize("method", ADJUSTED)
def test_bootstrap_is_reproducible_with_the_same_random_state(sim, method):
    df = sim.iloc[:3000]
    kw = dict(exposure="exposed", outcome="outcome", confounders=CONF, strata=("sex",), method=method,
              interval="bootstrap", n_boot=50)
    a = sg.analyze(df, seed=11, **kw)
    b = sg.analyze(df, seed=11, **kw)
    c = sg.analyze(df, seed=12, **kw)
    pd.testing.assert_frame_equal(a.strata, b.strata)
    assert not np.allclose(a.strata["ci_low"], c.strata["ci_low"])
    w = sg.analyze(df, **{**kw, "interval": "wald"})
    # percentile bootstrap and influence-function intervals agree roughly
    np.testing.assert_allclose(a.strata["se"], w.strata["se"], rtol=0.35)


# -- awkward data ----------------------------------------------------------------------------------------


def test_collinear_and_constant_confounders_are_dropped_with_notes(sim):
    df = sim.assign(const=1.0, x1_copy=2 * sim["x1"] - 3)
    _, _, ref = means(sim, "aipw", confounders=CONF, strata=("sex",))
    _, _, gm = means(df, "aipw", confounders=CONF + ("const", "x1_copy"), strata=("sex",))
    np.testing.assert_allclose(gm.m1, ref.m1, rtol=1e-9)
    text = " ".join(gm.notes)
    assert "'const'" in text and "'x1_copy'" in text


def test_confounder_constant_within_one_stratum(sim):
    df = sim.copy()
    df["site"] = np.where(df["sex"] == "m", "clinic", np.where(df["x1"] > 0, "home", "clinic"))
    _, _, gm = means(df, "aipw", confounders=CONF + ("site",), strata=("sex",))
    assert gm.status == [OK, OK, OK]
    assert any("'site=home'" in n and "sex=m" in n for n in gm.notes)


@pytest.mark.parametrize("method", ADJUSTED)
def test_tiny_stratum_is_not_estimable_and_overall_combines_the_estimable_strata(sim, method):
    df = sim.iloc[:4000].copy()
    df["grp"] = "big"
    pick = np.r_[np.flatnonzero(df["exposed"] == 1)[:2], np.flatnonzero(df["exposed"] == 0)[:2]]
    df.loc[df.index[pick], "grp"] = "tiny"
    _, _, gm = means(df, method, confounders=CONF, strata=("grp",))
    assert gm.status[0] == OK
    assert gm.status[1].startswith("fewer rows (4) than model parameters (")
    assert gm.status[2] == OK and np.isfinite(gm.m1[2]) and np.isfinite(gm.v11[2])
    # the overall group is the estimable stratum alone (the only one left), said in a note
    assert gm.m1[2] == pytest.approx(gm.m1[0], rel=1e-14) and gm.m0[2] == pytest.approx(gm.m0[0], rel=1e-14)
    assert gm.v11[2] == pytest.approx(gm.v11[0], rel=1e-12)
    assert any("combines the 1 estimable strata only (3996 of 4000 rows)" in n and "'grp=tiny'" in n
               for n in gm.notes)
    a = sg.analyze(df, exposure="exposed", outcome="outcome", confounders=CONF, strata=("grp",), method=method)
    assert np.isnan(a.strata["estimate"].iloc[1]) and "fewer rows" in a.strata["status"].iloc[1]


def test_stratum_without_unexposed_rows(sim):
    df = sim.iloc[:4000].copy()
    df = df[~((df["sex"] == "m") & (df["exposed"] == 0))]
    _, _, gm = means(df, "ipw", confounders=CONF, strata=("sex",))
    assert gm.status[1] == "no unexposed rows in this stratum"
    assert gm.status[2] == OK and gm.m1[2] == pytest.approx(gm.m1[0], rel=1e-14)  # the estimable one's
    assert any("left out: 'sex=m'" in n for n in gm.notes)


def test_separation_in_a_stratum_is_reported(sim):
    df = sim.iloc[:4000].copy()
    df["flag"] = np.where(df["sex"] == "f", df["exposed"], 0)  # predicts exposure among f perfectly
    _, _, gm = means(df, "ipw", confounders=CONF + ("flag",), strata=("sex",))
    # found before fitting: among f, flag = 0 holds only unexposed rows
    assert gm.status[0].startswith("positivity fails: confounder 'flag' = 0 has no exposed rows")
    assert "separates" in gm.status[0]
    assert gm.status[1] == OK
    assert gm.status[2] == OK and gm.m1[2] == pytest.approx(gm.m1[1], rel=1e-14)


def test_separation_by_a_numeric_confounder_is_reported(sim):
    df = sim.iloc[:4000].copy()
    noise = np.random.default_rng(3).uniform(0, 1, len(df))
    df["score"] = np.where(df["sex"] == "f", 2.0 * df["exposed"] + noise, noise)  # separates among f
    _, _, gm = means(df, "ipw", confounders=CONF + ("score",), strata=("sex",))
    assert "separat" in gm.status[0] and ("did not converge" in gm.status[0] or "positivity" in gm.status[0])
    assert np.isnan(gm.m1[0]) and gm.status[1] == OK


def test_outcome_constant_in_a_stratum():
    df = simulated(3, n=3000)
    df.loc[df["sex"] == "m", "outcome"] = 0
    _, _, gm = means(df, "standardization", confounders=CONF, strata=("sex",))
    assert gm.status[1].startswith("outcome is constant in this stratum")
    _, _, iw = means(df, "ipw", confounders=CONF, strata=("sex",))
    assert iw.status[1] == OK and iw.m1[1] == 0.0


def test_input_frame_is_not_changed(sim):
    df = sim.iloc[:2000].copy()
    before = df.copy()
    sg.analyze(df, exposure="exposed", outcome="outcome", confounders=CONF, strata=("sex",), method="aipw",
               interval="bootstrap", n_boot=20)
    pd.testing.assert_frame_equal(df, before)


def test_numeric_confounder_with_missing_values_dropped(sim):
    df = sim.iloc[:2000].copy()
    df.loc[df.index[:10], "x1"] = np.nan
    a = sg.analyze(df, exposure="exposed", outcome="outcome", confounders=CONF, method="ipw")
    assert a.n_dropped == 10 and np.isfinite(a.overall["estimate"])


def test_unknown_errors_are_stratagem_errors(sim):
    with pytest.raises(StratagemError, match="x9"):
        sg.analyze(sim, exposure="exposed", outcome="outcome", confounders=("x9",), method="ipw")


# -- coverage --------------------------------------------------------------------------------------------


@pytest.mark.slow
def test_coverage_of_95_percent_intervals_over_repeated_random_states():
    hits = {m: [] for m in ADJUSTED}
    reps = 120
    for r in range(reps):
        df = simulated(1000 + r, n=1500, confounding=0.6)
        truth = df.groupby("sex", observed=True)[["y1", "y0"]].mean()
        cate = (truth["y1"] - truth["y0"]).to_numpy()
        for m in ADJUSTED:
            _, _, gm = means(df, m, confounders=CONF, strata=("sex",))
            est, se = rd(gm)
            hits[m].extend(np.abs(est[:2] - cate) <= 1.96 * se[:2])
    for m, h in hits.items():
        cover = np.mean(h)
        # 240 intervals per method: binomial sd of the coverage is about 0.014 at 95%
        assert 0.90 <= cover <= 0.99, (m, cover)


def _refit_means(df, w, method):
    """(m1, m0) of one stratum from two statsmodels GLMs fitted with frequency weights ``w``:
    the straightforward refit a bootstrap replicate must equal."""
    X = pd.get_dummies(df[list(CONF)], columns=["x3"], drop_first=True, dtype=float).to_numpy(dtype=float)
    X = sm.add_constant(X, has_constant="add")
    a, y = df["exposed"].to_numpy(dtype=float), df["outcome"].to_numpy(dtype=float)
    e = sm.GLM(a, X, family=sm.families.Binomial(), freq_weights=w).fit(tol=1e-13).fittedvalues
    om = sm.GLM(y, np.column_stack([X, a]), family=sm.families.Binomial(), freq_weights=w).fit(tol=1e-13)
    q1 = om.predict(np.column_stack([X, np.ones_like(a)]))
    q0 = om.predict(np.column_stack([X, np.zeros_like(a)]))
    if method == "standardization":
        return np.average(q1, weights=w), np.average(q0, weights=w)
    if method == "ipw":
        return np.average(y, weights=w * a / e), np.average(y, weights=w * (1 - a) / (1 - e))
    return (np.average(q1 + a * (y - q1) / e, weights=w),
            np.average(q0 + (1 - a) * (y - q0) / (1 - e), weights=w))


@pytest.mark.parametrize("method", ADJUSTED)
def test_bootstrap_replicates_equal_statsmodels_refits(sim, method):
    # The batched bootstrap (a chord step from the full-sample fit, then Newton steps) must give
    # every replicate's full refit: statsmodels GLMs with the replicate's frequencies, to 1e-8.
    # reference library: statsmodels GLM (Binomial, freq_weights)
    df = sim.iloc[:4000].reset_index(drop=True)
    spec = Spec(exposure="exposed", outcome="outcome", confounders=CONF, strata=("sex",), method=method,
                n_boot=10, seed=9)
    prep, spec = prepare(df, spec)
    est = get_estimator(method)
    W = next(replicate_weights(prep, spec))
    m1, m0 = est.boot(prep, spec, W)
    labels = list(prep.labels["sex"].astype(str))
    for b in range(W.shape[0]):
        for s, label in enumerate(labels):
            rows = (df["sex"].astype(str) == label).to_numpy()
            r1, r0 = _refit_means(df[rows], W[b][rows], method)
            assert abs(m1[b, s] - r1) < 1e-8 and abs(m0[b, s] - r0) < 1e-8, (b, label)
