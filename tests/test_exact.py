"""Exact effects on populations whose two potential outcomes are known (simulate)."""

import numpy as np
import pytest

import stratagem as sg

SHARES = {
    "a": {"doomed": 0.1, "causal": 0.3, "preventive": 0.05, "immune": 0.55},
    "b": {"doomed": 0.2, "causal": 0.1, "preventive": 0.1, "immune": 0.6},
    "c": (0.05, 0.05, 0.2, 0.7),
}


@pytest.fixture(scope="module")
def population():
    return sg.simulate(
        3000,
        modifiers={"group": {"a": 0.5, "b": 0.3, "c": 0.2}, "sex": {"f": 0.5, "m": 0.5}},
        shares=SHARES,
        covariates={"age": ("normal", 50, 10), "smoker": ("binary", 0.3)},
        confounding=0.7,
        seed=3,
    )


def exact(pop, **kw):
    return sg.analyze(pop, exposure="exposed", outcome="outcome", potential_outcomes=("y0", "y1"), **kw)


def test_stratum_effects_are_mean_individual_effects(population):
    a = exact(population, strata=("group",))
    truth = (population.y1 - population.y0).groupby(population.group, observed=True).mean()
    assert a.spec.method == "exact"
    np.testing.assert_allclose(a.strata.set_index("group")["estimate"], truth.loc[["a", "b", "c"]], rtol=1e-12)
    # identity (common practice): E[Y1] - E[Y0] equals the mean of individual effects
    assert a.overall["estimate"] == pytest.approx((population.y1 - population.y0).mean(), rel=1e-12)
    assert a.overall["mean_exposed"] - a.overall["mean_unexposed"] == pytest.approx(a.overall["estimate"])


def test_overall_is_n_weighted_average_of_strata(population):
    # identity (common practice, no source): ATE = sum_k (n_k / n) CATE_k
    a = exact(population, strata=("group", "sex"))
    weighted = (a.strata.n * a.strata.estimate).sum() / a.strata.n.sum()
    assert a.overall["estimate"] == pytest.approx(weighted, rel=1e-12)


def test_no_sampling_interval(population):
    a = exact(population, strata=("group",))
    assert (a.strata.se == 0).all()
    assert (a.strata.ci_low == a.strata.estimate).all()
    assert any("no sampling interval" in n for n in a.notes)


def test_response_type_counts_sum_to_n_and_match_truth(population):
    a = exact(population, strata=("group",))
    rt = a.response_types
    per = rt.groupby("stratum")["count"].sum()
    assert per["overall"] == len(population)
    for label, g in population.groupby("group", observed=True):
        sub = rt[rt.stratum == f"group={label}"].set_index("type")
        assert sub["count"].sum() == len(g)
        counts = g.response_type.value_counts()
        for t in ("doomed", "causal", "preventive", "immune"):
            assert sub.loc[t, "count"] == counts.get(t, 0)
        assert (sub.lower == sub.upper).all()
        # the CATE is the causal share minus the preventive share
        cate = a.strata.set_index("group").loc[label, "estimate"]
        assert cate == pytest.approx(sub.loc["causal", "lower"] - sub.loc["preventive", "lower"])


def test_simulated_shares_are_close_to_the_design(population):
    a = exact(population, strata=("group",))
    rt = a.response_types.set_index(["stratum", "type"])
    for level, shares in SHARES.items():
        if not isinstance(shares, dict):
            shares = dict(zip(("doomed", "causal", "preventive", "immune"), shares))
        n = (population.group == level).sum()
        for t, share in shares.items():
            sd = np.sqrt(share * (1 - share) / n)
            assert abs(rt.loc[(f"group={level}", t), "lower"] - share) < 4 * sd + 1e-9


def test_ratio_measures_from_potential_outcome_means(population):
    a = exact(population, strata=("group",), measure="rr")
    row = a.strata.iloc[0]
    assert row.estimate == pytest.approx(row.mean_exposed / row.mean_unexposed)


def test_numeric_potential_outcomes():
    pop = sg.simulate(
        1000, modifiers={"g": {"x": 0.5, "y": 0.5}}, outcome="numeric", effects={"x": 2.0, "y": -1.0}, seed=1
    )
    a = exact(pop, strata=("g",))
    assert a.spec.measure == "md"
    np.testing.assert_allclose(a.strata.estimate, [2.0, -1.0])
    assert len(a.response_types) == 0
