"""Aggregate passes shared by the engines: checks, counts per cell, and the model fits.

Every function here reads the table only through :meth:`Source.run` with SQL built by :mod:`.sql`,
and brings back small aggregates (one row per stratum, cell or level). The passes are:

1. **Checks** (:func:`inspect`): column names and types from the schema (no rows read), then one query
   counting missing values per used column and one over the complete rows (distinct counts, ranges,
   whether the outcome is 0/1, the smallest frequency). Bad input raises the same
   :class:`~stratagem.errors.StratagemError` subclasses, with the same messages, as for pandas, before
   any heavy query runs.
2. **Cells** (:func:`cell_table`): one grouped query giving, per combination of modifier levels (or
   bins), exposure, outcome (0/1 outcome) and, for Mantel-Haenszel, confounder levels, the sum of the
   frequencies. For a numeric outcome each group returns the frequency, the sum of the centred outcome
   and of its square; :func:`moment_rows` turns each group into two rows with half the frequency at
   ``mean +- sd`` (population sd), which have exactly the group's frequency, mean and sum of squares,
   all that the crude and Mantel-Haenszel estimators use. The in-memory estimators then run on this
   small table of counts, so the numbers are the in-memory ones.
3. **Models** (:func:`model_means`): standardization, IPW and AIPW, fitted per stratum by Newton/IRLS
   in which every iteration is one grouped query returning ``X'WX`` and ``X'W(z)`` per stratum for the
   propensity and the outcome model at once; then one query for the potential-outcome means and the
   derivatives the influence functions need, and one for the influence-function variances.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import frame as fr
from ..errors import (
    DataError,
    MissingValuesError,
    ModifierError,
    OutcomeError,
)
from ..estimate import glm
from ..estimate._adjust import dropped_notes
from ..estimate.base import OK, GroupMeans
from ..estimate.design import _levels, independent_from_covariance
from ..estimate.mantel_haenszel import CONFOUNDER_BINS, LEVEL_THRESHOLD, binning_note
from ..spec import Spec
from . import sql
from .sql import Frag, fmt, join, raw, value

__all__ = ["Inspection", "inspect", "cell_table", "moment_rows", "model_means", "MAX_LEVELS_FETCHED"]

MAX_LEVELS_FETCHED = 1000  # distinct values brought back to label levels or to word an error
COUNT = "__stratagem_count__"  # frequency column of the table of counts (never a user column)


# -- expressions --------------------------------------------------------------------------------

def _col(src, name: str) -> Frag:
    return src.dialect.ident(name)


def _as_double(src, name: str) -> Frag:
    if src.kinds[name] == "bool":
        return fmt("(CASE WHEN {} THEN 1.0 ELSE 0.0 END)", _col(src, name))
    return fmt("CAST({} AS DOUBLE)", _col(src, name))


def _missing(src, name: str) -> Frag:
    c = _col(src, name)
    if src.kinds[name] == "float":
        return fmt("({} IS NULL OR {})", c, src.dialect.isnan(c))
    return fmt("({} IS NULL)", c)


def _case_codes(expr: Frag, values) -> Frag:
    """``CASE WHEN expr = v0 THEN 0 WHEN expr = v1 THEN 1 ... END`` (values as parameters)."""
    parts = [fmt("WHEN {} = {} THEN {}", expr, value(v), value(i)) for i, v in enumerate(values)]
    return fmt("(CASE {} END)", join(" ", parts))


def _bin_index(expr: Frag, edges) -> Frag:
    """Index of the bin of ``edges`` holding ``expr``, as ``frame``'s binning: [e_i, e_i+1), last closed."""
    inner = list(edges[1:-1])
    if not inner:
        return raw("0")
    parts = [fmt("WHEN {} < {} THEN {}", expr, value(float(e)), value(i)) for i, e in enumerate(inner)]
    return fmt("(CASE {} ELSE {} END)", join(" ", parts), value(len(inner)))


def _searchsorted_right(expr: Frag, inner) -> Frag:
    """Number of cut points ``<= expr`` (``np.searchsorted(inner, x, side="right")``)."""
    if len(inner) == 0:
        return raw("0")
    parts = [fmt("WHEN {} < {} THEN {}", expr, value(float(e)), value(i)) for i, e in enumerate(inner)]
    return fmt("(CASE {} ELSE {} END)", join(" ", parts), value(len(inner)))


def _expit(eta: Frag) -> tuple[Frag, Frag]:
    """``expit(eta) = 1 / (1 + exp(-eta))`` and ``1 - expit(eta) = 1 / (1 + exp(eta))``.

    Each is accurate to a few units in the last place for every ``eta``: an overflowing ``exp`` gives
    infinity in both engines, hence exactly 0. No ``CASE``: DuckDB merges the layered projections
    and cannot share a conditional expression between the many sums that use it, which made each
    Newton scan several times slower.
    """
    return fmt("(1.0 / (1.0 + EXP(-{})))", eta), fmt("(1.0 / (1.0 + EXP({})))", eta)


def _select(items: list[tuple[str, Frag]]) -> Frag:
    return join(", ", [fmt("{} AS " + alias, e) for alias, e in items])


# -- pass 1: checks -----------------------------------------------------------------------------

@dataclass
class Inspection:
    """What the checks found: row counts, the outcome's type, modifier binning, confounder levels."""

    n_input: int
    n_kept: int
    notes: list
    where: Frag
    binary: bool
    centre: float
    keys: list  # per modifier: (name, expr, edges or None, note or None)
    distinct: dict = field(default_factory=dict)
    ranges: dict = field(default_factory=dict)
    zero_one: dict = field(default_factory=dict)  # numeric confounders holding only 0 and 1


def _used(spec: Spec) -> list[str]:
    return list(dict.fromkeys(name for _, name in fr._used_columns(spec)))


def _check_schema(src, spec: Spec) -> None:
    dup = sorted({c for c in src.columns if src.columns.count(c) > 1})
    if dup:
        raise DataError(f"Column names {dup} appear more than once; rename them so each is unique.")
    fr._check_columns(pd.DataFrame(columns=src.columns), spec)
    for role, name in fr._used_columns(spec):
        kind = src.kinds[name]
        if kind == "other":
            raise DataError(
                f"Column {name!r} (given as {role}) has the {src.engine} type {src.types[name]}, which "
                "stratagem cannot analyse. Cast it to a number, a boolean or text in the query first."
            )
        if role == "counts" and kind not in ("numeric", "float"):
            raise DataError(
                f"counts column {spec.counts!r} must hold non-negative numbers (frequencies); "
                "fix or remove it."
            )


def _distinct(src, name: str, where: Frag, limit: int = MAX_LEVELS_FETCHED + 1) -> list:
    c = _col(src, name)
    q = fmt("SELECT DISTINCT {} AS v FROM {} WHERE {} LIMIT " + str(int(limit)), c, src.table, where)
    got = src.run(q)
    return list(got["v"]) if len(got) else []


