"""Power and sample size for effect modification: hand-derived values, the rule of thumb, simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import NormalIndPower

from stratagem.errors import SpecError
from stratagem.power import (
    MAX_DRAWS,
    SimulatedPower,
    power_modification,
    sample_size_modification,
    simulate_power,
)

Z = stats.norm.ppf(0.975)


def _two_sided(lam: float) -> float:
    """Power of the two-sided z test whose statistic has mean sqrt(lam)."""
    return stats.norm.cdf(math.sqrt(lam) - Z) + stats.norm.cdf(-math.sqrt(lam) - Z)


def test_difference_of_risk_differences_by_hand():
    # two equal strata of 1000, half exposed: 500 per arm; risks .3 -> .45 and .3 -> .35
    v1 = 0.45 * 0.55 / 500 + 0.3 * 0.7 / 500
    v2 = 0.35 * 0.65 / 500 + 0.3 * 0.7 / 500
    lam = 0.1**2 / (v1 + v2)
    got = power_modification(effects=(0.15, 0.05), risks_unexposed=0.3, n=2000)
    assert got == pytest.approx(_two_sided(lam), rel=1e-10)
    assert got == pytest.approx(0.6568, abs=1e-4)


def test_ratio_of_odds_ratios_by_hand():
    # baseline risk .2 (odds .25); odds ratios 1.5 and 3 give risks .375/1.375 and .75/1.75
    p0 = 0.2
    p1a, p1b = 0.375 / 1.375, 0.75 / 1.75
    # strata of 300 and 700, 40% exposed
    va = 1 / (120 * p1a * (1 - p1a)) + 1 / (180 * p0 * (1 - p0))
    vb = 1 / (280 * p1b * (1 - p1b)) + 1 / (420 * p0 * (1 - p0))
    lam = math.log(3 / 1.5) ** 2 / (va + vb)
    got = power_modification(effects=(1.5, 3.0), risks_unexposed=0.2, sizes=(300, 700),
                             exposed_share=0.4, scale="multiplicative")
    assert got == pytest.approx(_two_sided(lam), rel=1e-10)
    same = power_modification(effects=(1.5, 3.0), risks_unexposed=0.2, n=1000, shares=(0.3, 0.7),
                              exposed_share=0.4, scale="multiplicative")
    assert same == pytest.approx(got, rel=1e-12)


def test_k_level_power_matches_monte_carlo_of_the_q_statistic():
    """Three strata: the non-central chi-square power against direct draws of the stratum estimates
    from their normal sampling distributions (the approximation's own model, checked independently)."""
    effects, sizes, p0, e = np.array([0.05, 0.12, 0.2]), np.array([400, 500, 600]), 0.25, 0.5
    got = power_modification(effects=effects, risks_unexposed=p0, sizes=sizes, exposed_share=e)
    p1 = p0 + effects
    v = p1 * (1 - p1) / (e * sizes) + p0 * (1 - p0) / ((1 - e) * sizes)
    rng = np.random.default_rng(7)
    draws = 40000
    est = effects + rng.standard_normal((draws, 3)) * np.sqrt(v)
    w = 1 / v
    q = np.sum(w * (est - (est @ w)[:, None] / w.sum()) ** 2, axis=1)
    mc = np.mean(q > stats.chi2.ppf(0.95, 2))
    assert abs(got - mc) < 4 * math.sqrt(mc * (1 - mc) / draws)


def test_rule_of_thumb_four_times_the_main_effect_size_numeric_outcome():
    """from memory: Brookes et al. 2004 (Health Technol Assess 8(29); J Clin Epidemiol 57:229) -
    in a balanced two-arm trial with two equal subgroups, detecting an interaction as large as the
    overall effect needs about four times the sample size of the overall test.

    Main-effect size: reference library: statsmodels NormalIndPower.solve_power.
    """
    delta, sd = 0.25, 1.0
    per_arm = NormalIndPower().solve_power(effect_size=delta / sd, alpha=0.05, power=0.8, ratio=1.0)
    n_main = 2 * per_arm
    # subgroup effects differ by delta and average delta
    n_int = sample_size_modification(effects=(1.5 * delta, 0.5 * delta), sd=sd, power=0.8)
    assert n_int / n_main == pytest.approx(4.0, abs=4 / n_main + 1e-9)  # within rounding up to 1
    assert round(n_int / n_main) == 4


def test_rule_of_thumb_binary_outcome_about_four():
    # overall risks .3 vs .4; subgroup effects .15 and .05 (difference .1 = the main effect)
    e, p0, delta = 0.5, 0.3, 0.1
    n_main = (Z + stats.norm.ppf(0.8)) ** 2 * (0.4 * 0.6 / e + p0 * (1 - p0) / (1 - e)) / delta**2
    n_int = sample_size_modification(effects=(0.15, 0.05), risks_unexposed=p0, power=0.8)
    assert 3.9 < n_int / n_main < 4.1


def test_interaction_power_in_a_trial_sized_for_the_main_effect():
    """from memory: Brookes et al. 2004 - a trial with 80% power for the overall effect has about
    29% power for an interaction of the same size."""
    delta = 0.25
    n_main = 2 * NormalIndPower().solve_power(effect_size=delta, alpha=0.05, power=0.8)
    got = power_modification(effects=(1.5 * delta, 0.5 * delta), sd=1.0, n=n_main)
    assert got == pytest.approx(0.29, abs=0.01)


def test_sample_size_is_the_smallest_reaching_the_power():
    for kw in (
        dict(effects=(0.2, 0.05), risks_unexposed=(0.2, 0.3), shares=(0.3, 0.7), exposed_share=0.3),
        dict(effects=(1.2, 2.0, 3.0), risks_unexposed=0.1, scale="multiplicative"),
        dict(effects=(2.0, 0.0), sd=(5.0, 8.0), shares=(0.5, 0.5)),
    ):
        n = sample_size_modification(power=0.9, alpha=0.01, **kw)
        assert power_modification(n=n, alpha=0.01, **kw) >= 0.9
        assert power_modification(n=n - 1, alpha=0.01, **kw) < 0.9


def test_power_grows_with_size_and_no_modification_gives_alpha():
    small = power_modification(effects=(0.1, 0.0), risks_unexposed=0.3, n=500)
    large = power_modification(effects=(0.1, 0.0), risks_unexposed=0.3, n=5000)
    assert 0.05 < small < large < 1
    assert power_modification(effects=(0.1, 0.1), risks_unexposed=0.3, n=500) == pytest.approx(0.05)
    assert power_modification(effects=(2.0, 2.0), risks_unexposed=0.3, n=500, alpha=0.1,
                              scale="multiplicative") == pytest.approx(0.1)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (dict(alpha=1.5), r"'alpha' parameter must be a number in \(0, 1\).*got 1.5"),
        (dict(exposed_share=0.0), r"'exposed_share' parameter must be a number in \(0, 1\)"),
        (dict(risks_unexposed=(0.3, 1.2)), r"'risks_unexposed'.*\(risks_unexposed\[1\] = 1.2\)"),
        (dict(effects=(0.8, 0.1)), r"risk among the exposed in stratum 1 .* = 1.1\) must be in \(0, 1\)"),
        (dict(shares=(0.5, 0.6)), r"'shares' parameter must sum to 1"),
        (dict(shares=(0.0, 1.0)), r"'shares'.*\(shares\[0\] = 0.0\)"),
        (dict(shares=(0.2, 0.3, 0.5)), r"'shares' parameter has 3 value\(s\) but effects has 2"),
        (dict(effects=(0.1,)), r"one finite effect per stratum \(at least 2 strata\)"),
        (dict(scale="log"), r"'scale' parameter must be 'additive'"),
        (dict(scale="multiplicative", effects=(1.5, -1.0)), r"effects\[1\] = -1.0"),
        (dict(risks_unexposed=None), r"needs risks_unexposed="),
        (dict(sd=2.0, scale="multiplicative"), r"pass scale='additive'"),
        (dict(n=-5), r"'n' parameter must be a positive number"),
        (dict(sizes=(100, 100)), r"either sizes= .* or n= with shares="),
    ],
)
def test_bad_inputs_are_named(kwargs, message):
    design = dict(effects=(0.15, 0.05), risks_unexposed=0.3, n=1000)
    design.update(kwargs)
    with pytest.raises(SpecError, match=message):
        power_modification(**design)


