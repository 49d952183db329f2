"""Benchmark: crude and Mantel-Haenszel at n = 10,000,000 against one pandas group-by count.

The target (issue 3): both within 3x of a single ``DataFrame.groupby(columns).size()`` over the same
columns (exposure, outcome, modifiers, confounders). Prints times and ratios; asserts nothing about
time. Run with ``python tests/benchmarks/bench_counts.py [n]``.

Figures printed:
* ``pandas group-by count`` -- the baseline;
* ``analyze crude`` / ``analyze mantel-haenszel`` -- the full :func:`stratagem.analyze` call
  (table checks, stratum coding, estimator, diagnostics, toolkit);
* ``prepare`` -- table checks and stratum coding alone (shared by every method);
* ``estimator crude`` / ``estimator mantel-haenszel`` -- the estimator on prepared arrays.
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

import stratagem as sg
from stratagem.estimate import get_estimator
from stratagem.frame import prepare
from stratagem.spec import Spec


def make_table(n: int, random_state: int = 0) -> pd.DataFrame:
    """Invented rows: binary exposure and outcome, two modifiers, two categorical confounders."""
    rng = np.random.default_rng(random_state)
    region = rng.integers(0, 5, n)
    age_group = rng.integers(0, 6, n)
    sex = rng.integers(0, 2, n)
    smoker = rng.integers(0, 3, n)
    x = (rng.random(n) < 0.25 + 0.08 * region).astype(np.int8)
    y = (rng.random(n) < 0.1 + 0.05 * age_group + 0.05 * x).astype(np.int8)
    cat = pd.Categorical.from_codes
    return pd.DataFrame({
        "treated": x,
        "event": y,
        "sex": cat(sex, ["female", "male"]),
        "smoker": cat(smoker, ["never", "former", "current"]),
        "region": cat(region, ["north", "south", "east", "west", "centre"]),
        "age_group": cat(age_group, ["<30", "30-39", "40-49", "50-59", "60-69", "70+"]),
    })


def best_of(f, repeat: int = 3) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        f()
        times.append(time.perf_counter() - t)
    return min(times)


def main(n: int = 10_000_000) -> None:
    df = make_table(n)
    fields = dict(exposure="treated", outcome="event", strata=("sex", "smoker"),
                  confounders=("region", "age_group"), measure="rd")
    columns = ["treated", "event", "sex", "smoker", "region", "age_group"]
    base = best_of(lambda: df.groupby(columns, observed=True).size())
    print(f"n = {n:,}; modifiers sex x smoker (6 strata); confounders region x age_group (30 cells)")
    print(f"{'pandas group-by count':<32}{base:8.3f} s   1.00x")
    rows = []
    for method in ("crude", "mantel-haenszel"):
        t = best_of(lambda: sg.analyze(df, method=method, **fields))
        rows.append((f"analyze {method}", t))
    spec = Spec(method="mantel-haenszel", **fields)
    t = best_of(lambda: prepare(df, spec))
    rows.append(("prepare", t))
    for method in ("crude", "mantel-haenszel"):
        prep, resolved = prepare(df, spec.replace(method=method))
        est = get_estimator(method)
        t = best_of(lambda: est(prep, resolved))
        rows.append((f"estimator {method}", t))
    for name, t in rows:
        print(f"{name:<32}{t:8.3f} s {t / base:6.2f}x")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000)
