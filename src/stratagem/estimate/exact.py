"""Exact effects for a fully known population: both potential outcomes of every individual are given.

The individual effect is ``y1 - y0``; its average within a stratum is the conditional average
treatment effect (CATE) and over everyone the average treatment effect (ATE). There is no sampling
interval: nothing is estimated. For a binary outcome each individual has one of four response types
(common terms of the trade):

=========== ==== ==== ====================================
type         y0   y1   meaning
=========== ==== ==== ====================================
doomed        1    1   outcome occurs whether exposed or not
causal        0    1   outcome occurs only if exposed
preventive    1    0   outcome occurs only if not exposed
immune        0    0   outcome never occurs
=========== ==== ==== ====================================
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import OutcomeError
from ..frame import Prepared
from ..spec import Spec
from .base import OK, GroupMeans, arm_counts, group_sums

__all__ = ["exact", "TYPES", "response_type_counts"]

TYPES = ("doomed", "causal", "preventive", "immune")
_CODES = {("doomed"): (1, 1), "causal": (0, 1), "preventive": (1, 0), "immune": (0, 0)}


def exact(prep: Prepared, spec: Spec) -> GroupMeans:
    """Average potential outcomes per group from the given (y0, y1) columns."""
    if prep.y0 is None or prep.y1 is None:  # pragma: no cover - frame.resolve guards this
        raise OutcomeError("method='exact' needs potential_outcomes=('y0', 'y1').")
    n, n1, n0 = arm_counts(prep)
    with np.errstate(divide="ignore", invalid="ignore"):
        m1 = group_sums(prep.w * prep.y1, prep) / n
        m0 = group_sums(prep.w * prep.y0, prep) / n
    zero = np.zeros_like(m1)
    status = [OK if n[g] > 0 else "no rows in this stratum" for g in range(len(n))]
    notes = ["method='exact': the potential outcomes are known, so there is no sampling interval."]
    if spec.confounders:
        notes.append("method='exact' needs no adjustment: the confounders were not used.")
    out = GroupMeans(n, n1, n0, m1, m0, zero, zero.copy(), zero.copy(), status, notes=notes)
    if prep.binary and _is_binary(prep.y0) and _is_binary(prep.y1):
        out.extra["response_types"] = response_type_counts(prep)
    return out


def _is_binary(v: np.ndarray) -> bool:
    return bool(set(np.unique(v)) <= {0.0, 1.0})


def response_type_counts(prep: Prepared) -> pd.DataFrame:
    """Counts and shares of the four response types per stratum and overall (exact, from y0 and y1).

    Columns: stratum, type, count, lower, upper (lower == upper == the share: it is identified).
    """
    rows = []
    labels = list(prep.labels["stratum"]) if len(prep.labels) > 1 or prep.labels.columns.size > 1 else []
    total = group_sums(prep.w, prep)
    counts = {}
    for t in TYPES:
        c0, c1 = _CODES[t]
        counts[t] = group_sums(prep.w * ((prep.y0 == c0) & (prep.y1 == c1)), prep)
    names = (labels if labels else []) + ["overall"]
    index = list(range(len(labels))) + [len(total) - 1]
    for name, g in zip(names, index):
        for t in TYPES:
            share = counts[t][g] / total[g] if total[g] > 0 else np.nan
            rows.append({"stratum": name, "type": t, "count": counts[t][g], "lower": share, "upper": share})
    return pd.DataFrame(rows, columns=["stratum", "type", "count", "lower", "upper"])