def test_sample_size_input_errors():
    with pytest.raises(SpecError, match=r"'power' parameter must be a number in \(0, 1\).*got 1.0"):
        sample_size_modification(effects=(0.2, 0.1), risks_unexposed=0.3, power=1.0)
    with pytest.raises(SpecError, match="no modification to detect"):
        sample_size_modification(effects=(0.1, 0.1), risks_unexposed=0.3)
    with pytest.raises(SpecError, match="Give the study size"):
        power_modification(effects=(0.2, 0.1), risks_unexposed=0.3)
    with pytest.raises(SpecError, match=rf"'draws' parameter must be an integer from 10 to {MAX_DRAWS}"):
        simulate_power(effects=(0.2, 0.1), risks_unexposed=0.3, n=100, draws=10**6)


def test_simulation_is_reproducible_and_reports_its_design():
    kw = dict(effects=(0.2, 0.0), risks_unexposed=0.3, n=400, draws=20, seed=3)
    one, two = simulate_power(**kw), simulate_power(**kw)
    assert isinstance(one, SimulatedPower)
    assert one == two
    assert one.draws == 20 and one.usable <= 20 and 0 <= one.rejected <= one.usable
    assert one.analytic == pytest.approx(
        power_modification(effects=(0.2, 0.0), risks_unexposed=0.3, n=400)
    )
    seen = []
    simulate_power(**kw, progress=seen.append)
    assert seen[-1] == pytest.approx(1.0)


