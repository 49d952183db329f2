"""Speed and memory of the adjusted estimators against the plain approach an analyst would write.

Run: ``python tests/benchmarks/bench_adjusted.py`` (``--quick`` for a small smoke run, ``--part wald``
or ``--part bootstrap`` for one of the two, ``--help`` for the options).

1. AIPW with influence-function (Wald) intervals, n = 1,000,000 rows, 10 confounders, 12 strata:
   stratagem (prepare + estimate, and the whole ``analyze()`` call) against a loop over the strata of
   statsmodels GLM fits (propensity and outcome model per stratum, AIPW means and influence-function
   standard errors by hand). The time of each step of ``analyze()`` is printed (the estimate, and the
   post-estimation steps: diagnostics and the modification toolkit). Peak memory of stratagem's
   estimate (``tracemalloc``, which sees numpy's allocations) is measured in a separate run and
   compared with the size of the data frame (``tracemalloc`` slows allocations, so it is not on
   while timing).
   Targets: under 2 s, at least 5x faster, peak memory under 4x the data.
2. AIPW with 1,000 bootstrap replicates, n = 100,000, 12 strata: stratagem's vectorised bootstrap
   against a loop of the same statsmodels fits per replicate. The loop is timed on a few replicates
   and scaled to 1,000 (said in the output). Targets: under 20 s, at least 50x faster.

The plain loop is timed twice when ``threadpoolctl`` is installed: with the BLAS threads numpy
starts with, and with one BLAS thread (on a busy machine OpenBLAS's threads can make small products
many times slower); the speed-up is against the faster of the two, so it is never flattering.

Figures are printed, never asserted (the machine is shared; timings vary).
"""

from __future__ import annotations

import sys
import time
import tracemalloc

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy.special import expit

import stratagem as sg
import stratagem.analysis as sg_analysis
from stratagem.estimate import get_estimator
from stratagem.estimate.bootstrap import bootstrap_means
from stratagem.frame import prepare
from stratagem.spec import Spec

CONF = tuple(f"c{j}" for j in range(10))


