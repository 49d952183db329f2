"""Speed of transport() on a large target table and of simulate_power() per draw (printed, not asserted).

Run: ``python -m pytest tests/benchmarks/test_bench_transport_power.py -s -p no:cacheprovider``
or ``python tests/benchmarks/test_bench_transport_power.py``.
"""

from __future__ import annotations

import time

import numpy as np

import stratagem as sg
from stratagem.power import sample_size_modification, simulate_power
from stratagem.transport import transport


def _best(f, repeat=3) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        f()
        times.append(time.perf_counter() - t)
    return min(times)


def test_transport_large_target():
    df = sg.demo_data()
    a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("lives_alone", "insulin", "age"),
                   method="crude", measure="rr")
    rng = np.random.default_rng(0)
    target = df.sample(200_000, replace=True, random_state=1).reset_index(drop=True)
    target["age"] = rng.integers(30, 96, len(target))
    secs = _best(lambda: transport(a, target))
    print(f"\ntransport, 200,000-row target, {len(a.strata)} strata (3 modifiers, one binned): {secs:.3f} s")
    secs = _best(lambda: transport(a, dict(zip(a.strata["stratum"], np.ones(len(a.strata))))))
    print(f"transport, mapping of {len(a.strata)} shares: {secs * 1e3:.2f} ms")


def test_power_and_simulation():
    secs = _best(lambda: sample_size_modification(effects=(1.2, 2.0, 3.0), risks_unexposed=0.1,
                                                  scale="multiplicative"))
    print(f"\nsample_size_modification, 3 strata: {secs * 1e3:.2f} ms")
    t = time.perf_counter()
    simulate_power(effects=(0.15, 0.05), risks_unexposed=0.3, n=2000, draws=50)
    secs = time.perf_counter() - t
    print(f"simulate_power, n=2000, 50 draws: {secs:.2f} s ({secs / 50 * 1e3:.0f} ms per simulate + analyze)")


if __name__ == "__main__":
    test_transport_large_target()
    test_power_and_simulation()