def inspect(src, spec: Spec, *, confounder_levels: bool) -> Inspection:
    """Checks of the table against the Spec: the same errors as :func:`stratagem.frame.prepare`."""
    _check_schema(src, spec)
    used = _used(spec)
    where = join(" AND ", [fmt("NOT {}", _missing(src, c)) for c in used])

    def complete(expr: Frag) -> Frag:  # the value on complete rows, NULL (ignored by aggregates) otherwise
        return fmt("(CASE WHEN __complete THEN {} END)", expr)

    # One scan for the missing values per used column and the sums over the complete rows, another
    # for the distinct counts: DuckDB runs a query mixing DISTINCT and plain aggregates several times
    # slower than the two apart (10 s against 2 s on 100 million rows).
    items = [("n_input", raw("COUNT(*)"))]
    items += [(f"m{i}", fmt("SUM(CASE WHEN {} THEN 1 ELSE 0 END)", _missing(src, c))) for i, c in enumerate(used)]
    items.append(("n_kept", raw("SUM(CASE WHEN __complete THEN 1 ELSE 0 END)")))
    y = _as_double(src, spec.outcome) if src.kinds[spec.outcome] != "string" else None
    w = _as_double(src, spec.counts) if spec.counts else raw("1.0")
    if y is not None:
        items += [
            ("y_not01", fmt("SUM({})", complete(fmt("CASE WHEN {} = 0.0 OR {} = 1.0 THEN 0 ELSE 1 END", y, y)))),
            ("y_inf", fmt("SUM({})", complete(fmt("CASE WHEN ABS({}) = {} THEN 1 ELSE 0 END", y, value(float("inf")))))),
            ("sw", fmt("SUM({})", complete(w))),
            ("swy", fmt("SUM({})", complete(fmt("{} * {}", w, y)))),
        ]
    if spec.counts:
        items.append(("w_min", fmt("MIN({})", complete(w))))
    numeric_names = [c for c in list(spec.strata) + list(spec.confounders)
                     if src.kinds[c] in ("numeric", "float")]
    for i, c in enumerate(list(spec.strata) + list(spec.confounders)):
        if c in numeric_names:
            x = complete(_as_double(src, c))
            items += [(f"lo{i}", fmt("MIN({})", x)), (f"hi{i}", fmt("MAX({})", x)),
                      (f"nb{i}", fmt("SUM(CASE WHEN {} = 0.0 OR {} = 1.0 THEN 0 ELSE 1 END)", x, x))]
    flagged = fmt("SELECT *, ({}) AS __complete FROM {}", where, src.table)
    stats = src.run(fmt("SELECT {} FROM ({}) t", _select(items), flagged)).iloc[0]
    n_input = int(stats["n_input"])
    miss = {c: int(stats[f"m{i}"] or 0) for i, c in enumerate(used)}
    bad = {k: v for k, v in miss.items() if v}
    notes = []
    if bad:
        described = ", ".join(f"{k!r}: {v}" for k, v in bad.items())
        if spec.missing == "raise":
            raise MissingValuesError(
                f"Missing values in used columns ({described}). Fill or remove them, "
                "or pass missing='drop' to analyse complete rows only."
            )
    # distinct counts (a costly hash per column) only where they decide something: the exposure,
    # modifiers, text confounders, and numeric confounders of Mantel-Haenszel (binned when they have
    # many values)
    counted = set(spec.strata) | {c for c in spec.confounders
                                  if c not in numeric_names or spec.method == "mantel-haenszel"}
    items = [("n_exp", fmt("COUNT(DISTINCT {})", _col(src, spec.exposure)))]
    for i, c in enumerate(list(spec.strata) + list(spec.confounders)):
        if c in counted and spec.counts and c in numeric_names and c not in spec.strata:
            # as mantel_haenszel: values of rows with a positive frequency
            items.append((f"d{i}", fmt("COUNT(DISTINCT CASE WHEN {} > 0 THEN {} END)", w, _col(src, c))))
        elif c in counted:
            items.append((f"d{i}", fmt("COUNT(DISTINCT {})", _col(src, c))))
    if int(stats["n_kept"] or 0) > 0:
        stats = pd.concat([stats, src.run(fmt("SELECT {} FROM {} WHERE {}", _select(items), src.table,
                                              where)).iloc[0]])
    n_kept = int(stats["n_kept"] or 0)
    if bad:
        notes.append(f"{n_input - n_kept} row(s) with missing values dropped "
                     f"({', '.join(f'{k!r}: {v}' for k, v in bad.items())}).")
    if n_kept == 0:
        raise DataError(
            "No complete rows to analyse"
            + (" after dropping rows with missing values" if n_input else "")
            + ". Check the columns named in the analysis."
        )
    if spec.counts and float(stats["w_min"]) < 0:
        raise DataError(
            f"counts column {spec.counts!r} must hold non-negative numbers (frequencies); fix or remove it."
        )
    if int(stats["n_exp"]) > 2:
        levels = _distinct(src, spec.exposure, where)
        if len(levels) <= MAX_LEVELS_FETCHED:
            fr._code_exposure(pd.Series(levels), spec)  # raises the in-memory error
        raise fr.ExposureError(
            f"Exposure {spec.exposure!r} must be binary (0/1, True/False, or two levels with "
            f"exposed_level=); found {int(stats['n_exp'])} levels. Recode it to two levels."
        )
    if y is None:
        levels = _distinct(src, spec.outcome, where, limit=10)
        raise OutcomeError(
            f"Outcome {spec.outcome!r} is not numeric (levels: {sorted(map(repr, levels))[:10]}). Recode "
            "it as 0/1 for a binary outcome, or as numbers for a numeric outcome."
        )
    if int(stats["y_inf"] or 0):
        raise OutcomeError(f"Outcome {spec.outcome!r} has infinite values; remove or recode those rows.")
    binary = int(stats["y_not01"] or 0) == 0
    sw = float(stats["sw"] or 0.0)
    centre = float(stats["swy"]) / sw if sw > 0 else 0.0
    distinct, ranges, zero_one = {}, {}, {}
    for i, c in enumerate(list(spec.strata) + list(spec.confounders)):
        if c in counted:
            distinct[c] = int(stats[f"d{i}"])
        if c in numeric_names:
            ranges[c] = (float(stats[f"lo{i}"]), float(stats[f"hi{i}"]))
            zero_one[c] = int(stats[f"nb{i}"] or 0) == 0
    keys = [_modifier_key(src, spec, name, where, distinct[name], ranges.get(name)) for name in spec.strata]
    return Inspection(n_input, n_kept, notes, where, binary, centre, keys, distinct, ranges, zero_one)


def _quantile_edges(src, spec: Spec, name: str, where: Frag, probs) -> np.ndarray:
    x = _as_double(src, name)
    if spec.counts is None:  # exact quantiles in the engine (linear interpolation, as numpy's default)
        items = [(f"q{i}", src.dialect.quantile(x, q)) for i, q in enumerate(probs)]
        got = src.run(fmt("SELECT {} FROM {} WHERE {}", _select(items), src.table, where)).iloc[0]
        return np.array([float(got[f"q{i}"]) for i in range(len(probs))])
    # with frequencies: the distinct values and their total frequency, then frame's weighted quantiles
    w = _as_double(src, spec.counts)
    got = src.run(fmt("SELECT {} AS v, SUM({}) AS n FROM {} WHERE {} GROUP BY {}", x, w, src.table, where, x))
    return fr._quantiles(got["v"].to_numpy(float), got["n"].to_numpy(float), np.asarray(probs))


def _modifier_key(src, spec: Spec, name: str, where: Frag, n_distinct: int, rng):
    """(name, grouping expression, bin edges or None, note or None) for one modifier."""
    rule = spec.bins.get(name)
    if src.kinds[name] in ("numeric", "float"):
        if rule is None and n_distinct > fr.BIN_THRESHOLD:
            rule = fr.DEFAULT_BINS
        if rule is None:
            return name, _col(src, name), None, None
        edges, how = fr.bin_edges(
            name, rule, lambda probs: _quantile_edges(src, spec, name, where, probs), *rng
        )
        expr = _bin_index(_as_double(src, name), edges)
        return name, expr, tuple(float(e) for e in edges), f"Modifier {name!r} cut into {how}."
    if rule is not None:
        raise ModifierError(f"bins were given for {name!r}, which is not numeric; remove its entry from bins=.")
    if n_distinct > spec.max_levels:
        raise ModifierError(
            f"Modifier {name!r} has {n_distinct} levels, more than max_levels={spec.max_levels}. "
            "Group its levels into fewer, or raise max_levels=."
        )
    return name, _col(src, name), None, None


# -- pass 2: the table of counts ----------------------------------------------------------------

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


