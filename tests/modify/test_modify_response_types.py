"""Response-type bounds: hand-checked values and a linear program over the four shares."""

import numpy as np
import pytest
from scipy.optimize import linprog

from stratagem.errors import SpecError
from stratagem.modify.response_types import TYPES, bounds_frame, response_type_bounds


def _lp_bounds(p1, p0):
    """Min and max of each share s = (doomed, causal, preventive, immune) subject to the margins."""
    a_eq = np.array([[1, 1, 1, 1], [1, 1, 0, 0], [1, 0, 1, 0]], dtype=float)
    b_eq = np.array([1.0, p1, p0])
    out = {}
    for i, t in enumerate(TYPES):
        c = np.zeros(4)
        c[i] = 1
        lo = linprog(c, A_eq=a_eq, b_eq=b_eq, bounds=[(0, 1)] * 4, method="highs")
        hi = linprog(-c, A_eq=a_eq, b_eq=b_eq, bounds=[(0, 1)] * 4, method="highs")
        assert lo.status == 0 and hi.status == 0
        out[t] = (lo.fun, -hi.fun)
    return out


def test_hand_values():
    b = response_type_bounds(0.6, 0.3).set_index("type")
    assert b.loc["causal"].tolist() == pytest.approx([0.3, 0.6])
    assert b.loc["doomed"].tolist() == pytest.approx([0.0, 0.3])
    assert b.loc["immune"].tolist() == pytest.approx([0.1, 0.4])
    m = response_type_bounds(0.6, 0.3, monotone=True).set_index("type")
    assert m["lower"].to_dict() == pytest.approx({"doomed": 0.3, "causal": 0.3, "preventive": 0.0,
                                                  "immune": 0.4})
    assert (m["lower"] == m["upper"]).all()


def test_bounds_equal_linear_program_on_random_inputs():
    rng = np.random.default_rng(7)
    risks = np.vstack([rng.random((120, 2)), [[0, 0], [1, 1], [0, 1], [1, 0], [0.5, 0.5]]])
    for p1, p0 in risks:
        ours = response_type_bounds(p1, p0).set_index("type")
        lp = _lp_bounds(p1, p0)
        for t in TYPES:
            assert ours.loc[t, "lower"] == pytest.approx(lp[t][0], abs=1e-9)
            assert ours.loc[t, "upper"] == pytest.approx(lp[t][1], abs=1e-9)


def test_monotone_point_is_inside_bounds_and_solves_margins():
    rng = np.random.default_rng(3)
    for _ in range(100):
        p0, p1 = np.sort(rng.random(2))
        m = response_type_bounds(p1, p0, monotone=True).set_index("type")["lower"]
        b = response_type_bounds(p1, p0).set_index("type")
        assert m["doomed"] + m["causal"] == pytest.approx(p1)
        assert m["doomed"] + m["preventive"] == pytest.approx(p0)
        assert ((b["lower"] - 1e-12 <= m) & (m <= b["upper"] + 1e-12)).all()


def test_errors_and_vectorised_frame():
    with pytest.raises(SpecError, match="'risk_exposed'"):
        response_type_bounds(1.2, 0.3)
    with pytest.raises(SpecError, match="monotone"):
        response_type_bounds(0.2, 0.3, monotone=True)
    frame, notes = bounds_frame(["a", "b", "c"], [0.6, 0.2, np.nan], [0.3, 0.4, 0.1], [True, True, True],
                                monotone=True)
    assert list(frame.columns) == ["stratum", "type", "lower", "upper"]
    assert frame.loc[frame.stratum == "b", "lower"].isna().all()  # contradicts monotonicity
    assert frame.loc[frame.stratum == "c", "lower"].isna().all()  # not estimable
    assert notes and "contradicted" in notes[0]
    single = response_type_bounds(0.6, 0.3).set_index("type")
    got = frame[frame.stratum == "a"].set_index("type")
    assert got.loc["causal", "lower"] == pytest.approx(0.3)
    frame2, _ = bounds_frame(["a"], [0.6], [0.3], [True], monotone=False)
    assert frame2.set_index("type")[["lower", "upper"]].to_numpy() == pytest.approx(
        single[["lower", "upper"]].to_numpy())
