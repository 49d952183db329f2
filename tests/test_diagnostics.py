"""Checks table: SMD, effective sample size, common support and warnings on hand-made cases."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.diagnostics import (
    diagnostics_fields,
    diagnostics_table,
    effective_sample_size,
    smd,
)
from stratagem.estimate.base import GroupMeans
from stratagem.frame import prepare
from stratagem.results import DIAGNOSTIC_COLUMNS
from stratagem.spec import Spec


def fake_means(prep, **extra) -> GroupMeans:
    g = prep.n_strata + 1
    z = np.zeros(g)
    return GroupMeans(z, z, z, z, z, z, z, z, ["ok"] * g, extra=dict(extra))


def prep_of(df, **kw):
    spec = Spec(exposure="x", outcome="y", method="crude", **kw)
    return prepare(df, spec)[0]


def value(table, stratum, check, arm=None):
    sel = (table["stratum"] == stratum) & (table["check"] == check)
    if arm is not None:
        sel &= table["arm"] == arm
    got = table.loc[sel, "value"]
    assert len(got) == 1, (stratum, check, arm)
    return float(got.iloc[0])


def warning(table, stratum, check, arm=None):
    sel = (table["stratum"] == stratum) & (table["check"] == check)
    if arm is not None:
        sel &= table["arm"] == arm
    return str(table.loc[sel, "warning"].iloc[0])


@pytest.fixture
def small():
    """Exposed: z = 1, 2, 3 (mean 2, s^2 1), b = 1, 0, 1 ... see the tests for the hand values."""
    return pd.DataFrame({
        "x": [1, 1, 1, 0, 0, 0, 0],
        "y": [1, 0, 1, 0, 1, 0, 0],
        "z": [1.0, 2, 3, 2, 4, 6, 4],
        "b": [1, 0, 1, 0, 1, 0, 0],
        "d": ["n", "s", "s", "n", "n", "n", "s"],
    })


def test_smd_hand_derived(small):
    """z: exposed 1, 2, 3 -> mean 2, s^2 1; unexposed 2, 4, 6, 4 -> mean 4, s^2 8/3.
    SMD = (2 - 4) / sqrt((1 + 8/3) / 2) = -2 / 1.354006 = -1.477098.
    b (0/1): p1 = 2/3, p0 = 1/4; SMD = (2/3 - 1/4) / sqrt((2/9 + 3/16) / 2) = 0.920575.
    d=n: p1 = 1/3, p0 = 3/4; SMD = (1/3 - 3/4) / sqrt((2/9 + 3/16) / 2) = -0.920575."""
    prep = prep_of(small, confounders=("z", "b", "d"))
    t = diagnostics_table(prep, fake_means(prep))
    assert list(t.columns) == DIAGNOSTIC_COLUMNS
    assert value(t, "overall", "smd before: z") == pytest.approx(-2 / np.sqrt((1 + 8 / 3) / 2), rel=1e-12)
    assert value(t, "overall", "smd before: b") == pytest.approx(0.920575, abs=1e-6)
    assert value(t, "overall", "smd before: d=n") == pytest.approx(-0.920575, abs=1e-6)
    assert value(t, "overall", "smd before: d=s") == pytest.approx(0.920575, abs=1e-6)
    assert value(t, "overall", "n", "exposed") == 3
    assert value(t, "overall", "n", "unexposed") == 4
    # the reference function agrees
    assert smd(small["z"], small["x"]) == pytest.approx(-1.477098, abs=1e-6)


def test_arms_with_few_rows_warn(small):
    prep = prep_of(small, confounders=("z",))
    t = diagnostics_table(prep, fake_means(prep))
    assert "fewer than 10 rows in the exposed arm" in warning(t, "overall", "n", "exposed")
    big = pd.concat([small] * 4, ignore_index=True)
    prep = prep_of(big, confounders=("z",))
    t = diagnostics_table(prep, fake_means(prep))
    assert warning(t, "overall", "n", "exposed") == ""
    assert value(t, "overall", "n", "exposed") == 12


def test_effective_sample_size_formula():
    """Kish: (1 + 1 + 2 + 4)^2 / (1 + 1 + 4 + 16) = 64 / 22; frequencies repeat rows."""
    assert effective_sample_size([1, 1, 2, 4]) == pytest.approx(64 / 22, rel=1e-12)
    assert effective_sample_size([1, 2, 4], freq=[2, 1, 1]) == pytest.approx(64 / 22, rel=1e-12)
    assert effective_sample_size(np.ones(50)) == pytest.approx(50)


def test_weights_propensity_and_support_hand_made():
    """Exposed propensities 0.3, 0.5, 0.9 and unexposed 0.1, 0.4, 0.6: common support is
    [0.3, 0.6], so 0.9 and 0.1 are outside: 2 of 6 rows. Weights 1/ps for exposed, 1/(1-ps) else."""
    df = pd.DataFrame({"x": [1, 1, 1, 0, 0, 0], "y": [1, 0, 1, 0, 1, 0], "z": [1.0, 2, 3, 2, 4, 6]})
    ps = np.array([0.3, 0.5, 0.9, 0.1, 0.4, 0.6])
    w = np.where(df["x"] == 1, 1 / ps, 1 / (1 - ps))
    prep = prep_of(df, confounders=("z",))
    t = diagnostics_table(prep, fake_means(prep, propensity=ps, weights=w))
    assert value(t, "overall", "propensity min", "exposed") == 0.3
    assert value(t, "overall", "propensity max", "unexposed") == 0.6
    assert value(t, "overall", "outside common support", "all") == pytest.approx(2 / 6)
    assert value(t, "overall", "largest weight", "exposed") == pytest.approx(1 / 0.3)
    ess1 = effective_sample_size(w[:3])
    assert value(t, "overall", "effective sample size", "exposed") == pytest.approx(ess1, rel=1e-12)
    after = smd(df["z"], df["x"], weights=w)
    assert value(t, "overall", "smd after: z") == pytest.approx(after, rel=1e-12)


def test_positivity_ess_and_balance_warnings():
    rng = np.random.default_rng(0)
    n = 400
    x = np.r_[np.ones(200), np.zeros(200)]
    df = pd.DataFrame({"x": x, "y": rng.integers(0, 2, n), "z": rng.normal(size=n) + x})
    ps = np.full(n, 0.5)
    ps[0] = 0.005  # an exposed row with a tiny propensity
    ps[399] = 0.995  # an unexposed row with a huge one
    w = np.ones(n)
    w[0] = 1000.0  # one row carries the exposed arm's weight: ESS about 1
    prep = prep_of(df, confounders=("z",))
    t = diagnostics_table(prep, fake_means(prep, propensity=ps, weights=w))
    assert "positivity doubtful" in warning(t, "overall", "propensity min", "exposed")
    assert "positivity doubtful" in warning(t, "overall", "propensity max", "unexposed")
    assert warning(t, "overall", "propensity min", "unexposed") == ""
    assert "effective sample size under 10%" in warning(t, "overall", "effective sample size", "exposed")
    assert warning(t, "overall", "effective sample size", "unexposed") == ""
    assert "|SMD| > 0.1" in warning(t, "overall", "smd after: z")  # z differs by about 1 SD
    # constant weights leave z imbalanced (still flagged); a balanced z with them flags nothing
    flat = diagnostics_table(prep, fake_means(prep, propensity=np.full(n, 0.5), weights=np.ones(n)))
    assert "|SMD| > 0.1" in warning(flat, "overall", "smd after: z")
    bal = df.assign(z=np.tile(rng.normal(size=200), 2))
    prep_b = prep_of(bal, confounders=("z",))
    good = diagnostics_table(prep_b, fake_means(prep_b, propensity=np.full(n, 0.5), weights=np.ones(n)))
    assert (good["warning"] == "").all()


def test_per_stratum_values_equal_the_reference_function():
    """Vectorised per-stratum SMDs (frequency and IP weights) equal smd() applied stratum by stratum."""
    rng = np.random.default_rng(3)
    n = 2000
    df = pd.DataFrame({
        "x": rng.integers(0, 2, n), "y": rng.integers(0, 2, n), "s": rng.choice(["a", "b", "c"], n),
        "z": rng.gamma(2.0, 3.0, n) + 1000.0, "d": rng.choice(["p", "q"], n), "f": rng.integers(1, 4, n),
    })
    ps = rng.uniform(0.2, 0.8, n)
    w = np.where(df["x"] == 1, 1 / ps, 1 / (1 - ps))
    prep = prep_of(df, confounders=("z", "d"), strata=("s",), counts="f")
    t = diagnostics_table(prep, fake_means(prep, propensity=ps, weights=w))
    for level in ("a", "b", "c"):
        sel = (df["s"] == level).to_numpy()
        name = f"s={level}"
        for label, col in (("z", df["z"]), ("d=q", (df["d"] == "q").astype(float))):
            ref_before = smd(col[sel], df["x"][sel], freq=df["f"][sel])
            ref_after = smd(col[sel], df["x"][sel], weights=w[sel], freq=df["f"][sel])
            assert value(t, name, f"smd before: {label}") == pytest.approx(ref_before, rel=1e-9)
            assert value(t, name, f"smd after: {label}") == pytest.approx(ref_after, rel=1e-9)
        ess = effective_sample_size(w[sel & (df["x"] == 1).to_numpy()], df["f"][sel & (df["x"] == 1)])
        assert value(t, name, "effective sample size", "exposed") == pytest.approx(ess, rel=1e-12)
        assert value(t, name, "n", "unexposed") == df.loc[sel & (df["x"] == 0), "f"].sum()
    assert list(t["stratum"].unique()) == ["s=a", "s=b", "s=c", "overall"]


def test_fields_step_adds_a_note_only_when_warning(small):
    prep = prep_of(small, confounders=("z",))
    out = diagnostics_fields(prep, None, fake_means(prep), {"notes": ("earlier",)})
    assert out["notes"][0] == "earlier"
    assert "warning" in out["notes"][-1]
    big = pd.concat([small] * 4, ignore_index=True)
    prep = prep_of(big, confounders=("z",))
    out = diagnostics_fields(prep, None, fake_means(prep), {"notes": ("earlier",)})
    assert "notes" not in out


def test_analyze_carries_the_table(demo):
    a = sg.analyze(demo, exposure="visited", outcome="on_target", strata=("sex",),
                   confounders=("age", "district"), method="mantel-haenszel")
    d = a.diagnostics
    assert list(d.columns) == DIAGNOSTIC_COLUMNS
    for row in a.strata.itertuples():
        assert value(d, row.stratum, "n", "exposed") == row.n_exposed
    assert any(c.startswith("smd before: district=") for c in d["check"])


# -- huge and infinite weights ----------------------------------------------------------------------


def _weighted_case(random_state=0, n=200):
    rng = np.random.default_rng(random_state)
    df = pd.DataFrame({
        "x": np.tile([0, 1], n // 2),
        "y": rng.integers(0, 2, n),
        "z": rng.normal(size=n),
        "d": rng.choice(["p", "q", "r"], n),
        "m": np.repeat(["a", "b"], n // 2),
        "n": np.where(rng.random(n) < 0.05, 1_000_000, 1),
    })
    ipw = rng.uniform(1.0, 5.0, n)
    return df, ipw


@pytest.mark.parametrize("scale", [1e150, 1e-150])
def test_huge_weights_and_counts_give_the_same_table_without_warnings(scale):
    """Checks are ratios of weighted sums: multiplying every IP weight by a constant changes
    nothing, and weights near 1e150 with counts of 1e6 (f w^2 ~ 1e306 per row, so the sums would
    overflow) give no RuntimeWarning."""
    import warnings

    df, ipw = _weighted_case()
    prep = prep_of(df, confounders=("z", "d"), strata=("m",), counts="n")
    base = diagnostics_table(prep, fake_means(prep, weights=ipw, propensity=np.full(len(df), 0.5)))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        big = diagnostics_table(prep, fake_means(prep, weights=ipw * scale,
                                                 propensity=np.full(len(df), 0.5)))
    weighted = ~big["check"].isin(["largest weight"])
    np.testing.assert_allclose(big.loc[weighted, "value"].to_numpy(float),
                               base.loc[weighted, "value"].to_numpy(float), rtol=1e-10, atol=1e-12)
    assert (big.loc[weighted, "warning"] == base.loc[weighted, "warning"]).all()
    ess = big[big["check"] == "effective sample size"]["value"].to_numpy(float)
    assert np.isfinite(ess).all() and (ess > 0).all()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        w = ipw * scale
        f = df["n"].to_numpy(float)
        assert effective_sample_size(w, f) == pytest.approx(effective_sample_size(ipw, f), rel=1e-12)
        sel = df["x"].to_numpy()
        assert smd(df["z"], sel, w, f) == pytest.approx(smd(df["z"], sel, ipw, f), rel=1e-12)


def test_infinite_weights_leave_their_groups_weighted_checks_undefined_without_warnings():
    import warnings

    df, ipw = _weighted_case(1)
    first = np.flatnonzero((df["m"] == "a").to_numpy() & (df["x"] == 0).to_numpy())[0]
    ipw[first] = np.inf  # a propensity of exactly 1 in stratum m=a, unexposed arm
    prep = prep_of(df, confounders=("z", "d"), strata=("m",), counts="n")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        t = diagnostics_table(prep, fake_means(prep, weights=ipw, propensity=np.full(len(df), 0.5)))
    assert np.isnan(value(t, "m=a", "effective sample size", "unexposed"))
    assert np.isnan(value(t, "overall", "effective sample size", "unexposed"))
    assert np.isnan(value(t, "m=a", "smd after: z"))
    assert np.isfinite(value(t, "m=a", "effective sample size", "exposed"))
    # the other stratum is untouched: its checks equal those computed without the broken stratum
    clean = ipw.copy()
    clean[first] = 1.0
    ref = diagnostics_table(prep, fake_means(prep, weights=clean, propensity=np.full(len(df), 0.5)))
    for check, arm in (("effective sample size", "unexposed"), ("smd after: z", None),
                       ("smd after: d=q", None)):
        assert value(t, "m=b", check, arm) == pytest.approx(value(ref, "m=b", check, arm), rel=1e-9)
        assert np.isfinite(value(t, "m=b", check, arm))
