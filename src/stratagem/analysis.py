"""analyze(data, spec) -> Analysis: the one entry point that widgets, reports and the CLI call.

It is a pure function of the table and the Spec: it reads the table (never changes it), runs the
chosen estimator, turns potential-outcome means into the chosen measure with its interval, and adds
the modification toolkit's tables. Everything shown anywhere in stratagem comes from here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from importlib import import_module
from typing import Any

import numpy as np
import pandas as pd

from . import measures
from .estimate import get_estimator
from .estimate.base import OK, GroupMeans
from .estimate.bootstrap import bootstrap_replicates
from .frame import Prepared, prepare
from .results import OVERALL_FIELDS, STRATA_COLUMNS, Analysis
from .spec import Spec

__all__ = ["analyze", "extensions"]

# Steps run after estimation, in order: "module:function" in this package, each called as
# f(prep, spec, means, fields) -> dict of Analysis fields to set or replace. Diagnostics and the
# modification toolkit live in their own modules so analyze() stays one short pipeline.
extensions: list[str] = [
    "diagnostics:diagnostics_fields",
    "modify:toolkit_fields",
]


def _extension(path: str):
    module, _, function = path.partition(":")
    try:
        mod = import_module(f"{__package__}.{module}")
    except ModuleNotFoundError as exc:  # a step whose module is not in this build
        if exc.name == f"{__package__}.{module}":
            return None
        raise
    return getattr(mod, function)


def analyze(
    data: pd.DataFrame,
    spec: Spec | dict | None = None,
    /,
    *,
    progress: Callable[[float], None] | None = None,
    **fields: Any,
) -> Analysis:
    """Estimate the effect of the exposure overall and within every stratum of the modifiers.

    Parameters
    ----------
    data : pandas.DataFrame, polars or pyarrow frame, DuckDB relation, Parquet path or Spark DataFrame
        One row per individual (or per cell of a table of counts, with ``counts=``). Only read.
        Frames that narwhals reads (polars, pyarrow, ...) are converted once to pandas (a polars
        LazyFrame is collected); DuckDB relations, Parquet paths and Spark DataFrames are analysed
        where they live (:mod:`stratagem.engines`).
    spec : Spec, dict or None
        A Spec, or a mapping of its fields; ``fields`` given as keywords override it.
    progress : callable, optional
        Called with the fraction of bootstrap work done (0 to 1). It may raise to abandon the work.
    **fields
        Any field of :class:`~stratagem.spec.Spec`: ``exposure``, ``outcome``, ``confounders``,
        ``strata``, ``method``, ``measure``, ``level``, ``interval``, ``n_boot``, ``seed``, ``bins``,
        ``potential_outcomes``, ``counts``, ``exposed_level``, ``missing``, ``max_levels``,
        ``correction``, ``truncate``, ``monotone``.

    Returns
    -------
    Analysis
        Tables of per-stratum and overall effects, tests, response types and checks.

    Examples
    --------
    >>> import stratagem as sg
    >>> df = sg.demo_data()
    >>> a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("lives_alone",),
    ...                method="crude")
    >>> list(a.strata["lives_alone"])
    ['no', 'yes']
    """
    spec = Spec.from_fields(spec, **fields)
    if not isinstance(data, pd.DataFrame):  # a DuckDB relation, Parquet path or Spark DataFrame
        from .engines import analyze_engine, is_engine_input

        if is_engine_input(data):
            return analyze_engine(data, spec, progress)
        # another library's frame (polars, pyarrow, ...): one copy of the used columns into pandas
        from .dataframes import to_pandas_input
        from .frame import _used_columns

        data = to_pandas_input(data, columns=[name for _, name in _used_columns(spec)])
    prep, spec = prepare(data, spec)
    if spec.method in _SORTED_LEVELS:
        prep = _text_as_categories(prep)
    estimator = get_estimator(spec.method)
    gm = estimator(prep, spec)
    replicates = theta_b = None
    if spec.interval == "bootstrap" and spec.method != "exact":
        m1_b, m0_b, theta_b = bootstrap_replicates(estimator, prep, spec, progress=progress)
        replicates = (m1_b, m0_b)
    table = _effects_table(prep, spec, gm, replicates, theta_b)
    strata = table.iloc[:-1].reset_index(drop=True) if spec.strata else table.iloc[0:0]
    overall = table.iloc[-1][OVERALL_FIELDS].rename("overall")
    notes = list(prep.notes) + list(gm.notes)
    result = dict(
        spec=spec,
        overall=overall,
        strata=strata,
        notes=tuple(notes),
        n_input=prep.n_input,
        n_dropped=prep.n_dropped,
        extra={"replicates": replicates, "replicate_theta": theta_b, "bin_edges": dict(prep.bin_edges),
               "covariance": {"v11": gm.v11, "v00": gm.v00, "v10": gm.v10}, **gm.extra},
    )
    if "response_types" in gm.extra:
        result["response_types"] = gm.extra["response_types"]
    for path in extensions:
        step = _extension(path)
        if step is not None:
            result.update(step(prep, spec, gm, result))
    return Analysis(**result)


# Methods whose estimators code a text confounder by its sorted levels (the adjusted models), so
# reading it through a categorical of sorted categories gives the same numbers to the last digit.
# Mantel-Haenszel codes levels in order of appearance: a categorical would reorder its sums.
_SORTED_LEVELS = ("standardization", "ipw", "aipw")


def _text_as_categories(prep: Prepared) -> Prepared:
    """``prep`` with each text confounder column (pandas ``str`` dtype) as a categorical of its
    sorted values: the same values, read through integer codes.

    The adjusted estimator's design and positivity checks and the Checks table each turn a text
    column into level codes (sorted levels, as here); on Arrow-backed strings each of those passes
    costs milliseconds per 10^5 rows, so the one factorisation here replaces three. Numbers are
    unchanged (compared to the last digit on the demo and benchmark data).
    """
    frame = prep.confounders
    text = [c for c in frame.columns if isinstance(frame[c].dtype, pd.StringDtype)]
    if not text:
        return prep
    columns = {}
    for c in frame.columns:
        s = frame[c]
        if c in text:
            codes, levels = pd.factorize(s, sort=True)
            s = pd.Series(pd.Categorical.from_codes(codes, categories=levels), index=s.index, name=c)
        columns[c] = s
    return replace(prep, confounders=pd.DataFrame(columns, index=frame.index))


def _effects_table(prep: Prepared, spec: Spec, gm: GroupMeans, replicates, theta_b=None) -> pd.DataFrame:
    """One row per stratum plus the overall row, with the columns of STRATA_COLUMNS."""
    if gm.theta is not None:
        theta, se = gm.theta, gm.se
    else:
        theta, se = measures.on_analysis_scale(spec.measure, gm.m1, gm.m0, gm.v11, gm.v00, gm.v10)
    status = list(gm.status)
    if replicates is not None:
        if theta_b is None:  # estimators that give theta directly (Mantel-Haenszel) return its replicates
            theta_b, _ = measures.on_analysis_scale(spec.measure, *replicates, 0.0, 0.0, 0.0)
        est, lo, hi, p, se = _percentile(spec, theta, theta_b)
    else:
        est, lo, hi, p = measures.wald(spec.measure, theta, se, spec.level)
    for g, s in enumerate(status):
        if s == OK and not np.isfinite(theta[g]):
            status[g] = f"{spec.measure} is undefined here (a risk of 0 or 1); try measure='rd'"
    bad = np.array([s != OK for s in status])
    est, se, lo, hi, p = (np.where(bad, np.nan, v) for v in (est, se, lo, hi, p))
    overall_label = {c: "" for c in prep.labels.columns}
    overall_label["stratum"] = "overall"
    labels = pd.concat([prep.labels, pd.DataFrame([overall_label])], ignore_index=True)
    # one constructor call: adding the eleven columns one by one costs more than the rest here
    columns = {c: labels[c] for c in [*spec.strata, "stratum"]}
    columns.update(n=gm.n, n_exposed=gm.n1, n_unexposed=gm.n0, mean_exposed=gm.m1,
                   mean_unexposed=gm.m0, estimate=est, se=se, ci_low=lo, ci_high=hi, p_value=p,
                   status=status)
    return pd.DataFrame(columns, index=labels.index, columns=[*spec.strata, *STRATA_COLUMNS])


def _percentile(spec: Spec, theta, theta_b):
    """Percentile bootstrap interval; se is the replicates' standard deviation (analysis scale)."""
    alpha = 1 - spec.level
    finite = np.isfinite(theta_b)
    with np.errstate(invalid="ignore"):
        lo = np.array([np.quantile(col[ok], alpha / 2) if ok.sum() > 1 else np.nan
                       for col, ok in zip(theta_b.T, finite.T)])
        hi = np.array([np.quantile(col[ok], 1 - alpha / 2) if ok.sum() > 1 else np.nan
                       for col, ok in zip(theta_b.T, finite.T)])
        se = np.array([np.std(col[ok], ddof=1) if ok.sum() > 1 else np.nan
                       for col, ok in zip(theta_b.T, finite.T)])
    est, _, _, p = measures.wald(spec.measure, theta, se, spec.level)
    if spec.measure in measures.RATIO:
        lo, hi = np.exp(lo), np.exp(hi)
    return est, lo, hi, p, se