def _ranked(src, row_cols: list, where: Frag) -> Frag:
    """The rows' columns plus ``rn``, each row's rank among rows with the same values: with the
    values, a name for the row that does not depend on the order the engine reads the rows in."""
    cols = ", ".join(a for a, _ in row_cols)
    body = fmt("SELECT {} FROM {} WHERE {}", _select(row_cols), src.table, where)
    return fmt("SELECT *, ROW_NUMBER() OVER (PARTITION BY " + cols + " ORDER BY " + cols + ") AS rn "
               "FROM ({}) r0", body)


def _with_replicates(src, body: Frag, row_names: list, n_boot: int, seed: int, keep: list) -> Frag:
    """``body`` crossed with the replicate numbers ``b``; each row of each replicate gets a Poisson(1)
    frequency ``pw`` from a hash of its values, ``rn``, ``b`` and ``seed`` (see
    :func:`poisson_replicates`). Keeps the columns ``keep`` (as named in ``body``) and ``b``."""
    u = src.dialect.uniform([raw("t." + c) for c in row_names] + [raw("t.rn"), raw("rb.b"), value(int(seed))])
    kept = ", ".join(f"t.{c} AS {c}" for c in keep)
    draws = fmt("SELECT " + kept + ", rb.b AS b, {} AS u FROM ({}) t CROSS JOIN ({}) rb", u, body,
                src.dialect.replicate_numbers(n_boot))
    return fmt("SELECT " + ", ".join(keep) + ", b, {} AS pw FROM ({}) d", _poisson_weight(raw("u")), draws)


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


# -- pass 3: model-based estimators -------------------------------------------------------------

@dataclass
class _Design:
    exprs: list  # raw design column expressions
    names: list
    notes: list
    shifts: list  # a value inside each column's range (mid-range; 0 for indicators), for stable sums
    terms: list = field(default_factory=list)  # balance terms: (label, kind, design columns), see balance


def design(src, spec: Spec, ins: Inspection) -> _Design:
    """Design columns of the confounders, coded as :func:`stratagem.estimate.design.confounder_design`."""
    exprs, names, notes, shifts, terms = [], [], [], [], []
    for col in spec.confounders:
        if src.kinds[col] in ("numeric", "float"):
            lo, hi = ins.ranges[col]
            if lo == hi:
                notes.append(f"Confounder {col!r} is constant and was dropped.")
                terms.append((str(col), "constant", []))
                continue
            terms.append((str(col), "binary" if ins.zero_one.get(col) else "numeric", [len(exprs)]))
            exprs.append(_as_double(src, col))
            names.append(str(col))
            shifts.append((lo + hi) / 2.0)
            continue
        found = _distinct(src, col, ins.where)
        if len(found) > MAX_LEVELS_FETCHED:
            raise DataError(
                f"Confounder {col!r} has more than {MAX_LEVELS_FETCHED} levels; group its levels or "
                "code it as a number before analysing it in an engine."
            )
        levels = _levels(pd.Series(found))
        if len(levels) < 2:
            notes.append(f"Confounder {col!r} has a single level and was dropped.")
            continue
        first = len(exprs)
        for level in levels[1:]:
            exprs.append(fmt("(CASE WHEN {} = {} THEN 1.0 ELSE 0.0 END)", _col(src, col), value(level)))
            names.append(f"{col}={level}")
            shifts.append(0.0)
        terms.append((f"{col}={levels[0]}", "reference", list(range(first, len(exprs)))))
        terms += [(f"{col}={level}", "binary", [first + i]) for i, level in enumerate(levels[1:])]
    return _Design(exprs, names, notes, shifts, terms)


class StratumTable:
    """Per-stratum values for one query, joined to the rows on the modifier keys.

    A coefficient or constant that differs by stratum is written into a small inline table
    (``VALUES`` with one row per combination of modifier levels: the keys, the stratum number ``s``
    and one column per per-stratum vector, all as bound parameters) and joined to the rows, so each
    row reads its stratum's values by one hash join instead of evaluating one ``CASE`` over the strata
    per coefficient. With no modifiers there is one stratum and each value is a plain parameter.
    """

    def __init__(self, keys_to_stratum: dict, n_keys: int):
        self.keys = keys_to_stratum
        self.n_keys = n_keys
        self.columns: list = []

    def column(self, values) -> Frag:
        """The column holding ``values[s]`` on each row (identical vectors share a column)."""
        values = np.asarray(values, dtype=float)
        if self.n_keys == 0:
            return value(float(values[0]))
        for i, known in enumerate(self.columns):
            if np.array_equal(known, values, equal_nan=True):
                return raw(f"sv{i}")
        self.columns.append(values)
        return raw(f"sv{len(self.columns) - 1}")

    def joined(self, body: Frag) -> Frag:
        """``body`` (rows with key columns ``k0, k1, ...``) joined to the table: adds ``s`` and ``sv*``."""
        if self.n_keys == 0:
            return body
        rows = []
        for key, s in self.keys.items():
            vals = [value(v) for v in key] + [value(int(s))] + [value(float(c[s])) for c in self.columns]
            rows.append(fmt("({})", join(", ", vals)))
        names = [f"sk{i}" for i in range(self.n_keys)] + ["s"] + [f"sv{i}" for i in range(len(self.columns))]
        cond = " AND ".join(f"t.k{i} = st.sk{i}" for i in range(self.n_keys))
        return fmt("SELECT * FROM ({}) t JOIN (VALUES {}) AS st(" + ", ".join(names) + ") ON " + cond,
                   body, join(", ", rows))


def _per_stratum(values: np.ndarray, s: StratumTable) -> Frag:
    """The per-stratum ``values`` as a column of the query's :class:`StratumTable`."""
    return s.column(values)


def _dot(beta: np.ndarray, z: list[Frag], s: StratumTable) -> Frag:
    """``sum_j beta[s, j] z_j`` for per-stratum coefficients ``beta`` (K, p); zero columns skipped."""
    terms = []
    for j, zj in enumerate(z):
        if not np.any(beta[:, j]):
            continue
        terms.append(fmt("{} * {}", _per_stratum(beta[:, j], s), zj))
    return sql.total(terms)


def _grouped(src, inner: list, outer: list, where: Frag, k: int, layers=(), st: StratumTable | None = None
             ) -> pd.DataFrame:
    """One scan: ``SELECT s, <outer aggregates> FROM (...) GROUP BY s``, one row per stratum (strata
    without rows get zeros). ``inner`` are the row columns (the modifier keys ``k0, k1, ...``, or
    ``s = 0`` without modifiers); ``st`` joins the stratum number and the per-stratum values; each of
    ``layers`` adds columns computed from the previous ones (``SELECT *, ...``), so a quantity used
    many times is written once."""
    body = fmt("SELECT {} FROM {} WHERE {}", _select(inner), src.table, where)
    if st is not None:
        body = st.joined(body)
    for i, layer in enumerate(layers):
        if layer:
            body = fmt("SELECT *, {} FROM (" + "{}" + f") l{i}", _select(layer), body)
    q = fmt("SELECT s, {} FROM ({}) t GROUP BY s", _select(outer), body)
    got = src.run(q)
    out = pd.DataFrame(0.0, index=range(k), columns=[a for a, _ in outer])
    for a, _ in outer:
        out.loc[got["s"].to_numpy(int), a] = got[a].to_numpy(float)
    return out.fillna(0.0)


@dataclass
class Fitted:
    beta_ps: np.ndarray
    beta_om: np.ndarray
    ok_ps: np.ndarray
    ok_om: np.ndarray
    sep_ps: np.ndarray
    sep_om: np.ndarray


def _sym(flat: np.ndarray, p: int) -> np.ndarray:
    iu = np.triu_indices(p)
    out = np.zeros((flat.shape[0], p, p))
    out[:, iu[0], iu[1]] = flat
    out[:, iu[1], iu[0]] = flat
    return out


