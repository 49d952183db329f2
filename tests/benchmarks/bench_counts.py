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


def main(n: int = 10_000_000, rounds: int = 3) -> None:
    """Time every contender once per round, interleaved with the baseline, and print the best time
    and the median of the per-round ratios (robust when other work shares the machine)."""
    df = make_table(n)
    fields = dict(exposure="treated", outcome="event", strata=("sex", "smoker"),
                  confounders=("region", "age_group"), measure="rd")
    columns = ["treated", "event", "sex", "smoker", "region", "age_group"]
    spec = Spec(method="mantel-haenszel", **fields)
    prepared = {m: prepare(df, spec.replace(method=m)) for m in ("crude", "mantel-haenszel")}

    def estimator(method):
        prep, resolved = prepared[method]
        est = get_estimator(method)
        return lambda: est(prep, resolved)

    contenders = {
        "analyze crude": lambda: sg.analyze(df, method="crude", **fields),
        "analyze mantel-haenszel": lambda: sg.analyze(df, method="mantel-haenszel", **fields),
        "prepare": lambda: prepare(df, spec),
        "estimator crude": estimator("crude"),
        "estimator mantel-haenszel": estimator("mantel-haenszel"),
    }
    base_times, times = [], {name: [] for name in contenders}
    for _ in range(rounds):
        for name, f in contenders.items():
            t = time.perf_counter()
            df.groupby(columns, observed=True).size()
            base_times.append(time.perf_counter() - t)
            t = time.perf_counter()
            f()
            times[name].append(time.perf_counter() - t)
    base = np.array(base_times).reshape(rounds, len(contenders))
    print(f"n = {n:,}; modifiers sex x smoker (6 strata); confounders region x age_group (30 cells)")
    print(f"{'':<28}{'best s':>8}{'ratio':>8}   (ratio: median over rounds of time / the group-by just before)")
    print(f"{'pandas group-by count':<28}{base.min():8.3f}{1.0:8.2f}")
    for j, (name, ts) in enumerate(times.items()):
        ratio = np.median(np.array(ts) / base[:, j])
        print(f"{name:<28}{min(ts):8.3f}{ratio:8.2f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000)
