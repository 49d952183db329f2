"""Benchmark of the engines: crude and Mantel-Haenszel across 12 strata and AIPW with 10 confounders
on a generated Parquet file (written by DuckDB in a child process, in a temporary folder, deleted
after), PySpark local mode on the same file, the peak resident memory of this Python process (which
only analyses: the writer's memory is the child's), and the cost per 10x rows.

With ``--boot-rows``, also the Poisson bootstrap of AIPW (1,000 replicates, one extra scan) in DuckDB,
beside the in-memory bootstrap (which refits the models on every replicate) on the same rows.

Run:  python tests/benchmarks/bench_engines.py [--rows 1e6 1e7 1e8] [--spark-rows 1e7] [--no-aipw]
                                               [--boot-rows 1e5 1e6]
Figures are printed, never asserted (machines differ).
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from stratagem.engines import analyze_engine
from stratagem.spec import Spec

CONF = tuple(f"c{j}" for j in range(10))


def write_parquet(path: Path, rows: int) -> None:
    """rows of: g1 (3 levels) x g2 (4 levels) = 12 strata, 10 confounders (8 numeric, 2 coded),
    exposure ``a`` and binary outcome ``y`` from logistic models, generated inside DuckDB."""
    import duckdb

    con = duckdb.connect()
    con.execute("SET threads = 2")
    con.execute("SET enable_progress_bar = false")
    numeric = ", ".join(f"(hash(i * 10 + {j}) % 2000000) / 1000000.0 - 1.0 AS c{j}" for j in range(8))
    con.execute(f"""
        COPY (
          SELECT *, CASE WHEN random() < 1 / (1 + exp(-(0.7 * a - 0.5 + 0.4 * c0 - 0.3 * c1 + 0.2 * c8)))
                     THEN 1 ELSE 0 END AS y
          FROM (
            SELECT *, CASE WHEN random() < 1 / (1 + exp(-(0.5 * c0 + 0.3 * c2 - 0.2 * c9))) THEN 1 ELSE 0 END AS a
            FROM (SELECT i % 3 AS g1, (i // 3) % 4 AS g2, {numeric},
                         hash(i * 7) % 3 AS c8, hash(i * 13) % 2 AS c9
                  FROM range({rows}) t(i))
          )
        ) TO '{path}' (FORMAT parquet)
    """)
    con.close()


def write_in_child(path: Path, rows: int) -> None:
    """:func:`write_parquet` in a child process, so its memory is not counted as the analyser's."""
    code = "import sys; sys.path.insert(0, sys.argv[1]); import bench_engines as b; b.write_parquet(sys.argv[2], int(sys.argv[3]))"
    subprocess.run([sys.executable, "-c", code, os.path.dirname(os.path.abspath(__file__)), str(path), str(rows)],
                   check=True)


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def timed(label, fn):
    t = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t
    scans = out.extra["engine"]["scans"]
    print(f"  {label:<34} {dt:8.2f} s  ({scans} scans, peak RSS {peak_rss_mib():7.0f} MiB)", flush=True)
    return dt, out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=float, nargs="+", default=[1e6, 1e7])
    ap.add_argument("--spark-rows", type=float, default=0)
    ap.add_argument("--no-aipw", action="store_true")
    ap.add_argument("--boot-rows", type=float, nargs="*", default=[])
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="stratagem-bench-"))
    base = dict(exposure="a", outcome="y", strata=("g1", "g2"))
    times: dict = {}
    try:
        for rows in map(int, args.rows):
            path = tmp / f"rows_{rows}.parquet"
            t = time.perf_counter()
            write_in_child(path, rows)
            print(f"{rows:,} rows: Parquet written in {time.perf_counter() - t:.1f} s "
                  f"({path.stat().st_size / 2**20:.0f} MiB)", flush=True)
            for method, extra in (("crude", {}), ("mantel-haenszel", {"confounders": ("c8", "c9")}),
                                  ("aipw", {"confounders": CONF})):
                if method == "aipw" and args.no_aipw:
                    continue
                dt, res = timed(f"DuckDB {method}", lambda: analyze_engine(
                    str(path), Spec(**base, method=method, **extra)))
                times.setdefault(method, []).append((rows, dt))
                overall = res.overall
                print(f"    overall estimate {overall['estimate']:.6f} (se {overall['se']:.6f})")
            if args.spark_rows and int(args.spark_rows) == rows:
                from pyspark.sql import SparkSession

                spark = (SparkSession.builder.master("local[2]").config("spark.ui.enabled", "false")
                         .config("spark.sql.shuffle.partitions", "2")
                         .config("spark.ui.showConsoleProgress", "false").getOrCreate())
                spark.sparkContext.setLogLevel("ERROR")
                frame = spark.read.parquet(str(path))
                for method, extra in (("crude", {}), ("mantel-haenszel", {"confounders": ("c8", "c9")}),
                                      ("aipw", {"confounders": CONF})):
                    if method == "aipw" and args.no_aipw:
                        continue
                    d = analyze_engine(str(path), Spec(**base, method=method, **extra))
                    dt, s = timed(f"Spark local[2] {method}", lambda: analyze_engine(
                        frame, Spec(**base, method=method, **extra)))
                    cols = ["estimate", "se", "ci_low", "ci_high"]
                    diff = (s.strata[cols] - d.strata[cols]).abs().to_numpy().max()
                    print(f"    largest |Spark - DuckDB| over the strata's estimates, SEs and limits: {diff:.2e}")
                spark.stop()
            path.unlink()
        for rows in map(int, args.boot_rows):
            path = tmp / f"boot_{rows}.parquet"
            write_in_child(path, rows)
            spec = Spec(**base, method="aipw", confounders=CONF, interval="bootstrap", n_boot=1000, seed=1)
            dt, res = timed(f"DuckDB aipw, 1,000 Poisson replicates, {rows:,} rows", lambda: analyze_engine(
                str(path), spec))
            print(f"    overall {res.overall['estimate']:.6f} ({res.overall['ci_low']:.6f} to "
                  f"{res.overall['ci_high']:.6f})")
            if rows <= 1_000_000:
                import pandas as pd

                from stratagem.analysis import analyze

                frame = pd.read_parquet(path)
                t = time.perf_counter()
                mem = analyze(frame, spec)
                print(f"  in memory, refitting per replicate   {time.perf_counter() - t:8.2f} s")
                print(f"    overall {mem.overall['estimate']:.6f} ({mem.overall['ci_low']:.6f} to "
                      f"{mem.overall['ci_high']:.6f})")
            path.unlink()
        for method, pts in times.items():
            for (r0, t0), (r1, t1) in zip(pts, pts[1:]):
                print(f"{method}: {r0:,} -> {r1:,} rows: time x{t1 / t0:.1f} for x{r1 / r0:.0f} rows")
        print(f"peak RSS of this process: {peak_rss_mib():.0f} MiB")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
