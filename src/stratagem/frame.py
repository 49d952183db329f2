"""Reading the user's table: column checks, missing data, exposure and outcome coding, strata.

:func:`prepare` turns (DataFrame, Spec) into a :class:`Prepared` bundle of numpy arrays that every
estimator reads. The user's DataFrame is never modified: every step works on copies of single columns.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import (
    ColumnNotFoundError,
    DataError,
    ExposureError,
    MeasureError,
    MissingValuesError,
    ModifierError,
    OutcomeError,
    SpecError,
)
from .spec import Spec

__all__ = [
    "Prepared",
    "prepare",
    "resolve",
    "modifier_summary",
    "label_strata",
    "DEFAULT_BINS",
    "BIN_THRESHOLD",
]

DEFAULT_BINS = 4  # quantile bins for a numeric modifier without a bins entry
BIN_THRESHOLD = 10  # a numeric modifier with more distinct values than this is binned


@dataclass(frozen=True)
class Prepared:
    """Arrays an estimator needs, aligned row by row (after incomplete rows were dropped).

    Attributes
    ----------
    a : float64 array (n,)        exposure, 1.0 exposed and 0.0 unexposed
    y : float64 array (n,)        outcome
    w : float64 array (n,)        frequency of each row (ones unless ``counts`` was given)
    binary : bool                 whether the outcome is 0/1
    stratum : int64 array (n,)    index of each row's stratum into ``labels`` (all 0 without strata)
    labels : DataFrame            one row per stratum: one column per modifier (level labels), then
                                  ``stratum`` (a readable combined label)
    confounders : DataFrame       the confounder columns (copies), index reset
    y0, y1 : arrays or None       potential outcomes for ``method="exact"``
    notes : tuple of str          what was done to the data (rows dropped, bins made)
    n_input, n_dropped : int      rows given and rows dropped for missing values
    """

    a: np.ndarray
    y: np.ndarray
    w: np.ndarray
    binary: bool
    stratum: np.ndarray
    labels: pd.DataFrame
    confounders: pd.DataFrame
    y0: np.ndarray | None
    y1: np.ndarray | None
    notes: tuple = ()
    n_input: int = 0
    n_dropped: int = 0
    bin_edges: dict = field(default_factory=dict)

    @property
    def n_strata(self) -> int:
        return len(self.labels)


def _require_frame(data) -> pd.DataFrame:
    if not isinstance(data, pd.DataFrame):
        raise DataError(
            f"data must be a pandas DataFrame; got {type(data).__name__}. "
            "Convert it first, e.g. pd.DataFrame(data)."
        )
    if data.columns.duplicated().any():
        dup = sorted({str(c) for c in data.columns[data.columns.duplicated()]})
        raise DataError(f"Column names {dup} appear more than once; rename them so each is unique.")
    return data


def _used_columns(spec: Spec) -> list[tuple[str, str]]:
    cols = [("exposure", spec.exposure), ("outcome", spec.outcome)]
    cols += [("confounders", c) for c in spec.confounders]
    cols += [("strata", c) for c in spec.strata]
    if spec.counts is not None:
        cols.append(("counts", spec.counts))
    if spec.potential_outcomes is not None:
        cols += [("potential_outcomes", c) for c in spec.potential_outcomes]
    return cols


def _check_columns(data: pd.DataFrame, spec: Spec) -> None:
    present = set(map(str, data.columns)) | set(data.columns)
    for role, name in _used_columns(spec):
        if name not in present or name not in data.columns:
            close = [str(c) for c in data.columns if str(c).lower() == str(name).lower()]
            hint = f" Did you mean {close[0]!r}?" if close else ""
            shown = [str(c) for c in data.columns[:12]]
            more = " ..." if len(data.columns) > 12 else ""
            raise ColumnNotFoundError(
                f"Column {name!r} (given as {role}) is not in the data.{hint} "
                f"Columns are: {shown}{more}. Pass one of these names."
            )


def _is_numeric(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)


def _drop_missing(data: pd.DataFrame, spec: Spec) -> tuple[np.ndarray, list[str]]:
    """Boolean mask of complete rows over the used columns, and notes."""
    names = list(dict.fromkeys(name for _, name in _used_columns(spec)))
    miss = {name: int(data[name].isna().sum()) for name in names}
    bad = {k: v for k, v in miss.items() if v}
    if not bad:
        return np.ones(len(data), dtype=bool), []
    described = ", ".join(f"{k!r}: {v}" for k, v in bad.items())
    if spec.missing == "raise":
        raise MissingValuesError(
            f"Missing values in used columns ({described}). Fill or remove them, "
            "or pass missing='drop' to analyse complete rows only."
        )
    keep = ~data[names].isna().any(axis=1).to_numpy()
    dropped = int((~keep).sum())
    return keep, [f"{dropped} row(s) with missing values dropped ({described})."]


def _code_exposure(s: pd.Series, spec: Spec) -> np.ndarray:
    levels = pd.unique(s)
    shown = sorted(map(repr, levels))[:10]
    if spec.exposed_level is not None:
        if len(levels) > 2:
            raise ExposureError(
                f"Exposure {spec.exposure!r} must have two levels; found {len(levels)}: {shown}. "
                "Recode it to two levels (exposed / not exposed)."
            )
        hit = s == spec.exposed_level
        if not hit.any():
            raise ExposureError(
                f"exposed_level={spec.exposed_level!r} does not occur in exposure {spec.exposure!r} "
                f"(levels: {shown}). Pass one of these levels."
            )
        return hit.to_numpy(dtype=float)
    if pd.api.types.is_bool_dtype(s):
        return s.to_numpy(dtype=float)
    if _is_numeric(s) and _zero_one(s.to_numpy(dtype=float)):
        return s.to_numpy(dtype=float)
    if len(levels) == 2:
        raise ExposureError(
            f"Exposure {spec.exposure!r} has levels {shown}, not 0/1 or True/False. "
            f"Pass exposed_level= with the level that means exposed, e.g. exposed_level={levels[0]!r}."
        )
    raise ExposureError(
        f"Exposure {spec.exposure!r} must be binary (0/1, True/False, or two levels with "
        f"exposed_level=); found {len(levels)} levels: {shown}. Recode it to two levels."
    )


def _code_outcome(s: pd.Series, name: str) -> tuple[np.ndarray, bool]:
    if pd.api.types.is_bool_dtype(s):
        return s.to_numpy(dtype=float), True
    if not _is_numeric(s):
        levels = sorted(map(repr, pd.unique(s)))[:10]
        raise OutcomeError(
            f"Outcome {name!r} is not numeric (levels: {levels}). Recode it as 0/1 for a binary "
            "outcome, or as numbers for a numeric outcome."
        )
    y = s.to_numpy(dtype=float)
    if not np.all(np.isfinite(y)):
        raise OutcomeError(f"Outcome {name!r} has infinite values; remove or recode those rows.")
    return y, _zero_one(y)


def resolve(spec: Spec, binary: bool) -> Spec:
    """Fill the choices left to stratagem (method, measure) and check measure against outcome."""
    changes = {}
    if spec.method is None:
        if spec.potential_outcomes is not None:
            changes["method"] = "exact"
        elif spec.confounders:
            changes["method"] = "aipw"
        else:
            changes["method"] = "crude"
    if spec.measure is None:
        changes["measure"] = "rd" if binary else "md"
    out = spec.replace(**changes) if changes else spec
    if binary and out.measure == "md":
        raise MeasureError(
            f"measure='md' is for a numeric outcome, but {out.outcome!r} is binary (0/1). "
            "Use measure='rd' (risk difference), 'rr' or 'or'."
        )
    if not binary and out.measure in ("rd", "rr", "or"):
        raise MeasureError(
            f"measure={out.measure!r} needs a binary (0/1) outcome, but {out.outcome!r} is numeric. "
            "Use measure='md' (mean difference), or recode the outcome as 0/1."
        )
    if out.method == "exact" and out.potential_outcomes is None:
        raise SpecError(
            "method='exact' needs both potential outcomes: pass potential_outcomes=('y0', 'y1') "
            "naming the columns that hold them."
        )
    return out


def _fmt(x: float) -> str:
    return f"{x:.4g}"


def _quantiles(x: np.ndarray, w: np.ndarray | None, q: np.ndarray) -> np.ndarray:
    """Quantiles of ``x`` as if each value were repeated ``w`` times (numpy's default, linear
    method, on the expanded data), so a table of counts gets the bins of its individual rows."""
    if w is None or np.all(w == 1):
        return np.quantile(x, q)
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    xs, ws = xs[ws > 0], ws[ws > 0]
    cum = np.cumsum(ws)  # expanded position j holds xs[i] for the first i with cum[i] > j
    h = (cum[-1] - 1) * q
    lo, hi = np.floor(h), np.ceil(h)
    at = lambda j: xs[np.minimum(np.searchsorted(cum, j, side="right"), len(xs) - 1)]  # noqa: E731
    return at(lo) + (h - lo) * (at(hi) - at(lo))


def bin_edges(name: str, rule, quantiles, lo: float, hi: float) -> tuple[np.ndarray, str]:
    """Edges of a numeric modifier's bins and a few words on how they were made.

    ``rule`` is a bin count (quantile bins; ``quantiles(probs)`` returns the values at those
    probabilities) or increasing edges, which must cover the values' range ``lo`` to ``hi``. Shared
    by the in-memory path and the engines, so both cut and complain alike.
    """
    if isinstance(rule, int):
        edges = np.unique(quantiles(np.linspace(0, 1, rule + 1)))
        if len(edges) < 3:
            raise ModifierError(
                f"Modifier {name!r} has too few distinct values for {rule} quantile bins; "
                "pass fewer bins or explicit edges in bins=."
            )
        return edges, f"{len(edges) - 1} quantile bins"
    edges = np.asarray(rule, dtype=float)
    if lo < edges[0] or hi > edges[-1]:
        raise ModifierError(
            f"Bin edges for {name!r} span {_fmt(edges[0])} to {_fmt(edges[-1])}, but its values "
            f"run from {_fmt(lo)} to {_fmt(hi)}. Widen the first or last edge."
        )
    return edges, f"{len(edges) - 1} bins at given edges"


def _bin(s: pd.Series, name: str, rule, w: np.ndarray | None = None) -> tuple[pd.Categorical, tuple, str]:
    x = s.to_numpy(dtype=float)
    edges, how = bin_edges(name, rule, lambda probs: _quantiles(x, w, probs), x.min(), x.max())
    idx = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2)
    labels = [
        f"[{_fmt(lo)}, {_fmt(hi)}{']' if i == len(edges) - 2 else ')'}"
        for i, (lo, hi) in enumerate(zip(edges[:-1], edges[1:]))
    ]
    cat = pd.Categorical.from_codes(idx, categories=labels)
    return cat, tuple(float(e) for e in edges), how


def _modifier_levels(
    s: pd.Series, name: str, spec: Spec, *, auto_bin: bool = True, w: np.ndarray | None = None
) -> tuple[pd.Categorical, tuple | None, str | None]:
    """Categorical of level labels for one modifier; numeric columns with many values are binned
    (unless ``auto_bin`` is False: then each value is its own level, as for few distinct values)."""
    rule = spec.bins.get(name)
    if _is_numeric(s):
        n_distinct = s.nunique()
        if rule is None and auto_bin and n_distinct > BIN_THRESHOLD:
            rule = DEFAULT_BINS
        if rule is not None:
            cat, edges, how = _bin(s, name, rule, w)
            return cat, edges, f"Modifier {name!r} cut into {how}."
        values = np.sort(s.unique())
        labels = [_fmt(v) if not float(v).is_integer() else str(int(v)) for v in values]
        codes = np.searchsorted(values, s.to_numpy())
        return pd.Categorical.from_codes(codes, categories=labels), None, None
    if rule is not None:
        raise ModifierError(
            f"bins were given for {name!r}, which is not numeric; remove its entry from bins=."
        )
    if isinstance(s.dtype, pd.CategoricalDtype):
        cats = [c for c in s.cat.categories if (s == c).any()]
        # recode through the column's own codes: pd.Categorical(s, categories=cats) with unused
        # categories left out is deprecated by pandas (Pandas4Warning)
        raw = s.cat.codes.to_numpy()
        codes = np.where(raw >= 0, pd.Index(cats).get_indexer(s.cat.categories)[raw], -1)
    else:
        uniq = pd.unique(s)
        try:
            cats = sorted(uniq)
        except TypeError:
            cats = sorted(uniq, key=str)
        codes = pd.Categorical(s, categories=cats).codes
    if len(cats) > spec.max_levels:
        raise ModifierError(
            f"Modifier {name!r} has {len(cats)} levels, more than max_levels={spec.max_levels}. "
            "Group its levels into fewer, or raise max_levels=."
        )
    labels = [str(c) for c in cats]
    if len(set(labels)) < len(labels):
        labels = [f"{c!r}" for c in cats]
    return pd.Categorical.from_codes(codes, categories=labels), None, None


def _zero_one(v: np.ndarray) -> bool:
    """Whether every value is 0 or 1 (one pass; no sort)."""
    return bool(((v == 0.0) | (v == 1.0)).all())


def _occupied(radix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct codes and each row's index into them, as ``np.unique(..., return_inverse)``.

    When the code space is small the occupied codes come from one ``np.bincount`` and a lookup
    table (linear time); otherwise from ``np.unique`` (a sort).
    """
    top = int(radix.max()) + 1 if radix.size else 0
    if 0 < top <= max(1 << 22, radix.size):
        combos = np.flatnonzero(np.bincount(radix, minlength=top))
        lookup = np.zeros(top, dtype=np.int64)
        lookup[combos] = np.arange(len(combos))
        return combos, lookup[radix]
    combos, inverse = np.unique(radix, return_inverse=True)
    return combos, inverse.reshape(-1)


