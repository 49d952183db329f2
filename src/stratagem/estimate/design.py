"""Confounder design matrices, built directly from the table (no formula strings, no eval).

Coding rules (common practice, e.g. Hosmer, Lemeshow & Sturdivant, *Applied Logistic Regression*,
3rd ed., 2013, ch. 3 on design variables):

* numeric columns enter as they are (one column each, original scale);
* bool, categorical and other non-numeric columns get indicator (dummy) coding, one column per level
  except the first level, which is the reference (categories in their declared order for a
  ``Categorical``; sorted levels otherwise; ``False`` first for bools);
* columns that are constant are dropped, with a note;
* exact collinearity is found from the weighted correlation (Gram) matrix of the centred columns,
  scanning columns in order: a column whose variance left after regressing it on the columns kept
  before it (and an intercept) is below ``1e-9`` of its own variance is redundant and dropped, with a
  note. The design is never rank deficient afterwards, so no fit crashes on it.

The estimators standardise the kept columns (weighted mean 0, standard deviation 1) before fitting,
for numerical conditioning only: fitted values, and so every reported mean, are the same as on the
original scale.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .glm import dot_cols, weighted_gram  # products whose result does not depend on BLAS threads

__all__ = ["Design", "confounder_design", "independent_columns", "independent_from_covariance", "dropped_column_notes"]

RANK_TOL = 1e-9  # a column whose unexplained share of variance is below this is redundant


@dataclass(frozen=True)
class Design:
    """A confounder design matrix without an intercept.

    Attributes
    ----------
    matrix : ndarray, shape (n, p)
        Float64 design columns, original scale, rows in the order asked for.
    names : tuple of str
        One name per column: the column name for numeric columns, ``"name=level"`` for indicators.
    sources : tuple of str
        The table column each design column came from.
    notes : tuple of str
        Columns dropped (constant or collinear) and why.
    """

    matrix: np.ndarray
    names: tuple
    sources: tuple
    notes: tuple = field(default=())


def _is_numeric(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)


def _levels(s: pd.Series) -> list:
    if isinstance(s.dtype, pd.CategoricalDtype):
        present = set(pd.unique(s.dropna()))
        return [c for c in s.cat.categories if c in present]
    uniq = list(pd.unique(s.dropna()))
    try:
        return sorted(uniq)
    except TypeError:
        return sorted(uniq, key=str)


def _plan(frame: pd.DataFrame) -> tuple[list, list]:
    """Which design columns each table column gives: (name, source, kind, level) and notes."""
    plan, notes = [], []
    for col in frame.columns:
        s = frame[col]
        if _is_numeric(s):
            x = s.to_numpy(dtype=float)
            if x.size == 0 or np.all(x == x[0]):
                notes.append(f"Confounder {col!r} is constant and was dropped.")
                continue
            plan.append((str(col), col, "numeric", None))
            continue
        levels = _levels(s)
        if len(levels) < 2:
            notes.append(f"Confounder {col!r} has a single level and was dropped.")
            continue
        for level in levels[1:]:  # first level is the reference
            plan.append((f"{col}={level}", col, "level", level))
    return plan, notes


def _fill(frame: pd.DataFrame, plan: list, order: np.ndarray | None) -> np.ndarray:
    n = len(frame)
    out = np.empty((n, len(plan)))
    cache: dict = {}
    for j, (_, col, kind, level) in enumerate(plan):
        if col not in cache:
            if kind == "numeric":
                cache = {col: frame[col].to_numpy(dtype=float)}
            else:  # compare integer codes, not the values themselves
                s = frame[col]
                codes, uniques = pd.factorize(s, sort=False)
                cache = {col: (codes, {u: i for i, u in enumerate(uniques)})}
        v = cache[col]
        if kind == "numeric":
            out[:, j] = v
        else:
            codes, index = v
            out[:, j] = codes == index.get(level, -2)
    return out if order is None else out[order]


def _covariance(x: np.ndarray, w: np.ndarray, total: float) -> np.ndarray:
    """Weighted covariance matrix of the columns of ``x`` (p x p), without copying ``x`` when the
    columns are roughly centred already; a centred copy is used where cancellation would lose digits."""
    mean = dot_cols(x, w) / total
    raw = weighted_gram(x, w) / total
    gram = raw - np.outer(mean, mean)
    if np.any(np.diag(gram) < 1e-6 * np.diag(raw)):  # a column far from centred: be exact
        xc = x - mean
        gram = weighted_gram(xc, w) / total
    return gram


def independent_columns(x: np.ndarray, w: np.ndarray | None = None, tol: float = RANK_TOL):
    """Which columns of ``x`` (n, p) to keep so that ``[1, x[:, keep]]`` has full column rank.

    Columns are scanned in order; a column is kept when the share of its weighted variance not
    explained by an intercept and the columns kept before it exceeds ``tol``.

    Returns
    -------
    keep : bool ndarray (p,)
    reason : list of str
        For each column, ``""`` (kept), ``"constant"`` or ``"collinear"``.
    """
    n, p = x.shape
    w = np.ones(n) if w is None else np.asarray(w, dtype=float)
    total = w.sum()
    if p == 0 or total <= 0:
        return np.zeros(p, dtype=bool), ["constant"] * p
    return independent_from_covariance(_covariance(x, w, total), tol)


def independent_from_covariance(gram: np.ndarray, tol: float = RANK_TOL):
    """:func:`independent_columns` from the weighted covariance matrix (p, p) of the columns.

    Shared with the engines (:mod:`stratagem.engines`), which get the matrix from an aggregate
    query instead of the rows. Returns ``(keep, reason)`` as :func:`independent_columns` does.
    """
    p = gram.shape[0]
    keep = np.zeros(p, dtype=bool)
    reason = [""] * p
    if p == 0:
        return keep, reason
    scale = np.sqrt(np.maximum(np.diag(gram), 0.0))
    top = max(float(scale.max()), 1e-300)
    for j in range(p):
        if scale[j] <= 1e-12 * top or scale[j] == 0.0:
            reason[j] = "constant"
            continue
        kept = np.flatnonzero(keep)
        left = gram[j, j]
        if kept.size:
            g_kk = gram[np.ix_(kept, kept)]
            g_kj = gram[kept, j]
            left = gram[j, j] - g_kj @ np.linalg.solve(g_kk, g_kj)
        if left <= tol * gram[j, j]:
            reason[j] = "collinear"
            continue
        keep[j] = True
    return keep, reason


def dropped_column_notes(names, keep: np.ndarray, reason) -> list[str]:
    """One note per design column left out by :func:`independent_columns` (or
    :func:`independent_from_covariance`): constant, or a linear combination of the others."""
    notes = []
    for j in np.flatnonzero(~keep):
        if reason[j] == "constant":
            notes.append(f"Confounder column {names[j]!r} is constant and was dropped.")
        else:
            notes.append(
                f"Confounder column {names[j]!r} is an exact linear combination of other confounder "
                "columns (collinear) and was dropped; the adjustment is unchanged."
            )
    return notes


def confounder_design(
    frame: pd.DataFrame, *, order: np.ndarray | None = None, w: np.ndarray | None = None
) -> Design:
    """Design matrix of the confounders in ``frame`` (see the module docstring for the coding).

    Parameters
    ----------
    frame : DataFrame
        The confounder columns (``Prepared.confounders``); only read.
    order : int ndarray, optional
        Row order of the result (e.g. rows sorted by stratum); default the frame's order.
    w : ndarray, optional
        Frequency weights (in the frame's row order) used to judge constancy and collinearity.

    Returns
    -------
    Design
    """
    plan, notes = _plan(frame)
    x = _fill(frame, plan, order)
    if x.shape[1] == 0:
        return Design(x, (), (), tuple(notes))
    ww = None if w is None else (np.asarray(w, dtype=float) if order is None else np.asarray(w)[order])
    keep, reason = independent_columns(x, ww)
    if not keep.all():
        notes.extend(dropped_column_notes([entry[0] for entry in plan], keep, reason))
        x = np.ascontiguousarray(x[:, keep])
        plan = [p for p, k in zip(plan, keep) if k]
    return Design(x, tuple(p[0] for p in plan), tuple(p[1] for p in plan), tuple(notes))
