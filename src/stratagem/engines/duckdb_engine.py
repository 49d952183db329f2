"""DuckDB as the engine: a DuckDB relation, or a Parquet file (path or glob) read by DuckDB.

DuckDB runs in process and streams Parquet out of core, so tables larger than memory are analysed
with bounded memory; only the small results of aggregate queries come back to Python. The source is
registered once as a view with a generated name; every query is built by :mod:`.sql` (quoted
identifiers, ``?`` parameters) and run with ``connection.execute(sql, params)``.
"""

from __future__ import annotations

import itertools
import os
from pathlib import Path

import pandas as pd

from . import sql
from .source import Source

__all__ = ["DuckDBSource", "is_duckdb", "from_duckdb", "PARQUET_CONNECTION"]

#: Settings of the connections stratagem opens itself (for Parquet paths): DuckDB's own memory
#: (buffers, hash tables) is capped so the Python process stays well under 2 GiB while it streams a
#: file of any size (DuckDB spills to a temporary folder beyond it), one thread per core, rows need
#: not keep their file order (aggregates do not depend on it, and keeping order costs memory), and no
#: progress bar (the Explorer shows its own state).
#: Change the dict before calling :func:`stratagem.analyze` to use other values; a relation the user
#: passes keeps the settings of its own connection.
PARQUET_CONNECTION = {
    "memory_limit": "1GB",
    "threads": max(1, os.cpu_count() or 1),
    "preserve_insertion_order": False,
}

_names = itertools.count()
_NUMERIC = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
            "UINTEGER", "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "DECIMAL")
_FLOAT = ("FLOAT", "DOUBLE")


def is_duckdb(data) -> bool:
    """Whether ``data`` is a DuckDB relation or a path to Parquet file(s)."""
    if isinstance(data, Path):
        return True
    if isinstance(data, str):
        return data.lower().endswith(".parquet") or data.lower().endswith(".parq")
    return type(data).__module__.split(".")[0] in ("duckdb", "_duckdb") and hasattr(data, "create_view")


def _kind(type_name: str) -> str:
    t = type_name.upper()
    base = t.split("(")[0].strip()
    if base in _NUMERIC:
        return "float" if base in _FLOAT else "numeric"
    if base == "BOOLEAN":
        return "bool"
    if base in ("VARCHAR", "ENUM") or t.startswith("ENUM"):
        return "string"
    return "other"


class DuckDBSource(Source):
    """A DuckDB view over the user's relation or Parquet file(s)."""

    dialect = sql.DUCKDB
    engine = "DuckDB"

    def __init__(self, connection, relation):
        self.connection = connection
        self.view = f"stratagem_src_{next(_names)}"
        relation.create_view(self.view, replace=True)
        self.columns = [str(c) for c in relation.columns]
        self.types = {c: str(t) for c, t in zip(self.columns, relation.types)}
        self.kinds = {c: _kind(t) for c, t in self.types.items()}
        super().__init__()

    def _run(self, frag: sql.Frag) -> pd.DataFrame:
        return self.connection.execute(frag.text, list(frag.params)).df()


def from_duckdb(data) -> DuckDBSource:
    """A :class:`DuckDBSource` for a relation, or for Parquet file(s) in a new in-memory connection."""
    import duckdb

    if isinstance(data, (str, Path)):
        con = duckdb.connect(config=dict(PARQUET_CONNECTION))
        con.execute("SET enable_progress_bar = false")  # a connection option, not a global one
        return DuckDBSource(con, con.read_parquet(str(data)))
    con = getattr(data, "_con", None)  # the relation's own connection, where its view must live
    if con is None:  # pragma: no cover - relations of other duckdb builds
        con = duckdb.default_connection()
    return DuckDBSource(con, data)
