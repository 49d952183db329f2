"""Row expressions shared by the engines' queries: column casts, missing-value tests, bin
numbers, the logistic function and aliased select lists, all built by :mod:`.sql`.
"""

from __future__ import annotations

from .sql import Frag, fmt, join, raw, value


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