def _strata(
    df: pd.DataFrame, spec: Spec, w: np.ndarray | None = None
) -> tuple[np.ndarray, pd.DataFrame, list[str], dict]:
    n = len(df)
    if not spec.strata:
        return np.zeros(n, dtype=np.int64), pd.DataFrame({"stratum": ["all"]}), [], {}
    cats, notes, edges = {}, [], {}
    for name in spec.strata:
        cat, e, note = _modifier_levels(df[name], name, spec, w=w)
        cats[name] = cat
        if e is not None:
            edges[name] = e
        if note:
            notes.append(note)
    # Crossed strata in nesting order; only observed combinations are kept.
    radix = np.ones(n, dtype=np.int64) * 0
    for name in spec.strata:
        radix = radix * len(cats[name].categories) + cats[name].codes.astype(np.int64)
    combos, stratum = _occupied(radix)
    labels = {}
    rest = combos.copy()
    for name in reversed(spec.strata):
        k = len(cats[name].categories)
        labels[name] = np.asarray(cats[name].categories)[rest % k]
        rest = rest // k
    frame = pd.DataFrame({name: labels[name] for name in spec.strata})
    frame["stratum"] = _combined_labels(frame, spec.strata)
    return stratum.astype(np.int64), frame, notes, edges


def _combined_labels(frame: pd.DataFrame, names) -> list[str]:
    """The readable stratum label of every row, e.g. ``"sex=female, age=[30, 50)"``."""
    parts = [f"{name}=" + frame[name].astype(str) for name in names]  # whole columns at once
    out = parts[0]
    for part in parts[1:]:
        out = out + ", " + part
    return list(out)


