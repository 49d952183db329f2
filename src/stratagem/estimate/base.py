"""What every estimator returns: the two potential-outcome means per group and their covariance.

Groups are the strata ``0 .. K-1`` of :class:`~stratagem.frame.Prepared` followed by one group for
the whole sample (index ``K``). :mod:`stratagem.measures` turns the means into any effect measure.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..frame import Prepared

__all__ = ["GroupMeans", "group_index", "group_sums", "arm_counts", "OK"]

OK = "ok"


@dataclass
class GroupMeans:
    """Per-group results of one estimator; arrays have one entry per stratum plus the overall group.

    ``m1``/``m0`` are means of the potential outcomes under exposure / no exposure (risks for a binary
    outcome), ``v11``/``v00``/``v10`` the sampling variances and covariance of that pair. ``status``
    is ``"ok"`` or the reason the group is not estimable. An estimator that estimates a measure
    directly (Mantel-Haenszel) puts analysis-scale values in ``theta``/``se`` and they are used as is.
    ``replicates`` holds bootstrap replicates ``(m1, m0)`` of shape (B, G) when an estimator made them.
    """

    n: np.ndarray
    n1: np.ndarray
    n0: np.ndarray
    m1: np.ndarray
    m0: np.ndarray
    v11: np.ndarray
    v00: np.ndarray
    v10: np.ndarray
    status: list
    theta: np.ndarray | None = None
    se: np.ndarray | None = None
    notes: list = field(default_factory=list)
    extra: dict = field(default_factory=dict)


def group_index(prep: Prepared) -> tuple[np.ndarray, int]:
    """Stratum index of every row and the number of groups G (strata + overall)."""
    return prep.stratum, prep.n_strata + 1


def group_sums(values: np.ndarray, prep: Prepared) -> np.ndarray:
    """Sums of ``values`` (n,) or rows of ``values`` (B, n) per stratum, with the total appended.

    Returns shape (G,) or (B, G). Uses ``np.bincount`` (one pass over the rows) for 1-D input and
    a sparse indicator product for 2-D input.
    """
    k = prep.n_strata
    if values.ndim == 1:
        per = np.bincount(prep.stratum, weights=values, minlength=k)
        return np.append(per, per.sum())
    out = np.zeros((values.shape[0], k + 1))
    for j in range(k):  # K is small (strata), rows are many: loop over strata, vectorise over rows
        out[:, j] = values[:, prep.stratum == j].sum(axis=1)
    out[:, k] = out[:, :k].sum(axis=1)
    return out


def arm_counts(prep: Prepared, w: np.ndarray | None = None):
    """Weighted counts ``(n, n1, n0)`` per group."""
    w = prep.w if w is None else w
    n1 = group_sums(w * prep.a, prep)
    n0 = group_sums(w * (1.0 - prep.a), prep)
    return n1 + n0, n1, n0
