"""Mantel-Haenszel estimator: hand-derived values, published worked examples, edge cases.

Worked example (used throughout): the University Group Diabetes Program tolbutamide trial, deaths
by treatment in two age strata, as tabulated in Rothman, Greenland & Lash, *Modern Epidemiology*
(3rd ed., 2008, ch. 15) -- from memory: counts and the printed summary values RD_MH = 0.035 and
RR_MH = 1.33 are recalled, not read; the hand derivations below do not depend on that memory.

    age < 55:  tolbutamide 8 deaths / 106,  placebo 5 / 120    (T = 226)
    age 55+:   tolbutamide 22 deaths / 98,  placebo 16 / 85    (T = 183)

Hand derivation (a exposed cases, c unexposed cases, N1, N0 arm sizes, T total):
    sum a N0 / T = 8*120/226 + 22*85/183 = 4.24779 + 10.21858 = 14.46637
    sum c N1 / T = 5*106/226 + 16*98/183 = 2.34513 +  8.56831 = 10.91344
    sum N1 N0 / T = 106*120/226 + 98*85/183 = 56.28319 + 45.51913 = 101.80232
    RR_MH = 14.46637 / 10.91344 = 1.32556
    RD_MH = (14.46637 - 10.91344) / 101.80232 = 0.034901
    sum a d / T = 8*115/226 + 22*69/183 = 4.07080 + 8.29508 = 12.36588
    sum b c / T = 98*5/226 + 76*16/183 = 2.16814 + 6.64481 = 8.81295
    OR_MH = 12.36588 / 8.81295 = 1.40315
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.contingency_tables import StratifiedTable

import stratagem as sg
from stratagem.estimate.mantel_haenszel import CONFOUNDER_BINS, mantel_haenszel
from stratagem.frame import prepare
from stratagem.spec import Spec

TOLB = {"<55": (8, 106, 5, 120), "55+": (22, 98, 16, 85)}


def counts_frame(tables: dict, stratum="age") -> pd.DataFrame:
    rows = []
    for level, (a, n1, c, n0) in tables.items():
        rows += [
            {stratum: level, "x": 1, "y": 1, "f": a},
            {stratum: level, "x": 1, "y": 0, "f": n1 - a},
            {stratum: level, "x": 0, "y": 1, "f": c},
            {stratum: level, "x": 0, "y": 0, "f": n0 - c},
        ]
    return pd.DataFrame(rows)


def mh(df, measure, **kw):
    kw.setdefault("counts", "f")
    return sg.analyze(df, exposure="x", outcome="y", method="mantel-haenszel", measure=measure, **kw)


@pytest.fixture
def tolb():
    return counts_frame(TOLB)


def test_tolbutamide_hand_derived(tolb):
    """Values derived by hand in the module docstring."""
    assert mh(tolb, "rr", confounders=("age",)).overall["estimate"] == pytest.approx(1.32556, abs=1e-5)
    assert mh(tolb, "rd", confounders=("age",)).overall["estimate"] == pytest.approx(0.034901, abs=1e-6)
    assert mh(tolb, "or", confounders=("age",)).overall["estimate"] == pytest.approx(1.40315, abs=1e-5)


def test_tolbutamide_printed_values(tolb):
    """from memory: Rothman, Greenland & Lash, Modern Epidemiology 3rd ed., ch. 15 (tolbutamide
    example): RR_MH = 1.33 and RD_MH = 0.035 at the printed precision."""
    assert round(mh(tolb, "rr", confounders=("age",)).overall["estimate"], 2) == 1.33
    assert round(mh(tolb, "rd", confounders=("age",)).overall["estimate"], 3) == 0.035


def test_tolbutamide_variances_hand_derived(tolb):
    """Greenland & Robins (1985) variance of log RR_MH and Sato (1989) variance of RD_MH, by hand.

    GR: sum(N1 N0 M1 / T^2 - a c / T) / (sum a N0/T * sum c N1/T)
        stratum 1: 106*120*13/226^2 - 40/226 = 3.23753 - 0.17699 = 3.06054
        stratum 2:  98*85*38/183^2 - 352/183 = 9.45206 - 1.92350 = 7.52856
        Var = 10.58910 / (14.46637 * 10.91344) = 0.067071  -> se 0.25898
    Sato: P = (N1^2 c - N0^2 a + N1 N0 (N0 - N1)/2) / T^2, Q = (a (N0 - c) + c (N1 - a)) / (2T)
        P1 = (56180 - 115200 + 89040) / 51076 = 0.58775;  P2 = (153664 - 158950 - 54145) / 33489 = -1.77464
        Q1 = (920 + 490) / 452 = 3.11947;                 Q2 = (1518 + 1216) / 366 = 7.46995
        Var = (0.034901 * (-1.18689) + 10.58942) / 101.80232^2 = 0.0010178  -> se 0.031903
    """
    rr = mh(tolb, "rr", confounders=("age",)).overall
    rd = mh(tolb, "rd", confounders=("age",)).overall
    assert rr["se"] == pytest.approx(0.25898, abs=1e-5)
    assert rd["se"] == pytest.approx(0.031903, abs=2e-6)


def test_single_table_reduces_to_the_usual_formulas():
    """With one table the pooled estimators are the crude ones and both variances reduce to the
    large-sample ones (hand derivation: a=10, N1=30, c=5, N0=20; RD = 1/3 - 1/4 = 1/12,
    Var = (1/3)(2/3)/30 + (1/4)(3/4)/20 = 0.0167824; Var log RR = 1/10 - 1/30 + 1/5 - 1/20 = 0.216667;
    Var log OR = 1/10 + 1/20 + 1/5 + 1/15 = 0.416667)."""
    df = counts_frame({"all": (10, 30, 5, 20)})
    rd = mh(df, "rd").overall
    assert rd["estimate"] == pytest.approx(1 / 12, rel=1e-12)
    assert rd["se"] ** 2 == pytest.approx((1 / 3) * (2 / 3) / 30 + 0.25 * 0.75 / 20, rel=1e-12)
    rr = mh(df, "rr").overall
    assert rr["estimate"] == pytest.approx((1 / 3) / 0.25, rel=1e-12)
    assert rr["se"] ** 2 == pytest.approx(1 / 10 - 1 / 30 + 1 / 5 - 1 / 20, rel=1e-12)
    orr = mh(df, "or").overall
    assert orr["estimate"] == pytest.approx((10 * 15) / (20 * 5), rel=1e-12)
    assert orr["se"] ** 2 == pytest.approx(1 / 10 + 1 / 20 + 1 / 5 + 1 / 15, rel=1e-12)


@pytest.mark.parametrize("measure", ["rd", "rr", "or"])
def test_strata_without_confounders_equal_crude(tolb, measure):
    """Each stratum is one table: estimate and se equal the crude estimator's."""
    a = mh(tolb, measure, strata=("age",))
    c = sg.analyze(tolb, exposure="x", outcome="y", method="crude", measure=measure, counts="f",
                   strata=("age",))
    for col in ("estimate", "se", "ci_low", "ci_high", "mean_exposed", "mean_unexposed"):
        np.testing.assert_allclose(a.strata[col], c.strata[col], rtol=1e-10)


