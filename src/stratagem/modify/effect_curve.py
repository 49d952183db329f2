"""Effect curve over one numeric modifier: the DR-learner with cross-fitting.

Kennedy EH (2023). Towards optimal doubly robust estimation of heterogeneous causal effects.
*Electronic Journal of Statistics* 17(2):3008-3049 (arXiv 2004.14497, 2020).

1. Split the rows into ``folds`` parts at random (seeded). For each part, fit on the other parts
   a propensity model ``pi(X) = P(A=1 | X)`` (logistic) and outcome models ``mu_a(X) = E(Y | A=a, X)``
   for each arm (logistic for a 0/1 outcome, linear otherwise), with X = the confounders and a
   restricted cubic spline of the modifier V; predict on the held-out part (cross-fitting).
2. Form the doubly robust (AIPW) pseudo-outcome
   ``phi = mu1 - mu0 + A (Y - mu1) / pi - (1 - A) (Y - mu0) / (1 - pi)``, with ``pi`` truncated to
   ``[truncate, 1 - truncate]``.
3. Regress ``phi`` on a restricted cubic spline basis of V (least squares). The fitted curve estimates
   the conditional average effect ``E(Y1 - Y0 | V = v)`` (its best approximation in the spline
   space). Pointwise intervals use the sandwich (HC0) covariance of the second-stage coefficients,
   treating the cross-fitted nuisances as fixed, as Kennedy's analysis justifies; the simultaneous
   band uses the sup-t critical value of the Gaussian process ``b(v)' Z / se(v)``, ``Z ~ N(0, V)``,
   over the grid, by simulation (seeded).

The scale is the difference scale: risk difference for a 0/1 outcome, mean difference otherwise.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats
from scipy.special import expit

from ..errors import ModifierError, SpecError
from ..estimate import glm
from ..frame import _used_columns, prepare
from ..spec import Spec
from .design import confounder_matrix, rcs_basis, rcs_knots

__all__ = ["effect_curve", "dr_pseudo_outcomes", "sandwich_ols"]

CURVE_COLUMNS = ["estimate", "se", "ci_low", "ci_high", "ci_low_simultaneous", "ci_high_simultaneous"]


def _check(name, ok, rule, value):
    if not ok:
        raise SpecError(f"The {name!r} parameter must be {rule}; got {value!r}.")


def sandwich_ols(y, x, w=None):
    """Weighted least squares with frequency weights and its HC0 sandwich covariance.

    ``w`` are frequency weights (row i stands for ``w_i`` identical individuals), so the meat is
    ``sum_i w_i e_i^2 x_i x_i'``. With unit weights this equals statsmodels ``OLS(...).fit(
    cov_type="HC0")`` (tested). Returns ``(beta, cov)``.
    """
    y, x = np.asarray(y, dtype=float), np.asarray(x, dtype=float)
    w = np.ones(len(y)) if w is None else np.asarray(w, dtype=float)
    xtwx = x.T @ (x * w[:, None])
    bread = np.linalg.pinv(xtwx)
    beta = bread @ (x.T @ (w * y))
    e = y - x @ beta
    meat = x.T @ (x * (w * e * e)[:, None])
    return beta, bread @ meat @ bread


def dr_pseudo_outcomes(a, y, w, x, binary: bool, folds: int, truncate: float, seed: int):
    """Cross-fitted AIPW pseudo-outcomes (n,), the share of propensities truncated, failed fits."""
    n = len(y)
    rng = np.random.default_rng(seed)
    fold = rng.permutation(n) % folds if folds > 1 else np.zeros(n, dtype=int)
    pi = np.empty(n)
    mu1 = np.empty(n)
    mu0 = np.empty(n)
    failed = 0
    for f in range(max(folds, 1)):
        test = fold == f
        train = ~test if folds > 1 else test
        # the project's Newton/IRLS fits (stratagem.estimate.glm, tested equal to statsmodels GLM)
        ps = glm.fit(x[train], a[train], w[train], family="binomial")
        failed += not ps.converged
        pi[test] = expit(x[test] @ ps.beta)
        for arm, out in ((1.0, mu1), (0.0, mu0)):
            rows = train & (a == arm)
            model = glm.fit(x[rows], y[rows], w[rows], family="binomial" if binary else "gaussian")
            failed += not model.converged
            eta = x[test] @ model.beta
            out[test] = expit(eta) if binary else eta
    clipped = float(np.mean((pi < truncate) | (pi > 1 - truncate)))
    pi = np.clip(pi, truncate, 1 - truncate)
    phi = mu1 - mu0 + a * (y - mu1) / pi - (1 - a) * (y - mu0) / (1 - pi)
    return phi, clipped, failed


def effect_curve(
    data: pd.DataFrame,
    *,
    exposure: str,
    outcome: str,
    modifier: str,
    confounders=(),
    knots: int | tuple = 4,
    folds: int = 5,
    grid: int | tuple = 50,
    level: float = 0.95,
    exposed_level=None,
    counts: str | None = None,
    truncate: float = 0.01,
    seed: int = 0,
    n_sim: int = 5000,
) -> pd.DataFrame:
    """Conditional average effect as a smooth function of one numeric modifier (DR-learner).

    Parameters
    ----------
    data : DataFrame
        One row per individual (or per cell with ``counts``). Only read.
    exposure, outcome : str
        Binary exposure; 0/1 or numeric outcome.
    modifier : str
        A numeric column (e.g. age in years).
    confounders : sequence of str
        Adjusted for in the nuisance models (numeric linearly, others by indicators).
    knots : int or tuple of float
        Knots of the restricted cubic spline of the curve: a count (3 to 7, at Harrell's quantiles),
        0 for a straight line, or explicit knot positions in the modifier's units.
    folds : int
        Cross-fitting folds (1 turns cross-fitting off; 2 or more recommended).
    grid : int or tuple of float
        Number of evenly spaced points from the 1st to the 99th percentile of the modifier, or the
        points themselves.
    level : float
        Level of the pointwise intervals and the simultaneous band.
    exposed_level : optional
        Value of the exposure meaning exposed, when it is not 0/1 or boolean.
    counts : str, optional
        Column of frequencies.
    truncate : float
        Propensities are truncated to ``[truncate, 1 - truncate]``; in [0, 0.5).
    seed : int
        Seed of the fold split and of the band's simulation.
    n_sim : int
        Draws for the simultaneous band's critical value.

    Returns
    -------
    DataFrame
        One row per grid point: the modifier's value (column named after it), ``estimate``, ``se``,
        ``ci_low``, ``ci_high`` (pointwise), ``ci_low_simultaneous``, ``ci_high_simultaneous``. The
        effect is a risk difference (0/1 outcome) or mean difference. ``frame.attrs`` holds
        ``measure``, ``critical_value``, ``knots``, ``level``, ``truncated_share`` and ``notes``.
    """
    _check("level", isinstance(level, (int, float)) and 0 < level < 1, "a float in (0, 1)", level)
    _check("folds", isinstance(folds, int) and not isinstance(folds, bool) and folds >= 1,
           "an integer >= 1", folds)
    _check("truncate", isinstance(truncate, (int, float)) and 0 <= truncate < 0.5,
           "a number in [0, 0.5)", truncate)
    _check("n_sim", isinstance(n_sim, int) and n_sim >= 100, "an integer >= 100", n_sim)
    if isinstance(confounders, str):
        confounders = (confounders,)
    confounders = tuple(c for c in confounders if c != modifier)
    spec = Spec(exposure=exposure, outcome=outcome, confounders=confounders, strata=(modifier,),
                exposed_level=exposed_level, counts=counts, method="crude", max_levels=1_000_000)
    if isinstance(data, pd.DataFrame) and modifier in data.columns:
        s = data[modifier]
        if not pd.api.types.is_numeric_dtype(s) or pd.api.types.is_bool_dtype(s):
            raise ModifierError(
                f"Modifier {modifier!r} must be numeric for an effect curve; it is {s.dtype}. "
                "For a categorical modifier use analyze(..., strata=...)."
            )
        if s.nunique() < 3:
            raise ModifierError(
                f"Modifier {modifier!r} has {s.nunique()} distinct value(s); an effect curve needs a "
                "numeric modifier with many values. Use analyze(..., strata=...) instead."
            )
    prep, spec = prepare(data, spec)
    cols = list(dict.fromkeys(name for _, name in _used_columns(spec)))
    keep = ~data[cols].isna().any(axis=1).to_numpy()
    v = data.loc[keep, modifier].to_numpy(dtype=float)
    a, y, w = prep.a, prep.y, prep.w

    nuis_knots = rcs_knots(v[w > 0], 4)
    x = np.column_stack([np.ones(len(y)), confounder_matrix(prep.confounders), rcs_basis(v, nuis_knots)])
    phi, clipped, failed = dr_pseudo_outcomes(a, y, w, x, prep.binary, folds, float(truncate), seed)

    if isinstance(knots, (int, np.integer)) and not isinstance(knots, bool):
        if knots == 0:
            curve_knots = np.array([])
        elif 3 <= knots <= 7:
            curve_knots = rcs_knots(v[w > 0], int(knots))
        else:
            raise SpecError(f"The 'knots' parameter must be 0 or 3 to 7 (or knot positions); got {knots!r}.")
    else:
        curve_knots = np.sort(np.asarray(knots, dtype=float))
        _check("knots", len(curve_knots) >= 3 and np.all(np.diff(curve_knots) > 0),
               "0, 3 to 7, or at least 3 increasing knot positions", knots)

    def basis(values):
        values = np.asarray(values, dtype=float)
        return np.column_stack([np.ones(len(values)), rcs_basis(values, curve_knots)])

    beta, cov = sandwich_ols(phi, basis(v), w)

    if isinstance(grid, (int, np.integer)) and not isinstance(grid, bool):
        _check("grid", grid >= 2, "an integer >= 2 or a sequence of points", grid)
        lo_v, hi_v = np.quantile(v[w > 0], [0.01, 0.99])
        points = np.linspace(lo_v, hi_v, int(grid))
    else:
        points = np.asarray(grid, dtype=float)
    bg = basis(points)
    est = bg @ beta
    se = np.sqrt(np.einsum("ij,jk,ik->i", bg, cov, bg))
    z = stats.norm.ppf(0.5 + level / 2)
    crit = _sup_t(bg, cov, se, level, n_sim, seed)
    frame = pd.DataFrame({modifier: points, "estimate": est, "se": se,
                          "ci_low": est - z * se, "ci_high": est + z * se,
                          "ci_low_simultaneous": est - crit * se, "ci_high_simultaneous": est + crit * se})
    notes = []
    if failed:
        notes.append(f"{failed} nuisance model fit(s) did not converge (separation?); check the curve.")
    if clipped > 0:
        notes.append(f"{100 * clipped:.1f}% of propensities truncated to [{truncate}, {1 - truncate}].")
    frame.attrs.update(
        measure="rd" if prep.binary else "md",
        critical_value=float(crit),
        knots=tuple(float(k) for k in curve_knots),
        level=float(level),
        truncated_share=clipped,
        exposure=exposure,
        outcome=outcome,
        notes=tuple(notes),
    )
    return frame


def _sup_t(bg, cov, se, level, n_sim, seed) -> float:
    """Critical value of max_v |b(v)' Z| / se(v) with Z ~ N(0, cov), by simulation."""
    rng = np.random.default_rng(seed + 1)
    vals, vecs = np.linalg.eigh((cov + cov.T) / 2)
    root = vecs * np.sqrt(np.clip(vals, 0, None))
    draws = rng.standard_normal((n_sim, cov.shape[0])) @ root.T
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.abs(draws @ bg.T) / np.where(se > 0, se, np.nan)
    return float(np.quantile(np.nanmax(t, axis=1), level))
