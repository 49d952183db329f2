"""Multiplicity across exploratory subgroups: adjusted p-values and simultaneous intervals.

* Holm (1979, *Scand J Statist* 6:65) step-down and Benjamini & Hochberg (1995, *JRSS B* 57:289)
  adjusted p-values, equal to ``statsmodels.stats.multitest.multipletests`` (``"holm"``,
  ``"fdr_bh"``; tested).
* Simultaneous intervals over the m estimable strata:
  - Bonferroni: ``theta +/- z_{1 - alpha / (2 m)} * se`` on the analysis scale (log for ratios);
  - max-|t| from the bootstrap replicates (a studentised sup-t band; e.g. Montiel Olea & Plagborg-
    Moller 2019, *J Appl Econometrics* 34:1): ``c`` is the ``level`` quantile of
    ``max_k |theta*_bk - theta_k| / se_k`` over replicates b, and the band is ``theta +/- c * se``.
Only estimable strata with a finite p-value / standard error take part; the others get NaN.
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from statsmodels.stats.multitest import multipletests

__all__ = ["adjusted_p", "bonferroni_intervals", "maxt_intervals"]


def _holm(p: np.ndarray) -> np.ndarray:
    order = np.argsort(p)
    m = len(p)
    adj = np.minimum(1.0, np.maximum.accumulate(p[order] * np.arange(m, 0, -1)))
    out = np.empty(m)
    out[order] = adj
    return out


def _bh(p: np.ndarray) -> np.ndarray:
    order = np.argsort(p)[::-1]  # largest first
    m = len(p)
    adj = np.minimum(1.0, np.minimum.accumulate(p[order] * m / np.arange(m, 0, -1)))
    out = np.empty(m)
    out[order] = adj
    return out


# Written by hand (a sort and a running max/min) because multipletests(method="holm") calls
# gc.collect(), which costs tenths of a second in a busy kernel; tested equal to multipletests.
_FAST = {"holm": _holm, "fdr_bh": _bh}


def adjusted_p(p_values, method: str) -> np.ndarray:
    """Adjusted p-values over the finite entries of ``p_values`` (NaN elsewhere).

    ``method`` is a ``multipletests`` method name: ``"holm"`` and ``"fdr_bh"`` are computed here
    (equal to statsmodels), any other is passed to ``statsmodels.stats.multitest.multipletests``.
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    use = np.isfinite(p)
    if use.any():
        fast = _FAST.get(method)
        out[use] = fast(p[use]) if fast is not None else multipletests(p[use], method=method)[1]
    return out


def _to_reported(measure_is_ratio: bool, lo, hi):
    return (np.exp(lo), np.exp(hi)) if measure_is_ratio else (lo, hi)


def bonferroni_intervals(theta, se, level: float, ratio: bool):
    """Bonferroni simultaneous intervals on the reported scale; returns ``(low, high, m)``.

    ``theta`` and ``se`` are on the analysis scale; ``m`` is the number of finite pairs.
    """
    theta, se = np.asarray(theta, dtype=float), np.asarray(se, dtype=float)
    use = np.isfinite(theta) & np.isfinite(se)
    m = int(use.sum())
    lo = np.full(theta.shape, np.nan)
    hi = np.full(theta.shape, np.nan)
    if m:
        z = stats.norm.ppf(1 - (1 - level) / (2 * m))
        lo[use], hi[use] = theta[use] - z * se[use], theta[use] + z * se[use]
    lo, hi = _to_reported(ratio, lo, hi)
    return lo, hi, m


def maxt_intervals(theta, se, theta_boot, level: float, ratio: bool):
    """Bootstrap max-|t| simultaneous intervals on the reported scale; returns ``(low, high, c)``.

    ``theta_boot`` has shape (B, K) (analysis scale). Replicates with a non-finite value in any used
    stratum are left out of the maximum. ``c`` is the critical value (NaN when it cannot be formed).
    """
    theta, se = np.asarray(theta, dtype=float), np.asarray(se, dtype=float)
    tb = np.asarray(theta_boot, dtype=float)
    use = np.isfinite(theta) & np.isfinite(se) & (se > 0)
    lo = np.full(theta.shape, np.nan)
    hi = np.full(theta.shape, np.nan)
    c = np.nan
    if use.any():
        t = np.abs(tb[:, use] - theta[use]) / se[use]
        t = t[np.all(np.isfinite(t), axis=1)]
        if len(t) > 1:
            c = float(np.quantile(t.max(axis=1), level))
            lo[use], hi[use] = theta[use] - c * se[use], theta[use] + c * se[use]
    lo, hi = _to_reported(ratio, lo, hi)
    return lo, hi, c
