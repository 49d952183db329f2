"""The table of counts of crude and Mantel-Haenszel, built by one grouped query in the engine.

Per combination of modifier levels (or bins), exposure, outcome (0/1 outcome) and, for
Mantel-Haenszel, confounder levels, the query returns the sum of the frequencies. For a numeric outcome
each group returns the frequency, the sum of the centred outcome and of its square; :func:`moment_rows`
turns each group into two rows with half the frequency at ``mean +- sd`` (population sd), which keep
the group's frequency, mean and sum of squares exactly: all that the crude and Mantel-Haenszel
estimators use. The in-memory estimators then run on this small table, so the numbers are the
in-memory ones. :func:`poisson_cells` gives the same cells' Poisson-bootstrap replicates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..estimate.mantel_haenszel import CONFOUNDER_BINS, LEVEL_THRESHOLD, binning_note
from ..spec import Spec
from .checks import Inspection, _quantile_edges
from .design import _Design
from .expressions import _as_double, _col, _searchsorted_right, _select
from .replicates import _ranked, _with_replicates
from .sql import fmt, raw, value

COUNT = "__stratagem_count__"  # frequency column of the table of counts (never a user column)


def _mh_keys(src, spec: Spec, ins: Inspection):
    """Grouping expressions of the confounders for Mantel-Haenszel, and notes of binned ones."""
    out, notes = [], []
    for name in spec.confounders:
        if src.kinds[name] in ("numeric", "float") and ins.distinct[name] > LEVEL_THRESHOLD:
            # as mantel_haenszel does: quantiles of the rows weighted by their frequencies
            q = _quantile_edges(src, spec, name, ins.where, np.linspace(0, 1, CONFOUNDER_BINS + 1))
            inner = np.unique(q)[1:-1]
            out.append((name, _searchsorted_right(_as_double(src, name), inner)))
            notes.append(binning_note(name, ins.distinct[name], inner))
        else:
            out.append((name, _col(src, name)))
    return out, notes


def _cell_columns(src, spec: Spec, ins: Inspection, *, confounders: bool):
    """Row columns of the table of counts' scan and the names it groups by: modifier keys ``k*``,
    exposure ``e``, Mantel-Haenszel confounder keys ``c*``, outcome ``y`` (a numeric outcome centred,
    and not grouped) and frequency ``w``. Returns ``(columns, group names, confounder keys, notes)``."""
    inner = [(f"k{i}", expr) for i, (_, expr, _, _) in enumerate(ins.keys)]
    inner.append(("e", _col(src, spec.exposure)))
    mh, notes = _mh_keys(src, spec, ins) if confounders else ([], [])
    inner += [(f"c{i}", expr) for i, (_, expr) in enumerate(mh)]
    groups = [a for a, _ in inner]
    y = _as_double(src, spec.outcome)
    if ins.binary:
        inner.append(("y", _col(src, spec.outcome)))
        groups.append("y")
    else:
        inner.append(("y", fmt("({} - {})", y, value(ins.centre))))
    inner.append(("w", _as_double(src, spec.counts) if spec.counts else raw("1.0")))
    return inner, groups, mh, notes


def poisson_cells(src, spec: Spec, ins: Inspection, table: pd.DataFrame, *, confounders: bool):
    """Poisson-bootstrap replicates of the table of counts of a numeric outcome, in one scan.

    Every row gets a Poisson(1) frequency per replicate (as :func:`poisson_replicates`), and each
    cell's replicate frequency and sum of the centred outcome are summed in the engine, so each
    replicate's cell means are exact (no linearisation): crude and Mantel-Haenszel use nothing else
    to estimate. Returns ``(n, sy)``, arrays (n_boot, cells) in the row order of ``table`` (the
    table of :func:`cell_table`, before :func:`moment_rows`).
    """
    inner, groups, _, _ = _cell_columns(src, spec, ins, confounders=confounders)
    names = [a for a, _ in inner]
    body = _with_replicates(src, _ranked(src, inner, ins.where), names, spec.n_boot, spec.seed,
                            keep=groups + ["y", "w"])
    g = ", ".join(groups + ["b"])
    got = src.run(fmt("SELECT " + g + ", SUM(pw * w) AS n, SUM(pw * w * y) AS sy FROM ({}) p GROUP BY "
                      + g, body))
    index = {}
    key_cols = [table[c].to_numpy() for c in table.columns[:len(groups)]]
    for i in range(len(table)):
        index[tuple(_plain(col[i]) for col in key_cols)] = i
    # the table of counts shows a binned modifier by its left edge; the scan groups by bin number
    shown = []
    for i, (_, _, edges, _) in enumerate(ins.keys):
        col = got[f"k{i}"]
        shown.append(np.asarray(edges)[col.to_numpy(int)] if edges is not None else col.to_numpy())
    shown += [got[c].to_numpy() for c in groups[len(ins.keys):]]
    rows = np.array([index[tuple(_plain(col[r]) for col in shown)] for r in range(len(got))], dtype=np.int64)
    n = np.zeros((spec.n_boot, len(table)))
    sy = np.zeros((spec.n_boot, len(table)))
    b = got["b"].to_numpy(int)
    n[b, rows] = got["n"].to_numpy(float)
    sy[b, rows] = got["sy"].to_numpy(float)
    return n, sy


def _plain(v):
    """A cell key as a hashable plain value (numpy scalars and NaN-free floats compare equal)."""
    return v.item() if hasattr(v, "item") else v


def cell_table(src, spec: Spec, ins: Inspection, *, confounders: bool, des: _Design | None = None
               ) -> tuple[pd.DataFrame, list, pd.DataFrame | None]:
    """The table of counts: one row per observed cell, with the frequency in column :data:`COUNT`.

    Columns: the modifiers (bins as their left edge), the exposure, the outcome (0/1 outcome) or
    ``__s1``/``__s2`` (sums of the centred outcome and its square), the confounders' levels when
    ``confounders`` (Mantel-Haenszel), and :data:`COUNT`. With a confounder design ``des``, the same
    scan also sums every design column ``u_j = x_j - shift_j`` and its square per cell (for the
    balance checks): returned as a third table, row for row with the first, columns ``d{j}``, ``q{j}``.
    Returns ``(table, notes, sums or None)``.
    """
    inner, groups, mh, notes = _cell_columns(src, spec, ins, confounders=confounders)
    aggs = "SUM(w) AS n" + ("" if ins.binary else ", SUM(w * y) AS s1, SUM(w * y * y) AS s2")
    p = len(des.exprs) if des is not None else 0
    for j in range(p):
        inner.append((f"u{j}", fmt("({} - {})", des.exprs[j], value(float(des.shifts[j])))))
        aggs += f", SUM(w * u{j}) AS d{j}, SUM(w * u{j} * u{j}) AS q{j}"
    g = ", ".join(groups)
    # ORDER BY: the engine returns groups in any order (threads); a fixed order keeps seeded
    # bootstrap draws over the cells reproducible.
    q = fmt("SELECT " + g + ", " + aggs + " FROM (SELECT {} FROM {} WHERE {}) t GROUP BY " + g
            + " ORDER BY " + g, _select(inner), src.table, ins.where)
    got = src.run(q)
    out = pd.DataFrame()
    for i, (name, _, edges, _) in enumerate(ins.keys):
        col = got[f"k{i}"]
        out[name] = np.asarray(edges)[col.to_numpy(int)] if edges is not None else col.to_numpy()
    out[spec.exposure] = got["e"].to_numpy()
    for i in range(len(mh)):
        out[confounder_alias(i)] = got[f"c{i}"].to_numpy()  # a modifier may be a confounder too
    if ins.binary:
        out[spec.outcome] = got["y"].to_numpy()
    else:
        out["__s1"] = got["s1"].to_numpy(float)
        out["__s2"] = got["s2"].to_numpy(float)
    out[COUNT] = got["n"].to_numpy(float)
    sums = got[[f"{c}{j}" for j in range(p) for c in ("d", "q")]].astype(float) if des is not None else None
    return out, notes, sums


def confounder_alias(i: int) -> str:
    """Column name of the ``i``-th confounder in the table of counts (never a user column)."""
    return f"__stratagem_confounder_{i}__"


def moment_rows(table: pd.DataFrame, outcome: str, centre: float) -> pd.DataFrame:
    """Two rows per group of a numeric outcome, frequency ``n / 2`` each at ``mean +- sd``.

    They keep each group's frequency ``n``, mean and sum of squared deviations ``n sd^2`` exactly, so
    every estimator that uses only those (crude, Mantel-Haenszel) gives the group's numbers.
    """
    n = table[COUNT].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(n > 0, table["__s1"].to_numpy(float) / n, 0.0)
        ss = np.maximum(table["__s2"].to_numpy(float) - n * mean * mean, 0.0)
        sd = np.where(n > 0, np.sqrt(ss / n), 0.0)
    base = table.drop(columns=["__s1", "__s2"])
    lo, hi = base.copy(), base.copy()
    lo[outcome], hi[outcome] = centre + mean - sd, centre + mean + sd
    lo[COUNT] = hi[COUNT] = n / 2.0
    return pd.concat([lo, hi], ignore_index=True)