def model_means(src, spec: Spec, ins: Inspection, prep, keys_to_stratum: dict, *, name: str,
                tol: float = 1e-6, max_iter: int = 60) -> GroupMeans:
    """Standardization, IPW or AIPW per stratum, fitted and averaged in the engine.

    Equal to :mod:`stratagem.estimate._adjust` on the same rows (same models, masks, Newton steps
    from zero, influence functions), with every sum over rows done by the engine. Newton stops after
    a step no larger than ``tol * (1 + max|beta|)``: near the solution Newton's error is squared at
    every step, so after a step of 1e-6 the coefficients are within about 1e-12 of the in-memory fit
    (which takes one more step to confirm 1e-10), and each step saved is a scan of every row saved.
    """
    need_ps_req = name in ("ipw", "aipw")
    need_om = name in ("standardization", "aipw")
    k = prep.n_strata
    # row expressions: the modifier keys (joined to a table of per-stratum values in every scan)
    key_exprs = [expr for _, expr, _, _ in ins.keys]
    n_keys = len(key_exprs)

    def table() -> StratumTable:
        return StratumTable(keys_to_stratum, n_keys)

    a_expr = _exposure_expr(src, spec, prep)
    y_expr = _as_double(src, spec.outcome)
    w_expr = _as_double(src, spec.counts) if spec.counts else raw("1.0")
    des = design(src, spec, ins)
    p = len(des.exprs)
    base = [(f"k{i}", e) for i, e in enumerate(key_exprs)] if n_keys else [("s", raw("0"))]
    base += [("a", a_expr), ("y", y_expr), ("w", w_expr)]
    base += [(f"x{j}", e) for j, e in enumerate(des.exprs)]
    # moments in one scan: sums of the shifted columns u = x - shift and of their products per stratum
    # (the shift is a value inside each column's range, so the centred sums lose no precision)
    shift = np.asarray(des.shifts, dtype=float)
    u = [fmt("(x" + str(j) + " - {})", value(shift[j])) for j in range(p)]
    iu = np.triu_indices(p)
    outer = [("sw", raw("SUM(w)")), ("swa", raw("SUM(w * a)")), ("swy", raw("SUM(w * y)")),
             ("npos", raw("SUM(CASE WHEN w > 0 THEN 1 ELSE 0 END)")),
             ("ylo", raw("MIN(CASE WHEN w > 0 THEN y END)")), ("yhi", raw("MAX(CASE WHEN w > 0 THEN y END)"))]
    outer += [(f"d{j}", fmt("SUM(w * {})", u[j])) for j in range(p)]
    outer += [(f"c{i}", fmt("SUM(w * {} * {})", u[a], u[b])) for i, (a, b) in enumerate(zip(*iu))]
    # and with the exposure and the outcome: the first Newton step (from zero) needs no scan of its own
    outer += [("swya", raw("SUM(w * y * a)"))]
    outer += [(f"da{j}", fmt("SUM(w * a * {})", u[j])) for j in range(p)]
    outer += [(f"dy{j}", fmt("SUM(w * y * {})", u[j])) for j in range(p)]
    outer += [(f"qa{j}", fmt("SUM(w * a * {} * {})", u[j], u[j])) for j in range(p)]  # balance checks
    m = _grouped(src, base, outer, ins.where, k, st=table())
    N = m["sw"].to_numpy()
    total_w = N.sum()
    notes = list(des.notes)
    cov_s = np.zeros((k, p, p))
    if p:
        sxx = _sym(m[[f"c{i}" for i in range(len(iu[0]))]].to_numpy(), p)
        sx = m[[f"d{j}" for j in range(p)]].to_numpy()
        mean = shift + sx.sum(axis=0) / total_w
        with np.errstate(divide="ignore", invalid="ignore"):
            cov_s = (sxx - sx[:, :, None] * sx[:, None, :] / np.where(N > 0, N, 1.0)[:, None, None]) \
                / np.where(N > 0, N, 1.0)[:, None, None]
        cov_all = (sxx.sum(axis=0) - np.outer(sx.sum(axis=0), sx.sum(axis=0)) / total_w) / total_w
        keep, reason = independent_from_covariance(cov_all)
        for j in np.flatnonzero(~keep):
            if reason[j] == "constant":
                notes.append(f"Confounder column {des.names[j]!r} is constant and was dropped.")
            else:
                notes.append(
                    f"Confounder column {des.names[j]!r} is an exact linear combination of other confounder "
                    "columns (collinear) and was dropped; the adjustment is unchanged."
                )
        kept = np.flatnonzero(keep)
        sd = np.sqrt(np.maximum(np.diag(cov_all)[kept], 0.0))
        sd = np.where(sd > 0, sd, 1.0)
        zdef = [(f"z{i}", fmt("((x" + str(j) + " - {}) / {})", value(mean[j]), value(s)))
                for i, (j, s) in enumerate(zip(kept, sd))]
        z = [raw(a) for a, _ in zdef]
        names = [des.names[j] for j in kept]
        cov_s = cov_s[:, kept][:, :, kept]
    else:
        z, names, zdef = [], [], []
    q = len(z)
    Z = [raw("1.0")] + z + [raw("a")]
    P = q + 2
    masks = np.ones((k, P), dtype=bool)
    dropped: dict = {}
    for s in range(k):
        if N[s] <= 0 or q == 0:
            continue
        keep_s, _ = independent_from_covariance(cov_s[s])
        masks[s, 1:q + 1] = keep_s
        for j in np.flatnonzero(~keep_s):
            dropped.setdefault(names[j], []).append(str(prep.labels["stratum"].iloc[s]))
    if k > 1:
        notes.extend(dropped_notes(dropped))
    # status per stratum, as _adjust._status
    n1 = m["swa"].to_numpy()
    status = []
    for s in range(k):
        params = P - (0 if need_om else 1)
        if N[s] <= 0:
            st = "no rows in this stratum"
        elif n1[s] <= 0:
            st = "no exposed rows in this stratum"
        elif N[s] - n1[s] <= 0:
            st = "no unexposed rows in this stratum"
        elif int(m["npos"].iloc[s]) < params:
            st = f"fewer rows ({int(m['npos'].iloc[s])}) than model parameters ({params})"
        elif need_om and ins.binary and m["ylo"].iloc[s] == m["yhi"].iloc[s]:
            st = "outcome is constant in this stratum (all 0 or all 1): the outcome model cannot be fitted"
        else:
            st = OK
        status.append(st)
    okmask = np.array([st == OK for st in status])
    base = (base, zdef, table)  # row columns, standardised design columns, per-stratum table maker
    start = _first_sums(m, p, kept if p else np.zeros(0, int), (mean - shift)[kept] if p else np.zeros(0),
                        sd if p else np.zeros(0))
    fit = _irls(src, base, ins, Z, masks, okmask, binary=ins.binary, need_om=need_om, tol=tol,
                max_iter=max_iter, start=start)
    for s in range(k):
        if status[s] != OK:
            continue
        if need_ps_req and not fit.ok_ps[s]:
            status[s] = "propensity model did not converge" + (
                " (separation: the confounders predict exposure perfectly here, so positivity fails)"
                if fit.sep_ps[s] else "")
        elif need_om and not fit.ok_om[s]:
            status[s] = "outcome model did not converge" + (" (separation)" if fit.sep_om[s] else "")
    okmask = np.array([st == OK for st in status])
    m1, m0, v11, v00, v10, diag = _means_and_variances(src, base, ins, Z, masks, fit, okmask, N, n1, name,
                                                       pilot=m["swy"].to_numpy() / np.where(N > 0, N, 1.0),
                                                       shifts=shift)
    G = k + 1
    status.append(OK)
    if okmask.all():
        tot = N.sum()
        m1[k] = np.sum(N * m1[:k]) / tot
        m0[k] = np.sum(N * m0[:k]) / tot
        f1, f0, f1f1, f0f0, f1f0 = (diag[key] for key in ("f1", "f0", "f1f1", "f0f0", "f1f0"))
        d1, d0 = m1[:k] - m1[k], m0[:k] - m0[k]
        acc11 = np.sum(f1f1 + 2 * d1 * f1 + N * d1 * d1)
        acc00 = np.sum(f0f0 + 2 * d0 * f0 + N * d0 * d0)
        acc10 = np.sum(f1f0 + d1 * f0 + d0 * f1 + N * d1 * d0)
        v11[k], v00[k], v10[k] = acc11 / tot**2, acc00 / tot**2, acc10 / tot**2
    elif k > 1:
        status[k] = ("not estimable in the engine: a stratum could not be estimated, and the overall "
                     "fallback (one model on all rows with stratum indicators) runs only in memory")
    else:
        status[k] = "not estimable"
    n, nn1, nn0 = (np.append(x, x.sum()) for x in (N, n1, N - n1))
    assert len(n) == G
    gm = GroupMeans(n, nn1, nn0, m1, m0, v11, v00, v10, status, notes=notes)
    gm.extra["confounder_columns"] = tuple(names)
    gm.extra["engine_checks"] = diag["checks"]
    gm.extra["engine_balance"] = balance(des, moment_sums(m, p), diag["checks"])
    if spec.interval == "bootstrap":
        S, layers = diag["rows"]
        gm.extra["engine_replicates"] = poisson_replicates(
            src, base[0], layers, S, ins.where, m1, m0, okmask, n_boot=spec.n_boot, seed=spec.seed)
    return gm


