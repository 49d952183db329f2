"""Batched Newton/IRLS fits and confounder design matrices.

reference library: statsmodels GLM (Binomial / Gaussian families with freq_weights).
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from stratagem.estimate import glm
from stratagem.estimate.design import confounder_design, independent_columns


def _data(random_state, n=400, p=5, numeric=False):
    rng = np.random.default_rng(random_state)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, p - 1)) * rng.uniform(0.5, 20, p - 1)])
    X[:, 1:] += rng.normal(0, 5, p - 1)
    beta = rng.normal(size=p) / np.r_[1.0, X[:, 1:].std(axis=0)] * 0.8
    eta = X @ beta
    if numeric:
        y = eta * 3 + rng.normal(size=n)
    else:
        y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    w = rng.integers(0, 5, n).astype(float)
    return X, y, w


@pytest.mark.parametrize("random_state", [0, 1, 2, 3, 4])
def test_logistic_equals_statsmodels(random_state):
    X, y, w = _data(random_state)
    ref = sm.GLM(y, X, family=sm.families.Binomial(), freq_weights=w).fit(tol=1e-12)
    got = glm.fit(X, y, w, family="binomial")
    assert got.converged and not got.separated
    np.testing.assert_allclose(got.beta, ref.params, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("random_state", [0, 1, 2])
def test_linear_equals_statsmodels(random_state):
    X, y, w = _data(random_state, numeric=True)
    ref = sm.GLM(y, X, family=sm.families.Gaussian(), freq_weights=w).fit()
    got = glm.fit(X, y, w, family="gaussian")
    np.testing.assert_allclose(got.beta, ref.params, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("family", ["binomial", "gaussian"])
def test_batched_fits_equal_statsmodels_one_by_one(family):
    X, y, _ = _data(7, n=300, numeric=family == "gaussian")
    rng = np.random.default_rng(11)
    W = rng.multinomial(300, np.full(300, 1 / 300), size=12).astype(float)
    got = glm.fit(X, y, W, family=family)
    fam = sm.families.Binomial() if family == "binomial" else sm.families.Gaussian()
    for b in range(W.shape[0]):
        ref = sm.GLM(y, X, family=fam, freq_weights=W[b]).fit(tol=1e-12)
        np.testing.assert_allclose(got.beta[b], ref.params, rtol=1e-6, atol=1e-9)
    assert got.converged.all()


def test_warm_start_and_mask():
    X, y, w = _data(3)
    full = glm.fit(X, y, w)
    again = glm.fit(X, y, w, beta0=full.beta)
    assert again.n_iter <= 2
    np.testing.assert_allclose(again.beta, full.beta, rtol=1e-9)
    mask = np.array([True, True, False, True, True])
    sub = glm.fit(X, y, w, mask=mask)
    ref = sm.GLM(y, X[:, mask], family=sm.families.Binomial(), freq_weights=w).fit(tol=1e-12)
    assert sub.beta[2] == 0.0
    np.testing.assert_allclose(sub.beta[mask], ref.params, rtol=1e-6)


def test_column_without_weight_in_a_replicate_is_held_at_zero():
    X, y, _ = _data(5, n=200)
    X = np.column_stack([X, np.r_[np.ones(10), np.zeros(190)]])  # a rare indicator
    W = np.ones((2, 200))
    W[1, :10] = 0.0  # replicate 1 never draws the rows where the indicator is 1
    got = glm.fit(X, y, W)
    assert got.converged.all()
    assert got.beta[1, -1] == 0.0
    ref = sm.GLM(y[10:], X[10:, :-1], family=sm.families.Binomial()).fit(tol=1e-12)
    np.testing.assert_allclose(got.beta[1, :-1], ref.params, rtol=1e-6)


def test_replicates_from_a_shared_warm_start_equal_their_own_fits():
    # Bootstrap-style fits: every replicate starts from the full-sample coefficients (a chord step
    # with one shared information matrix, then Newton steps) and must end at its own full refit.
    X, y, w = _data(8, n=500)
    X[:, 1:] = (X[:, 1:] - X[:, 1:].mean(axis=0)) / X[:, 1:].std(axis=0)  # as the estimators' designs
    full = glm.fit(X, y, w)
    rng = np.random.default_rng(2)
    W = rng.multinomial(500, np.full(500, 1 / 500), size=20).astype(float) * w
    got = glm.fit(X, y, W, beta0=full.beta, tol=1e-5)  # the bootstrap's tolerance
    assert got.converged.all()
    for b in range(W.shape[0]):
        own = glm.fit(X, y, W[b], tol=1e-12)
        np.testing.assert_allclose(got.beta[b], own.beta, rtol=0, atol=1e-8)
    ref = sm.GLM(y, X, family=sm.families.Binomial(), freq_weights=W[0]).fit(tol=1e-13)
    np.testing.assert_allclose(got.beta[0], ref.params, rtol=1e-7, atol=1e-9)
    # the chord step moves the replicates most of the way: closer to their solutions than the start
    Wt = np.ascontiguousarray(W.T)
    start = glm._chord_start(np.ascontiguousarray(X), y, Wt, np.ones((W.shape[0], 5), dtype=bool),
                             full.beta, glm._col_absmax(X))
    before = np.abs(got.beta - full.beta).max(axis=1)
    after = np.abs(got.beta - start).max(axis=1)
    assert np.all(after < 0.6 * before)  # on this small, rare-outcome sample; far closer on large strata


def test_chord_start_holds_a_column_without_weight_at_its_start():
    X, y, _ = _data(5, n=200)
    X = np.column_stack([X, np.r_[np.ones(10), np.zeros(190)]])  # a rare indicator
    full = glm.fit(X, y)
    W = np.ones((3, 200))
    W[1, :10] = 0.0  # replicate 1 never draws the rows where the indicator is 1
    W[2, 50:60] = 3.0
    got = glm.fit(X, y, W, beta0=full.beta, tol=1e-5)
    assert got.converged.all()
    assert got.beta[1, -1] == full.beta[-1]  # no information on it: left where it started
    ref = sm.GLM(y[10:], X[10:, :-1], family=sm.families.Binomial()).fit(tol=1e-13)
    np.testing.assert_allclose(got.beta[1, :-1], ref.params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(got.beta[2], glm.fit(X, y, W[2], tol=1e-12).beta, rtol=0, atol=1e-8)


def test_chord_start_falls_back_to_newton_on_far_replicates():
    # Weight piled on a few rows puts a replicate's solution far from the shared start; the chord
    # step is refused there (or harmless) and Newton steps with step-halving still find the fit.
    X, a, w = _heavy_counts()
    full = glm.fit(X, a, np.ones_like(w))
    W = np.vstack([np.ones_like(w), w, 2.0 * w])
    got = glm.fit(X, a, W, beta0=full.beta, tol=1e-5)
    assert got.converged.all()
    for b in range(3):
        np.testing.assert_allclose(got.beta[b], glm.fit(X, a, W[b]).beta, rtol=0, atol=1e-8)


@pytest.mark.parametrize("n, B", [(1, 2), (7, 1), (1000, 3), (20_011, 40), (513, 70)])
def test_linear_predictor_and_expit_in_place(n, B):
    rng = np.random.default_rng(n + B)
    X = rng.normal(size=(n, 12))
    beta = rng.normal(size=(B, 12))
    got = glm.linear_predictor(X, beta)
    assert got.shape == (B, n) and got.flags.c_contiguous
    np.testing.assert_allclose(got, beta @ X.T, rtol=1e-13, atol=1e-12)
    eta = got * 40.0  # into the clipped tails as well
    assert np.array_equal(glm.expit_inplace(eta.copy()), glm.logistic(eta))


def test_complete_separation_is_reported():
    rng = np.random.default_rng(0)
    x = rng.normal(size=200)
    X = np.column_stack([np.ones(200), x])
    got = glm.fit(X, (x > 0).astype(float))
    assert not got.converged
    assert got.separated


def test_quasi_complete_separation_is_reported():
    rng = np.random.default_rng(1)
    g = (rng.random(300) < 0.2).astype(float)
    y = np.where(g == 1, 1.0, (rng.random(300) < 0.4).astype(float))  # g = 1 implies y = 1
    X = np.column_stack([np.ones(300), g, rng.normal(size=300)])
    got = glm.fit(X, y)
    assert not got.converged and got.separated


def _heavy_counts(random_state=7, n=300):
    """Exposure model data where 5% of rows stand for a million individuals each (the same recipe
    as the hardening suite's extreme-frequency-weight case). Plain Newton steps from 0 overshoot
    on these weights until the coefficients run off to infinity."""
    rng = np.random.default_rng(random_state)
    c1 = rng.normal(0, 1, n)
    c2 = rng.choice(["p", "q", "r"], n)
    a = (rng.random(n) < 1 / (1 + np.exp(-0.8 * c1))).astype(float)
    rng.random(n)  # the outcome's draws in that recipe, kept so the weights below are the same
    w = np.where(rng.random(n) < 0.05, 1_000_000, 1).astype(float)
    X = np.column_stack([np.ones(n), c1, c2 == "q", c2 == "r"]).astype(float)
    return X, a, w


def _reference_heavy(X, y, w):
    """statsmodels' coefficients with these frequency weights, or (if it does not converge there)
    with the weights divided by 1e6: logistic coefficients do not change when all frequency
    weights are multiplied by one constant."""
    import warnings

    for scale in (1.0, 1e6):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = sm.GLM(y, X, family=sm.families.Binomial(), freq_weights=w / scale).fit(tol=1e-14, maxiter=500)
        if ref.converged and np.isfinite(ref.params).all():
            return ref.params
    raise AssertionError("statsmodels did not converge on either scale")


def _score(X, y, w, beta):
    mu = 1 / (1 + np.exp(-(X @ beta)))
    return X.T @ (w * (y - mu))


def test_extreme_frequency_weights_converge_with_step_halving():
    X, a, w = _heavy_counts()
    got = glm.fit(X, a, w)
    assert got.converged and not got.separated
    np.testing.assert_allclose(got.beta, _reference_heavy(X, a, w), rtol=1e-7, atol=1e-7)
    # the score equations hold: the score is zero to rounding (relative to the total weight)
    assert np.abs(_score(X, a, w, got.beta)).max() < 1e-6 * w.sum() * 1e-6


def test_extreme_frequency_weights_batched_and_scale_free():
    X, a, w = _heavy_counts()
    rng = np.random.default_rng(3)
    W = np.vstack([w, 3.0 * w, w / 1e6, rng.multinomial(len(w), np.full(len(w), 1 / len(w))) * w])
    got = glm.fit(X, a, W)
    assert got.converged.all() and not got.separated.any()
    single = glm.fit(X, a, w).beta
    for b in range(3):  # a common scale of the weights leaves the coefficients unchanged
        np.testing.assert_allclose(got.beta[b], single, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(got.beta[3], _reference_heavy(X, a, W[3]), rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(got.beta[3], glm.fit(X, a, W[3]).beta, rtol=1e-9, atol=1e-9)


def _nll(X, y, w, beta):
    eta = X @ beta
    return float(np.sum(w * (np.logaddexp(0.0, eta) - y * eta)))


def test_steps_declared_sure_to_descend_do_descend():
    """The bound that lets a step skip the likelihood check never passes a step that raises it:
    Newton and chord steps (information taken at another point) from random points."""
    rng = np.random.default_rng(0)
    sure = unsure = 0
    for _ in range(300):
        n, p = int(rng.integers(5, 60)), int(rng.integers(1, 5))
        X = np.column_stack([np.ones(n), rng.normal(0, rng.uniform(0.2, 3), (n, p - 1))])
        y = (rng.random(n) < 0.5).astype(float)
        w = rng.choice([1.0, 1e6], n, p=[0.9, 0.1])
        base = rng.normal(0, rng.uniform(0.01, 3), p)
        at = base + rng.normal(0, rng.uniform(0, 0.5), p) * (rng.random() < 0.5)  # where H is taken
        mu = 1 / (1 + np.exp(-(X @ at)))
        H = (X * (w * mu * (1 - mu))[:, None]).T @ X
        try:
            step = np.linalg.solve(H, _score(X, y, w, base))
        except np.linalg.LinAlgError:
            continue
        if glm._certain_descent(step, base - at, glm._col_absmax(X)):
            sure += 1
            before = _nll(X, y, w, base)
            assert _nll(X, y, w, base + step) <= before + 1e-12 * abs(before)
        else:
            unsure += 1
    assert sure > 30 and unsure > 30  # both branches were exercised


def test_column_absolute_maxima():
    rng = np.random.default_rng(1)
    for n, p in [(1, 3), (5, 1), (100, 7), (20_000, 8), (8193, 3), (17, 200)]:
        X = rng.normal(size=(n, p))
        assert np.array_equal(glm._col_absmax(X), np.abs(X).max(axis=0))


def test_unknown_family_is_rejected():
    with pytest.raises(ValueError, match="family must be one of"):
        glm.fit(np.ones((3, 1)), np.zeros(3), family="poisson")


# -- design ----------------------------------------------------------------------------------------


def test_design_codes_categoricals_with_first_level_reference():
    rng = np.random.default_rng(3)
    n = 40
    df = pd.DataFrame(
        {
            "age": rng.normal(50, 10, n).round(),
            "region": rng.choice(["south", "north", "east"], n),
            "smoker": rng.random(n) < 0.4,
            "grade": pd.Categorical(rng.choice(["a", "b", "c"], n), categories=["c", "b", "a"]),
        }
    )
    before = df.copy()
    d = confounder_design(df)
    assert d.names == ("age", "region=north", "region=south", "smoker=True", "grade=b", "grade=a")
    np.testing.assert_array_equal(d.matrix[:, 0], df["age"])  # original scale
    np.testing.assert_array_equal(d.matrix[:, 1], df["region"] == "north")
    np.testing.assert_array_equal(d.matrix[:, 3], df["smoker"])
    np.testing.assert_array_equal(d.matrix[:, 5], df["grade"] == "a")
    assert d.sources == ("age", "region", "region", "smoker", "grade", "grade")
    pd.testing.assert_frame_equal(df, before)


def test_design_drops_constant_and_collinear_columns_with_notes():
    rng = np.random.default_rng(0)
    x = rng.normal(size=50)
    df = pd.DataFrame({"x": x, "const": 3.0, "twice": 2 * x + 1, "z": rng.normal(size=50)})
    d = confounder_design(df)
    assert d.names == ("x", "z")
    text = " ".join(d.notes)
    assert "'const' is constant" in text and "'twice'" in text and "collinear" in text


def test_design_detects_dummy_trap_across_columns():
    df = pd.DataFrame({"a": ["x", "y", "x", "y", "x"], "b": [0, 1, 0, 1, 0], "c": [1.0, 2, 3, 5, 8]})
    d = confounder_design(df)
    assert d.names == ("a=y", "c")


def test_independent_columns_respects_weights():
    x = np.column_stack([[0.0, 1, 0, 1], [5.0, 5, 5, 6]])
    keep, why = independent_columns(x, np.array([1.0, 1, 1, 0]))
    assert keep.tolist() == [True, False] and why[1] == "constant"


def test_design_rows_follow_order():
    df = pd.DataFrame({"v": [1.0, 2.0, 3.0], "g": ["a", "b", "a"]})
    d = confounder_design(df, order=np.array([2, 0, 1]))
    np.testing.assert_array_equal(d.matrix, [[3, 0], [1, 0], [2, 1]])
