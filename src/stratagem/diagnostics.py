"""Checks of positivity, weights and balance per stratum: the table behind ``Analysis.diagnostics``.

One long table with the columns of :data:`stratagem.results.DIAGNOSTIC_COLUMNS`
(``stratum, check, arm, value, warning``), rows for every stratum and then ``overall``:

=============================== ======================= =============================================
check                           arm                     value
=============================== ======================= =============================================
``n``                           exposed / unexposed     rows in the arm (sum of frequencies)
``propensity min``, ``max``     exposed / unexposed     smallest / largest fitted propensity
``outside common support``      all                     share of rows whose propensity lies outside
                                                        the overlap of the two arms' ranges
``largest weight``              exposed / unexposed     largest inverse probability weight
``effective sample size``       exposed / unexposed     Kish (1965): (sum w)^2 / sum w^2
``smd before: <term>``          exposed vs unexposed    standardized mean difference, unweighted
``smd after: <term>``           exposed vs unexposed    the same with the inverse probability weights
=============================== ======================= =============================================

Propensity and weight rows appear when the estimator put per-row ``propensity`` and ``weights``
arrays (n,) in ``GroupMeans.extra`` (IPW, AIPW). ``<term>`` is a numeric confounder's name, or
``name=level`` for each level of a non-numeric confounder (indicator coding).

Standardized mean difference (Austin 2009, "Balance diagnostics for comparing the distribution of
baseline covariates between treatment groups in propensity-score matched samples", Stat Med
28:3083-3107): ``(mean_1 - mean_0) / sqrt((s_1^2 + s_0^2) / 2)`` with ``s^2 = p (1 - p)`` for a 0/1
term and the sample variance (n - 1 divisor) otherwise. After weighting, means and variances are
weighted by frequency x IP weight (Austin & Stuart 2015, Stat Med 34:3661), the variance scaled so it
reduces to the sample variance when the weights are constant.

Warnings (text in ``warning``, empty when fine): an arm with fewer than 10 rows; propensities below
0.01 or above 0.99 (positivity doubtful); an effective sample size under 10% of the arm's rows; an
|SMD| above 0.1 after weighting (common practice, e.g. Austin 2009).

Everything is computed with ``np.bincount`` over (group, arm) codes and one pandas group-by for
minima and maxima: no per-row Python, so it runs on every :func:`stratagem.analyze` call.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .estimate.base import GroupMeans
from .frame import Prepared
from .results import DIAGNOSTIC_COLUMNS
from .spec import Spec

__all__ = ["diagnostics_fields", "diagnostics_table", "effective_sample_size", "smd",
           "MIN_ROWS", "PROPENSITY_LIMITS", "SMD_LIMIT", "ESS_SHARE"]

MIN_ROWS = 10  # an arm with fewer rows than this is flagged
PROPENSITY_LIMITS = (0.01, 0.99)  # propensities beyond these suggest a positivity problem
SMD_LIMIT = 0.1  # |SMD| after weighting above this is flagged (common practice)
ESS_SHARE = 0.10  # ESS below this share of an arm's rows is flagged
ARMS = ("unexposed", "exposed")  # arm index 0, 1
BOTH = "exposed vs unexposed"


def _unit_scale(w: np.ndarray) -> np.ndarray:
    """``w`` times the power of two that brings its largest finite magnitude into [0.5, 1).

    Squares and sums of the scaled weights cannot overflow, and as a power of two is exact in
    binary floating point, every scale-free quantity (a ratio of weighted sums: means, variances,
    Kish's ESS) comes out bit for bit as from the unscaled weights when those do not overflow.
    """
    finite = np.abs(w[np.isfinite(w)])
    top = finite.max(initial=0.0)
    if top == 0.0:
        return w
    return np.ldexp(w, -int(np.frexp(top)[1]))


def effective_sample_size(weights: np.ndarray, freq: np.ndarray | None = None) -> float:
    """Kish's effective sample size ``(sum f w)^2 / sum f w^2`` (Kish 1965, *Survey Sampling*).

    ``freq`` are row frequencies (each row stands for that many individuals with weight ``w``).
    The weights are scaled by a power of two first (:func:`_unit_scale`), so huge weights do not
    overflow ``w^2``.
    """
    w = _unit_scale(np.asarray(weights, dtype=float))
    f = np.ones_like(w) if freq is None else np.asarray(freq, dtype=float)
    s2 = np.sum(f * w * w)
    return float(np.sum(f * w) ** 2 / s2) if s2 > 0 else float("nan")


def smd(x, arm, weights=None, freq=None, *, binary: bool | None = None) -> float:
    """Standardized mean difference of ``x`` between ``arm == 1`` and ``arm == 0`` (Austin 2009).

    ``weights`` are IP weights, ``freq`` row frequencies. A plain, loop-free-of-groups reference of
    what :func:`diagnostics_table` computes for every group at once.
    """
    x, arm = np.asarray(x, dtype=float), np.asarray(arm, dtype=float)
    v = np.ones_like(x) if weights is None else _unit_scale(np.asarray(weights, dtype=float))
    f = np.ones_like(x) if freq is None else np.asarray(freq, dtype=float)
    binary = bool(np.isin(x, (0.0, 1.0)).all()) if binary is None else binary
    stats = []
    for j in (1.0, 0.0):
        sel = arm == j
        ww, xx, n = (f * v)[sel], x[sel], f[sel].sum()
        m = np.sum(ww * xx) / np.sum(ww)
        var = m * (1 - m) if binary else np.sum(ww * (xx - m) ** 2) / np.sum(ww) * n / (n - 1)
        stats.append((m, var))
    (m1, v1), (m0, v0) = stats
    return float((m1 - m0) / np.sqrt((v1 + v0) / 2))


# -- vectorised pieces ------------------------------------------------------------------------------
class _Groups:
    """Sums per (group, arm) with G = K strata + overall; results have shape (G, 2)."""

    def __init__(self, prep: Prepared, keep: np.ndarray):
        self.k = prep.n_strata
        self.code = prep.stratum.astype(np.int64) * 2 + (prep.a > 0).astype(np.int64)
        self.keep = keep

    def sums(self, values: np.ndarray) -> np.ndarray:
        per = np.bincount(self.code, weights=values, minlength=2 * self.k).reshape(self.k, 2)
        return np.vstack([per, per.sum(axis=0, keepdims=True)])

    def extreme(self, values: np.ndarray, how: str) -> np.ndarray:
        """Minimum or maximum of ``values`` per (group, arm) over kept rows; NaN where empty.

        NaN values (rows of a stratum whose model was not fitted) are skipped: comparing NaN in
        ``ufunc.at`` raises "invalid value" RuntimeWarnings."""
        fill = np.inf if how == "min" else -np.inf
        ufunc = np.minimum if how == "min" else np.maximum
        out = np.full(2 * self.k, fill)
        kept = np.where(self.keep & ~np.isnan(values), values, fill)
        ufunc.at(out, self.code, kept)  # one unbuffered pass (numpy >= 1.25)
        per = out.reshape(self.k, 2)
        per = np.vstack([per, (per.min(axis=0) if how == "min" else per.max(axis=0))[None, :]])
        return np.where(np.isfinite(per), per, np.nan)


def _terms(confounders: pd.DataFrame):
    """Yield ("numeric", name, values, is_binary) or ("levels", name, codes, levels) per confounder."""
    for name in confounders.columns:
        s = confounders[name]
        if pd.api.types.is_bool_dtype(s):
            yield "numeric", str(name), s.to_numpy(dtype=float), True
        elif pd.api.types.is_numeric_dtype(s):
            x = s.to_numpy(dtype=float)
            yield "numeric", str(name), x, bool(((x == 0.0) | (x == 1.0)).all())
        else:
            if isinstance(s.dtype, pd.CategoricalDtype):  # categories no row has get no SMD rows
                s = s.cat.remove_unused_categories()
                codes, levels = s.cat.codes.to_numpy(), list(s.cat.categories)
            else:
                codes, levels = pd.factorize(s, sort=True)
            if len(levels) >= 2:
                yield "levels", str(name), codes.astype(np.int64), list(levels)


def _smd_groups(groups: _Groups, x: np.ndarray, w: np.ndarray, binary: bool, n_rows: np.ndarray,
                sw: np.ndarray | None = None, w_total: float | None = None):
    """SMD per group (G,) of term ``x`` with row weights ``w``; ``n_rows`` (G, 2) rows per arm.

    ``sw`` (the per-group sums of ``w``) and ``w_total`` (``w.sum()``) may be passed when shared by
    several terms; the result is the same to the last bit.
    """
    w_total = w.sum() if w_total is None else w_total
    centre = np.average(x, weights=w) if w_total > 0 else 0.0
    xc = x - centre  # centring limits rounding in the one-pass variance
    sw = groups.sums(w) if sw is None else sw
    wx = w * xc
    sx = groups.sums(wx)
    with np.errstate(divide="ignore", invalid="ignore"):
        m = sx / sw
        if binary:
            p = m + centre
            var = p * (1 - p)
        else:
            wx *= xc  # w * xc * xc, evaluated in the same order as before
            ss = groups.sums(wx) - sx * m
            var = np.maximum(ss, 0.0) / sw * n_rows / (n_rows - 1)
        d = (m[:, 1] - m[:, 0]) / np.sqrt((var[:, 1] + var[:, 0]) / 2)
    return np.where(np.isfinite(d), d, np.nan)


def _smd_levels(groups: _Groups, codes: np.ndarray, n_levels: int, w: np.ndarray) -> np.ndarray:
    """SMD of every level's indicator per group, shape (G, L), from one bincount over levels."""
    per = np.bincount(groups.code * n_levels + codes, weights=w,
                      minlength=2 * groups.k * n_levels).reshape(groups.k, 2, n_levels)
    per = np.concatenate([per, per.sum(axis=0, keepdims=True)], axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = per / per.sum(axis=2, keepdims=True)
        var = p * (1 - p)
        d = (p[:, 1] - p[:, 0]) / np.sqrt((var[:, 1] + var[:, 0]) / 2)
    return np.where(np.isfinite(d), d, np.nan)


def diagnostics_table(prep: Prepared, gm: GroupMeans) -> pd.DataFrame:
    """The long table of checks (see the module docstring) for one estimate."""
    names = list(prep.labels["stratum"]) + ["overall"]
    f = prep.w
    groups = _Groups(prep, f > 0)
    n_rows = groups.sums(f)  # (G, 2): unexposed, exposed
    frames = []

    def add(check, arm, value, warning):
        frames.append((check, arm, np.asarray(value, dtype=float), np.broadcast_to(warning, len(names))))

    for j in (1, 0):
        warn = np.where(n_rows[:, j] < MIN_ROWS, f"fewer than {MIN_ROWS} rows in the {ARMS[j]} arm", "")
        add("n", ARMS[j], n_rows[:, j], warn)

    ps = gm.extra.get("propensity")
    ipw = gm.extra.get("weights")
    if ps is not None:
        ps = np.asarray(ps, dtype=float)
        lo, hi = groups.extreme(ps, "min"), groups.extreme(ps, "max")
        for j in (1, 0):
            add("propensity min", ARMS[j], lo[:, j],
                np.where(lo[:, j] < PROPENSITY_LIMITS[0],
                         f"propensities below {PROPENSITY_LIMITS[0]} in the {ARMS[j]} arm: "
                         "positivity doubtful", ""))
            add("propensity max", ARMS[j], hi[:, j],
                np.where(hi[:, j] > PROPENSITY_LIMITS[1],
                         f"propensities above {PROPENSITY_LIMITS[1]} in the {ARMS[j]} arm: "
                         "positivity doubtful", ""))
        low = np.fmax(lo[:, 0], lo[:, 1])  # common support: overlap of the two arms' ranges
        high = np.fmin(hi[:, 0], hi[:, 1])
        row_low, row_high = low[prep.stratum], high[prep.stratum]
        out_rows = f * ((ps < row_low) | (ps > row_high))
        out_all = f * ((ps < low[-1]) | (ps > high[-1]))
        per = np.bincount(prep.stratum, weights=out_rows, minlength=prep.n_strata)
        share = np.append(per, out_all.sum()) / n_rows.sum(axis=1)
        add("outside common support", "all", share, "")

    broken = None
    if ipw is not None:
        raw = np.asarray(ipw, dtype=float)
        top = groups.extreme(raw, "max")
        # A row whose weight is infinite or NaN (its stratum's propensities reached 0 or 1) leaves
        # the weighted checks of its (group, arm) undefined: they are NaN there, and the row adds
        # nothing to the sums (no inf - inf). The rest are scaled by a power of two, so sums of
        # f w^2 cannot overflow however large the weights (exact: the ratios are unchanged).
        bad = ~np.isfinite(raw) & (f > 0)
        broken = groups.sums(bad.astype(float)) > 0  # (G, 2)
        v = _unit_scale(np.where(bad, 0.0, np.nan_to_num(raw, nan=0.0, posinf=0.0, neginf=0.0)))
        s1, s2 = groups.sums(f * v), groups.sums(f * v * v)
        with np.errstate(divide="ignore", invalid="ignore"):
            ess = s1 * s1 / s2
        ess[broken] = np.nan
        for j in (1, 0):
            add("largest weight", ARMS[j], top[:, j], "")
        for j in (1, 0):
            add("effective sample size", ARMS[j], ess[:, j],
                np.where(ess[:, j] < ESS_SHARE * n_rows[:, j],
                         f"effective sample size under {ESS_SHARE:.0%} of the {ARMS[j]} arm's rows: "
                         "a few rows carry most of the weight", ""))

    # weights shared by every term: rows' frequencies, and frequencies x IP weights
    fv = f * v if ipw is not None else None
    shared_f = (n_rows, f.sum())  # groups.sums(f) is n_rows
    shared_fv = (groups.sums(fv), fv.sum()) if fv is not None else None
    for kind, name, x, info in _terms(prep.confounders):
        if kind == "numeric":
            labels = [name]
            before = _smd_groups(groups, x, f, info, n_rows, *shared_f)[:, None]
            after = (_smd_groups(groups, x, fv, info, n_rows, *shared_fv)[:, None]
                     if fv is not None else None)
        else:
            labels = [f"{name}={level}" for level in info]
            before = _smd_levels(groups, x, len(info), f)
            after = _smd_levels(groups, x, len(info), fv) if fv is not None else None
        for j, label in enumerate(labels):
            add(f"smd before: {label}", BOTH, before[:, j], "")
            if after is not None:
                after[broken.any(axis=1), j] = np.nan
                add(f"smd after: {label}", BOTH, after[:, j],
                    np.where(np.abs(after[:, j]) > SMD_LIMIT,
                             f"imbalance in {label} remains after weighting (|SMD| > {SMD_LIMIT})", ""))

    # long form, group by group (checks in the order added)
    g, c = len(names), len(frames)
    table = pd.DataFrame({
        "stratum": np.repeat(np.asarray(names, dtype=object), c),
        "check": np.tile(np.asarray([fr[0] for fr in frames], dtype=object), g),
        "arm": np.tile(np.asarray([fr[1] for fr in frames], dtype=object), g),
        "value": np.stack([fr[2] for fr in frames], axis=1).ravel(),
        "warning": np.stack([np.asarray(fr[3], dtype=object) for fr in frames], axis=1).ravel(),
    })
    return table[DIAGNOSTIC_COLUMNS]


def diagnostics_fields(prep: Prepared, spec: Spec, gm: GroupMeans, fields: dict) -> dict:
    """Post-estimation step of :func:`stratagem.analyze`: the ``diagnostics`` table and a note.

    Returns ``{"diagnostics": DataFrame}``, plus ``"notes"`` with one summary line appended when
    any check warns.
    """
    table = diagnostics_table(prep, gm)
    out = {"diagnostics": table}
    note = warnings_note(table)
    if note:
        out["notes"] = tuple(fields.get("notes", ())) + (note,)
    return out


def warnings_note(table: pd.DataFrame) -> str:
    """The one-line summary of a Checks table's warnings, or ``""`` when none warns."""
    warned = table[table["warning"] != ""]
    if not len(warned):
        return ""
    return (f"Checks: {len(warned)} warning(s) in {warned['stratum'].nunique()} group(s) "
            "(positivity, weights, balance or small arms); see Analysis.diagnostics.")
