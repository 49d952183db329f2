"""Gail-Simon likelihood-ratio test for qualitative interaction (effects of opposite sign).

Gail M, Simon R (1985). Testing for qualitative interactions between treatment effects and patient
subsets. *Biometrics* 41:361-372.

With K independent stratum estimates ``theta_k`` (analysis scale, null 0) and standard errors ``s_k``:

    Q-  = sum_k (theta_k / s_k)^2  over theta_k > 0
    Q+  = sum_k (theta_k / s_k)^2  over theta_k < 0
    Q   = min(Q-, Q+)

Under the least favourable null (all true effects 0) the p-value is a mixture of chi-squares:

    P(Q > c) = sum_{i=1}^{K-1} C(K-1, i) 2^-(K-1) P(chi2_i > c).

Large Q means some strata show a clear benefit and others a clear harm.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

__all__ = ["GailSimon", "gail_simon", "gail_simon_pvalue", "gail_simon_critical"]


@dataclass(frozen=True)
class GailSimon:
    """Result of :func:`gail_simon`: statistic ``min(Q-, Q+)``, the two sums, p-value, strata used."""

    statistic: float
    q_minus: float
    q_plus: float
    p_value: float
    k: int


def gail_simon_pvalue(q: float, k: int) -> float:
    """P-value of the Gail-Simon statistic ``q`` with ``k`` strata (mixture-of-chi-squares null)."""
    if k < 2 or not np.isfinite(q):
        return float("nan")
    i = np.arange(1, k)
    weights = special.comb(k - 1, i) / 2.0 ** (k - 1)
    return float(np.sum(weights * stats.chi2.sf(q, i)))


def gail_simon_critical(k: int, alpha: float = 0.05) -> float:
    """Critical value ``c`` with ``P(Q > c) = alpha`` under the null, for ``k`` strata."""
    from scipy.optimize import brentq

    return float(brentq(lambda c: gail_simon_pvalue(c, k) - alpha, 1e-9, 1000.0))


def gail_simon(theta, se) -> GailSimon:
    """Gail-Simon test of qualitative interaction from stratum estimates and standard errors.

    Parameters
    ----------
    theta : array_like, shape (K,)
        Stratum effects on the analysis scale (differences, or log ratios), null value 0.
    se : array_like, shape (K,)
        Their standard errors (strata independent). Entries with a non-finite value or ``se <= 0``
        are left out.

    Returns
    -------
    GailSimon
        NaN statistic and p-value when fewer than two strata remain.
    """
    theta, se = np.asarray(theta, dtype=float), np.asarray(se, dtype=float)
    use = np.isfinite(theta) & np.isfinite(se) & (se > 0)
    theta, se = theta[use], se[use]
    k = int(use.sum())
    if k < 2:
        return GailSimon(np.nan, np.nan, np.nan, np.nan, k)
    z2 = (theta / se) ** 2
    q_minus = float(z2[theta > 0].sum())
    q_plus = float(z2[theta < 0].sum())
    q = min(q_minus, q_plus)
    return GailSimon(q, q_minus, q_plus, gail_simon_pvalue(q, k), k)
