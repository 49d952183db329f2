"""Shared pieces of the hardening suite: which methods exist yet, random tables, result comparison.

The adjusted estimators land one by one; :func:`method_params` turns every method into a pytest
parameter that skips (with the reason) while its module is not in the build, so each test starts
covering a method as soon as it exists.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stratagem.estimate import get_estimator
from stratagem.results import STRATA_COLUMNS
from stratagem.spec import METHODS

NUMERIC_COLUMNS = [c for c in STRATA_COLUMNS if c not in ("stratum", "status")]
ADJUSTED = ("mantel-haenszel", "standardization", "ipw", "aipw")


def method_available(method: str) -> bool:
    """Whether the estimator module of ``method`` is in this build."""
    try:
        get_estimator(method)
    except ModuleNotFoundError:
        return False
    return True


def method_params(methods=METHODS):
    """``pytest.param`` per method, skipped while its estimator is not written yet."""
    return [
        pytest.param(
            m,
            id=m,
            marks=pytest.mark.skipif(not method_available(m), reason=f"estimator {m!r} not in build"),
        )
        for m in methods
    ]


def measures_for(method: str, binary: bool) -> list[str]:
    """Measures a method supports for a binary or numeric outcome."""
    return ["rd", "rr", "or"] if binary else ["md"]


def random_table(
    random_state: int,
    *,
    binary: bool = True,
    levels: int = 2,
    per_cell: int = 40,
    confounded: bool = True,
) -> pd.DataFrame:
    """A table with exposure ``x``, outcome ``y``, modifier ``m``, confounders ``c1`` (numeric),
    ``c2`` (three levels) and ``c1_band`` (``c1`` in five bands), and both potential outcomes
    ``y0``/``y1``.

    Every stratum has ``per_cell`` rows or more in each arm and, for a binary outcome, events and
    non-events in each arm, so every row of every method is estimable.
    """
    rng = np.random.default_rng(random_state)
    names = ["lvl_a", "lvl_b", "lvl_c", "lvl_d"][:levels]
    frames = []
    for k, name in enumerate(names):
        n = 2 * per_cell + int(rng.integers(0, per_cell))
        c1 = rng.normal(0, 1, n)
        c2 = rng.choice(["p", "q", "r"], n)
        logit = 0.6 * c1 * confounded + 0.3 * (c2 == "q") * confounded
        x = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(int)
        # guarantee both arms are populated
        x[:per_cell // 2] = 1
        x[per_cell // 2:per_cell] = 0
        if binary:
            base = -0.5 + 0.5 * c1 + 0.4 * (c2 == "r") + 0.2 * k
            u = rng.random(n)
            y0 = (u < 1 / (1 + np.exp(-base))).astype(int)
            y1 = (u < 1 / (1 + np.exp(-(base + 0.5 - 0.3 * k)))).astype(int)
            # events and non-events in each arm
            y0[:2], y1[:2] = 1, 1
            y0[2:4], y1[2:4] = 0, 0
            x[0], x[2] = 1, 1
            x[1], x[3] = 0, 0
        else:
            y0 = 10 + 2.0 * c1 + 1.0 * (c2 == "r") + rng.normal(0, 1.5, n)
            y1 = y0 + 1.0 + 0.7 * k
        frames.append(pd.DataFrame({"m": name, "c1": c1, "c2": c2, "x": x, "y0": y0, "y1": y1}))
    df = pd.concat(frames, ignore_index=True)
    df["y"] = np.where(df["x"] == 1, df["y1"], df["y0"])
    df["c1_band"] = np.digitize(df["c1"], [-1.0, -0.3, 0.3, 1.0])  # five levels of c1
    return df


def fields_for(method: str, measure: str, *, strata=("m",)) -> dict:
    """Keyword fields of an analysis of :func:`random_table` with ``method`` and ``measure``."""
    out = dict(exposure="x", outcome="y", strata=strata, method=method, measure=measure)
    if method == "exact":
        out["potential_outcomes"] = ("y0", "y1")
    elif method != "crude":
        out["confounders"] = ("c1", "c2")
    return out


def by_stratum(a) -> pd.DataFrame:
    """The strata table indexed by stratum label, plus the overall row."""
    return a.to_frame().set_index("stratum")


def assert_same_numbers(left: pd.DataFrame, right: pd.DataFrame, *, rtol=1e-9, atol=1e-12):
    """Numeric columns equal to ``rtol``; status columns identical; rows aligned by index."""
    right = right.loc[left.index]
    np.testing.assert_allclose(
        left[NUMERIC_COLUMNS].to_numpy(float),
        right[NUMERIC_COLUMNS].to_numpy(float),
        rtol=rtol,
        atol=atol,
        equal_nan=True,
    )
    assert list(left["status"]) == list(right["status"])


def assert_ok_rows_finite(a) -> None:
    """Every row whose status is ``"ok"`` has finite numbers; every other row has a reason."""
    frame = a.to_frame()
    for _, row in frame.iterrows():
        status = row["status"]
        assert isinstance(status, str) and status.strip(), f"empty status in row {row['stratum']!r}"
        if status == "ok":
            values = row[["estimate", "n", "mean_exposed", "mean_unexposed"]].to_numpy(float)
            assert np.all(np.isfinite(values)), f"NaN estimate in ok row {row['stratum']!r}: {row}"