def label_strata(data: pd.DataFrame, spec: Spec, bin_edges: dict | None = None) -> pd.DataFrame:
    """Label every row of a new table with the strata of an analysis that used ``spec``.

    Numeric modifiers that the analysis binned are cut at the analysis's own edges (``bin_edges``,
    from :attr:`Prepared.bin_edges`); every other modifier gets level labels exactly as
    :func:`prepare` makes them, never new bins. Rows must have no missing modifier values, and
    binned values must lie within the edges (else :class:`ModifierError`).

    Returns a DataFrame aligned with ``data`` (index reset): one column per modifier, then
    ``stratum``, the combined label used in ``Analysis.strata``.
    """
    bin_edges = dict(bin_edges or {})
    plain = spec.replace(bins={})
    cats = {}
    radix = np.zeros(len(data), dtype=np.int64)
    for name in spec.strata:
        s = data[name].reset_index(drop=True)
        if name in bin_edges:
            cat, _, _ = _bin(s, name, bin_edges[name])
        else:
            cat, _, _ = _modifier_levels(s, name, plain, auto_bin=False)
        cats[name] = cat
        radix = radix * len(cat.categories) + cat.codes.astype(np.int64)
    # Label each observed combination once, then spread the labels over the rows.
    _, first, inverse = np.unique(radix, return_index=True, return_inverse=True)
    combos = pd.DataFrame(
        {name: np.asarray(cat.categories, dtype=object)[cat.codes[first]] for name, cat in cats.items()}
    )
    combos["stratum"] = _combined_labels(combos, spec.strata)
    return combos.take(inverse.ravel()).reset_index(drop=True)


