"""Standardization, IPW and AIPW fitted and averaged in the engine (:func:`model_means`).

One scan gives the moments of the confounders per stratum (and the first Newton step); the propensity
and outcome models of every stratum are then fitted by Newton and chord steps, one grouped query per
step (:mod:`.newton`); one more query gives the potential-outcome means, the checks (propensity ranges,
weights, balance) and, for AIPW, the influence-function variances; standardization and IPW take a
second query for the variances (their influence functions need constants solved from the first), and
the common-support check reads the propensity ranges found by the first.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..estimate._adjust import dropped_notes
from ..estimate.base import OK, GroupMeans
from ..estimate.design import dropped_column_notes, independent_from_covariance
from ..spec import Spec
from .balance import balance, moment_sums
from .checks import Inspection
from .design import design
from .expressions import _as_double, _col, _expit
from .grouped import StratumTable, _dot, _grouped, _per_stratum, _sym
from .newton import _first_sums, _irls
from .replicates import poisson_replicates
from .sql import Frag, fmt, raw, value


def model_means(src, spec: Spec, ins: Inspection, prep, keys_to_stratum: dict, *, name: str,
                tol: float = 1e-6, max_iter: int = 60) -> GroupMeans:
    """Standardization, IPW or AIPW per stratum, fitted and averaged in the engine.

    Equal to :mod:`stratagem.estimate._adjust` on the same rows (same models, masks, Newton steps
    from zero, influence functions), with every sum over rows done by the engine. Newton stops after
    a step no larger than ``tol * (1 + max|beta|)``: near the solution Newton's error is squared at
    every step, so after a step of 1e-6 the coefficients are within about 1e-12 of the in-memory fit
    (which takes one more step to confirm 1e-10), and each step saved is a scan of every row saved.
    """
    need_ps_req = name in ("ipw", "aipw")
    need_om = name in ("standardization", "aipw")
    k = prep.n_strata
    # row expressions: the modifier keys (joined to a table of per-stratum values in every scan)
    key_exprs = [expr for _, expr, _, _ in ins.keys]
    n_keys = len(key_exprs)

    def table() -> StratumTable:
        return StratumTable(keys_to_stratum, n_keys)

    a_expr = _exposure_expr(src, spec, prep)
    y_expr = _as_double(src, spec.outcome)
    w_expr = _as_double(src, spec.counts) if spec.counts else raw("1.0")
    des = design(src, spec, ins)
    p = len(des.exprs)
    base = [(f"k{i}", e) for i, e in enumerate(key_exprs)] if n_keys else [("s", raw("0"))]
    base += [("a", a_expr), ("y", y_expr), ("w", w_expr)]
    base += [(f"x{j}", e) for j, e in enumerate(des.exprs)]
    # moments in one scan: sums of the shifted columns u = x - shift and of their products per stratum
    # (the shift is a value inside each column's range, so the centred sums lose no precision)
    shift = np.asarray(des.shifts, dtype=float)
    u = [fmt("(x" + str(j) + " - {})", value(shift[j])) for j in range(p)]
    iu = np.triu_indices(p)
    outer = [("sw", raw("SUM(w)")), ("swa", raw("SUM(w * a)")), ("swy", raw("SUM(w * y)")),
             ("npos", raw("SUM(CASE WHEN w > 0 THEN 1 ELSE 0 END)")),
             ("ylo", raw("MIN(CASE WHEN w > 0 THEN y END)")), ("yhi", raw("MAX(CASE WHEN w > 0 THEN y END)"))]
    outer += [(f"d{j}", fmt("SUM(w * {})", u[j])) for j in range(p)]
    outer += [(f"c{i}", fmt("SUM(w * {} * {})", u[a], u[b])) for i, (a, b) in enumerate(zip(*iu))]
    # and with the exposure and the outcome: the first Newton step (from zero) needs no scan of its own
    outer += [("swya", raw("SUM(w * y * a)"))]
    outer += [(f"da{j}", fmt("SUM(w * a * {})", u[j])) for j in range(p)]
    outer += [(f"dy{j}", fmt("SUM(w * y * {})", u[j])) for j in range(p)]
    outer += [(f"qa{j}", fmt("SUM(w * a * {} * {})", u[j], u[j])) for j in range(p)]  # balance checks
    m = _grouped(src, base, outer, ins.where, k, st=table())
    N = m["sw"].to_numpy()
    total_w = N.sum()
    notes = list(des.notes)
    cov_s = np.zeros((k, p, p))
    if p:
        sxx = _sym(m[[f"c{i}" for i in range(len(iu[0]))]].to_numpy(), p)
        sx = m[[f"d{j}" for j in range(p)]].to_numpy()
        mean = shift + sx.sum(axis=0) / total_w
        with np.errstate(divide="ignore", invalid="ignore"):
            cov_s = (sxx - sx[:, :, None] * sx[:, None, :] / np.where(N > 0, N, 1.0)[:, None, None]) \
                / np.where(N > 0, N, 1.0)[:, None, None]
        cov_all = (sxx.sum(axis=0) - np.outer(sx.sum(axis=0), sx.sum(axis=0)) / total_w) / total_w
        keep, reason = independent_from_covariance(cov_all)
        notes.extend(dropped_column_notes(des.names, keep, reason))
        kept = np.flatnonzero(keep)
        sd = np.sqrt(np.maximum(np.diag(cov_all)[kept], 0.0))
        sd = np.where(sd > 0, sd, 1.0)
        zdef = [(f"z{i}", fmt("((x" + str(j) + " - {}) / {})", value(mean[j]), value(s)))
                for i, (j, s) in enumerate(zip(kept, sd))]
        z = [raw(a) for a, _ in zdef]
        names = [des.names[j] for j in kept]
        cov_s = cov_s[:, kept][:, :, kept]
    else:
        z, names, zdef = [], [], []
    q = len(z)
    Z = [raw("1.0")] + z + [raw("a")]
    P = q + 2
    masks = np.ones((k, P), dtype=bool)
    dropped: dict = {}
    for s in range(k):
        if N[s] <= 0 or q == 0:
            continue
        keep_s, _ = independent_from_covariance(cov_s[s])
        masks[s, 1:q + 1] = keep_s
        for j in np.flatnonzero(~keep_s):
            dropped.setdefault(names[j], []).append(str(prep.labels["stratum"].iloc[s]))
    if k > 1:
        notes.extend(dropped_notes(dropped))
    # status per stratum, as _adjust._status
    n1 = m["swa"].to_numpy()
    status = []
    for s in range(k):
        params = P - (0 if need_om else 1)
        if N[s] <= 0:
            st = "no rows in this stratum"
        elif n1[s] <= 0:
            st = "no exposed rows in this stratum"
        elif N[s] - n1[s] <= 0:
            st = "no unexposed rows in this stratum"
        elif int(m["npos"].iloc[s]) < params:
            st = f"fewer rows ({int(m['npos'].iloc[s])}) than model parameters ({params})"
        elif need_om and ins.binary and m["ylo"].iloc[s] == m["yhi"].iloc[s]:
            st = "outcome is constant in this stratum (all 0 or all 1): the outcome model cannot be fitted"
        else:
            st = OK
        status.append(st)
    okmask = np.array([st == OK for st in status])
    base = (base, zdef, table)  # row columns, standardised design columns, per-stratum table maker
    start = _first_sums(m, p, kept if p else np.zeros(0, int), (mean - shift)[kept] if p else np.zeros(0),
                        sd if p else np.zeros(0))
    fit = _irls(src, base, ins, Z, masks, okmask, binary=ins.binary, need_om=need_om, tol=tol,
                max_iter=max_iter, start=start)
    for s in range(k):
        if status[s] != OK:
            continue
        if need_ps_req and not fit.ok_ps[s]:
            status[s] = "propensity model did not converge" + (
                " (separation: the confounders predict exposure perfectly here, so positivity fails)"
                if fit.sep_ps[s] else "")
        elif need_om and not fit.ok_om[s]:
            status[s] = "outcome model did not converge" + (" (separation)" if fit.sep_om[s] else "")
    okmask = np.array([st == OK for st in status])
    m1, m0, v11, v00, v10, diag = _means_and_variances(src, base, ins, Z, masks, fit, okmask, N, n1, name,
                                                       pilot=m["swy"].to_numpy() / np.where(N > 0, N, 1.0),
                                                       shifts=shift)
    G = k + 1
    status.append(OK)
    if okmask.all():
        tot = N.sum()
        m1[k] = np.sum(N * m1[:k]) / tot
        m0[k] = np.sum(N * m0[:k]) / tot
        f1, f0, f1f1, f0f0, f1f0 = (diag[key] for key in ("f1", "f0", "f1f1", "f0f0", "f1f0"))
        d1, d0 = m1[:k] - m1[k], m0[:k] - m0[k]
        acc11 = np.sum(f1f1 + 2 * d1 * f1 + N * d1 * d1)
        acc00 = np.sum(f0f0 + 2 * d0 * f0 + N * d0 * d0)
        acc10 = np.sum(f1f0 + d1 * f0 + d0 * f1 + N * d1 * d0)
        v11[k], v00[k], v10[k] = acc11 / tot**2, acc00 / tot**2, acc10 / tot**2
    elif k > 1:
        status[k] = ("not estimable in the engine: a stratum could not be estimated, and the overall "
                     "fallback (one model on all rows with stratum indicators) runs only in memory")
    else:
        status[k] = "not estimable"
    n, nn1, nn0 = (np.append(x, x.sum()) for x in (N, n1, N - n1))
    assert len(n) == G
    gm = GroupMeans(n, nn1, nn0, m1, m0, v11, v00, v10, status, notes=notes)
    gm.extra["confounder_columns"] = tuple(names)
    gm.extra["engine_checks"] = diag["checks"]
    gm.extra["engine_balance"] = balance(des, moment_sums(m, p), diag["checks"])
    if spec.interval == "bootstrap":
        S, layers = diag["rows"]
        gm.extra["engine_replicates"] = poisson_replicates(
            src, base[0], layers, S, ins.where, m1, m0, okmask, n_boot=spec.n_boot, seed=spec.seed)
    return gm


def _support_sums(got: pd.DataFrame, S: StratumTable) -> list:
    """Aggregates counting the frequency of rows outside common support: ``out_s`` per stratum (the
    overlap ``[max(min_0, min_1), min(max_0, max_1)]`` of the arms' propensity ranges in the
    stratum) and ``out_all`` (the overlap over all strata). An arm without rows bounds nothing."""
    lo1, lo0 = got["emin1"].to_numpy(float), got["emin0"].to_numpy(float)
    hi1, hi0 = got["emax1"].to_numpy(float), got["emax0"].to_numpy(float)
    with np.errstate(invalid="ignore"):
        low, high = np.fmax(lo1, lo0), np.fmin(hi1, hi0)
        low_all = max(np.nanmin(lo1, initial=np.inf), np.nanmin(lo0, initial=np.inf))
        high_all = min(np.nanmax(hi1, initial=-np.inf), np.nanmax(hi0, initial=-np.inf))
    low = np.where(np.isnan(low), -np.inf, low)
    high = np.where(np.isnan(high), np.inf, high)
    return [("out_s", fmt("SUM(CASE WHEN e < {} OR e > {} THEN w ELSE 0.0 END)", _per_stratum(low, S),
                          _per_stratum(high, S))),
            ("out_all", fmt("SUM(CASE WHEN e < {} OR e > {} THEN w ELSE 0.0 END)", value(float(low_all)),
                            value(float(high_all))))]


def _exposure_expr(src, spec: Spec, prep) -> Frag:
    e = _col(src, spec.exposure)
    if spec.exposed_level is not None:
        return fmt("(CASE WHEN {} = {} THEN 1.0 ELSE 0.0 END)", e, value(spec.exposed_level))
    return _as_double(src, spec.exposure)


def _means_and_variances(src, base, ins, Z, masks, fit, okmask, N, n1, name, pilot, shifts=()):
    """Potential-outcome means and the sums of squares and products of the influence functions per
    stratum. Standardization and IPW take two scans (the influence functions need constants solved
    from the first); AIPW takes one: its influence functions are ``psi - m``, so the sums of ``psi - c``
    and of its squares and products, for a per-stratum constant ``c`` near ``m`` (``pilot``, the
    stratum's outcome mean, which keeps the sums of squares free of cancellation), give ``m`` and the
    variances at once."""
    k, P = masks.shape
    S = base[2]()  # one table for both scans (the second adds its own columns)
    binary = ins.binary
    ps_mask = masks.copy()
    ps_mask[:, -1] = False
    safeN = np.where(N > 0, N, 1.0)
    p1 = n1 / safeN
    iu = np.triu_indices(P)
    nq = len(iu[0])
    # row quantities, each defined once, layer by layer
    etas = [("eta_ps", _dot(fit.beta_ps, Z, S))]
    e_def = list(zip(("e", "ome"), _expit(raw("eta_ps"))))
    links, derived = [], []
    if name in ("standardization", "aipw"):
        ba = _per_stratum(fit.beta_om[:, -1], S)
        etas.append(("eta_om", _dot(fit.beta_om, Z, S)))
        e_def += [("eta1", fmt("(eta_om + {} * (1.0 - a))", ba)), ("eta0", fmt("(eta_om - {} * a)", ba))]
        if binary:
            for nm, src_eta in (("q1", "eta1"), ("q0", "eta0"), ("mu", "eta_om")):
                val, rest = _expit(raw(src_eta))
                links += [(nm, val), (nm + "r", rest)]
        else:
            links += [("q1", raw("eta1")), ("q0", raw("eta0")), ("mu", raw("eta_om"))]
    if name != "standardization":
        p1s = _per_stratum(p1, S)
        links.append(("sw", fmt("(CASE WHEN a = 1.0 THEN {} / e ELSE (1.0 - {}) / ome END)", p1s, p1s)))
    if name == "aipw":  # untruncated: sw / P(A = a | stratum) = 1 / e or 1 / (1 - e)
        derived += [("psi1", raw("(q1 + a * (y - q1) / e)")), ("psi0", raw("(q0 + (1.0 - a) * (y - q0) / ome)"))]
    layers = [base[1], etas, e_def, links, derived]
    outer = [("emin1", raw("MIN(CASE WHEN a = 1.0 AND w > 0 THEN e END)")),
             ("emax1", raw("MAX(CASE WHEN a = 1.0 AND w > 0 THEN e END)")),
             ("emin0", raw("MIN(CASE WHEN a = 0.0 AND w > 0 THEN e END)")),
             ("emax0", raw("MAX(CASE WHEN a = 0.0 AND w > 0 THEN e END)"))]
    if name != "standardization":
        outer += [("swmax1", raw("MAX(CASE WHEN a = 1.0 AND w > 0 THEN sw END)")),
                  ("swmax0", raw("MAX(CASE WHEN a = 0.0 AND w > 0 THEN sw END)")),
                  ("sws1", raw("SUM(w * a * sw)")), ("sws0", raw("SUM(w * (1.0 - a) * sw)")),
                  ("swss1", raw("SUM(w * a * sw * sw)")), ("swss0", raw("SUM(w * (1.0 - a) * sw * sw)"))]
        for j, shift in enumerate(shifts):  # weighted sums of the design columns for the balance checks
            uj = fmt("(x" + str(j) + " - {})", value(float(shift)))
            outer += [(f"bal1_{j}", fmt("SUM(w * a * sw * {})", uj)),
                      (f"bal1q_{j}", fmt("SUM(w * a * sw * {} * {})", uj, uj)),
                      (f"bal0_{j}", fmt("SUM(w * (1.0 - a) * sw * {})", uj)),
                      (f"bal0q_{j}", fmt("SUM(w * (1.0 - a) * sw * {} * {})", uj, uj))]
    zt = [z.text for z in Z]  # Z holds column names only ("1.0", "z0", ..., "a")
    if name == "standardization":
        d1, d0, v = ("q1 * q1r", "q0 * q0r", "mu * mur") if binary else ("1.0", "1.0", "1.0")
        outer += [("s1", raw("SUM(w * q1)")), ("s0", raw("SUM(w * q0)"))]
        outer += [(f"D1_{j}", raw(f"SUM(w * {d1} * {zt[j]})")) for j in range(P)]
        outer += [(f"D0_{j}", raw(f"SUM(w * {d0} * {zt[j]})")) for j in range(P)]
        outer += [(f"I{i}", raw(f"SUM(w * {v} * {zt[a]} * {zt[b]})")) for i, (a, b) in enumerate(zip(*iu))]
    elif name == "ipw":
        outer += [("c1", raw("SUM(w * a * sw)")), ("c1y", raw("SUM(w * a * sw * y)")),
                  ("c0", raw("SUM(w * (1.0 - a) * sw)")), ("c0y", raw("SUM(w * (1.0 - a) * sw * y)"))]
        for j in range(P):
            outer += [(f"A1_{j}", raw(f"SUM(w * a * sw * ome * {zt[j]})")),
                      (f"A1y_{j}", raw(f"SUM(w * a * sw * ome * y * {zt[j]})")),
                      (f"A0_{j}", raw(f"SUM(w * (1.0 - a) * sw * e * {zt[j]})")),
                      (f"A0y_{j}", raw(f"SUM(w * (1.0 - a) * sw * e * y * {zt[j]})"))]
        outer += [(f"I{i}", raw(f"SUM(w * e * ome * {zt[a]} * {zt[b]})")) for i, (a, b) in enumerate(zip(*iu))]
    else:
        c1, c0 = _per_stratum(pilot, S), _per_stratum(pilot, S)
        derived += [("g1", fmt("(psi1 - {})", c1)), ("g0", fmt("(psi0 - {})", c0))]
        outer += [("s1", raw("SUM(w * g1)")), ("s0", raw("SUM(w * g0)")), ("g11", raw("SUM(w * g1 * g1)")),
                  ("g00", raw("SUM(w * g0 * g0)")), ("g10", raw("SUM(w * g1 * g0)"))]
    got = _grouped(src, base[0], outer, ins.where, k, layers=layers, st=S)
    G = k + 1
    m1, m0, v11, v00, v10 = (np.full(G, np.nan) for _ in range(5))
    col = lambda prefix, n_: got[[f"{prefix}{j}" for j in range(n_)]].to_numpy()  # noqa: E731

    def solve(info, D, mask):
        return np.linalg.lstsq(info[np.ix_(mask, mask)], D[mask], rcond=None)[0]

    # per-stratum constants of the influence functions
    if name == "standardization":
        m1[:k], m0[:k] = got["s1"] / safeN, got["s0"] / safeN
        D1, D0 = col("D1_", P) / safeN[:, None], col("D0_", P) / safeN[:, None]
        D1[:, -1] = D1[:, 0]  # the exposure is 1 in every prediction of Q(1, L) ...
        D0[:, -1] = 0.0  # ... and 0 in every prediction of Q(0, L)
        info = _sym(col("I", nq), P) / safeN[:, None, None]
        k1, k0 = np.zeros((k, P)), np.zeros((k, P))
        for s in np.flatnonzero(okmask):
            k1[s, masks[s]] = solve(info[s], D1[s], masks[s])
            k0[s, masks[s]] = solve(info[s], D0[s], masks[s])
        fdef = [("f1", fmt("(q1 - {} + {} * (y - mu))", _per_stratum(np.nan_to_num(m1[:k]), S), _dot(k1, Z, S))),
                ("f0", fmt("(q0 - {} + {} * (y - mu))", _per_stratum(np.nan_to_num(m0[:k]), S), _dot(k0, Z, S)))]
    elif name == "ipw":
        c1, c0 = got["c1"].to_numpy(), got["c0"].to_numpy()
        with np.errstate(divide="ignore", invalid="ignore"):
            m1[:k], m0[:k] = got["c1y"] / c1, got["c0y"] / c0
        m1k, m0k = np.nan_to_num(m1[:k]), np.nan_to_num(m0[:k])
        G1 = -(col("A1y_", P) - m1k[:, None] * col("A1_", P)) / safeN[:, None]
        G0 = (col("A0y_", P) - m0k[:, None] * col("A0_", P)) / safeN[:, None]
        info = _sym(col("I", nq), P) / safeN[:, None, None]
        k1, k0 = np.zeros((k, P)), np.zeros((k, P))
        for s in np.flatnonzero(okmask):
            k1[s, ps_mask[s]] = solve(info[s], G1[s], ps_mask[s])
            k0[s, ps_mask[s]] = solve(info[s], G0[s], ps_mask[s])
        cc1, cc0 = np.where(c1 > 0, c1 / safeN, 1.0), np.where(c0 > 0, c0 / safeN, 1.0)
        fdef = [("f1", fmt("((a * sw * (y - {}) + {} * (a - e)) / {})", _per_stratum(m1k, S), _dot(k1, Z, S),
                           _per_stratum(cc1, S))),
                ("f0", fmt("(((1.0 - a) * sw * (y - {}) + {} * (a - e)) / {})", _per_stratum(m0k, S),
                           _dot(k0, Z, S), _per_stratum(cc0, S)))]
    else:  # AIPW: everything from the one scan
        G1, G0 = got["s1"].to_numpy(), got["s0"].to_numpy()
        m1[:k], m0[:k] = pilot + G1 / safeN, pilot + G0 / safeN
        var = pd.DataFrame({"f1f1": got["g11"] - G1 * G1 / safeN, "f0f0": got["g00"] - G0 * G0 / safeN,
                            "f1f0": got["g10"] - G1 * G0 / safeN, "f1": 0.0, "f0": 0.0})
        # the influence functions themselves, for bootstrap replicates: psi - m = g - G / N
        fdef = [("f1", fmt("(g1 - {})", _per_stratum(G1 / safeN, S))),
                ("f0", fmt("(g0 - {})", _per_stratum(G0 / safeN, S)))]
    # common support: the frequency of rows whose propensity lies outside the overlap of the two arms'
    # ranges, in their stratum and overall (as diagnostics.py); bounds from the scan above
    support = _support_sums(got, S)
    if name != "aipw":
        outer = [("f1f1", raw("SUM(w * f1 * f1)")), ("f0f0", raw("SUM(w * f0 * f0)")),
                 ("f1f0", raw("SUM(w * f1 * f0)")), ("f1", raw("SUM(w * f1)")), ("f0", raw("SUM(w * f0)"))]
        var = _grouped(src, base[0], outer + support, ins.where, k, layers=layers + [fdef], st=S)
        outside = var[["out_s", "out_all"]]
    else:  # AIPW's one scan could not know the bounds: one more, light scan
        outside = _grouped(src, base[0], support, ins.where, k, layers=layers[:3], st=S)
    for s in range(k):
        if not okmask[s]:
            m1[s] = m0[s] = np.nan
            continue
        v11[s], v00[s], v10[s] = (var[c].iloc[s] / N[s] ** 2 for c in ("f1f1", "f0f0", "f1f0"))
    diag = {c: var[c].to_numpy() for c in ("f1f1", "f0f0", "f1f0", "f1", "f0")}
    diag["checks"] = got.drop(columns=[c for c in got.columns if not c.startswith(("emin", "emax", "sw", "bal"))])
    diag["checks"]["out_s"] = outside["out_s"].to_numpy(float)
    diag["checks"]["out_all"] = outside["out_all"].to_numpy(float)
    diag["rows"] = (S, layers + [fdef])  # row columns f1, f0: the influence functions (for replicates)
    return m1, m0, v11, v00, v10, diag
