"""The simulation lab's pure functions: known truth recovered, crude biased, reproducible."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.errors import SpecError
from stratagem.simlab import (
    COMPARE_COLUMNS,
    REPEAT_COLUMNS,
    LabSetup,
    compare,
    draw,
    repeat_draws,
    repeat_records,
    summarise_draws,
)

CONFOUNDED = LabSetup(n=1000, confounding=0.6, method="aipw")


def test_one_draw_matches_the_pure_calls_it_is_made_of():
    setup = LabSetup(n=800, confounding=0.5, method="ipw")
    result = draw(setup, 3)
    df = sg.simulate(**setup.simulate_args(3))
    pd.testing.assert_frame_equal(result.data, df)
    args = setup.analyze_args()
    for role in ("truth", "crude", "adjusted"):
        expected = sg.analyze(df, **args[role])
        pd.testing.assert_frame_equal(getattr(result, role).strata, expected.strata)
    assert result.adjusted.spec.method == "ipw"
    assert result.adjusted.spec.confounders == ("age", "frail", "visits")


def test_code_text_reproduces_the_draw_exactly():
    setup = LabSetup(n=600, confounding=0.4, method="standardization", level=0.9,
                     weights={"low": 0.7, "high": 0.3})
    result = draw(setup, 11)
    namespace: dict = {}
    exec(setup.code(11), namespace)  # the text shown to the user, run as they would run it
    for role in ("truth", "crude", "adjusted"):
        shown = getattr(result, role).strata[["estimate", "ci_low", "ci_high"]].to_numpy()
        again = namespace[role].strata[["estimate", "ci_low", "ci_high"]].to_numpy()
        np.testing.assert_array_equal(shown, again)


def test_repeat_code_text_reproduces_the_summary():
    setup = LabSetup(n=300, confounding=0.3, method="ipw", modifier="need",
                     shares={"a": {"doomed": 0.2, "causal": 0.3, "preventive": 0.1, "immune": 0.4},
                             "b": {"doomed": 0.5, "causal": 0.1, "preventive": 0.0, "immune": 0.4},
                             "c": {"doomed": 0.1, "causal": 0.1, "preventive": 0.1, "immune": 0.7}})
    namespace: dict = {}
    exec(setup.repeat_code(2, seed=4), namespace)
    pd.testing.assert_frame_equal(namespace["runs"], repeat_draws(setup, draws=2, seed=4))
    assert namespace["setup"] == setup


def test_compare_lays_truth_crude_adjusted_side_by_side():
    result = draw(CONFOUNDED, 0)
    table = compare(result)
    assert list(table.columns) == COMPARE_COLUMNS
    assert list(table["role"].unique()) == ["truth", "crude", "adjusted"]
    assert list(table["stratum"].unique()) == ["group=low", "group=high", "overall"]
    truth = result.truth.strata["estimate"].to_numpy()
    adj = table[table["role"] == "adjusted"].reset_index(drop=True)
    np.testing.assert_array_equal(adj["estimate"].to_numpy()[:2], result.adjusted.strata["estimate"].to_numpy())
    np.testing.assert_allclose(adj["error"].to_numpy()[:2], adj["estimate"].to_numpy()[:2] - truth)
    expected_cover = (adj["ci_low"] <= adj["truth"]) & (adj["truth"] <= adj["ci_high"])
    assert adj["covered"].astype(bool).tolist() == expected_cover.tolist()
    # the exact truth is the mean of y1 - y0 in the stratum of this draw
    d = result.data
    low = d[d["group"] == "low"]
    assert truth[0] == pytest.approx((low["y1"] - low["y0"]).mean(), abs=1e-12)
    assert table[table["role"] == "truth"]["covered"].isna().all()
    assert table["set_effect"].tolist()[:3] == pytest.approx([0.05, 0.20, 0.125])


@pytest.mark.slow
def test_adjusted_unbiased_with_nominal_coverage_and_crude_biased_under_confounding():
    draws = 30
    runs = repeat_draws(CONFOUNDED, draws=draws, seed=7).set_index(["role", "stratum"])
    for stratum in ("group=low", "group=high", "overall"):
        adj = runs.loc[("adjusted", stratum)]
        crude = runs.loc[("crude", stratum)]
        assert adj["draws"] == draws and adj["failed"] == 0
        # bias within 3 Monte Carlo standard errors (plus a hair) of 0
        assert abs(adj["bias"]) < 3 * adj["bias_mcse"] + 0.005, (stratum, adj["bias"], adj["bias_mcse"])
        # coverage of 95% intervals: with 30 draws, below 0.80 would be a 3-sigma miss
        assert adj["coverage"] >= 0.80, (stratum, adj["coverage"])
        # the crude estimate is pushed up by confounding and its intervals miss the truth
        assert crude["bias"] > 0.10 and crude["bias"] > 5 * crude["bias_mcse"]
        assert crude["coverage"] <= 0.10
        assert adj["rmse"] < crude["rmse"]


def test_without_confounding_crude_is_unbiased_too():
    setup = LabSetup(n=1000, confounding=0.0, method="ipw")
    runs = repeat_draws(setup, draws=8, seed=1).set_index(["role", "stratum"])
    crude = runs.loc[("crude", "overall")]
    assert abs(crude["bias"]) < 3 * crude["bias_mcse"] + 0.005


def test_repeat_draws_reproducible_with_the_same_random_state():
    setup = LabSetup(n=400, confounding=0.5)
    first = repeat_draws(setup, draws=3, seed=21)
    again = repeat_draws(setup, draws=3, seed=21)
    pd.testing.assert_frame_equal(first, again)
    assert list(first.columns) == REPEAT_COLUMNS
    other = repeat_draws(setup, draws=3, seed=22)
    assert not np.array_equal(first["bias"].to_numpy(), other["bias"].to_numpy())


def test_draw_k_uses_seed_plus_k_and_summary_is_the_mean_of_the_records():
    setup = LabSetup(n=400, confounding=0.5)
    records = repeat_records(setup, draws=3, seed=5)
    assert records["seed"].unique().tolist() == [5, 6, 7]
    one = compare(draw(setup, 6))
    one = one[one["role"] != "truth"].reset_index(drop=True)
    got = records[records["draw"] == 1].drop(columns=["draw", "seed"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, one)
    summary = summarise_draws(records).set_index(["role", "stratum"])
    errs = records[(records["role"] == "crude") & (records["stratum"] == "group=low")]["error"]
    assert summary.loc[("crude", "group=low"), "bias"] == pytest.approx(errs.mean())
    assert summary.loc[("crude", "group=low"), "bias_mcse"] == pytest.approx(errs.std() / math.sqrt(3))


def test_progress_is_reported_and_may_stop_the_work():
    seen = []
    repeat_draws(LabSetup(n=200), draws=4, seed=0, progress=seen.append)
    assert seen == [0.25, 0.5, 0.75, 1.0]

    class Stop(Exception):
        pass

    def stop_after_two(fraction):
        if fraction >= 0.5:
            raise Stop

    with pytest.raises(Stop):
        repeat_draws(LabSetup(n=200), draws=4, seed=0, progress=stop_after_two)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"shares": {"a": {"doomed": 0.5, "causal": 0.5, "preventive": 0.1, "immune": 0.0}}}, "sum to 1.1"),
        ({"shares": {"a": {"doomed": 1.0}}}, "exactly the keys"),
        ({"shares": {}}, "non-empty mapping"),
        ({"shares": {"a": {"doomed": -0.1, "causal": 0.6, "preventive": 0.0, "immune": 0.5}}}, r"\[0.0, 1.0\]"),
        ({"method": "crude"}, "'method' parameter must be one of"),
        ({"n": 10}, "at least 50"),
        ({"confounding": 1.5}, "'confounding' parameter"),
        ({"level": 1.0}, "'level' parameter"),
        ({"weights": {"low": 1.0}}, "one probability for each level"),
        ({"modifier": "age"}, "must differ"),
        ({"modifier": "my group"}, "identifiers"),
    ],
)
def test_setup_refuses_bad_values_with_a_useful_message(kwargs, match):
    with pytest.raises(SpecError, match=match):
        LabSetup(**kwargs)


def test_repeat_refuses_bad_draws():
    with pytest.raises(SpecError, match="'draws' parameter"):
        repeat_draws(LabSetup(), draws=0)
    with pytest.raises(SpecError, match="LabSetup"):
        draw({"n": 100})


def test_set_effects_weighted_overall():
    setup = LabSetup(weights={"low": 0.75, "high": 0.25})
    eff = setup.set_effects()
    assert eff["low"] == pytest.approx(0.05) and eff["high"] == pytest.approx(0.20)
    assert eff["overall"] == pytest.approx(0.75 * 0.05 + 0.25 * 0.20)
