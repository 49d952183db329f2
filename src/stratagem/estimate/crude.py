"""Crude (unadjusted) effects: observed means by exposure within each stratum and overall.

Risks and means come from one weighted pass over the rows (``np.bincount``). Variances are the
standard large-sample ones (common practice): p(1-p)/n for a risk, s^2/n (s with n-1 divisor) for a
mean; exposed and unexposed groups are independent, so the covariance is zero. With a ratio measure
and a zero cell, ``correction`` (e.g. 0.5, the Haldane-Anscombe correction) is added to each of the
stratum's four cells.
"""

from __future__ import annotations

import numpy as np

from ..frame import Prepared
from ..spec import Spec
from .base import OK, GroupMeans, arm_counts, group_sums

__all__ = ["crude"]


def _arm_stats(prep: Prepared, arm: np.ndarray):
    """Weighted count, mean and variance of the mean of ``y`` in one arm, per group."""
    w = prep.w * arm
    n = group_sums(w, prep)
    s = group_sums(w * prep.y, prep)
    with np.errstate(divide="ignore", invalid="ignore"):
        m = s / n
    m_row = np.nan_to_num(m[prep.stratum])
    m_all = np.nan_to_num(m[-1])
    dev_strata = group_sums(w * (prep.y - m_row) ** 2, prep)[:-1]
    dev_all = float(np.sum(w * (prep.y - m_all) ** 2))
    dev = np.append(dev_strata, dev_all)
    with np.errstate(divide="ignore", invalid="ignore"):
        if prep.binary:
            var_mean = m * (1 - m) / n
        else:
            var_mean = dev / (n - 1) / n
    return n, s, m, var_mean


def crude(prep: Prepared, spec: Spec) -> GroupMeans:
    """Unadjusted potential-outcome means per group: observed mean among exposed and unexposed."""
    n, n1, n0 = arm_counts(prep)
    _, s1, m1, v11 = _arm_stats(prep, prep.a)
    _, s0, m0, v00 = _arm_stats(prep, 1.0 - prep.a)
    status, notes = [], []
    for g in range(len(n)):
        status.append(_status(prep, spec, n1[g], n0[g], s1[g], s0[g]))
    if prep.binary and spec.measure in ("rr", "or") and spec.correction is not None:
        m1, m0, v11, v00, fixed = _corrected(spec.correction, n1, n0, s1, s0, m1, m0, v11, v00, status)
        if fixed:
            notes.append(
                f"{spec.correction} added to every cell of {fixed} table(s) with a zero cell."
            )
            status = [OK if s.startswith("zero") else s for s in status]
    if spec.confounders:
        notes.append("method='crude' does not adjust: the confounders were not used.")
    return GroupMeans(n, n1, n0, m1, m0, v11, v00, np.zeros_like(m1), status, notes=notes)


def _status(prep: Prepared, spec: Spec, n1, n0, s1, s0) -> str:
    if n1 <= 0:
        return "no exposed rows in this stratum"
    if n0 <= 0:
        return "no unexposed rows in this stratum"
    if not prep.binary:
        if n1 < 2 or n0 < 2:
            return "fewer than 2 rows in an arm: no variance"
        return OK
    if spec.measure == "rr" and (s1 == 0 or s0 == 0):
        arm = "exposed" if s1 == 0 else "unexposed"
        return f"zero events among the {arm}: risk ratio undefined; pass correction=0.5"
    if spec.measure == "or" and (s1 in (0, n1) or s0 in (0, n0)):
        return "zero cell in the 2x2 table: odds ratio undefined; pass correction=0.5"
    return OK


def _corrected(c, n1, n0, s1, s0, m1, m0, v11, v00, status):
    m1, m0, v11, v00 = m1.copy(), m0.copy(), v11.copy(), v00.copy()
    fixed = 0
    for g, st in enumerate(status):
        if not st.startswith("zero"):
            continue
        fixed += 1
        a, b = s1[g] + c, n1[g] - s1[g] + c
        d_, e = s0[g] + c, n0[g] - s0[g] + c
        m1[g], m0[g] = a / (a + b), d_ / (d_ + e)
        v11[g] = m1[g] * (1 - m1[g]) / (a + b)
        v00[g] = m0[g] * (1 - m0[g]) / (d_ + e)
    return m1, m0, v11, v00, fixed
