"""Invariants every method and measure must satisfy, checked on random tables with hypothesis.

Each property is a fact about the estimand or the estimator that holds whatever the data (common
practice, no source): the order of rows carries no information; stratum labels are names, not
numbers; recoding exposed as unexposed reverses the effect; a mean difference ignores the outcome's
origin; doubling the sample halves the variance; the average effect is the n-weighted average of the
stratum effects when both potential outcomes are known.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hardening_helpers import (
    assert_ok_rows_finite,
    assert_same_numbers,
    by_stratum,
    fields_for,
    method_params,
    random_table,
)
from hypothesis import given, settings
from hypothesis import strategies as st

import stratagem as sg

random_states = st.integers(0, 2**32 - 1)
# Tests repeated for every method draw a quarter of the profile's examples (10 in "ci", 250 in
# "nightly"); single-method tests draw half. Each example runs two full analyses.
PER_METHOD = settings(max_examples=max(5, settings.default.max_examples // 4))
SINGLE = settings(max_examples=max(5, settings.default.max_examples // 2))
binary_measures = st.sampled_from(["rd", "rr", "or"])
METHODS = method_params()


def _outcome_and_measure(method, binary, measure):
    """(binary, measure) to use: a numeric outcome takes the mean difference."""
    return binary, (measure if binary else "md")


@pytest.mark.parametrize("method", METHODS)
@PER_METHOD
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures,
       levels=st.integers(1, 3))
def test_row_order_changes_nothing(method, random_state, binary, measure, levels):
    binary, measure = _outcome_and_measure(method, binary, measure)
    df = random_table(random_state, binary=binary, levels=levels)
    shuffled = df.sample(frac=1.0, random_state=np.random.default_rng(random_state))
    fields = fields_for(method, measure)
    a = sg.analyze(df, **fields)
    b = sg.analyze(shuffled, **fields)
    assert_ok_rows_finite(a)
    assert_same_numbers(by_stratum(a), by_stratum(b))
    assert list(a.strata["stratum"]) == list(b.strata["stratum"])


@pytest.mark.parametrize("method", METHODS)
@PER_METHOD
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures,
       order=st.permutations(range(3)))
def test_relabelling_levels_permutes_strata_rows_only(method, random_state, binary, measure, order):
    binary, measure = _outcome_and_measure(method, binary, measure)
    df = random_table(random_state, binary=binary, levels=3)
    # New names whose sort order differs from the old one: rows of .strata come back reordered.
    new_names = [["zeta", "alpha", "mu"][i] for i in order]
    rename = dict(zip(["lvl_a", "lvl_b", "lvl_c"], new_names))
    relabelled = df.assign(m=df["m"].map(rename))
    fields = fields_for(method, measure)
    a = sg.analyze(df, **fields)
    b = sg.analyze(relabelled, **fields)
    left = by_stratum(a).rename(index={f"m={k}": f"m={v}" for k, v in rename.items()})
    assert sorted(left.index) == sorted(by_stratum(b).index)
    assert_same_numbers(left, by_stratum(b))
    assert list(b.strata["m"]) == sorted(new_names)


@pytest.mark.parametrize("method", METHODS)
@PER_METHOD
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures)
def test_swapping_exposure_coding_reverses_the_effect(method, random_state, binary, measure):
    binary, measure = _outcome_and_measure(method, binary, measure)
    df = random_table(random_state, binary=binary, levels=2)
    fields = fields_for(method, measure)
    swapped_fields = dict(fields)
    if method == "exact":  # the potential outcome under exposure is now the old y0
        swapped_fields["potential_outcomes"] = ("y1", "y0")
    a = by_stratum(sg.analyze(df, **fields))
    b = by_stratum(sg.analyze(df.assign(x=1 - df["x"]), **swapped_fields))
    np.testing.assert_allclose(a["n_exposed"], b["n_unexposed"])
    np.testing.assert_allclose(a["mean_exposed"], b["mean_unexposed"], rtol=1e-7, atol=1e-10)
    np.testing.assert_allclose(a["mean_unexposed"], b["mean_exposed"], rtol=1e-7, atol=1e-10)
    if measure in ("rr", "or"):
        np.testing.assert_allclose(a["estimate"], 1 / b["estimate"], rtol=1e-7)
        np.testing.assert_allclose(a["ci_low"], 1 / b["ci_high"], rtol=1e-7)
        np.testing.assert_allclose(a["ci_high"], 1 / b["ci_low"], rtol=1e-7)
    else:
        np.testing.assert_allclose(a["estimate"], -b["estimate"], rtol=1e-7, atol=1e-10)
        np.testing.assert_allclose(a["ci_low"], -b["ci_high"], rtol=1e-7, atol=1e-10)
        np.testing.assert_allclose(a["ci_high"], -b["ci_low"], rtol=1e-7, atol=1e-10)
    np.testing.assert_allclose(a["se"], b["se"], rtol=1e-7, atol=1e-12)
    np.testing.assert_allclose(a["p_value"], b["p_value"], rtol=1e-6, atol=1e-12)


@pytest.mark.parametrize("method", METHODS)
@PER_METHOD
@given(random_state=random_states, shift=st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False))
def test_shifting_a_numeric_outcome_leaves_the_mean_difference(method, random_state, shift):
    df = random_table(random_state, binary=False, levels=2)
    shifted = df.assign(y=df["y"] + shift, y0=df["y0"] + shift, y1=df["y1"] + shift)
    fields = fields_for(method, "md")
    a = by_stratum(sg.analyze(df, **fields))
    b = by_stratum(sg.analyze(shifted, **fields))
    # Shifting by up to 1e6 loses up to ~1e6 * 2**-52 of absolute precision in every value.
    atol = 1e-8 * max(1.0, abs(shift))
    for col in ("estimate", "ci_low", "ci_high"):
        np.testing.assert_allclose(a[col], b[col], rtol=1e-6, atol=atol)
    np.testing.assert_allclose(a["se"], b["se"], rtol=1e-5, atol=atol)
    np.testing.assert_allclose(a["mean_exposed"] + shift, b["mean_exposed"], rtol=1e-9, atol=atol)
    assert list(a["status"]) == list(b["status"])


def _doubled(df: pd.DataFrame) -> pd.DataFrame:
    return pd.concat([df, df], ignore_index=True)


@SINGLE
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures)
def test_duplicating_rows_halves_the_crude_variance_exactly(random_state, binary, measure):
    measure = measure if binary else "md"
    df = random_table(random_state, binary=binary, levels=2)
    fields = fields_for("crude", measure)
    a = by_stratum(sg.analyze(df, **fields))
    b = by_stratum(sg.analyze(_doubled(df), **fields))
    ratio = (b["se"] / a["se"]) ** 2
    if binary:
        # p(1-p)/n in each arm: doubling n halves it exactly, on every scale (delta method).
        np.testing.assert_allclose(ratio, 0.5, rtol=1e-12)
    else:
        # s^2/n with the n-1 divisor, arms independent: the ratio is (n-1)/(2n-1) per arm, not 1/2;
        # check the doubled variance against numpy on the doubled rows, and the exact ratio.
        for key in a.index:
            rows = df if key == "overall" else df[df["m"] == key.split("=", 1)[1]]
            arms = [rows.loc[rows["x"] == arm, "y"].to_numpy() for arm in (1, 0)]
            before = sum(np.var(y, ddof=1) / len(y) for y in arms)
            after = sum(np.var(np.r_[y, y], ddof=1) / (2 * len(y)) for y in arms)
            shrink = sum((len(y) - 1) / (2 * len(y) - 1) * np.var(y, ddof=1) / len(y) for y in arms)
            assert a.loc[key, "se"] ** 2 == pytest.approx(before, rel=1e-10)
            assert b.loc[key, "se"] ** 2 == pytest.approx(after, rel=1e-10)
            assert ratio[key] == pytest.approx(shrink / before, rel=1e-10)
    np.testing.assert_allclose(a["estimate"], b["estimate"], rtol=1e-12)


@SINGLE
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures)
def test_duplicated_rows_equal_a_counts_column_of_two(random_state, binary, measure):
    measure = measure if binary else "md"
    df = random_table(random_state, binary=binary, levels=2)
    fields = fields_for("crude", measure)
    a = by_stratum(sg.analyze(_doubled(df), **fields))
    b = by_stratum(sg.analyze(df.assign(freq=2), counts="freq", **fields))
    assert_same_numbers(a, b, rtol=1e-10)


@pytest.mark.parametrize("method", method_params(("mantel-haenszel", "standardization", "ipw", "aipw")))
@PER_METHOD
@given(random_state=random_states, binary=st.booleans(), measure=binary_measures)
def test_duplicating_rows_about_halves_the_adjusted_variance(method, random_state, binary, measure):
    binary, measure = _outcome_and_measure(method, binary, measure)
    df = random_table(random_state, binary=binary, levels=2)
    fields = fields_for(method, measure)
    if method == "mantel-haenszel":
        # Its quantile bins of a numeric confounder move when rows are doubled (numpy's linear
        # quantiles are not invariant to duplication), and its cells must stay large: with s^2 on
        # n - 1, doubling a cell of n rows scales its variance by (n-1)/(2n-1), far from 1/2 for small n.
        fields["confounders"] = ("c2",)
    a = by_stratum(sg.analyze(df, **fields))
    b = by_stratum(sg.analyze(_doubled(df), **fields))
    np.testing.assert_allclose(a["estimate"], b["estimate"], rtol=1e-6, atol=1e-9)
    ratio = (b["se"] / a["se"]) ** 2
    # Model-based variances carry n/(n-p)-type factors; with 80+ rows a stratum, within 5% of 1/2.
    np.testing.assert_allclose(ratio, 0.5, rtol=0.05)


@SINGLE
@given(random_state=random_states, binary=st.booleans(), levels=st.integers(1, 4))
def test_exact_cates_average_to_the_ate(random_state, binary, levels):
    df = random_table(random_state, binary=binary, levels=levels, confounded=False)
    a = sg.analyze(df, **fields_for("exact", "rd" if binary else "md"))
    if levels == 1:
        assert len(a.strata) == 1
    n, cate = a.strata["n"].to_numpy(float), a.strata["estimate"].to_numpy(float)
    assert np.sum(n * cate) / np.sum(n) == pytest.approx(a.overall["estimate"], rel=1e-12, abs=1e-14)
    assert a.overall["estimate"] == pytest.approx(float(np.mean(df["y1"] - df["y0"])), abs=1e-12)


@SINGLE
@given(random_state=random_states, levels=st.integers(1, 4), share=st.floats(0.2, 0.8))
def test_exact_truth_on_a_randomised_simulation(random_state, levels, share):
    modifiers = {"grp": {f"g{i}": 1.0 for i in range(levels)}}
    shares = {f"g{i}": (0.1, 0.1 + 0.05 * i, 0.05, 0.75 - 0.05 * i) for i in range(levels)}
    df = sg.simulate(600, modifiers=modifiers, shares=shares, randomised=True,
                     exposed_share=share, seed=random_state % 2**31)
    a = sg.analyze(df, exposure="exposed", outcome="outcome", strata=("grp",),
                   potential_outcomes=("y0", "y1"))
    assert a.spec.method == "exact"
    n, cate = a.strata["n"].to_numpy(float), a.strata["estimate"].to_numpy(float)
    assert np.sum(n * cate) / np.sum(n) == pytest.approx(a.overall["estimate"], abs=1e-12)
    # Within a stratum the CATE is the causal share minus the preventive share (exact, no sampling).
    types = df.groupby("grp", observed=True)["response_type"].value_counts(normalize=True).unstack(
        fill_value=0.0
    )
    for level, cate_k in zip(a.strata["grp"], cate):
        row = types.loc[level]
        assert cate_k == pytest.approx(row.get("causal", 0.0) - row.get("preventive", 0.0), abs=1e-12)


@SINGLE
@given(random_state=random_states, bins=st.integers(2, 5))
def test_counts_table_bins_a_numeric_modifier_like_its_expanded_rows(random_state, bins):
    """Found a bug: quantile bins of a numeric modifier ignored ``counts`` (fixed in frame.py)."""
    rng = np.random.default_rng(random_state)
    n = 24
    table = pd.DataFrame({
        "age": rng.integers(18, 90, n),
        "x": np.tile([0, 1], n // 2),
        "y": np.tile([0, 0, 1, 1], n // 4),
        "freq": rng.integers(0, 40, n),
    })
    table.loc[:3, "freq"] = table.loc[:3, "freq"] + 1  # both arms, events and non-events
    expanded = table.loc[table.index.repeat(table["freq"])].drop(columns="freq")
    fields = dict(exposure="x", outcome="y", strata=("age",), bins={"age": bins}, method="crude")
    a = sg.analyze(table, counts="freq", **fields)
    b = sg.analyze(expanded, **fields)
    assert list(a.strata["stratum"]) == list(b.strata["stratum"])
    assert_same_numbers(by_stratum(a), by_stratum(b), rtol=1e-10)