def test_standardised_means_reproduce_rd_and_rr(tolb):
    """m1 - m0 = RD_MH and m1 / m0 = RR_MH (one standard: the weights N1 N0 / T)."""
    rd = mh(tolb, "rd", confounders=("age",)).overall
    rr = mh(tolb, "rr", confounders=("age",)).overall
    assert rd["mean_exposed"] - rd["mean_unexposed"] == pytest.approx(rd["estimate"], rel=1e-12)
    assert rr["mean_exposed"] / rr["mean_unexposed"] == pytest.approx(rr["estimate"], rel=1e-12)
    # weights 56.283 and 45.519: m1 = (56.283*8/106 + 45.519*22/98) / 101.802
    w1, w2 = 106 * 120 / 226, 98 * 85 / 183
    assert rd["mean_exposed"] == pytest.approx((w1 * 8 / 106 + w2 * 22 / 98) / (w1 + w2), rel=1e-12)


def test_matched_pairs_sparse_limit():
    """Pair-matched data (one exposed and one unexposed per pair, pair = confounder): the MH odds
    ratio is the ratio of discordant pairs n10/n01 with RBG variance 1/n10 + 1/n01, and the MH risk
    difference is (n10 - n01)/pairs -- from memory: Breslow & Day (1980), Statistical Methods in
    Cancer Research vol. I, ch. 5 (matched pairs); also follows by hand from the formulas."""
    kinds = {"11": 7, "10": 12, "01": 5, "00": 20}  # (exposed outcome, unexposed outcome): pairs
    rows, pair = [], 0
    for kind, k in kinds.items():
        for _ in range(k):
            rows += [{"pair": f"p{pair}", "x": 1, "y": int(kind[0])},
                     {"pair": f"p{pair}", "x": 0, "y": int(kind[1])}]
            pair += 1
    df = pd.DataFrame(rows)
    orr = sg.analyze(df, exposure="x", outcome="y", confounders=("pair",), method="mantel-haenszel",
                     measure="or").overall
    assert orr["estimate"] == pytest.approx(12 / 5, rel=1e-12)
    assert orr["se"] ** 2 == pytest.approx(1 / 12 + 1 / 5, rel=1e-12)
    rd = sg.analyze(df, exposure="x", outcome="y", confounders=("pair",), method="mantel-haenszel",
                    measure="rd").overall
    assert rd["estimate"] == pytest.approx((12 - 5) / 44, rel=1e-12)


