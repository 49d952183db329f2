"""Poisson-bootstrap weights drawn inside the engine.

Every row gets an independent Poisson(1) frequency per replicate: a hash of the row's values, its rank
among identical rows, the replicate number and the random state, inverted through the Poisson(1)
distribution function (:func:`_poisson_weight`). A replicate is therefore the same on every run,
whatever order the engine reads the rows in, and identical rows still get independent weights.
"""

from __future__ import annotations

import numpy as np

from .expressions import _select
from .grouped import StratumTable
from .sql import Frag, fmt, join, raw, value


def _ranked(src, row_cols: list, where: Frag) -> Frag:
    """The rows' columns plus ``rn``, each row's rank among rows with the same values: with the
    values, a name for the row that does not depend on the order the engine reads the rows in."""
    cols = ", ".join(a for a, _ in row_cols)
    body = fmt("SELECT {} FROM {} WHERE {}", _select(row_cols), src.table, where)
    return fmt("SELECT *, ROW_NUMBER() OVER (PARTITION BY " + cols + " ORDER BY " + cols + ") AS rn "
               "FROM ({}) r0", body)


def _with_replicates(src, body: Frag, row_names: list, n_boot: int, seed: int, keep: list) -> Frag:
    """``body`` crossed with the replicate numbers ``b``; each row of each replicate gets a Poisson(1)
    frequency ``pw`` from a hash of its values, ``rn``, ``b`` and ``seed`` (see
    :func:`poisson_replicates`). Keeps the columns ``keep`` (as named in ``body``) and ``b``."""
    u = src.dialect.uniform([raw("t." + c) for c in row_names] + [raw("t.rn"), raw("rb.b"), value(int(seed))])
    kept = ", ".join(f"t.{c} AS {c}" for c in keep)
    draws = fmt("SELECT " + kept + ", rb.b AS b, {} AS u FROM ({}) t CROSS JOIN ({}) rb", u, body,
                src.dialect.replicate_numbers(n_boot))
    return fmt("SELECT " + ", ".join(keep) + ", b, {} AS pw FROM ({}) d", _poisson_weight(raw("u")), draws)


#: Poisson(1) cumulative probabilities P(W <= j), j = 0..17 (beyond 17 the remaining mass is < 1e-16)
_POISSON1_CDF = tuple(float(np.exp(-1.0) * sum(1.0 / np.prod(np.arange(1, i + 1)) for i in range(j + 1)))
                      for j in range(18))


def _poisson_weight(u: Frag) -> Frag:
    """A Poisson(1) count from a uniform ``u`` by inversion of its distribution function."""
    parts = [fmt("WHEN {} < {} THEN " + f"{j}.0", u, value(c)) for j, c in enumerate(_POISSON1_CDF)]
    return fmt("(CASE {} ELSE 18.0 END)", join(" ", parts))


def poisson_replicates(src, row_cols: list, layers: list, S: StratumTable, where: Frag, m1: np.ndarray,
                       m0: np.ndarray, okmask: np.ndarray, *, n_boot: int, seed: int):
    """Bootstrap replicates of the potential-outcome means, in one scan, with Poisson(1) row weights.

    The Poisson bootstrap (Hanley & MacGibbon 2006, *Comput. Methods Programs Biomed.* 83:57-62;
    Chamandy, Muralidharan, Najmi & Naidu 2012, "Estimating uncertainty for massive data streams",
    Google technical report; both from memory) gives every row an independent Poisson(1) frequency in
    each replicate instead of drawing exactly ``n`` rows: the replicate sizes vary a little, and the
    rows need not be gathered, so each replicate is a weighted sum that the engine computes during one
    pass. The weight of row ``i`` in replicate ``b`` is a fixed function of the row's values, its rank
    among identical rows, ``b`` and ``seed`` (a hash inverted through the Poisson(1) distribution
    function), so a replicate is the same on every run whatever order the engine reads the rows in.

    Each replicate is the linearised (one-step) estimate: with influence functions ``f`` (the same
    ones the Wald standard errors use, which carry the estimation of the working models),
    ``m_b = m + sum_i W_ib w_i f_i / sum_i W_ib w_i`` per stratum and arm, i.e. the models are not
    refitted per replicate. This is the score or multiplier bootstrap (Kline & Santos 2012, "A score
    based approach to wild bootstrap inference", *J. Econom. Methods* 1:23-41, from memory), first-order
    equivalent to refitting; the overall replicate averages the strata by their replicate sizes.

    Returns
    -------
    (m1_b, m0_b) : arrays (n_boot, K + 1)
        Replicates per stratum and overall (last column); NaN where the stratum is not estimable.
    """
    k = len(okmask)
    cols = [a for a, _ in row_cols]
    body = S.joined(_ranked(src, row_cols, where))
    for i, layer in enumerate(layers):
        if layer:
            body = fmt("SELECT *, {} FROM (" + "{}" + f") l{i}", _select(layer), body)
    weighted = _with_replicates(src, body, cols, n_boot, seed, keep=["s", "w", "f1", "f0"])
    q = fmt("SELECT s, b, SUM(pw * w) AS n, SUM(pw * w * f1) AS t1, SUM(pw * w * f0) AS t0 "
            "FROM ({}) p GROUP BY s, b", weighted)
    got = src.run(q)
    n, t1, t0 = (np.zeros((n_boot, k)) for _ in range(3))
    s_idx, b_idx = got["s"].to_numpy(int), got["b"].to_numpy(int)
    for arr, c in ((n, "n"), (t1, "t1"), (t0, "t0")):
        arr[b_idx, s_idx] = got[c].to_numpy(float)
    m1_b, m0_b = np.full((n_boot, k + 1), np.nan), np.full((n_boot, k + 1), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        m1_b[:, :k] = np.where(okmask & (n > 0), m1[:k] + t1 / n, np.nan)
        m0_b[:, :k] = np.where(okmask & (n > 0), m0[:k] + t0 / n, np.nan)
        if okmask.all():
            tot = n.sum(axis=1)
            m1_b[:, k] = np.sum(n * m1_b[:, :k], axis=1) / tot
            m0_b[:, k] = np.sum(n * m0_b[:, :k], axis=1) / tot
    return m1_b, m0_b
