"""Tables from data-frame libraries other than pandas (polars, pyarrow, modin, ...), read through narwhals.

:func:`stratagem.analyze` works on pandas. A table in an engine (DuckDB relation, Parquet path, Spark
DataFrame) is analysed where it lives (:mod:`stratagem.engines`); any other frame that the
dataframe-agnostic layer `narwhals <https://narwhals-dev.github.io/narwhals/>`_ recognises is copied
once into a pandas DataFrame by :func:`to_pandas_input`, with the same column names and values, and
then analysed exactly as that pandas frame would be.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd

from .errors import DataError

__all__ = ["ACCEPTED", "to_pandas_input"]

# Said in every message about input that cannot be read, so the user sees what would work.
ACCEPTED = (
    "a pandas DataFrame, or a polars DataFrame or LazyFrame, a pyarrow Table, another frame that "
    "narwhals supports (modin, cuDF, ...), a DuckDB relation, a Parquet path or a Spark DataFrame"
)


def to_pandas_input(data: Any, columns: Sequence[str] | None = None) -> pd.DataFrame:
    """Return ``data`` as a pandas DataFrame with the same column names and values.

    Parameters
    ----------
    data : pandas.DataFrame or any frame narwhals supports
        A pandas DataFrame is returned as it is (not copied). A polars DataFrame, pyarrow Table,
        modin or cuDF frame (anything :func:`narwhals.from_native` accepts as a data frame) is
        converted. A lazy frame (e.g. a polars LazyFrame) is **collected first**: all its rows are
        brought into memory. For data larger than memory write it to Parquet and pass the path to
        :func:`stratagem.analyze`, which then runs in DuckDB without loading the rows. The input is
        never modified.
    columns : sequence of str, optional
        The columns the analysis uses. When all of them are in ``data``, only these are converted
        (a wide table is not copied whole); otherwise every column is converted, so that the
        missing-column error lists the table's real columns.

    Returns
    -------
    pandas.DataFrame
        A new frame with a default (0..n-1) index. Values map as pandas users would have them:
        numbers stay numbers (integers with nulls become floats with NaN), strings stay strings,
        nulls become missing values (so ``missing=`` treats them exactly as in pandas), boolean
        columns with nulls become pandas' nullable ``boolean``, a polars ``Enum`` becomes a pandas
        categorical with the Enum's levels in their order, and a polars ``Categorical`` (which polars
        orders lexically) a pandas categorical with its levels sorted. Arrow dictionary columns keep
        their dictionary order.

    Raises
    ------
    DataError
        If ``data`` is not a frame narwhals recognises (the message lists what is accepted), if
        narwhals is not installed, or if column names repeat.
    """
    if isinstance(data, pd.DataFrame):
        return data
    try:
        import narwhals as nw
    except ImportError:  # optional at import time: only needed for non-pandas frames
        raise DataError(
            f"data must be {ACCEPTED}; got {type(data).__name__}. Reading frames other than pandas needs narwhals: "
            "pip install narwhals, or convert it first, e.g. data.to_pandas()."
        ) from None
    try:
        frame = nw.from_native(data, pass_through=True)
    except nw.exceptions.DuplicateError as exc:
        raise DataError(f"{_repeated(data, exc)}; rename them so each is unique.") from None
    if isinstance(frame, nw.LazyFrame):
        frame = frame.collect()
    if not isinstance(frame, nw.DataFrame):  # passed through: narwhals does not know it (or a Series)
        raise DataError(
            f"data must be {ACCEPTED}; got {type(data).__name__}. Convert it first, e.g. pd.DataFrame(data)."
        )
    if columns is not None:
        wanted = set(columns)
        if wanted <= set(frame.columns):
            frame = frame.select([c for c in frame.columns if c in wanted])
    schema = frame.schema
    out = frame.to_pandas()
    if not isinstance(out.index, pd.RangeIndex) or out.index.start != 0 or out.index.step != 1:
        out = out.reset_index(drop=True)  # pandas-like backends (modin, cuDF) may carry their own index
    from_polars = frame.implementation is nw.Implementation.POLARS
    for name, dtype in schema.items():
        s = out[name]
        if dtype == nw.Boolean and s.dtype == object:  # booleans with nulls come back as objects
            out[name] = s.astype("boolean")
        elif from_polars and dtype == nw.Categorical and isinstance(s.dtype, pd.CategoricalDtype):
            # polars orders Categorical values lexically; its pandas export lists them as first seen
            out[name] = s.cat.reorder_categories(sorted(s.cat.categories))
    return out


def _repeated(data: Any, exc: Exception) -> str:
    """'Column names [...] appear more than once', naming the repeated names when they can be read."""
    names = getattr(data, "column_names", None) or getattr(data, "columns", None)
    try:
        names = [str(n) for n in names]
    except TypeError:
        return "Column names appear more than once (" + " ".join(str(exc).split()) + ")"
    return f"Column names {sorted({n for n in names if names.count(n) > 1})} appear more than once"
