"""The engine-neutral view of a table that lives in an engine (DuckDB or Spark).

A :class:`Source` knows the table's columns and their kinds (``"numeric"``, ``"float"``, ``"bool"``,
``"string"`` or ``"other"``) without reading any row, runs one SQL query at a time and counts the
full scans it made, so the Checks can say how much work the engine did.
"""

from __future__ import annotations

import pandas as pd

from . import sql

__all__ = ["Source"]


class Source:
    """Base of the engine adapters: ``columns``, ``kinds``, ``dialect``, ``view`` and ``run``."""

    dialect: sql.Dialect
    engine: str = "engine"
    view: str
    columns: list
    kinds: dict

    def __init__(self) -> None:
        self.scans = 0  # queries that read the whole table
        self.rows_per_scan = 0

    @property
    def table(self) -> sql.Frag:
        return self.dialect.ident(self.view)

    def run(self, frag: sql.Frag) -> pd.DataFrame:
        """Run one query (a full scan of the table) and return its (small) result as pandas."""
        self.scans += 1
        return self._run(frag)

    def _run(self, frag: sql.Frag) -> pd.DataFrame:  # pragma: no cover - each engine implements it
        raise NotImplementedError
