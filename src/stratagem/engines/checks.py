"""The first queries on a table in an engine: the checks of the Spec against the table.

Column names and types come from the schema (no rows read); then one scan counts missing values per
used column and sums over the complete rows (whether the outcome is 0/1, its mean, ranges, the smallest
frequency), and one more counts distinct values where they decide something. Bad input raises the same
:class:`~stratagem.errors.StratagemError` subclasses, with the same messages, as
:func:`stratagem.frame.prepare`, before any heavy query runs. Numeric modifiers get their bin edges
here (exact quantiles in the engine, the rule of :func:`stratagem.frame.bin_edges`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import frame as fr
from ..errors import DataError, MissingValuesError, ModifierError, OutcomeError
from ..spec import Spec
from .expressions import _as_double, _bin_index, _col, _missing, _select
from .sql import Frag, fmt, join, raw, value

MAX_LEVELS_FETCHED = 1000  # distinct values brought back to label levels or to word an error


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