def random_frame(rng, n=3000):
    return pd.DataFrame({
        "x": rng.integers(0, 2, n),
        "y": rng.integers(0, 2, n),
        "s": rng.choice(["a", "b", "c"], n),
        "c1": rng.choice(["u", "v"], n),
        "c2": rng.integers(0, 4, n),
    })


@pytest.mark.parametrize("random_state", [1, 2, 3])
def test_overall_pools_modifier_by_confounder_cells(random_state):
    """The overall group with strata=(s,) and confounders (c1, c2) pools the s x c1 x c2 cells: it
    equals the analysis with confounders (s, c1, c2) and no strata, and statsmodels for the OR."""
    df = random_frame(np.random.default_rng(random_state))
    for measure in ("rd", "rr", "or"):
        a = mh(df, measure, counts=None, strata=("s",), confounders=("c1", "c2"))
        b = mh(df, measure, counts=None, confounders=("s", "c1", "c2"))
        assert a.overall["estimate"] == pytest.approx(b.overall["estimate"], rel=1e-12)
        assert a.overall["se"] == pytest.approx(b.overall["se"], rel=1e-12)
    tabs = []
    for _, g in df.groupby(["s", "c1", "c2"]):
        t = pd.crosstab(g["x"], g["y"]).reindex(index=[1, 0], columns=[1, 0], fill_value=0)
        tabs.append(t.to_numpy())
    ref = StratifiedTable(tabs)
    a = mh(df, "or", counts=None, strata=("s",), confounders=("c1", "c2"))
    assert a.overall["estimate"] == pytest.approx(ref.oddsratio_pooled, rel=1e-10)
    assert a.overall["se"] == pytest.approx(ref.logodds_pooled_se, rel=1e-10)


def test_numeric_confounder_is_binned_with_a_note():
    rng = np.random.default_rng(5)
    df = random_frame(rng).assign(age=rng.normal(50, 10, 3000))
    a = mh(df, "rd", counts=None, confounders=("age", "c1"))
    assert any("'age'" in n and f"{CONFOUNDER_BINS} quantile bins" in n for n in a.notes)
    binned = df.assign(age_bin=pd.qcut(df["age"], CONFOUNDER_BINS, labels=False).astype(str))
    b = mh(binned, "rd", counts=None, confounders=("age_bin", "c1"))
    assert a.overall["estimate"] == pytest.approx(b.overall["estimate"], rel=1e-12)
    # a numeric confounder with few values is used level by level, without a note
    c = mh(df, "rd", counts=None, confounders=("c2",))
    assert not any("quantile bins" in n for n in c.notes)