def make_data(n: int, random_state: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(random_state)
    df = pd.DataFrame({f"c{j}": rng.normal(size=n) for j in range(8)})
    df["c8"] = (rng.random(n) < 0.3).astype(float)
    df["c9"] = rng.poisson(2.0, n).astype(float)
    df["region"] = pd.Categorical(rng.choice(["north", "south", "east"], n))
    df["band"] = pd.Categorical(rng.choice(["a", "b", "c", "d"], n))
    score = df[list(CONF)].to_numpy() @ np.linspace(0.3, -0.2, 10) * 0.5
    a = (rng.random(n) < expit(-0.3 + score)).astype(float)
    effect = 0.4 + 0.3 * (df["band"].cat.codes.to_numpy() - 1.5)
    y = (rng.random(n) < expit(-0.5 + score + effect * a)).astype(float)
    df["a"] = a
    df["y"] = y
    return df


def plain_aipw(df: pd.DataFrame, weights: np.ndarray | None = None):
    """What an analyst writes: per stratum, two statsmodels GLMs, AIPW means, IF-based SEs."""
    out = {}
    for key, g in df.groupby(["region", "band"], observed=True):
        X = sm.add_constant(g[list(CONF)].to_numpy(), has_constant="add")
        a, y = g["a"].to_numpy(), g["y"].to_numpy()
        fw = None if weights is None else weights[g.index.to_numpy()]
        ps = sm.GLM(a, X, family=sm.families.Binomial(), freq_weights=fw).fit()
        e = ps.fittedvalues
        XA = np.column_stack([X, a])
        om = sm.GLM(y, XA, family=sm.families.Binomial(), freq_weights=fw).fit()
        q1 = om.predict(np.column_stack([X, np.ones_like(a)]))
        q0 = om.predict(np.column_stack([X, np.zeros_like(a)]))
        psi1 = q1 + a * (y - q1) / e
        psi0 = q0 + (1 - a) * (y - q0) / (1 - e)
        w = np.ones_like(a) if fw is None else fw
        d = np.average(psi1 - psi0, weights=w)
        se = np.sqrt(np.sum(w * (psi1 - psi0 - d) ** 2)) / w.sum()
        out[key] = (d, se)
    return out


def timed(f, *args, **kwargs):
    t = time.perf_counter()
    r = f(*args, **kwargs)
    return time.perf_counter() - t, r


def timed_plain(f, *args):
    """(best time, result, description) of the plain approach: default BLAS threads, and one thread."""
    t_default, r = timed(f, *args)
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return t_default, r, f"default BLAS threads {t_default:.2f} s"
    with threadpool_limits(limits=1):
        t_one, _ = timed(f, *args)
    return min(t_default, t_one), r, f"default BLAS threads {t_default:.2f} s, one thread {t_one:.2f} s"


def bench_wald(n: int) -> None:
    df = make_data(n)
    data_mb = df.memory_usage(deep=True).sum() / 2**20
    spec = Spec(exposure="a", outcome="y", confounders=CONF, strata=("region", "band"), method="aipw")

    def estimate():
        prep, s = prepare(df, spec)
        return get_estimator("aipw")(prep, s)

    estimate()  # warm-up (imports)
    t_est, gm = timed(estimate)
    steps = {}
    plain_extension = sg_analysis._extension

    def timed_extension(path):  # time each post-estimation step of analyze()
        f = plain_extension(path)
        if f is None:
            return None

        def run(*args):
            t, out = timed(f, *args)
            steps[path] = t
            return out
        return run

    sg_analysis._extension = timed_extension
    try:
        t_analyze, a = timed(sg.analyze, df, spec)
    finally:
        sg_analysis._extension = plain_extension
    tracemalloc.start()
    estimate()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    t_plain, ref, how = timed_plain(plain_aipw, df)
    d = gm.m1 - gm.m0
    diff = max(abs(d[i] - v[0]) for i, v in enumerate(ref.values()))
    print(f"AIPW Wald, n={n:,}, 10 confounders, 12 strata")
    print(f"  stratagem prepare+estimate : {t_est:6.2f} s   (target < 2 s)")
    print(f"  stratagem analyze() total  : {t_analyze:6.2f} s   (includes the other post-estimation steps)")
    for path, t in steps.items():
        print(f"    of which {path:<28}: {t:6.2f} s")
    print(f"  plain statsmodels loop     : {t_plain:6.2f} s   (best of: {how})")
    print(f"  speed-up (estimate)        : {t_plain / t_est:6.1f} x  (target >= 5x)")
    print(f"  speed-up (analyze)         : {t_plain / t_analyze:6.1f} x")
    print(f"  peak memory of estimate    : {peak / 2**20:6.0f} MB = {peak / 2**20 / data_mb:.2f} x the data "
          f"({data_mb:.0f} MB)  (target < 4x)")
    print(f"  largest |difference| of stratum estimates vs the loop: {diff:.2e}")


def bench_bootstrap(n: int, n_boot: int, plain_reps: int) -> None:
    df = make_data(n, random_state=1)
    spec = Spec(exposure="a", outcome="y", confounders=CONF, strata=("region", "band"), method="aipw",
                interval="bootstrap", n_boot=n_boot, seed=1)
    prep, spec = prepare(df, spec)
    est = get_estimator("aipw")
    t_est, _ = timed(est, prep, spec)
    t_boot, (m1, _) = timed(bootstrap_means, est, prep, spec)
    def plain_loop():
        rng = np.random.default_rng(0)
        for _ in range(plain_reps):
            w = rng.multinomial(n, np.full(n, 1 / n)).astype(float)
            plain_aipw(df, w)

    t_loop, _, how = timed_plain(plain_loop)
    t_plain = t_loop / plain_reps * n_boot
    total = t_est + t_boot
    print(f"AIPW bootstrap, n={n:,}, 12 strata, {n_boot} replicates")
    print(f"  stratagem estimate + bootstrap : {total:6.2f} s   (target < 20 s); "
          f"failed replicates: {int(np.isnan(m1).any(axis=1).sum())}")
    print(f"    of which the estimate {t_est:.2f} s, the replicates {t_boot:.2f} s")
    print(f"  plain loop (timed on {plain_reps} replicates, scaled to {n_boot}): {t_plain:8.1f} s   "
          f"(best of: {how}, for {plain_reps} replicates)")
    print(f"  speed-up                       : {t_plain / total:6.1f} x  (target >= 50x)")


def main(argv: list[str]) -> None:
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="small sizes, for a smoke run")
    parser.add_argument("--part", choices=("wald", "bootstrap", "both"), default="both",
                        help="which benchmark to run (default both)")
    args = parser.parse_args(argv)
    if args.part in ("wald", "both"):
        bench_wald(50_000 if args.quick else 1_000_000)
    if args.part == "both":
        print()
    if args.part in ("bootstrap", "both"):
        bench_bootstrap(20_000 if args.quick else 100_000, 100 if args.quick else 1000, 2 if args.quick else 5)


if __name__ == "__main__":
    main(sys.argv[1:])
