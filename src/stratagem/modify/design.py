"""Design matrices built directly from arrays (never from formula strings), and small model fits.

Numeric confounders enter linearly; boolean ones as 0/1; other columns (text, categories) as
indicators of every level but the first (sorted) one. Constant columns are dropped.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import statsmodels.api as sm

__all__ = ["confounder_matrix", "fit_glm", "rcs_basis", "rcs_knots"]


def confounder_matrix(frame: pd.DataFrame) -> np.ndarray:
    """Columns of ``frame`` as a float matrix (n, p) with indicator coding of non-numeric columns."""
    parts = []
    for name in frame.columns:
        s = frame[name]
        if pd.api.types.is_bool_dtype(s):
            parts.append(s.to_numpy(dtype=float)[:, None])
        elif pd.api.types.is_numeric_dtype(s):
            parts.append(s.to_numpy(dtype=float)[:, None])
        else:
            values = s.astype(str).to_numpy() if not isinstance(s.dtype, pd.CategoricalDtype) else s.to_numpy()
            levels = sorted(pd.unique(values), key=str)
            parts.append(np.column_stack([values == lev for lev in levels[1:]]).astype(float)
                         if len(levels) > 1 else np.empty((len(s), 0)))
    if not parts:
        return np.empty((len(frame), 0))
    x = np.hstack(parts)
    keep = x.std(axis=0) > 0 if len(x) else np.ones(x.shape[1], dtype=bool)
    return x[:, keep]


def fit_glm(y, x, w=None, binary: bool = True, start=None):
    """Fit a logistic (``binary``) or Gaussian linear model with frequency weights; statsmodels GLM.

    Returns the statsmodels results, or raises ``np.linalg.LinAlgError``/``ValueError`` from the fit.
    Convergence and separation warnings are turned into errors so callers can report them.
    """
    family = sm.families.Binomial() if binary else sm.families.Gaussian()
    with warnings.catch_warnings():
        warnings.simplefilter("error", category=sm.tools.sm_exceptions.PerfectSeparationWarning)
        warnings.simplefilter("error", category=sm.tools.sm_exceptions.ConvergenceWarning)
        warnings.simplefilter("ignore", category=RuntimeWarning)
        return sm.GLM(y, x, family=family, freq_weights=w).fit(start_params=start)


def rcs_knots(x, k: int) -> np.ndarray:
    """Knots of a restricted cubic spline at Harrell's default quantiles for ``k`` knots (3 to 7).

    Harrell FE (2015), *Regression Modeling Strategies*, 2nd ed., section 2.4.6, table 2.3.
    """
    quantiles = {
        3: (0.10, 0.5, 0.90),
        4: (0.05, 0.35, 0.65, 0.95),
        5: (0.05, 0.275, 0.5, 0.725, 0.95),
        6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
        7: (0.025, 0.1833, 0.3417, 0.5, 0.6583, 0.8167, 0.975),
    }[k]
    return np.unique(np.quantile(np.asarray(x, dtype=float), quantiles))


def rcs_basis(x, knots) -> np.ndarray:
    """Restricted (natural) cubic spline basis without intercept, shape (n, len(knots) - 1).

    The first column is ``x``; the others are Harrell's truncated-power terms, scaled by
    ``(t_k - t_1)^2``, so the fit is linear beyond the outer knots (Harrell 2015, eq. 2.25).
    With fewer than 3 knots the basis is ``x`` alone.
    """
    x = np.asarray(x, dtype=float)
    t = np.asarray(knots, dtype=float)
    cols = [x]
    k = len(t)
    if k >= 3:
        scale = (t[-1] - t[0]) ** 2

        def cube(v):
            return np.maximum(v, 0.0) ** 3

        for j in range(k - 2):
            term = (cube(x - t[j])
                    - cube(x - t[-2]) * (t[-1] - t[j]) / (t[-1] - t[-2])
                    + cube(x - t[-1]) * (t[-2] - t[j]) / (t[-1] - t[-2]))
            cols.append(term / scale)
    return np.column_stack(cols)