def test_stacked_draws_give_each_draw_its_own_estimates():
    """simulate_power analyses several simulated studies in one table stratified by (draw,
    subgroup); each draw's stratum estimates must equal those of analysing that draw alone."""
    import stratagem as sg
    from stratagem.power import _draw_batch

    kwargs = dict(modifiers={"subgroup": {"1": 0.5, "2": 0.5}}, by=("subgroup",), confounding=0.0,
                  randomised=True, exposed_share=0.5,
                  shares={"1": (0.3, 0.15, 0.0, 0.55), "2": (0.3, 0.05, 0.0, 0.65)})
    frame = _draw_batch(sg.simulate, 300, 4, 99, kwargs)
    assert len(frame) == 1200 and list(frame["draw"].unique()) == ["0", "1", "2", "3"]
    stacked = sg.analyze(frame, exposure="exposed", outcome="outcome", strata=("draw", "subgroup"),
                         method="crude", measure="or", max_levels=4).strata
    for draw in ("0", "3"):
        alone = sg.analyze(frame[frame["draw"] == draw], exposure="exposed", outcome="outcome",
                           strata=("subgroup",), method="crude", measure="or").strata
        mine = stacked[stacked["draw"] == draw]
        np.testing.assert_allclose(mine["estimate"], alone["estimate"], rtol=1e-12)
        np.testing.assert_allclose(mine["se"], alone["se"], rtol=1e-12)


@pytest.mark.slow  # 300 simulated studies per design: 3-10 s each on a busy 2-core machine
@pytest.mark.parametrize(
    "design",
    [
        dict(effects=(0.15, 0.05), risks_unexposed=0.3, n=2000),
        dict(effects=(1.3, 2.2), risks_unexposed=0.25, n=1600, shares=(0.6, 0.4),
             scale="multiplicative", exposed_share=0.4),
        dict(effects=(0.0, 0.4, 0.8), sd=2.0, n=900),
    ],
)
def test_analytic_power_agrees_with_simulated_power(design):
    """Repeated studies through stratagem.simulate + analyze (bounded: 300 draws each): the simulated rejection rate lies within Monte Carlo error of the analytic power."""
    sim = simulate_power(**design, draws=300, seed=12)
    assert sim.usable == 300
    mc = math.sqrt(sim.analytic * (1 - sim.analytic) / sim.usable)
    assert abs(sim.power - sim.analytic) < 3.5 * mc, sim
