"""Building SQL safely: identifiers quoted, values passed as parameters, never pasted into text.

A :class:`Frag` is a piece of SQL text plus the values of its ``?`` placeholders, in order. Text comes
only from this package's own templates; a column name enters only through :meth:`Dialect.ident`
(wrapped in the dialect's quote character, with that character doubled inside the name), and every
value (a level, a bin edge, a coefficient) enters only through :func:`value` as a ``?`` parameter.
Both DuckDB (``connection.execute(sql, params)``) and Spark SQL (``spark.sql(sql, args=[...])``,
Spark >= 3.5) bind positional ``?`` parameters, so one builder serves both engines.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

__all__ = ["Dialect", "Frag", "value", "raw", "join", "fmt", "total", "DUCKDB", "SPARK"]


@dataclass(frozen=True)
class Frag:
    """SQL text with ``?`` placeholders and the values bound to them, in order of appearance."""

    text: str
    params: tuple = ()

    def __add__(self, other: Frag) -> Frag:
        return Frag(self.text + other.text, self.params + other.params)


def raw(text: str) -> Frag:
    """A fragment of this package's own SQL (keywords, operators, function names); never user data."""
    return Frag(text)


def value(v: Any) -> Frag:
    """A value as a bound parameter. numpy scalars become Python scalars first."""
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):
        v = v.item()
    return Frag("?", (v,))


def join(sep: str, parts: Iterable[Frag]) -> Frag:
    """Fragments joined by ``sep`` (a separator of our own, e.g. ``", "`` or ``" + "``)."""
    parts = list(parts)
    return Frag(sep.join(p.text for p in parts), tuple(v for p in parts for v in p.params))


def fmt(template: str, *parts: Frag) -> Frag:
    """Fill the ``{}`` slots of an own ``template`` with fragments, keeping parameter order."""
    pieces = template.split("{}")
    if len(pieces) != len(parts) + 1:
        raise ValueError(f"template has {len(pieces) - 1} slots for {len(parts)} fragments")
    out = Frag(pieces[0])
    for part, text in zip(parts, pieces[1:]):
        out = out + part + Frag(text)
    return out


def total(parts: Iterable[Frag]) -> Frag:
    """Sum of expressions, ``(a + b + ...)``; ``0.0`` when empty."""
    parts = list(parts)
    return fmt("({})", join(" + ", parts)) if parts else raw("0.0")


@dataclass(frozen=True)
class Dialect:
    """What differs between engines' SQL: the identifier quote and a few function spellings."""

    name: str
    quote: str

    def ident(self, name: str) -> Frag:
        """A column or view name as a quoted identifier (quote characters inside are doubled)."""
        q = self.quote
        return Frag(q + str(name).replace(q, q + q) + q)

    def isnan(self, expr: Frag) -> Frag:
        return fmt("isnan({})", expr)

    def uniform(self, parts: list[Frag]) -> Frag:
        """A number in [0, 1) that is a fixed function of ``parts`` (a hash of them to 53 bits).

        DuckDB's ``hash`` and Spark's ``xxhash64`` differ, so the two engines give different (equally
        distributed) numbers for the same values; each gives the same number on every run.
        """
        if self.name == "duckdb":
            return fmt("(CAST(hash({}) % 9007199254740992 AS DOUBLE) / 9007199254740992.0)", join(", ", parts))
        return fmt("(CAST(pmod(xxhash64({}), 9007199254740992) AS DOUBLE) / 9007199254740992.0)",
                   join(", ", parts))

    def replicate_numbers(self, count: int) -> Frag:
        """A one-column table ``b`` holding 0, 1, ..., count - 1."""
        n = str(int(count))
        if self.name == "duckdb":
            return raw("SELECT range AS b FROM range(" + n + ")")
        return raw("SELECT id AS b FROM range(" + n + ")")

    def quantile(self, expr: Frag, q: float) -> Frag:
        """Exact quantile with linear interpolation between order statistics (numpy's default)."""
        if self.name == "duckdb":
            return fmt("quantile_cont({}, {})", expr, value(float(q)))
        return fmt("percentile({}, {})", expr, value(float(q)))


DUCKDB = Dialect("duckdb", '"')
SPARK = Dialect("spark", "`")
