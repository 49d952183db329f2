"""Spark as the engine: a PySpark DataFrame, analysed where it lives (local mode or a cluster).

The DataFrame is registered as a temporary view with a generated name; every query is built by
:mod:`.sql` (identifiers in backticks with backticks doubled, ``?`` parameters) and run with
``spark.sql(text, args=[...])`` (positional parameters, Spark >= 3.5). Only small aggregate results
are collected to the driver.
"""

from __future__ import annotations

import itertools

import pandas as pd

from . import sql
from .source import Source

__all__ = ["SparkSource", "is_spark"]

_names = itertools.count()


def is_spark(data) -> bool:
    """Whether ``data`` is a PySpark DataFrame (classic or Spark Connect)."""
    mod = type(data).__module__
    return mod.startswith("pyspark.") and type(data).__name__ == "DataFrame"


def _kind(data_type) -> str:
    from pyspark.sql import types as T

    if isinstance(data_type, (T.FloatType, T.DoubleType)):
        return "float"
    if isinstance(data_type, T.NumericType):
        return "numeric"
    if isinstance(data_type, T.BooleanType):
        return "bool"
    if isinstance(data_type, T.StringType):
        return "string"
    return "other"


class SparkSource(Source):
    """A temporary view over the user's Spark DataFrame."""

    dialect = sql.SPARK
    engine = "Spark"

    def __init__(self, frame):
        self.spark = frame.sparkSession
        self.view = f"stratagem_src_{next(_names)}"
        frame.createOrReplaceTempView(self.view)
        fields = frame.schema.fields
        self.columns = [f.name for f in fields]
        self.types = {f.name: f.dataType.simpleString() for f in fields}
        self.kinds = {f.name: _kind(f.dataType) for f in fields}
        super().__init__()

    def _run(self, frag: sql.Frag) -> pd.DataFrame:
        rows = self.spark.sql(frag.text, args=list(frag.params)).collect()
        if not rows:
            return pd.DataFrame()
        names = list(rows[0].asDict().keys())
        return pd.DataFrame([tuple(r) for r in rows], columns=names)
