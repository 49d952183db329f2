"""Where the time of one Explorer recompute goes, at 100,000 rows with AIPW and Wald intervals.

Run: ``python tests/benchmarks/bench_explorer_recompute.py`` (``--quick`` for a small smoke run,
``--rows N`` for another size, ``--repeats R``).

Issue 5's target is a median time from drop to updated plot under 150 ms at 100,000 rows with AIPW
and Wald intervals. This script times, per drop (a modifier added to "Stratify by"), the stages of
the Python side of that path:

* ``prepare``: reading the table (``stratagem.frame.prepare``, and for the adjusted methods the
  recoding of text confounders that ``analyze`` does next);
* ``estimate``: the AIPW estimator (per-stratum propensity and outcome fits);
* ``effects``: the effects table (measure, Wald intervals);
* ``diagnostics``, ``toolkit``: the two extension steps of ``analyze`` (checks; heterogeneity,
  multiplicity, E-values, ...);
* ``analyze``: the whole ``stratagem.analyze`` call;
* ``payload``, ``snapshot``, ``transport``: the widget's JSON, its static HTML and the effect in a
  target population;
* ``widget``: the Explorer itself (``sync=True``), from setting ``strata`` to the new ``_result``;
  the drop-to-plot latency in a browser adds the front end's redraw and the message round trip
  (measured by the end-to-end test).

It also prints the sizes of the messages a recompute sends: the ``_result`` and ``_transport``
JSON and the ``text/html`` snapshot that replaces the displayed output.

Times are medians over repeats, as wall clock and as CPU time of this process (the machine may be
shared: the load average is printed). Figures are printed, never asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import time

import numpy as np
import pandas as pd

import stratagem as sg
from stratagem.analysis import _SORTED_LEVELS, _effects_table, _extension, _text_as_categories, extensions
from stratagem.estimate import get_estimator
from stratagem.frame import prepare
from stratagem.spec import Spec
from stratagem.transport import transport
from stratagem.widgets import Explorer
from stratagem.widgets.payload import Target, analysis_payload, run_transport
from stratagem.widgets.snapshot import snapshot_html

CONFOUNDERS = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")
DROPS = [("sex",), ("sex", "lives_alone"), ("sex", "lives_alone", "insulin"), ("insulin", "age")]


def demo_rows(n: int, random_state: int = 1) -> pd.DataFrame:
    """The demo data resampled to ``n`` rows (modifiers sex, lives_alone, insulin, age)."""
    demo = sg.demo_data()
    return demo.sample(n, replace=True, random_state=random_state).reset_index(drop=True)


def simulated_rows(n: int) -> pd.DataFrame:
    """``sg.simulate`` with three modifiers and eight confounders."""
    return sg.simulate(
        n,
        modifiers={"sex": {"f": 0.5, "m": 0.5}, "band": {"a": 0.3, "b": 0.4, "c": 0.3},
                   "alone": {"no": 0.7, "yes": 0.3}},
        shares={"f": (0.1, 0.3, 0.05, 0.55), "m": (0.15, 0.2, 0.05, 0.6)},
        covariates={f"x{j}": ("normal", 0.0, 1.0) for j in range(6)}
        | {"smoker": ("binary", 0.3), "region": ("categorical", {"n": 0.3, "s": 0.3, "e": 0.4})},
        seed=3,
    )


def timed(fn, repeats: int):
    """(median wall seconds, median CPU seconds, last value) of ``fn()``."""
    walls, cpus, value = [], [], None
    for _ in range(repeats):
        w0, c0 = time.perf_counter(), time.process_time()
        value = fn()
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
    return statistics.median(walls), statistics.median(cpus), value


def read(df: pd.DataFrame, spec: Spec):
    """What ``analyze`` does before estimating: ``prepare``, then (adjusted methods) text
    confounders recoded as categoricals."""
    prep, resolved = prepare(df, spec)
    if resolved.method in _SORTED_LEVELS:
        prep = _text_as_categories(prep)
    return prep, resolved


def stages(df: pd.DataFrame, spec: Spec, target: pd.DataFrame, repeats: int) -> dict:
    """Median wall/CPU seconds of each stage of one recompute for ``spec``."""
    out = {}
    out["prepare"] = timed(lambda: read(df, spec), repeats)
    prep, resolved = out["prepare"][2]
    estimator = get_estimator(resolved.method)
    # A fresh Prepared per repeat: the adjusted estimators keep the layout of the last Prepared
    # they saw, which a new drop never has.
    fresh = [read(df, spec)[0] for _ in range(repeats)]
    out["estimate"] = timed(lambda: estimator(fresh.pop(), resolved), repeats)
    gm = out["estimate"][2]
    out["effects"] = timed(lambda: _effects_table(prep, resolved, gm, None), repeats)
    table = out["effects"][2]
    fields = dict(spec=resolved, overall=table.iloc[-1], strata=table.iloc[:-1], notes=(),
                  extra={"replicates": None, "replicate_theta": None, "bin_edges": dict(prep.bin_edges),
                         "covariance": {"v11": gm.v11, "v00": gm.v00, "v10": gm.v10}, **gm.extra})
    for path in extensions:
        step = _extension(path)
        if step is not None:
            name = {"diagnostics": "diagnostics", "modify": "toolkit"}.get(path.split(":")[0], path)
            out[name] = timed(lambda step=step: step(prep, resolved, gm, dict(fields)), repeats)
    out["analyze"] = timed(lambda: sg.analyze(df, spec), repeats)
    analysis = out["analyze"][2]
    out["payload"] = timed(lambda: analysis_payload(analysis), repeats)
    payload = out["payload"][2]
    picked = Target(target, "target")
    out["transport"] = timed(lambda: run_transport(analysis, picked), repeats)
    moved = out["transport"][2][1]
    out["snapshot"] = timed(lambda: snapshot_html(payload, moved), repeats)
    out["sizes"] = {
        "_result JSON": len(json.dumps(payload)),
        "_transport JSON": len(json.dumps(moved)),
        "text/html": len(out["snapshot"][2]),
    }
    transport(analysis, target)  # a plain call, so a failure would show here and not be hidden
    return out


def widget_latency(df: pd.DataFrame, target: pd.DataFrame, repeats: int) -> list[tuple]:
    """Explorer (sync=True): seconds from setting ``strata`` to the new result, per drop.

    ``first``: a choice not seen before (the kept results are cleared before each repeat);
    ``again``: the same drop once more, after removing it (the kept result is reused).
    For each, two times: to the published result (``_result``, ``_transport`` and the idle
    ``_status`` set together, which is when the front end's message leaves), and to the return
    of the assignment (adding what follows the message: the static snapshot and keeping the
    result for reuse). Returns per drop ``(drop, {kind: (to result, to return, CPU to return)})``.
    """
    ex = Explorer(df, exposure="visited", outcome="on_target", confounders=CONFOUNDERS,
                  method="aipw", measure="rd", target=target, sync=True)
    published = []

    def on_status(change):
        if change["new"].get("state") == "idle":
            published.append(time.perf_counter())

    ex.observe(on_status, names="_status")
    rows = []
    for drop in DROPS:
        got = {"first": ([], [], []), "again": ([], [], [])}
        for _ in range(repeats):
            for kind in ("first", "again"):
                ex.strata = []
                if kind == "first":
                    getattr(ex, "_cache", {}).clear()
                published.clear()
                w0, c0 = time.perf_counter(), time.process_time()
                ex.strata = list(drop)
                w1, c1 = time.perf_counter(), time.process_time()
                assert ex._status["state"] == "idle", ex._status
                assert ex._result["modifiers"] == list(drop)
                got[kind][0].append(published[-1] - w0)
                got[kind][1].append(w1 - w0)
                got[kind][2].append(c1 - c0)
        rows.append((drop, {kind: tuple(statistics.median(v) for v in got[kind]) for kind in got}))
    ex.close()
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--quick", action="store_true", help="4,000 rows, 2 repeats")
    args = parser.parse_args()
    n, repeats = (4_000, 2) if args.quick else (args.rows, args.repeats)
    print(f"rows {n:,}; median of {repeats} repeats; load average {os.getloadavg()[0]:.1f} "
          f"on {os.cpu_count()} cores")
    df = demo_rows(n)
    target = demo_rows(max(n // 4, 500), random_state=7).query("lives_alone == 'yes' or insulin == 'yes'")
    base = dict(exposure="visited", outcome="on_target", confounders=CONFOUNDERS, method="aipw",
                measure="rd", interval="wald")
    order = ["prepare", "estimate", "effects", "diagnostics", "toolkit", "analyze", "payload",
             "transport", "snapshot"]
    print("\nStages (ms, wall / CPU), demo data resampled, AIPW + Wald, 5 confounders:")
    print(f"{'strata':34s}" + "".join(f"{k:>16s}" for k in order))
    for drop in DROPS:
        spec = Spec.from_fields(strata=drop, **base)
        got = stages(df, spec, target, repeats)
        cells = "".join(f"{got[k][0] * 1e3:9.0f}/{got[k][1] * 1e3:<6.0f}" if k in got else f"{'-':>16s}"
                        for k in order)
        print(f"{' x '.join(drop):34s}{cells}")
        print(f"{'':34s}message sizes (bytes): " + ", ".join(f"{k} {v:,}" for k, v in got["sizes"].items()))
    print("\nExplorer recompute per drop (sync=True, target set), ms: wall to the published result / "
          "wall to return / CPU to return:")
    print(f"  {'strata':34s}{'first visit':>24s}{'again':>24s}")
    for drop, got in widget_latency(df, target, repeats):
        cells = "".join(f"{got[k][0] * 1e3:10.0f} /{got[k][1] * 1e3:5.0f} /{got[k][2] * 1e3:5.0f}"
                        for k in ("first", "again"))
        print(f"  {' x '.join(drop):34s}{cells}")
    sim = simulated_rows(n)
    conf = tuple(c for c in sim.columns if c.startswith("x")) + ("smoker", "region")
    spec = Spec.from_fields(exposure="exposed", outcome="outcome", confounders=conf,
                            strata=("sex", "band", "alone"), method="aipw", measure="rd")
    got = stages(sim, spec, sim[["sex", "band", "alone"]].iloc[: max(n // 10, 200)], repeats)
    print("\nsg.simulate, 3 modifiers (12 strata), 8 confounders, AIPW + Wald (ms wall / CPU):")
    print("  " + ", ".join(f"{k} {got[k][0] * 1e3:.0f}/{got[k][1] * 1e3:.0f}" for k in order if k in got))
    print("  message sizes (bytes): " + ", ".join(f"{k} {v:,}" for k, v in got["sizes"].items()))


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()
