"""Standardized mean differences per stratum from sums the engine returns (Austin 2009), in the
terms and order of the in-memory Checks (:mod:`stratagem.diagnostics`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .design import _Design


def _smd(sums: dict, kind: str, shift: float, n_rows: np.ndarray) -> np.ndarray:
    """Standardized mean difference per group from per-arm sums ``sums[arm] = (S0, S1, S2)`` of the
    weights, the weighted shifted values and their squares; as :func:`stratagem.diagnostics.smd`
    (Austin 2009): ``p (1 - p)`` for a 0/1 term, else the weighted variance scaled by ``n / (n - 1)``
    with ``n`` the arm's rows (``n_rows[arm]``)."""
    mean, var = {}, {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for arm, (s0, s1, s2) in sums.items():
            m = s1 / s0
            if kind == "numeric":
                var[arm] = np.maximum(s2 - s1 * m, 0.0) / s0 * n_rows[arm] / (n_rows[arm] - 1)
            else:
                p = m + shift
                var[arm] = p * (1 - p)
            mean[arm] = m
        d = (mean[1] - mean[0]) / np.sqrt((var[1] + var[0]) / 2)
    return np.where(np.isfinite(d), d, np.nan)


def moment_sums(m: pd.DataFrame, p: int) -> dict:
    """The unweighted balance sums per stratum from the moments scan (see :func:`balance`)."""
    iu = np.triu_indices(p)
    diag = [int(np.flatnonzero((iu[0] == j) & (iu[1] == j))[0]) for j in range(p)]
    cols = lambda names: m[names].to_numpy(float).reshape(len(m), -1)  # noqa: E731
    return {"sw": m["sw"].to_numpy(float), "swa": m["swa"].to_numpy(float),
            "d": cols([f"d{j}" for j in range(p)]), "da": cols([f"da{j}" for j in range(p)]),
            "qq": cols([f"c{i}" for i in diag]), "qa": cols([f"qa{j}" for j in range(p)])}


def balance(des: _Design, sums: dict, checks: pd.DataFrame | None = None) -> list:
    """Balance of every confounder term per stratum and overall: ``(label, before, after or None)``,
    arrays over the K strata and the overall group, in the terms and order of the in-memory Checks.

    ``sums`` holds, per stratum, the frequency ``sw`` and the exposed frequency ``swa`` (K,), and for
    every design column ``j`` the sums of ``w u_j`` (``d``), ``w a u_j`` (``da``), ``w u_j^2``
    (``qq``) and ``w a u_j^2`` (``qa``), (K, p), with ``u_j = x_j - shift_j``. ``checks`` (the means
    scan of IPW and AIPW) adds the same sums weighted by the inverse probability weights.
    """
    p = len(des.exprs)
    shift = np.asarray(des.shifts, dtype=float)
    if not des.terms:
        return []

    def grp(x):  # strata, then overall
        x = np.asarray(x, dtype=float)
        return np.append(x, x.sum())

    N, Na = sums["sw"], sums["swa"]
    n_rows = {1: grp(Na), 0: grp(N - Na)}
    weighted = checks is not None and "sws1" in checks
    raw_sums = {}
    for j in range(p):
        d, da, qq, qa = (sums[key][:, j] for key in ("d", "da", "qq", "qa"))
        before = {1: (grp(Na), grp(da), grp(qa)), 0: (grp(N - Na), grp(d - da), grp(qq - qa))}
        after = None
        if weighted:
            after = {1: (grp(checks["sws1"]), grp(checks[f"bal1_{j}"]), grp(checks[f"bal1q_{j}"])),
                     0: (grp(checks["sws0"]), grp(checks[f"bal0_{j}"]), grp(checks[f"bal0q_{j}"]))}
        raw_sums[j] = (before, after)
    out = []
    for label, kind, cols in des.terms:
        if kind == "constant":
            nan = np.full(len(N) + 1, np.nan)
            out.append((label, nan, nan if weighted else None))
            continue
        if kind == "reference":  # indicator of the first level: 1 - the other indicators
            results = []
            for which in (0, 1):
                parts = [raw_sums[j][which] for j in cols]
                if parts[0] is None:
                    results.append(None)
                    continue
                ref = {}
                for arm in (0, 1):
                    s0 = parts[0][arm][0]
                    s1 = s0 - sum(part[arm][1] for part in parts)
                    ref[arm] = (s0, s1, s1)
                results.append(_smd(ref, "binary", 0.0, n_rows))
            out.append((label, results[0], results[1]))
            continue
        j = cols[0]
        before, after = raw_sums[j]
        out.append((label, _smd(before, kind, shift[j], n_rows),
                    _smd(after, kind, shift[j], n_rows) if after is not None else None))
    return out
