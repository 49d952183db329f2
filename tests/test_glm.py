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
