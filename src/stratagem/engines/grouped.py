"""Grouped aggregate queries per stratum: the inline table of per-stratum values joined to the
rows, sums of per-stratum linear combinations, and one scan returning one row per stratum.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import sql
from .expressions import _select
from .sql import Frag, fmt, join, raw, value


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


def _sym(flat: np.ndarray, p: int) -> np.ndarray:
    iu = np.triu_indices(p)
    out = np.zeros((flat.shape[0], p, p))
    out[:, iu[0], iu[1]] = flat
    out[:, iu[1], iu[0]] = flat
    return out