def prepare(data: pd.DataFrame, spec: Spec) -> tuple[Prepared, Spec]:
    """Check the table against the Spec and return the arrays estimators use, and the resolved Spec.

    Raises a :class:`~stratagem.errors.StratagemError` subclass naming the column and the fix for
    every problem found. The input DataFrame is only read.
    """
    data = _require_frame(data)
    _check_columns(data, spec)
    n_input = len(data)
    keep, notes = _drop_missing(data, spec)
    cols = list(dict.fromkeys(name for _, name in _used_columns(spec)))
    df = data.loc[keep, cols].reset_index(drop=True) if not keep.all() else data[cols].reset_index(drop=True)
    if len(df) == 0:
        raise DataError(
            "No complete rows to analyse"
            + (" after dropping rows with missing values" if n_input else "")
            + ". Check the columns named in the analysis."
        )
    if spec.counts is not None:
        w = df[spec.counts]
        if not _is_numeric(w) or (w.to_numpy(dtype=float) < 0).any():
            raise DataError(
                f"counts column {spec.counts!r} must hold non-negative numbers (frequencies); "
                "fix or remove it."
            )
        w = w.to_numpy(dtype=float)
    else:
        w = np.ones(len(df))
    a = _code_exposure(df[spec.exposure], spec)
    y, binary = _code_outcome(df[spec.outcome], spec.outcome)
    kept = y[w > 0]
    if kept.size == 0 or kept.min() == kept.max():
        raise OutcomeError(
            f"Outcome {spec.outcome!r} is constant ({_fmt(y[w > 0][0]) if (w > 0).any() else 'no rows'}); "
            "an effect cannot be estimated. Check the outcome column and the rows kept."
        )
    spec = resolve(spec, binary)
    y0 = y1 = None
    if spec.potential_outcomes is not None:
        y0, _ = _code_outcome(df[spec.potential_outcomes[0]], spec.potential_outcomes[0])
        y1, _ = _code_outcome(df[spec.potential_outcomes[1]], spec.potential_outcomes[1])
    stratum, labels, strata_notes, edges = _strata(df, spec, w)
    # ``df`` is already a new frame (a column selection: a copy in pandas 2, copy-on-write in pandas 3),
    # so the user's table cannot be reached from here; a .copy() would only add a deep copy and a
    # block consolidation (a third of a second at a million rows).
    confounders = df[list(spec.confounders)] if spec.confounders else pd.DataFrame(index=df.index)
    prepared = Prepared(
        a=a,
        y=y,
        w=w,
        binary=binary,
        stratum=stratum,
        labels=labels,
        confounders=confounders,
        y0=y0,
        y1=y1,
        notes=tuple(notes + strata_notes),
        n_input=n_input,
        n_dropped=int((~keep).sum()),
        bin_edges=edges,
    )
    return prepared, spec


def modifier_summary(data: pd.DataFrame, column: str, *, max_levels: int = 20) -> dict:
    """Describe whether ``column`` can serve as a modifier: ``{"ok", "kind", "tag", "reason"}``.

    Used by the widgets to label variables ("2 levels", "numeric · 4 bins") and to disable columns
    that cannot form strata (constant, too many levels).
    """
    s = data[column].dropna()
    n_distinct = int(s.nunique())
    if n_distinct < 2:
        return {"ok": False, "kind": "constant", "tag": "constant", "reason": "has a single value"}
    if _is_numeric(s) and n_distinct > BIN_THRESHOLD:
        return {"ok": True, "kind": "numeric", "tag": f"numeric · {DEFAULT_BINS} bins", "reason": ""}
    if not _is_numeric(s) and not pd.api.types.is_bool_dtype(s) and n_distinct > max_levels:
        return {
            "ok": False,
            "kind": "many",
            "tag": f"{n_distinct} levels",
            "reason": f"has {n_distinct} levels (more than {max_levels}); group them first",
        }
    return {"ok": True, "kind": "levels", "tag": f"{n_distinct} levels", "reason": ""}