def test_stratum_without_overlap_says_so():
    """In stratum 'b' the exposed are all c1=u and the unexposed all c1=v: no cell has both arms."""
    df = pd.DataFrame({
        "s": ["a"] * 8 + ["b"] * 4,
        "c1": ["u", "u", "v", "v", "u", "u", "v", "v", "u", "u", "v", "v"],
        "x": [1, 0, 1, 0, 1, 0, 1, 0, 1, 1, 0, 0],
        "y": [1, 0, 0, 1, 1, 1, 0, 0, 1, 0, 1, 0],
    })
    a = mh(df, "rd", counts=None, strata=("s",), confounders=("c1",))
    st = dict(zip(a.strata["s"], a.strata["status"]))
    assert st["a"] == "ok"
    assert "both exposed and unexposed" in st["b"]
    assert np.isnan(a.strata.loc[a.strata["s"] == "b", "estimate"]).all()
    assert any("only one arm" in n for n in a.notes)


def test_zero_events_and_correction():
    """No exposed case in any table: RR_MH undefined; with correction=0.5 each zero-cell table
    gets 0.5 in every cell. By hand: tables (a,b,c,d) = (0,10,3,7) and (0,5,2,8) become
    (0.5,10.5,3.5,7.5), (0.5,5.5,2.5,8.5); RR = (0.5*11/22 + 0.5*11/17) / (3.5*11/22 + 2.5*6/17)."""
    df = counts_frame({"p": (0, 10, 3, 10), "q": (0, 5, 2, 10)}, stratum="c")
    bad = mh(df, "rr", confounders=("c",))
    assert "zero events among the exposed" in bad.overall["status"]
    assert np.isnan(bad.overall["estimate"])
    good = mh(df, "rr", confounders=("c",), correction=0.5)
    assert good.overall["status"] == "ok"
    want = (0.5 * 11 / 22 + 0.5 * 11 / 17) / (3.5 * 11 / 22 + 2.5 * 6 / 17)
    assert good.overall["estimate"] == pytest.approx(want, rel=1e-12)
    assert any("0.5 added" in n for n in good.notes)
    orr = mh(df, "or", confounders=("c",))
    assert "odds ratio undefined" in orr.overall["status"]
    # the risk difference needs no correction
    assert mh(df, "rd", confounders=("c",)).overall["status"] == "ok"


def test_zero_cell_in_one_table_needs_no_correction(tolb):
    """A zero in a single table does not make the pooled ratio undefined: it stays uncorrected."""
    df = counts_frame({"p": (0, 10, 3, 10), "q": (4, 12, 2, 10)}, stratum="c")
    a = mh(df, "rr", confounders=("c",), correction=0.5)
    want = (0 + 4 * 10 / 22) / (3 * 10 / 20 + 2 * 12 / 22)
    assert a.overall["estimate"] == pytest.approx(want, rel=1e-12)
    assert not any("added" in n for n in a.notes)


def test_mean_difference_hand_derived():
    """Two cells. Cell u: exposed y = 1, 3 (mean 2, s^2 2), unexposed y = 0, 2, 4 (mean 2, s^2 4);
    W = 2*3/5 = 1.2. Cell v: exposed 5, 7, 9 (mean 7, s^2 4), unexposed 1, 3 (mean 2, s^2 2);
    W = 3*2/5 = 1.2. MD = (1.2*0 + 1.2*5) / 2.4 = 2.5.
    Var = (1.2^2 (2/2 + 4/3) + 1.2^2 (4/3 + 2/2)) / 2.4^2 = 1.44 * 4.66667 / 5.76 = 1.166667."""
    df = pd.DataFrame({
        "c": ["u"] * 5 + ["v"] * 5,
        "x": [1, 1, 0, 0, 0, 1, 1, 1, 0, 0],
        "y": [1.0, 3, 0, 2, 4, 5, 7, 9, 1, 3],
    })
    a = sg.analyze(df, exposure="x", outcome="y", confounders=("c",), method="mantel-haenszel")
    assert a.spec.measure == "md"
    assert a.overall["estimate"] == pytest.approx(2.5, rel=1e-12)
    assert a.overall["se"] ** 2 == pytest.approx(1.44 * (1 + 4 / 3 + 4 / 3 + 1) / 5.76, rel=1e-12)
    assert a.overall["mean_exposed"] - a.overall["mean_unexposed"] == pytest.approx(2.5, rel=1e-12)