def _support_sums(got: pd.DataFrame, S: StratumTable) -> list:
    """Aggregates counting the frequency of rows outside common support: ``out_s`` per stratum (the
    overlap ``[max(min_0, min_1), min(max_0, max_1)]`` of the arms' propensity ranges in the
    stratum) and ``out_all`` (the overlap over all strata). An arm without rows bounds nothing."""
    lo1, lo0 = got["emin1"].to_numpy(float), got["emin0"].to_numpy(float)
    hi1, hi0 = got["emax1"].to_numpy(float), got["emax0"].to_numpy(float)
    with np.errstate(invalid="ignore"):
        low, high = np.fmax(lo1, lo0), np.fmin(hi1, hi0)
        low_all = max(np.nanmin(lo1, initial=np.inf), np.nanmin(lo0, initial=np.inf))
        high_all = min(np.nanmax(hi1, initial=-np.inf), np.nanmax(hi0, initial=-np.inf))
    low = np.where(np.isnan(low), -np.inf, low)
    high = np.where(np.isnan(high), np.inf, high)
    return [("out_s", fmt("SUM(CASE WHEN e < {} OR e > {} THEN w ELSE 0.0 END)", _per_stratum(low, S),
                          _per_stratum(high, S))),
            ("out_all", fmt("SUM(CASE WHEN e < {} OR e > {} THEN w ELSE 0.0 END)", value(float(low_all)),
                            value(float(high_all))))]


