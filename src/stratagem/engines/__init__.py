"""Analyse tables that live in an engine: a DuckDB relation, Parquet file(s), or a PySpark DataFrame.

:func:`stratagem.analyze` hands any input that is not a pandas DataFrame to :func:`analyze_engine`,
which returns the same :class:`~stratagem.results.Analysis` (same tables, same columns, the same
numbers as the in-memory path on the same rows) while the rows stay in the engine:

* crude and Mantel-Haenszel need only counts per cell, so one grouped query builds a small table of
  counts (:func:`.counts.cell_table`) and the in-memory estimators, tests and toolkit run on it;
* standardization, IPW and AIPW fit their per-stratum models by Newton and chord steps in which every
  step is one grouped query (``X'WX`` and ``X'W(z)`` per stratum, or only ``X'W(z)``), then one or two
  more queries give the potential-outcome means, the influence-function variances and the checks
  (:func:`.models.model_means`).

The Checks (``Analysis.diagnostics``) are the in-memory table, computed from the same queries, plus
two rows saying where the data stayed and how many full scans were made.

Bootstrap intervals (crude and Mantel-Haenszel with a 0/1 outcome) resample individuals through the
table of counts: drawing ``n`` individuals with replacement and counting them per cell is one
multinomial draw over the cells with probabilities proportional to their counts, which is what
:func:`stratagem.estimate.bootstrap.replicate_weights` draws on a table of counts (Efron &
Tibshirani 1993, *An Introduction to the Bootstrap*, ch. 6; the equivalence is the definition of the
multinomial). The replicates have the same distribution as on the raw rows, but not the same random
stream, so engine and in-memory bootstrap intervals agree within Monte Carlo error, not digit for digit.
Standardization, IPW and AIPW take the Poisson bootstrap in one more scan
(:func:`.replicates.poisson_replicates`): every row gets a Poisson(1) frequency per replicate, a fixed
function of its values, so replicates repeat exactly on every run; the replicates are the linearised
(influence-function) ones, first-order equivalent to refitting the models per replicate. Crude and
Mantel-Haenszel with a numeric outcome take the same Poisson weights, summed per cell of the table of
counts in one scan, so each replicate's cell means are exact (:func:`.counts.poisson_cells`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from .. import frame as fr
from ..errors import SpecError
from ..results import DIAGNOSTIC_COLUMNS, OVERALL_FIELDS, Analysis
from ..spec import Spec
from . import balance, checks, counts, design, models
from .duckdb_engine import from_duckdb, is_duckdb
from .spark_engine import SparkSource, is_spark

__all__ = ["analyze_engine", "is_engine_input", "source_for", "modifier_summary", "modifier_summaries"]

MODEL_METHODS = ("standardization", "ipw", "aipw")


def is_engine_input(data: Any) -> bool:
    """Whether ``data`` is a table an engine holds (DuckDB relation, Parquet path, Spark DataFrame)."""
    return is_duckdb(data) or is_spark(data)


def source_for(data: Any):
    """The engine adapter (:class:`~.source.Source`) for ``data``."""
    if is_spark(data):
        return SparkSource(data)
    if is_duckdb(data):
        return from_duckdb(data)
    raise TypeError(f"not an engine table: {type(data).__name__}")


def _engine_limits(spec: Spec) -> None:
    """Options the engines do not offer yet: refuse them up front, saying what to do instead."""
    if spec.method == "exact" or spec.potential_outcomes is not None:
        raise SpecError(
            "method='exact' (potential_outcomes=) is not available for tables in an engine; "
            "select the needed columns into pandas first, e.g. relation.df()."
        )
    if spec.truncate is not None:
        raise SpecError(
            "truncate= is not available for tables in an engine yet (weight percentiles would need a "
            "sort of every row); pass truncate=None, or analyse the table in pandas."
        )


def analyze_engine(data: Any, spec: Spec, progress: Callable[[float], None] | None = None) -> Analysis:
    """:func:`stratagem.analyze` for a table in an engine; see the module docstring.

    Parameters
    ----------
    data : duckdb.DuckDBPyRelation, str or pathlib.Path (Parquet), or pyspark.sql.DataFrame
        Only read; never copied into Python.
    spec : Spec
        The analysis (validated).
    progress : callable, optional
        Bootstrap progress, as for :func:`stratagem.analyze`.

    Returns
    -------
    Analysis
        As for a pandas DataFrame. ``extra["engine"]`` says which engine held the data and how many
        full scans of how many rows were made; the Checks (``diagnostics``) say the same.
    """
    _engine_limits(spec)
    src = source_for(data)
    method_hint = spec.method
    ins = checks.inspect(src, spec, confounder_levels=method_hint in MODEL_METHODS)
    resolved = fr.resolve(spec, ins.binary)
    model = resolved.method in MODEL_METHODS
    poisson = resolved.interval == "bootstrap" and (model or not ins.binary)  # else multinomial cells
    if poisson and resolved.counts is not None:
        raise SpecError(
            "interval='bootstrap' for a table of counts (counts=) is available in an engine only for "
            "'crude' and 'mantel-haenszel' with a 0/1 outcome (elsewhere each row would need a Poisson "
            "draw with its own frequency as mean); pass interval='wald', or analyse the table in pandas."
        )
    mh = resolved.method == "mantel-haenszel"
    des = design.design(src, resolved, ins) if not model and resolved.confounders else None
    table, mh_notes, cell_sums = counts.cell_table(src, resolved, ins, confounders=mh, des=des)
    n_cells = len(table)
    cell_reps = None
    if poisson and not model:  # a numeric outcome's crude or Mantel-Haenszel bootstrap
        cell_reps = counts.poisson_cells(src, resolved, ins, table, confounders=mh)
    if not ins.binary:
        table = counts.moment_rows(table, resolved.outcome, ins.centre)
    bins = {name: edges for name, _, edges, _ in ins.keys if edges is not None}
    key_notes = [note for _, _, _, note in ins.keys if note]
    confounders = ()
    if resolved.method in ("crude", "mantel-haenszel"):
        confounders = tuple(counts.confounder_alias(i) for i in range(len(resolved.confounders)))
    if resolved.method == "crude":  # crude ignores confounders but says so: keep placeholders
        for name in confounders:
            table[name] = 0.0
    cspec = resolved.replace(counts=counts.COUNT, bins=bins, confounders=confounders, interval="wald"
                             if model else resolved.interval)
    if model:
        result = _model_analysis(src, resolved, cspec, ins, table)
    elif cell_reps is not None:
        result = _cells_bootstrap_analysis(src, resolved, cspec, ins, table, cell_reps)
    else:
        from ..analysis import analyze

        result = analyze(table, cspec, progress=progress)
    if des is not None:  # balance before adjustment, as the in-memory Checks of crude and MH
        result.extra["engine_balance"] = _cell_balance(table, cspec, des, cell_sums, n_cells)
    notes = list(result.notes)[len(bins):]  # the table of counts' own binning notes, replaced below
    notes = list(ins.notes) + key_notes + mh_notes + [n for n in notes if not n.startswith("Checks: ")]
    diagnostics = _engine_diagnostics(result, src, ins)
    from ..diagnostics import warnings_note

    if warnings_note(diagnostics):  # counted on the engine's Checks, not the table of counts'
        notes.append(warnings_note(diagnostics))
    scanned = f"{src.scans} full scan(s) of {ins.n_input:,} rows"
    notes.append(f"The data stayed in {src.engine}: {scanned}; only aggregates came back to Python.")
    extra = dict(result.extra)
    extra["engine"] = {"engine": src.engine, "scans": src.scans, "rows": ins.n_input}
    extra["bin_edges"] = dict(bins)
    return replace(
        result,
        spec=resolved,
        notes=tuple(notes),
        n_input=ins.n_input,
        n_dropped=ins.n_input - ins.n_kept,
        diagnostics=diagnostics,
        heterogeneity=_engine_heterogeneity(result, resolved),
        extra=extra,
    )


def _model_analysis(src, spec: Spec, cspec: Spec, ins, table: pd.DataFrame) -> Analysis:
    """Standardization, IPW or AIPW: strata from the table of counts, models fitted in the engine."""
    prep, _ = fr.prepare(table, cspec.replace(method="crude", interval="wald"))
    keys_to_stratum = {}
    key_cols = []
    for name, _, edges, _ in ins.keys:
        col = table[name].to_numpy()
        key_cols.append(np.searchsorted(np.asarray(edges), col.astype(float)) if edges is not None else col)
    for i in range(len(table)):
        keys_to_stratum.setdefault(tuple(c[i] for c in key_cols), int(prep.stratum[i]))
    gm = models.model_means(src, spec, ins, prep, keys_to_stratum, name=spec.method)
    replicates = gm.extra.pop("engine_replicates", None)
    if replicates is not None:
        gm.notes.append(
            f"Bootstrap in {src.engine}: {spec.n_boot:,} Poisson-weighted replicates (every row a Poisson(1) "
            "frequency), each the one-step update of the estimate through its influence functions rather "
            "than a refit of the models; percentile intervals.")
    return _finish(prep, spec, ins, gm, replicates, None)


def _cells_bootstrap_analysis(src, spec: Spec, cspec: Spec, ins, table: pd.DataFrame, cell_reps) -> Analysis:
    """Crude or Mantel-Haenszel with a numeric outcome and Poisson-bootstrap intervals.

    The table of counts holds each cell as two rows at ``mean -+ sd`` (:func:`.counts.moment_rows`).
    A replicate's cell frequency ``n_b`` and outcome sum ``S_b`` (:func:`.counts.poisson_cells`) are
    given to the two rows as frequencies ``W_lo + W_hi = n_b`` with ``W_lo y_lo + W_hi y_hi = S_b``,
    so the replicate's cell mean is exact; the estimators' vectorised bootstrap then pools the cells
    with the point estimate's formulas (a frequency may be negative when a replicate's mean falls
    outside ``mean -+ sd``: the pooled means are linear in the frequencies, so that is harmless).
    """
    from ..estimate import get_estimator

    n_b, s_b = cell_reps
    c = n_b.shape[1]
    y = table[spec.outcome].to_numpy(float)
    y_lo, y_hi = y[:c], y[c:]
    total = s_b + ins.centre * n_b  # the uncentred outcome sums
    spread = y_hi - y_lo
    with np.errstate(divide="ignore", invalid="ignore"):
        w_hi = np.where(spread > 0, (total - n_b * y_lo) / np.where(spread > 0, spread, 1.0), n_b / 2.0)
    W = np.concatenate([n_b - w_hi, w_hi], axis=1)
    bspec = cspec.replace(interval="bootstrap", n_boot=spec.n_boot)
    prep, bspec = fr.prepare(table, bspec)
    estimator = get_estimator(bspec.method)
    gm = estimator(prep, bspec)
    fast = getattr(estimator, "boot", None)
    if fast is not None:
        got = fast(prep, bspec, W)
        m1_b, m0_b, theta_b = got[0], got[1], (got[2] if len(got) > 2 else None)
    else:  # crude: per replicate on the small table
        from dataclasses import replace as with_

        m1_b = np.empty((len(W), prep.n_strata + 1))
        m0_b = np.empty_like(m1_b)
        for i, w in enumerate(W):
            rep = estimator(with_(prep, w=w), bspec)
            m1_b[i], m0_b[i] = rep.m1, rep.m0
        theta_b = None
    gm.notes.append(
        f"Bootstrap in {src.engine}: {spec.n_boot:,} Poisson-weighted replicates (every row a Poisson(1) "
        "frequency), each cell's replicate mean summed exactly in the engine; percentile intervals.")
    return _finish(prep, bspec, ins, gm, (m1_b, m0_b), theta_b)


def _finish(prep, spec: Spec, ins, gm, replicates, theta_b) -> Analysis:
    """The effects table, the Analysis fields and the extension steps, as :func:`stratagem.analyze`."""
    from ..analysis import _effects_table, _extension, extensions

    frame = _effects_table(prep, spec, gm, replicates, theta_b)
    strata = frame.iloc[:-1].reset_index(drop=True) if spec.strata else frame.iloc[0:0]
    overall = frame.iloc[-1][OVERALL_FIELDS].rename("overall")
    fields = dict(
        spec=spec, overall=overall, strata=strata, notes=tuple(prep.notes) + tuple(gm.notes),
        n_input=ins.n_input, n_dropped=ins.n_input - ins.n_kept,
        extra={"replicates": replicates, "replicate_theta": theta_b, "bin_edges": dict(prep.bin_edges),
               "covariance": {"v11": gm.v11, "v00": gm.v00, "v10": gm.v10}, **gm.extra},
    )
    for path in extensions:
        step = _extension(path)
        if step is not None:
            fields.update(step(prep, spec, gm, fields))
    return Analysis(**fields)


def _cell_balance(table: pd.DataFrame, cspec: Spec, des, cell_sums: pd.DataFrame, n_cells: int) -> list:
    """Standardized mean differences per stratum from the design sums of the table of counts' cells
    (the first ``n_cells`` rows of ``table``; a numeric outcome's table repeats them once more)."""
    prep, _ = fr.prepare(table, cspec.replace(method="crude", interval="wald"))
    k, p = prep.n_strata, len(des.exprs)
    stratum, a = prep.stratum[:n_cells], prep.a[:n_cells]
    n = table[counts.COUNT].to_numpy(float)[:n_cells] * (1.0 if n_cells == len(table) else 2.0)

    def per_stratum(v):
        return np.bincount(stratum, weights=v, minlength=k)

    d = cell_sums[[f"d{j}" for j in range(p)]].to_numpy(float)
    q = cell_sums[[f"q{j}" for j in range(p)]].to_numpy(float)
    sums = {"sw": per_stratum(n), "swa": per_stratum(n * a),
            "d": np.column_stack([per_stratum(d[:, j]) for j in range(p)]) if p else np.zeros((k, 0)),
            "da": np.column_stack([per_stratum(a * d[:, j]) for j in range(p)]) if p else np.zeros((k, 0)),
            "qq": np.column_stack([per_stratum(q[:, j]) for j in range(p)]) if p else np.zeros((k, 0)),
            "qa": np.column_stack([per_stratum(a * q[:, j]) for j in range(p)]) if p else np.zeros((k, 0))}
    return balance.balance(des, sums)


def _engine_diagnostics(result: Analysis, src, ins) -> pd.DataFrame:
    """The arm sizes of the in-memory Checks, the propensity and weight checks computed in the
    engine (model-based methods), and a row saying where the data lives and how much was scanned."""
    diag = result.diagnostics
    if diag is None or len(diag) == 0:
        diag = pd.DataFrame(columns=DIAGNOSTIC_COLUMNS)
    keep = diag[diag["check"] == "n"]
    extra_rows = []
    checks = result.extra.get("engine_checks")
    names = list(result.strata["stratum"]) if len(result.strata) else ["all"]
    if checks is not None and len(checks):
        from ..diagnostics import ESS_SHARE, PROPENSITY_LIMITS

        arms = (("exposed", "1"), ("unexposed", "0"))
        whole = {c: (checks[c].min() if c.startswith("emin") else checks[c].max() if "max" in c
                     else checks[c].sum()) for c in checks.columns}
        for s, label in enumerate(names + ["overall"]):  # the rows and order of diagnostics.py
            row = checks.iloc[s] if s < len(names) else pd.Series(whole)
            n_arm = {arm: keep[(keep["stratum"] == label) & (keep["arm"] == arm)]["value"] for arm, _ in arms}
            n_arm = {arm: float(v.iloc[0]) if len(v) else np.nan for arm, v in n_arm.items()}
            for arm, j in arms:
                lo, hi = float(row[f"emin{j}"]), float(row[f"emax{j}"])
                extra_rows.append((label, "propensity min", arm, lo,
                                   f"propensities below {PROPENSITY_LIMITS[0]} in the {arm} arm: positivity "
                                   "doubtful" if lo < PROPENSITY_LIMITS[0] else ""))
                extra_rows.append((label, "propensity max", arm, hi,
                                   f"propensities above {PROPENSITY_LIMITS[1]} in the {arm} arm: positivity "
                                   "doubtful" if hi > PROPENSITY_LIMITS[1] else ""))
            outside = float(row["out_s"]) if s < len(names) else float(checks["out_all"].sum())
            extra_rows.append((label, "outside common support", "all", outside / sum(n_arm.values()), ""))
            if "swmax1" in checks:
                ess = {}
                for arm, j in arms:
                    s1, s2 = float(row[f"sws{j}"]), float(row[f"swss{j}"])
                    ess[arm] = s1 * s1 / s2 if s2 > 0 else np.nan
                    extra_rows.append((label, "largest weight", arm, float(row[f"swmax{j}"]), ""))
                for arm, _ in arms:
                    extra_rows.append((label, "effective sample size", arm, ess[arm],
                                       f"effective sample size under {ESS_SHARE:.0%} of the {arm} arm's rows: "
                                       "a few rows carry most of the weight" if ess[arm] < ESS_SHARE * n_arm[arm]
                                       else ""))
    balance = result.extra.get("engine_balance") or []
    if balance:
        from ..diagnostics import BOTH, SMD_LIMIT

        for s, label in enumerate(names + ["overall"]):
            for term, before, after in balance:
                extra_rows.append((label, f"smd before: {term}", BOTH, float(before[s]), ""))
                if after is not None:
                    bad = np.isfinite(after[s]) and abs(after[s]) > SMD_LIMIT
                    extra_rows.append((label, f"smd after: {term}", BOTH, float(after[s]),
                                       f"imbalance in {term} remains after weighting (|SMD| > {SMD_LIMIT})"
                                       if bad else ""))
    # where the data lives: facts, not warnings (the warning column stays empty)
    extra_rows.append(("overall", f"rows scanned in {src.engine} (the data stays there)", "all",
                       float(ins.n_input), ""))
    extra_rows.append(("overall", f"full scans in {src.engine}", "all", float(src.scans), ""))
    more = pd.DataFrame(extra_rows, columns=DIAGNOSTIC_COLUMNS)
    table = pd.concat([keep, more], ignore_index=True)[DIAGNOSTIC_COLUMNS]
    order = {label: i for i, label in enumerate(names + ["overall"])}  # group by group, as in memory
    rank = table["stratum"].map(order).fillna(len(order)).to_numpy()
    return table.iloc[np.argsort(rank, kind="stable")].reset_index(drop=True)


def _engine_heterogeneity(result: Analysis, spec: Spec) -> pd.DataFrame:
    """The in-memory tests, except the confounder-adjusted likelihood-ratio test, which would refit
    the working model on every row: it is left out (NaN) with a note, as for large tables in memory."""
    het = result.heterogeneity
    if het is None or spec.method not in MODEL_METHODS + ("mantel-haenszel",) or not spec.confounders:
        return het
    het = het.copy()
    at = het["test"] == "interaction_lr"
    het.loc[at, ["statistic", "p_value"]] = np.nan
    het.loc[at, "note"] = ("not computed: the table lives in an engine, where refitting the working model "
                           "with confounders would scan every row again; see interaction_wald")
    return het


def modifier_summaries(data: Any, columns, *, max_levels: int = 20) -> dict:
    """:func:`stratagem.frame.modifier_summary` for several columns of an engine table, in one scan.

    Parameters
    ----------
    data : DuckDB relation, Parquet path or Spark DataFrame
    columns : sequence of str
    max_levels : int
        Text columns with more levels than this cannot be modifiers.

    Returns
    -------
    dict
        Column name -> ``{"ok", "kind", "tag", "reason"}``, worded as for a pandas DataFrame. The
        distinct non-missing values are counted by the engine (one grouped-free aggregate query);
        whether a column is numeric comes from the table's schema.
    """
    from .. import frame as fr_
    from .sql import fmt, join

    src = data if hasattr(data, "kinds") else source_for(data)
    columns = list(columns)
    missing = [c for c in columns if c not in src.columns]
    if missing:
        from ..errors import ColumnNotFoundError

        raise ColumnNotFoundError(
            f"Column {missing[0]!r} is not in the data. Columns are: {src.columns[:12]}. Pass one of these names."
        )
    out = {}
    if not columns:
        return out
    items = []
    for i, c in enumerate(columns):
        col = src.dialect.ident(c)
        if src.kinds[c] == "float":  # NaN is missing, as in pandas
            col = fmt("CASE WHEN NOT {} THEN {} END", src.dialect.isnan(col), col)
        items.append(fmt("COUNT(DISTINCT {}) AS d" + str(i), col))
    got = src.run(fmt("SELECT {} FROM {}", join(", ", items), src.table)).iloc[0]
    for i, c in enumerate(columns):
        n_distinct = int(got[f"d{i}"])
        kind = src.kinds[c]
        numeric = kind in ("numeric", "float")
        if kind == "other":
            out[c] = {"ok": False, "kind": "other", "tag": src.types[c],
                      "reason": f"has the {src.engine} type {src.types[c]}, which cannot form strata"}
        elif n_distinct < 2:
            out[c] = {"ok": False, "kind": "constant", "tag": "constant", "reason": "has a single value"}
        elif numeric and n_distinct > fr_.BIN_THRESHOLD:
            out[c] = {"ok": True, "kind": "numeric", "tag": f"numeric · {fr_.DEFAULT_BINS} bins", "reason": ""}
        elif not numeric and kind != "bool" and n_distinct > max_levels:
            out[c] = {"ok": False, "kind": "many", "tag": f"{n_distinct} levels",
                      "reason": f"has {n_distinct} levels (more than {max_levels}); group them first"}
        else:
            out[c] = {"ok": True, "kind": "levels", "tag": f"{n_distinct} levels", "reason": ""}
    return out


def modifier_summary(data: Any, column: str, *, max_levels: int = 20) -> dict:
    """:func:`stratagem.frame.modifier_summary` for one column of an engine table (one query)."""
    return modifier_summaries(data, [column], max_levels=max_levels)[column]