def test_mean_difference_single_cell_equals_crude():
    rng = np.random.default_rng(9)
    df = pd.DataFrame({"x": rng.integers(0, 2, 500), "y": rng.normal(size=500) + 100,
                       "s": rng.choice(["a", "b"], 500)})
    a = sg.analyze(df, exposure="x", outcome="y", strata=("s",), method="mantel-haenszel")
    c = sg.analyze(df, exposure="x", outcome="y", strata=("s",), method="crude")
    for col in ("estimate", "se", "mean_exposed", "mean_unexposed"):
        np.testing.assert_allclose(a.strata[col], c.strata[col], rtol=1e-9)


def test_mean_difference_singleton_arm_uses_pooled_variance():
    """Cell v has one exposed row: its exposed variance is the exposed arm's pooled within-cell
    variance (cell u exposed: 1, 3 -> SS 2 over 1 df; cell v: SS 0 over 0 df; pooled 2)."""
    df = pd.DataFrame({
        "c": ["u"] * 5 + ["v"] * 3,
        "x": [1, 1, 0, 0, 0, 1, 0, 0],
        "y": [1.0, 3, 0, 2, 4, 6, 1, 3],
    })
    a = sg.analyze(df, exposure="x", outcome="y", confounders=("c",), method="mantel-haenszel")
    w_u, w_v = 2 * 3 / 5, 1 * 2 / 3
    var = (w_u**2 * (2 / 2 + 4 / 3) + w_v**2 * (2 / 1 + 2 / 2)) / (w_u + w_v) ** 2
    assert a.overall["se"] ** 2 == pytest.approx(var, rel=1e-12)
    assert a.overall["estimate"] == pytest.approx((w_u * 0 + w_v * 4) / (w_u + w_v), rel=1e-12)


def test_frequency_weights_equal_expanded_rows(tolb):
    expanded = tolb.loc[tolb.index.repeat(tolb["f"])].drop(columns="f").reset_index(drop=True)
    for measure in ("rd", "rr", "or"):
        a = mh(tolb, measure, confounders=("age",)).overall
        b = mh(expanded, measure, counts=None, confounders=("age",)).overall
        assert a["estimate"] == pytest.approx(b["estimate"], rel=1e-12)
        assert a["se"] == pytest.approx(b["se"], rel=1e-12)


def test_input_not_mutated(tolb):
    before = tolb.copy()
    mh(tolb, "rr", confounders=("age",), strata=("age",))
    pd.testing.assert_frame_equal(tolb, before)


def test_estimator_returns_theta_on_log_scale(tolb):
    prep, spec = prepare(tolb, Spec(exposure="x", outcome="y", confounders=("age",), counts="f",
                                    method="mantel-haenszel", measure="rr"))
    gm = mantel_haenszel(prep, spec)
    assert gm.theta[-1] == pytest.approx(np.log(1.32556), abs=1e-5)
    assert gm.status[-1] == "ok"


# -- bootstrap ------------------------------------------------------------------------------------
def _prep(df, **kw):
    return prepare(df, Spec(exposure="x", outcome="y", method="mantel-haenszel", **kw))


