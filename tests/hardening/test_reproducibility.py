"""Same data, Spec and random state: the same numbers to the last bit, in this process or another,
with one BLAS thread or several; and every method's recipe reproduces its analysis exactly.

Bit-identity is checked on the IEEE-754 bytes of every number (``float.hex``), not to a tolerance.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest
from hardening_helpers import method_available

import stratagem as sg
from stratagem.spec import METHODS, Spec

AVAILABLE = [m for m in METHODS if method_available(m)]


def cases() -> list[dict]:
    """Analyses of the demo table: every method in this build, Wald and bootstrap."""
    out = []
    for method in AVAILABLE:
        base = dict(exposure="visited", outcome="on_target", strata=("sex", "lives_alone"), method=method)
        if method == "exact":
            base["potential_outcomes"] = ("y0", "y1")
        elif method != "crude":
            base["confounders"] = ("age", "deprivation", "district")
        out.append(dict(base, measure="rd"))
        out.append(dict(base, measure="or", level=0.9))
        if method != "exact":
            out.append(dict(base, measure="rr", interval="bootstrap", n_boot=40, seed=7))
    return out


CASES = cases()
ROWS = 1500  # a smaller demo table keeps the fresh-process runs short
# BLAS splits work across threads only for large enough products: the thread checks use the full
# demo table (4000 rows), with every bootstrap case and one Wald case per method.
THREAD_ROWS = 4000
THREAD_CASES = [c for c in CASES if c.get("interval") == "bootstrap" or c["measure"] == "rd"]
THREAD_IDS = [f"{c['method']}-{c['measure']}-{c.get('interval', 'wald')}" for c in THREAD_CASES]


@pytest.fixture(scope="module")
def demo_small():
    return sg.demo_data(n=ROWS)
CASE_IDS = [f"{c['method']}-{c['measure']}-{c.get('interval', 'wald')}" for c in CASES]


def fingerprint(a) -> list:
    """Every number of the result as exact hex text, with statuses and labels."""
    frame = a.to_frame()
    out = []
    for _, row in frame.iterrows():
        out.append([str(row["stratum"]), str(row["status"])]
                   + [float(v).hex() for v in row[["n", "estimate", "se", "ci_low", "ci_high", "p_value",
                                                    "mean_exposed", "mean_unexposed"]]])
    for name in ("heterogeneity", "response_types", "diagnostics"):
        table = getattr(a, name)
        for col in table.columns:
            values = table[col].tolist()
            out.append([name, col] + [float(v).hex() if isinstance(v, (float, np.floating)) else str(v)
                                      for v in values])
    return out


SCRIPT = textwrap.dedent(
    """
    import json, sys
    import stratagem as sg
    sys.path.insert(0, sys.argv[1])
    import test_reproducibility as t
    cases, rows = (t.CASES, t.ROWS) if sys.argv[2] == "all" else (t.THREAD_CASES, t.THREAD_ROWS)
    df = sg.demo_data(n=rows)
    print(json.dumps([t.fingerprint(sg.analyze(df, **case)) for case in cases]))
    """
)


def run_elsewhere(threads: int | None = None) -> list:
    """Fingerprints computed in a fresh Python process: every case of CASES on ROWS rows, or, with
    ``threads``, the THREAD_CASES on THREAD_ROWS rows with that many BLAS threads."""
    env = dict(os.environ)
    if threads is not None:
        for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS",
                    "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS"):
            env[var] = str(threads)
    here = os.path.dirname(os.path.abspath(__file__))
    which = "all" if threads is None else "threads"
    done = subprocess.run([sys.executable, "-c", SCRIPT, here, which], capture_output=True, text=True, env=env,
                          timeout=600, check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def here_fingerprints(demo_small):
    return [fingerprint(sg.analyze(demo_small, **case)) for case in CASES]


@pytest.mark.parametrize("case", CASES, ids=CASE_IDS)
def test_bit_identical_across_runs(demo_small, case):
    first = fingerprint(sg.analyze(demo_small, **case))
    second = fingerprint(sg.analyze(demo_small.copy(), **case))
    assert first == second


def test_bit_identical_in_a_separate_process(here_fingerprints):
    there = run_elsewhere()
    for case_id, mine, theirs in zip(CASE_IDS, here_fingerprints, there):
        assert mine == theirs, f"{case_id} differs in a separate process"
    assert len(there) == len(CASES)


@pytest.fixture(scope="module")
def thread_runs():
    """Fingerprints of THREAD_CASES with one BLAS thread and with two (threadpoolctl if installed,
    else fresh processes with the thread-count environment variables set), and in this process."""
    df = sg.demo_data(n=THREAD_ROWS)
    here = [fingerprint(sg.analyze(df, **case)) for case in THREAD_CASES]
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return run_elsewhere(threads=1), run_elsewhere(threads=2), here
    runs = []
    for threads in (1, 2):
        with threadpool_limits(limits=threads):
            runs.append([fingerprint(sg.analyze(df, **case)) for case in THREAD_CASES])
    return runs[0], runs[1], here


def _relative_gap(a: list, b: list) -> float:
    worst = 0.0
    for row_a, row_b in zip(a, b):
        assert len(row_a) == len(row_b)
        for x, y in zip(row_a, row_b):
            if x == y:
                continue
            try:
                fx, fy = float.fromhex(x), float.fromhex(y)
            except ValueError:
                return float("inf")  # a label or status differs
            worst = max(worst, abs(fx - fy) / max(abs(fx), abs(fy)))
    return worst


def test_results_do_not_depend_on_blas_threads(thread_runs):
    """Wald results are bit-identical; bootstrap results agree to 1e-12 (and bit-identical below)."""
    one, two, mine = thread_runs
    assert len(one) == len(two) == len(THREAD_CASES)
    for case, case_id, a, b, c in zip(THREAD_CASES, THREAD_IDS, one, two, mine):
        if case.get("interval") != "bootstrap":
            assert a == b == c, f"{case_id} depends on the number of BLAS threads"
        else:
            assert _relative_gap(a, b) < 1e-12, case_id
            assert _relative_gap(a, c) < 1e-12, case_id


@pytest.mark.parametrize("method", [m for m in AVAILABLE if m != "exact"])
def test_bootstrap_bit_identical_whatever_the_blas_threads(thread_runs, method):
    one, two, _ = thread_runs
    for case, case_id, a, b in zip(THREAD_CASES, THREAD_IDS, one, two):
        if case["method"] == method and case.get("interval") == "bootstrap":
            assert a == b, f"{case_id} differs between 1 and 2 BLAS threads"


def test_a_different_random_state_changes_only_the_bootstrap(demo_small):
    case = next(c for c in CASES if c.get("interval") == "bootstrap")
    a = sg.analyze(demo_small, **case)
    b = sg.analyze(demo_small, **dict(case, seed=case["seed"] + 1))
    assert a.overall["estimate"] == b.overall["estimate"]  # the point estimate is not random
    assert a.overall["ci_low"] != b.overall["ci_low"]  # the replicates are


# -- recipes ---------------------------------------------------------------------------------------

RECIPE_EXTRAS = [
    dict(),
    dict(bins={"age": 3}, strata=("age", "insulin")),
    dict(level=0.8, missing="raise"),
    dict(interval="bootstrap", n_boot=30, seed=123),
]


def _recipe_cases():
    out = []
    for case in CASES:
        for extra in RECIPE_EXTRAS:
            if case["method"] == "exact" and extra.get("interval") == "bootstrap":
                continue
            if case.get("interval") == "bootstrap" and extra:
                continue
            full = {**case, **extra}
            if "age" in full.get("strata", ()) and "age" in full.get("confounders", ()):
                full["confounders"] = tuple(c for c in full["confounders"] if c != "age")
            out.append(full)
    return out


RECIPES = _recipe_cases()


@pytest.mark.parametrize("case", RECIPES, ids=[f"{c['method']}-{i}" for i, c in enumerate(RECIPES)])
def test_recipe_round_trips(demo_small, case):
    a = sg.analyze(demo_small, **case)
    namespace = {"df": demo_small.copy()}
    exec(compile(a.recipe(), "<recipe>", "exec"), namespace)  # the test runs generated code on purpose
    b = namespace["analysis"]
    assert b.spec == a.spec
    assert fingerprint(a) == fingerprint(b)
    pd.testing.assert_frame_equal(a.to_frame(), b.to_frame())


def test_recipe_round_trips_with_counts_truncation_and_levels():
    """Fields rarely used together: counts, truncate, correction, exposed_level, max_levels."""
    rng = np.random.default_rng(0)
    n = 600
    df = pd.DataFrame({
        "arm": rng.choice(["drug", "placebo"], n),
        "died": rng.integers(0, 2, n),
        "site": rng.choice([f"s{i}" for i in range(12)], n),
        "score": rng.normal(0, 1, n),
        "w": rng.integers(1, 4, n),
    })
    for method in [m for m in AVAILABLE if m != "exact"]:
        fields = dict(exposure="arm", outcome="died", exposed_level="drug", strata=("site",), max_levels=12,
                      counts="w", method=method, measure="or", correction=0.5)
        if method in ("ipw", "aipw"):
            fields["truncate"] = (2.0, 98.0)
        if method != "crude":
            fields["confounders"] = ("score",)
        a = sg.analyze(df, **fields)
        namespace = {"df": df.copy()}
        exec(compile(a.recipe(), "<recipe>", "exec"), namespace)  # generated code, run on purpose
        assert fingerprint(namespace["analysis"]) == fingerprint(a), method


def test_spec_json_round_trip_keeps_every_field():
    spec = Spec(exposure="é x", outcome="y ~ 1", confounders=("a", "b"), strata=("m", "k"), method="ipw",
                measure="rr", level=0.9, interval="bootstrap", n_boot=55, seed=2**40, bins={"k": (0, 1.5, 3)},
                counts="w", exposed_level="yes", missing="raise", max_levels=7, correction=0.5,
                truncate=(1, 99), monotone=True)
    again = Spec.from_json(spec.to_json())
    assert again == spec
    assert again.to_json() == spec.to_json()