def _smd(sums: dict, kind: str, shift: float, n_rows: np.ndarray) -> np.ndarray:
    """Standardized mean difference per group from per-arm sums ``sums[arm] = (S0, S1, S2)`` of the
    weights, the weighted shifted values and their squares; as :func:`stratagem.diagnostics.smd`
    (Austin 2009): ``p (1 - p)`` for a 0/1 term, else the weighted variance scaled by ``n / (n - 1)``
    with ``n`` the arm's rows (``n_rows[arm]``)."""
    mean, var = {}, {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for arm, (s0, s1, s2) in sums.items():
            m = s1 / s0
            if kind == "numeric":
                var[arm] = np.maximum(s2 - s1 * m, 0.0) / s0 * n_rows[arm] / (n_rows[arm] - 1)
            else:
                p = m + shift
                var[arm] = p * (1 - p)
            mean[arm] = m
        d = (mean[1] - mean[0]) / np.sqrt((var[1] + var[0]) / 2)
    return np.where(np.isfinite(d), d, np.nan)


def moment_sums(m: pd.DataFrame, p: int) -> dict:
    """The unweighted balance sums per stratum from the moments scan (see :func:`balance`)."""
    iu = np.triu_indices(p)
    diag = [int(np.flatnonzero((iu[0] == j) & (iu[1] == j))[0]) for j in range(p)]
    cols = lambda names: m[names].to_numpy(float).reshape(len(m), -1)  # noqa: E731
    return {"sw": m["sw"].to_numpy(float), "swa": m["swa"].to_numpy(float),
            "d": cols([f"d{j}" for j in range(p)]), "da": cols([f"da{j}" for j in range(p)]),
            "qq": cols([f"c{i}" for i in diag]), "qa": cols([f"qa{j}" for j in range(p)])}


def balance(des: _Design, sums: dict, checks: pd.DataFrame | None = None) -> list:
    """Balance of every confounder term per stratum and overall: ``(label, before, after or None)``,
    arrays over the K strata and the overall group, in the terms and order of the in-memory Checks.

    ``sums`` holds, per stratum, the frequency ``sw`` and the exposed frequency ``swa`` (K,), and for
    every design column ``j`` the sums of ``w u_j`` (``d``), ``w a u_j`` (``da``), ``w u_j^2``
    (``qq``) and ``w a u_j^2`` (``qa``), (K, p), with ``u_j = x_j - shift_j``. ``checks`` (the means
    scan of IPW and AIPW) adds the same sums weighted by the inverse probability weights.
    """
    p = len(des.exprs)
    shift = np.asarray(des.shifts, dtype=float)
    if not des.terms:
        return []

    def grp(x):  # strata, then overall
        x = np.asarray(x, dtype=float)
        return np.append(x, x.sum())

    N, Na = sums["sw"], sums["swa"]
    n_rows = {1: grp(Na), 0: grp(N - Na)}
    weighted = checks is not None and "sws1" in checks
    raw_sums = {}
    for j in range(p):
        d, da, qq, qa = (sums[key][:, j] for key in ("d", "da", "qq", "qa"))
        before = {1: (grp(Na), grp(da), grp(qa)), 0: (grp(N - Na), grp(d - da), grp(qq - qa))}
        after = None
        if weighted:
            after = {1: (grp(checks["sws1"]), grp(checks[f"bal1_{j}"]), grp(checks[f"bal1q_{j}"])),
                     0: (grp(checks["sws0"]), grp(checks[f"bal0_{j}"]), grp(checks[f"bal0q_{j}"]))}
        raw_sums[j] = (before, after)
    out = []
    for label, kind, cols in des.terms:
        if kind == "constant":
            nan = np.full(len(N) + 1, np.nan)
            out.append((label, nan, nan if weighted else None))
            continue
        if kind == "reference":  # indicator of the first level: 1 - the other indicators
            results = []
            for which in (0, 1):
                parts = [raw_sums[j][which] for j in cols]
                if parts[0] is None:
                    results.append(None)
                    continue
                ref = {}
                for arm in (0, 1):
                    s0 = parts[0][arm][0]
                    s1 = s0 - sum(part[arm][1] for part in parts)
                    ref[arm] = (s0, s1, s1)
                results.append(_smd(ref, "binary", 0.0, n_rows))
            out.append((label, results[0], results[1]))
            continue
        j = cols[0]
        before, after = raw_sums[j]
        out.append((label, _smd(before, kind, shift[j], n_rows),
                    _smd(after, kind, shift[j], n_rows) if after is not None else None))
    return out


#: Poisson(1) cumulative probabilities P(W <= j), j = 0..17 (beyond 17 the remaining mass is < 1e-16)
_POISSON1_CDF = tuple(float(np.exp(-1.0) * sum(1.0 / np.prod(np.arange(1, i + 1)) for i in range(j + 1)))
                      for j in range(18))


def _poisson_weight(u: Frag) -> Frag:
    """A Poisson(1) count from a uniform ``u`` by inversion of its distribution function."""
    parts = [fmt("WHEN {} < {} THEN " + f"{j}.0", u, value(c)) for j, c in enumerate(_POISSON1_CDF)]
    return fmt("(CASE {} ELSE 18.0 END)", join(" ", parts))


def poisson_replicates(src, row_cols: list, layers: list, S: StratumTable, where: Frag, m1: np.ndarray,
                       m0: np.ndarray, okmask: np.ndarray, *, n_boot: int, seed: int):
    """Bootstrap replicates of the potential-outcome means, in one scan, with Poisson(1) row weights.

    The Poisson bootstrap (Hanley & MacGibbon 2006, *Comput. Methods Programs Biomed.* 83:57-62;
    Chamandy, Muralidharan, Najmi & Naidu 2012, "Estimating uncertainty for massive data streams",
    Google technical report; both from memory) gives every row an independent Poisson(1) frequency in
    each replicate instead of drawing exactly ``n`` rows: the replicate sizes vary a little, and the
    rows need not be gathered, so each replicate is a weighted sum that the engine computes during one
    pass. The weight of row ``i`` in replicate ``b`` is a fixed function of the row's values, its rank
    among identical rows, ``b`` and ``seed`` (a hash inverted through the Poisson(1) distribution
    function), so a replicate is the same on every run whatever order the engine reads the rows in.

    Each replicate is the linearised (one-step) estimate: with influence functions ``f`` (the same
    ones the Wald standard errors use, which carry the estimation of the working models),
    ``m_b = m + sum_i W_ib w_i f_i / sum_i W_ib w_i`` per stratum and arm, i.e. the models are not
    refitted per replicate. This is the score or multiplier bootstrap (Kline & Santos 2012, "A score
    based approach to wild bootstrap inference", *J. Econom. Methods* 1:23-41, from memory), first-order
    equivalent to refitting; the overall replicate averages the strata by their replicate sizes.

    Returns
    -------
    (m1_b, m0_b) : arrays (n_boot, K + 1)
        Replicates per stratum and overall (last column); NaN where the stratum is not estimable.
    """
    k = len(okmask)
    cols = [a for a, _ in row_cols]
    body = S.joined(_ranked(src, row_cols, where))
    for i, layer in enumerate(layers):
        if layer:
            body = fmt("SELECT *, {} FROM (" + "{}" + f") l{i}", _select(layer), body)
    weighted = _with_replicates(src, body, cols, n_boot, seed, keep=["s", "w", "f1", "f0"])
    q = fmt("SELECT s, b, SUM(pw * w) AS n, SUM(pw * w * f1) AS t1, SUM(pw * w * f0) AS t0 "
            "FROM ({}) p GROUP BY s, b", weighted)
    got = src.run(q)
    n, t1, t0 = (np.zeros((n_boot, k)) for _ in range(3))
    s_idx, b_idx = got["s"].to_numpy(int), got["b"].to_numpy(int)
    for arr, c in ((n, "n"), (t1, "t1"), (t0, "t0")):
        arr[b_idx, s_idx] = got[c].to_numpy(float)
    m1_b, m0_b = np.full((n_boot, k + 1), np.nan), np.full((n_boot, k + 1), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        m1_b[:, :k] = np.where(okmask & (n > 0), m1[:k] + t1 / n, np.nan)
        m0_b[:, :k] = np.where(okmask & (n > 0), m0[:k] + t0 / n, np.nan)
        if okmask.all():
            tot = n.sum(axis=1)
            m1_b[:, k] = np.sum(n * m1_b[:, :k], axis=1) / tot
            m0_b[:, k] = np.sum(n * m0_b[:, :k], axis=1) / tot
    return m1_b, m0_b


def _exposure_expr(src, spec: Spec, prep) -> Frag:
    e = _col(src, spec.exposure)
    if spec.exposed_level is not None:
        return fmt("(CASE WHEN {} = {} THEN 1.0 ELSE 0.0 END)", e, value(spec.exposed_level))
    return _as_double(src, spec.exposure)


def _model_aggs(tag: str, S: Frag, r: Frag, Z: list, eta: Frag, *, hessian: bool = True):
    P = len(Z)
    iu = np.triu_indices(P)
    out = [(f"{tag}h{i}", fmt("SUM({} * {} * {})", S, Z[a], Z[b])) for i, (a, b) in enumerate(zip(*iu))
           ] if hessian else []
    out += [(f"{tag}g{j}", fmt("SUM({} * {})", r, Z[j])) for j in range(P)]
    out.append((f"{tag}eta", fmt("MAX(CASE WHEN w > 0 THEN ABS({}) ELSE 0.0 END)", eta)))
    return out


def _first_sums(m: pd.DataFrame, p: int, kept, c, sd):
    """``sum w Z Z'``, ``sum w a Z`` and ``sum w y Z`` per stratum from the moments scan, for
    ``Z = (1, z, a)`` with ``z = (u - c) / sd`` the standardised design columns (``u = x - shift``,
    ``c = mean - shift``): what the first Newton step from zero needs, so it costs no scan."""
    k = len(m)
    q = len(kept)
    P = q + 2
    N, Sa, Sy, Sya = (m[c_].to_numpy(float) for c_ in ("sw", "swa", "swy", "swya"))
    iu = np.triu_indices(p)
    sxx = _sym(m[[f"c{i}" for i in range(len(iu[0]))]].to_numpy(), p)[:, kept][:, :, kept] if p else np.zeros((k, 0, 0))
    sx = m[[f"d{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    sax = m[[f"da{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    syx = m[[f"dy{j}" for j in range(p)]].to_numpy()[:, kept] if p else np.zeros((k, 0))
    sz = (sx - N[:, None] * c) / sd  # sum w z
    szz = (sxx - sx[:, :, None] * c[None, None, :] - c[None, :, None] * sx[:, None, :]
           + N[:, None, None] * np.outer(c, c)[None]) / np.outer(sd, sd)[None]
    ZZ = np.zeros((k, P, P))
    ZZ[:, 0, 0] = N
    ZZ[:, 0, 1:q + 1] = ZZ[:, 1:q + 1, 0] = sz
    ZZ[:, 1:q + 1, 1:q + 1] = szz
    ZZ[:, 0, -1] = ZZ[:, -1, 0] = Sa
    za = (sax - Sa[:, None] * c) / sd
    ZZ[:, 1:q + 1, -1] = ZZ[:, -1, 1:q + 1] = za
    ZZ[:, -1, -1] = Sa  # the exposure is 0 or 1
    aZ = np.column_stack([Sa, za, Sa])
    yZ = np.column_stack([Sy, (syx - Sy[:, None] * c) / sd, Sya])
    one_Z = ZZ[:, 0, :]
    return {"ZZ": ZZ, "aZ": aZ, "yZ": yZ, "Z": one_Z}


#: once a Newton step is this small (relative to 1 + max|beta|), later scans reuse its Hessian and
#: compute only the gradient (the chord method): near the solution this converges about as fast as
#: Newton while each scan sums P values per stratum and model instead of P (P + 3) / 2
CHORD_FROM = 1e-2


def _irls(src, base, ins, Z, masks, okmask, *, binary, need_om, tol, max_iter, start=None) -> Fitted:
    """Newton/IRLS for the propensity and outcome models of every stratum; one scan per iteration.

    The first step (from zero) comes from the moments scan (``start``, see :func:`_first_sums`): at
    zero the logistic weights are all 1/4 and the residuals ``t - 1/2``. Once a model's Newton step is
    small (:data:`CHORD_FROM`), later scans compute only its gradient and reuse the last Hessian (the
    chord, or simplified Newton, method: Ortega & Rheinboldt 1970, *Iterative Solution of Nonlinear
    Equations in Several Variables*, sec. 7.1, from memory); it returns to full Newton steps if a
    chord step fails to shrink by half.
    """
    k, P = masks.shape
    ps_mask = masks.copy()
    ps_mask[:, -1] = False
    beta = {"ps": np.zeros((k, P)), "om": np.zeros((k, P))}
    active = {"ps": okmask.copy(), "om": okmask.copy() if need_om else np.zeros(k, dtype=bool)}
    conv = {"ps": np.zeros(k, dtype=bool), "om": np.zeros(k, dtype=bool)}
    far = {"ps": np.zeros(k), "om": np.zeros(k)}
    chord = {"ps": False, "om": False}
    last_H = {"ps": None, "om": None}
    last_rel = {"ps": np.full(k, np.inf), "om": np.full(k, np.inf)}
    fam_om = "binomial" if binary else "gaussian"
    nq = P * (P + 1) // 2
    for it in range(max_iter):
        todo = [t for t in ("ps", "om") if active[t].any()]
        if not todo:
            break
        if it == 0 and start is not None:  # beta = 0: the sums follow from the moments
            got = {}
            for t in todo:
                gaussian = t == "om" and fam_om == "gaussian"
                scale = 1.0 if gaussian else 0.25
                got[t] = (scale * start["ZZ"],
                          (start["aZ"] if t == "ps" else start["yZ"]) - (0.0 if gaussian else 0.5) * start["Z"],
                          np.zeros(k))
        else:
            S = base[2]()
            outer, etas, links, weights = [], [], [], []
            for t in todo:
                etas.append((f"eta_{t}", _dot(beta[t], Z, S)))
                eta = raw(f"eta_{t}")
                target = raw("a") if t == "ps" else raw("y")
                if t == "om" and fam_om == "gaussian":
                    weights += [(f"S_{t}", raw("w")), (f"r_{t}", fmt("w * (y - {})", eta))]
                else:
                    mu, rest = _expit(eta)
                    links += [(f"mu_{t}", mu), (f"rest_{t}", rest)]
                    weights += [(f"S_{t}", raw(f"w * mu_{t} * rest_{t}")),
                                (f"r_{t}", fmt("w * ({} - mu_" + t + ")", target))]
                outer += _model_aggs(t, raw(f"S_{t}"), raw(f"r_{t}"), Z, eta, hessian=not chord[t])
            res = _grouped(src, base[0], outer, ins.where, k, layers=[base[1], etas, links, weights], st=S)
            got = {}
            for t in todo:
                H = None if chord[t] else _sym(res[[f"{t}h{i}" for i in range(nq)]].to_numpy(), P)
                got[t] = (H, res[[f"{t}g{j}" for j in range(P)]].to_numpy(), res[f"{t}eta"].to_numpy())
        for t in todo:
            H, g, far[t] = got[t]
            was_chord = chord[t]
            if H is None:
                H = last_H[t]
            else:
                last_H[t] = H
            idx = np.flatnonzero(active[t])
            mask = (ps_mask if t == "ps" else masks)[idx]
            step = glm._solve(H[idx], g[idx], mask)
            new = beta[t][idx] + step
            beta[t][idx] = np.where(np.isfinite(new), new, beta[t][idx])
            rel = np.abs(step).max(axis=1) / (1.0 + np.abs(new).max(axis=1))
            done = rel <= tol
            if t == "om" and fam_om == "gaussian":
                done[:] = True  # one weighted least-squares solve is the fit
            bad = ~np.isfinite(new).all(axis=1)
            conv[t][idx[done]] = True
            active[t][idx[done | bad]] = False
            live = ~(done | bad)
            if was_chord and np.any(rel[live] > 0.5 * last_rel[t][idx][live]):
                chord[t] = False  # a chord step that did not halve: back to Newton
            elif not was_chord and live.any() and np.all(rel[live] <= CHORD_FROM):
                chord[t] = True
            last_rel[t][idx] = rel
    sep = {t: (~conv[t]) & (far[t] > glm.SEPARATION_ETA) for t in ("ps", "om")}
    return Fitted(beta["ps"], beta["om"], conv["ps"], conv["om"], sep["ps"], sep["om"])


def _means_and_variances(src, base, ins, Z, masks, fit, okmask, N, n1, name, pilot, shifts=()):
    """Potential-outcome means and the sums of squares and products of the influence functions per
    stratum. Standardization and IPW take two scans (the influence functions need constants solved
    from the first); AIPW takes one: its influence functions are ``psi - m``, so the sums of ``psi - c``
    and of its squares and products, for a per-stratum constant ``c`` near ``m`` (``pilot``, the
    stratum's outcome mean, which keeps the sums of squares free of cancellation), give ``m`` and the
    variances at once."""
    k, P = masks.shape
    S = base[2]()  # one table for both scans (the second adds its own columns)
    binary = ins.binary
    ps_mask = masks.copy()
    ps_mask[:, -1] = False
    safeN = np.where(N > 0, N, 1.0)
    p1 = n1 / safeN
    iu = np.triu_indices(P)
    nq = len(iu[0])
    # row quantities, each defined once, layer by layer
    etas = [("eta_ps", _dot(fit.beta_ps, Z, S))]
    e_def = list(zip(("e", "ome"), _expit(raw("eta_ps"))))
    links, derived = [], []
    if name in ("standardization", "aipw"):
        ba = _per_stratum(fit.beta_om[:, -1], S)
        etas.append(("eta_om", _dot(fit.beta_om, Z, S)))
        e_def += [("eta1", fmt("(eta_om + {} * (1.0 - a))", ba)), ("eta0", fmt("(eta_om - {} * a)", ba))]
        if binary:
            for nm, src_eta in (("q1", "eta1"), ("q0", "eta0"), ("mu", "eta_om")):
                val, rest = _expit(raw(src_eta))
                links += [(nm, val), (nm + "r", rest)]
        else:
            links += [("q1", raw("eta1")), ("q0", raw("eta0")), ("mu", raw("eta_om"))]
    if name != "standardization":
        p1s = _per_stratum(p1, S)
        links.append(("sw", fmt("(CASE WHEN a = 1.0 THEN {} / e ELSE (1.0 - {}) / ome END)", p1s, p1s)))
    if name == "aipw":  # untruncated: sw / P(A = a | stratum) = 1 / e or 1 / (1 - e)
        derived += [("psi1", raw("(q1 + a * (y - q1) / e)")), ("psi0", raw("(q0 + (1.0 - a) * (y - q0) / ome)"))]
    layers = [base[1], etas, e_def, links, derived]
    outer = [("emin1", raw("MIN(CASE WHEN a = 1.0 AND w > 0 THEN e END)")),
             ("emax1", raw("MAX(CASE WHEN a = 1.0 AND w > 0 THEN e END)")),
             ("emin0", raw("MIN(CASE WHEN a = 0.0 AND w > 0 THEN e END)")),
             ("emax0", raw("MAX(CASE WHEN a = 0.0 AND w > 0 THEN e END)"))]
    if name != "standardization":
        outer += [("swmax1", raw("MAX(CASE WHEN a = 1.0 AND w > 0 THEN sw END)")),
                  ("swmax0", raw("MAX(CASE WHEN a = 0.0 AND w > 0 THEN sw END)")),
                  ("sws1", raw("SUM(w * a * sw)")), ("sws0", raw("SUM(w * (1.0 - a) * sw)")),
                  ("swss1", raw("SUM(w * a * sw * sw)")), ("swss0", raw("SUM(w * (1.0 - a) * sw * sw)"))]
        for j, shift in enumerate(shifts):  # weighted sums of the design columns for the balance checks
            uj = fmt("(x" + str(j) + " - {})", value(float(shift)))
            outer += [(f"bal1_{j}", fmt("SUM(w * a * sw * {})", uj)),
                      (f"bal1q_{j}", fmt("SUM(w * a * sw * {} * {})", uj, uj)),
                      (f"bal0_{j}", fmt("SUM(w * (1.0 - a) * sw * {})", uj)),
                      (f"bal0q_{j}", fmt("SUM(w * (1.0 - a) * sw * {} * {})", uj, uj))]
    zt = [z.text for z in Z]  # Z holds column names only ("1.0", "z0", ..., "a")
    if name == "standardization":
        d1, d0, v = ("q1 * q1r", "q0 * q0r", "mu * mur") if binary else ("1.0", "1.0", "1.0")
        outer += [("s1", raw("SUM(w * q1)")), ("s0", raw("SUM(w * q0)"))]
        outer += [(f"D1_{j}", raw(f"SUM(w * {d1} * {zt[j]})")) for j in range(P)]
        outer += [(f"D0_{j}", raw(f"SUM(w * {d0} * {zt[j]})")) for j in range(P)]
        outer += [(f"I{i}", raw(f"SUM(w * {v} * {zt[a]} * {zt[b]})")) for i, (a, b) in enumerate(zip(*iu))]
    elif name == "ipw":
        outer += [("c1", raw("SUM(w * a * sw)")), ("c1y", raw("SUM(w * a * sw * y)")),
                  ("c0", raw("SUM(w * (1.0 - a) * sw)")), ("c0y", raw("SUM(w * (1.0 - a) * sw * y)"))]
        for j in range(P):
            outer += [(f"A1_{j}", raw(f"SUM(w * a * sw * ome * {zt[j]})")),
                      (f"A1y_{j}", raw(f"SUM(w * a * sw * ome * y * {zt[j]})")),
                      (f"A0_{j}", raw(f"SUM(w * (1.0 - a) * sw * e * {zt[j]})")),
                      (f"A0y_{j}", raw(f"SUM(w * (1.0 - a) * sw * e * y * {zt[j]})"))]
        outer += [(f"I{i}", raw(f"SUM(w * e * ome * {zt[a]} * {zt[b]})")) for i, (a, b) in enumerate(zip(*iu))]
    else:
        c1, c0 = _per_stratum(pilot, S), _per_stratum(pilot, S)
        derived += [("g1", fmt("(psi1 - {})", c1)), ("g0", fmt("(psi0 - {})", c0))]
        outer += [("s1", raw("SUM(w * g1)")), ("s0", raw("SUM(w * g0)")), ("g11", raw("SUM(w * g1 * g1)")),
                  ("g00", raw("SUM(w * g0 * g0)")), ("g10", raw("SUM(w * g1 * g0)"))]
    got = _grouped(src, base[0], outer, ins.where, k, layers=layers, st=S)
    G = k + 1
    m1, m0, v11, v00, v10 = (np.full(G, np.nan) for _ in range(5))
    col = lambda prefix, n_: got[[f"{prefix}{j}" for j in range(n_)]].to_numpy()  # noqa: E731

    def solve(info, D, mask):
        return np.linalg.lstsq(info[np.ix_(mask, mask)], D[mask], rcond=None)[0]

    # per-stratum constants of the influence functions
    if name == "standardization":
        m1[:k], m0[:k] = got["s1"] / safeN, got["s0"] / safeN
        D1, D0 = col("D1_", P) / safeN[:, None], col("D0_", P) / safeN[:, None]
        D1[:, -1] = D1[:, 0]  # the exposure is 1 in every prediction of Q(1, L) ...
        D0[:, -1] = 0.0  # ... and 0 in every prediction of Q(0, L)
        info = _sym(col("I", nq), P) / safeN[:, None, None]
        k1, k0 = np.zeros((k, P)), np.zeros((k, P))
        for s in np.flatnonzero(okmask):
            k1[s, masks[s]] = solve(info[s], D1[s], masks[s])
            k0[s, masks[s]] = solve(info[s], D0[s], masks[s])
        fdef = [("f1", fmt("(q1 - {} + {} * (y - mu))", _per_stratum(np.nan_to_num(m1[:k]), S), _dot(k1, Z, S))),
                ("f0", fmt("(q0 - {} + {} * (y - mu))", _per_stratum(np.nan_to_num(m0[:k]), S), _dot(k0, Z, S)))]
    elif name == "ipw":
        c1, c0 = got["c1"].to_numpy(), got["c0"].to_numpy()
        with np.errstate(divide="ignore", invalid="ignore"):
            m1[:k], m0[:k] = got["c1y"] / c1, got["c0y"] / c0
        m1k, m0k = np.nan_to_num(m1[:k]), np.nan_to_num(m0[:k])
        G1 = -(col("A1y_", P) - m1k[:, None] * col("A1_", P)) / safeN[:, None]
        G0 = (col("A0y_", P) - m0k[:, None] * col("A0_", P)) / safeN[:, None]
        info = _sym(col("I", nq), P) / safeN[:, None, None]
        k1, k0 = np.zeros((k, P)), np.zeros((k, P))
        for s in np.flatnonzero(okmask):
            k1[s, ps_mask[s]] = solve(info[s], G1[s], ps_mask[s])
            k0[s, ps_mask[s]] = solve(info[s], G0[s], ps_mask[s])
        cc1, cc0 = np.where(c1 > 0, c1 / safeN, 1.0), np.where(c0 > 0, c0 / safeN, 1.0)
        fdef = [("f1", fmt("((a * sw * (y - {}) + {} * (a - e)) / {})", _per_stratum(m1k, S), _dot(k1, Z, S),
                           _per_stratum(cc1, S))),
                ("f0", fmt("(((1.0 - a) * sw * (y - {}) + {} * (a - e)) / {})", _per_stratum(m0k, S),
                           _dot(k0, Z, S), _per_stratum(cc0, S)))]
    else:  # AIPW: everything from the one scan
        G1, G0 = got["s1"].to_numpy(), got["s0"].to_numpy()
        m1[:k], m0[:k] = pilot + G1 / safeN, pilot + G0 / safeN
        var = pd.DataFrame({"f1f1": got["g11"] - G1 * G1 / safeN, "f0f0": got["g00"] - G0 * G0 / safeN,
                            "f1f0": got["g10"] - G1 * G0 / safeN, "f1": 0.0, "f0": 0.0})
        # the influence functions themselves, for bootstrap replicates: psi - m = g - G / N
        fdef = [("f1", fmt("(g1 - {})", _per_stratum(G1 / safeN, S))),
                ("f0", fmt("(g0 - {})", _per_stratum(G0 / safeN, S)))]
    # common support: the frequency of rows whose propensity lies outside the overlap of the two arms'
    # ranges, in their stratum and overall (as diagnostics.py); bounds from the scan above
    support = _support_sums(got, S)
    if name != "aipw":
        outer = [("f1f1", raw("SUM(w * f1 * f1)")), ("f0f0", raw("SUM(w * f0 * f0)")),
                 ("f1f0", raw("SUM(w * f1 * f0)")), ("f1", raw("SUM(w * f1)")), ("f0", raw("SUM(w * f0)"))]
        var = _grouped(src, base[0], outer + support, ins.where, k, layers=layers + [fdef], st=S)
        outside = var[["out_s", "out_all"]]
    else:  # AIPW's one scan could not know the bounds: one more, light scan
        outside = _grouped(src, base[0], support, ins.where, k, layers=layers[:3], st=S)
    for s in range(k):
        if not okmask[s]:
            m1[s] = m0[s] = np.nan
            continue
        v11[s], v00[s], v10[s] = (var[c].iloc[s] / N[s] ** 2 for c in ("f1f1", "f0f0", "f1f0"))
    diag = {c: var[c].to_numpy() for c in ("f1f1", "f0f0", "f1f0", "f1", "f0")}
    diag["checks"] = got.drop(columns=[c for c in got.columns if not c.startswith(("emin", "emax", "sw", "bal"))])
    diag["checks"]["out_s"] = outside["out_s"].to_numpy(float)
    diag["checks"]["out_all"] = outside["out_all"].to_numpy(float)
    diag["rows"] = (S, layers + [fdef])  # row columns f1, f0: the influence functions (for replicates)
    return m1, m0, v11, v00, v10, diag