@pytest.mark.parametrize("measure", ["rd", "rr", "or", "md"])
def test_vectorised_boot_equals_reestimation(measure):
    """mantel_haenszel.boot on a (B, n) frequency matrix equals re-running the estimator with each
    row's frequencies (the slow path), for theta and for (m1, m0)."""
    from dataclasses import replace

    rng = np.random.default_rng(11)
    df = random_frame(rng, 600)
    if measure == "md":
        df["y"] = rng.normal(size=600) * 3 + 50
    prep, spec = _prep(df, measure=measure, strata=("s",), confounders=("c1", "c2"), correction=0.5)
    W = rng.multinomial(600, np.full(600, 1 / 600), size=5).astype(float)
    m1, m0, theta = mantel_haenszel.boot(prep, spec, np.vstack([prep.w, W]))
    ref = mantel_haenszel(prep, spec)
    np.testing.assert_allclose(theta[0], ref.theta, rtol=1e-10)
    np.testing.assert_allclose(m1[0], ref.m1, rtol=1e-10)
    for i, w in enumerate(W, start=1):
        gm = mantel_haenszel(replace(prep, w=w), spec)
        ok = np.array([s == "ok" for s in gm.status])
        np.testing.assert_allclose(theta[i][ok], gm.theta[ok], rtol=1e-10)
        np.testing.assert_allclose(m0[i], gm.m0, rtol=1e-10)


def test_bootstrap_interval_uses_replicates_of_the_mh_odds_ratio(tolb):
    """The percentile interval is taken over the replicates' MH odds ratios, not over an odds ratio
    of the standardised risks (which differs from OR_MH); same random state, same numbers."""
    a = mh(tolb, "or", confounders=("age",), interval="bootstrap", n_boot=400, seed=3)
    theta_b = a.extra["replicate_theta"][:, -1]
    lo, hi = np.exp(np.quantile(theta_b, [0.025, 0.975]))
    assert (a.overall["ci_low"], a.overall["ci_high"]) == pytest.approx((lo, hi), rel=1e-12)
    m1, m0 = (r[:, -1] for r in a.extra["replicates"])
    other = np.log(m1 / (1 - m1)) - np.log(m0 / (1 - m0))
    assert not np.allclose(other, theta_b)
    assert a.overall["estimate"] == pytest.approx(1.40315, abs=1e-5)
    assert a.overall["ci_low"] < 1.40315 < a.overall["ci_high"]
    # bootstrap se close to the RBG se (0.311 by the Wald route) for this sample size
    assert a.overall["se"] == pytest.approx(0.311, rel=0.2)
    b = mh(tolb, "or", confounders=("age",), interval="bootstrap", n_boot=400, seed=3)
    assert (b.overall["ci_low"], b.overall["ci_high"]) == (a.overall["ci_low"], a.overall["ci_high"])


# -- counting fast paths -----------------------------------------------------------------------
@pytest.mark.parametrize("high", [1, 7, 5000, 1 << 40])
def test_occupied_codes_equal_numpy_unique(high):
    """frame._occupied (bincount + lookup when the code space is small) equals np.unique."""
    from stratagem.frame import _occupied

    rng = np.random.default_rng(high % 97)
    radix = rng.integers(0, high, 10_000).astype(np.int64)
    combos, inverse = _occupied(radix)
    ref_combos, ref_inverse = np.unique(radix, return_inverse=True)
    np.testing.assert_array_equal(combos, ref_combos)
    np.testing.assert_array_equal(inverse, ref_inverse.reshape(-1))


def test_confounder_cells_compress_large_code_spaces():
    """Many-level confounders (codes beyond the dense limit) are compressed and still pool right."""
    from stratagem.estimate import mantel_haenszel as mod

    rng = np.random.default_rng(4)
    df = random_frame(rng, 2000).assign(pair=rng.integers(0, 400, 2000).astype(str))
    a = mh(df, "or", counts=None, confounders=("pair", "c1"))
    old = mod._MAX_DENSE
    try:
        mod._MAX_DENSE = 8  # force the np.unique route
        b = mh(df, "or", counts=None, confounders=("pair", "c1"))
    finally:
        mod._MAX_DENSE = old
    assert a.overall["estimate"] == pytest.approx(b.overall["estimate"], rel=1e-12)
    assert a.overall["se"] == pytest.approx(b.overall["se"], rel=1e-12)
