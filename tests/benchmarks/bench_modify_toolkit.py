"""Benchmark: cost of the modification toolkit step (``modify.toolkit_fields``) inside analyze().

Prints, for several table sizes and methods, the time of the estimator and of the toolkit step on
the same prepared arrays; asserts nothing about time. Run with
``python tests/benchmarks/bench_modify_toolkit.py [n_large]`` (default 10,000,000 for crude).
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

import stratagem as sg
from stratagem.analysis import _effects_table
from stratagem.estimate import get_estimator
from stratagem.frame import prepare
from stratagem.modify import toolkit_fields
from stratagem.results import OVERALL_FIELDS
from stratagem.spec import Spec


def make_table(n: int, random_state: int = 0) -> pd.DataFrame:
    """Invented rows: binary exposure and outcome, two modifiers, a numeric and a categorical confounder."""
    rng = np.random.default_rng(random_state)
    age = rng.normal(60, 10, n)
    region = rng.integers(0, 4, n)
    a = (rng.random(n) < 1 / (1 + np.exp(-(age - 60) / 10))).astype(np.int8)
    m1 = rng.integers(0, 2, n).astype(np.int8)
    m2 = rng.integers(0, 3, n).astype(np.int8)
    p = 0.2 + 0.1 * a + 0.05 * a * m1 + 0.002 * (age - 60) + 0.02 * region
    y = (rng.random(n) < np.clip(p, 0.01, 0.99)).astype(np.int8)
    return pd.DataFrame({"a": a, "y": y, "m1": m1, "m2": m2, "age": age, "region": region.astype(str)})


def time_step(df, **fields):
    spec = Spec(exposure="a", outcome="y", strata=("m1", "m2"), **fields)
    prep, spec = prepare(df, spec)
    estimator = get_estimator(spec.method)
    t0 = time.perf_counter()
    gm = estimator(prep, spec)
    t1 = time.perf_counter()
    table = _effects_table(prep, spec, gm, None)
    result = dict(spec=spec, strata=table.iloc[:-1].reset_index(drop=True),
                  overall=table.iloc[-1][OVERALL_FIELDS], notes=(), extra={"replicates": None})
    t2 = time.perf_counter()
    toolkit_fields(prep, spec, gm, result)
    t3 = time.perf_counter()
    return t1 - t0, t3 - t2


def main(n_large: int = 10_000_000) -> None:
    rows = []
    for n, method, conf in [
        (4_000, "crude", ()),
        (4_000, "aipw", ("age", "region")),
        (50_000, "aipw", ("age", "region")),
        (200_000, "aipw", ("age", "region")),
        (n_large, "crude", ()),
    ]:
        df = make_table(n)
        for measure in ("rd", "or"):
            est, tk = time_step(df, method=method, confounders=conf, measure=measure)
            rows.append((n, method, measure, est, tk))
            print(f"n={n:>11,}  {method:<6} {measure}  estimator {est:8.3f} s   toolkit {tk:8.3f} s",
                  flush=True)
    print(f"stratagem {sg.__version__}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000)
