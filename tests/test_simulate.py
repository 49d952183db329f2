"""simulate(): validation, reproducibility, confounding, and crude interval coverage when randomised."""

import numpy as np
import pytest

import stratagem as sg
from stratagem.errors import SpecError


def test_same_random_state_same_population():
    kw = dict(modifiers={"g": {"a": 0.5, "b": 0.5}}, shares=(0.1, 0.2, 0.05, 0.65))
    a, b = sg.simulate(500, seed=4, **kw), sg.simulate(500, seed=4, **kw)
    assert a.equals(b)
    assert not a.equals(sg.simulate(500, seed=5, **kw))


def test_shares_must_sum_to_one():
    with pytest.raises(SpecError, match="sum to 1"):
        sg.simulate(10, shares=(0.5, 0.5, 0.5, 0.5))


def test_shares_needed_for_every_cell():
    with pytest.raises(SpecError, match="No shares given"):
        sg.simulate(100, modifiers={"g": {"a": 0.5, "b": 0.5}}, shares={"a": (0.1, 0.2, 0.3, 0.4)})


def test_columns_and_truth_consistency():
    df = sg.simulate(400, modifiers={"g": {"a": 1.0}}, shares=(0.2, 0.3, 0.1, 0.4), seed=2)
    assert {"g", "risk", "exposed", "outcome", "y0", "y1", "propensity", "response_type"} <= set(df)
    observed = np.where(df.exposed == 1, df.y1, df.y0)
    assert (df.outcome == observed).all()
    causal = df.response_type == "causal"
    assert ((df.y0 == 0) & (df.y1 == 1))[causal].all()


def test_confounding_biases_the_crude_estimate():
    df = sg.simulate(20000, shares=(0.2, 0.2, 0.05, 0.55), confounding=0.9, seed=1)
    crude = sg.analyze(df, exposure="exposed", outcome="outcome").overall["estimate"]
    truth = (df.y1 - df.y0).mean()
    assert crude - truth > 0.1


def test_randomised_crude_intervals_cover_true_cates():
    """Bounded coverage study: randomised exposure, so crude 95% intervals should cover about 95%."""
    hits = total = 0
    for r in range(60):
        df = sg.simulate(
            600,
            modifiers={"g": {"a": 0.5, "b": 0.5}},
            shares={"a": (0.1, 0.3, 0.05, 0.55), "b": (0.2, 0.1, 0.1, 0.6)},
            randomised=True,
            seed=100 + r,
        )
        est = sg.analyze(df, exposure="exposed", outcome="outcome", strata=("g",)).strata
        # The target is the population's mean individual effect in the stratum (the exact CATE).
        truth = (df.y1 - df.y0).groupby(df.g, observed=True).mean()
        for _, row in est.iterrows():
            t = truth.loc[row.g]
            hits += row.ci_low <= t <= row.ci_high
            total += 1
    coverage = hits / total
    # 120 intervals; binomial sd at 0.95 is 0.02; the Wald interval is conservative for a
    # finite-population CATE, so allow a little above as well.
    assert 0.88 <= coverage <= 1.0, coverage
