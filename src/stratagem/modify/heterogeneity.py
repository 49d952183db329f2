"""Tests of effect modification across strata: the rows of ``Analysis.heterogeneity``.

Rows (column ``test``), each with ``statistic``, ``df``, ``p_value`` and a ``note`` saying the scale:

``cochran_q``
    Cochran's Q of the stratum estimates on the analysis scale (differences, or log ratios) with
    inverse-variance weights, through ``statsmodels.stats.meta_analysis.combine_effects``.
``i2``
    Higgins & Thompson (2002, *Stat Med* 21:1539) I^2 = max(0, (Q - df) / Q), as a proportion: the
    share of the variation between strata estimates beyond what chance would give.
``interaction_wald``
    Wald test that all stratum estimates are equal, ``(C theta)' (C V C')^-1 (C theta)`` with C the
    contrasts against the first stratum, K - 1 df. The stratum estimates come from estimators without
    one model holding exposure-by-modifier terms, so this is the natural analogue of the Wald test of
    those terms (for the crude method it equals that test in the saturated logistic or linear model).
    V is the estimator's covariance of the stratum estimates when it reports one
    (``GroupMeans.extra["theta_cov"]``), else the covariance of the bootstrap replicates (interval
    "bootstrap"), else diagonal (strata are disjoint samples) -- then the statistic equals Q.
``interaction_lr``
    Likelihood-ratio test of all exposure-by-stratum product terms in a working model of the outcome
    on stratum indicators, exposure and (for adjusted methods) the confounders: logistic for a binary
    outcome (so it tests the odds-ratio scale), Gaussian linear for a numeric one (the difference
    scale). Without confounders the models are fitted on the cells (stratum x exposure), which costs
    one pass over the rows at any size; with confounders they are fitted on the rows with statsmodels
    only up to :data:`LR_MAX_ROWS` rows (larger tables give NaN with a note, to keep ``analyze`` fast).
``breslow_day``
    Breslow-Day test of equal odds ratios with Tarone's correction, through
    ``statsmodels.stats.contingency_tables.StratifiedTable.test_equal_odds(adjust=True)``, on the 2x2
    tables of the strata. Computed for ``measure="or"`` with methods "mantel-haenszel" and "crude"
    (the methods built on 2x2 tables); for every other case the row is present with NaN and a note, so
    the table always has the same rows.
``gail_simon``
    Gail & Simon (1985) test of qualitative interaction (see :mod:`.gail_simon`).
``scale``
    For a binary outcome: Cochran's Q on the risk-difference and on the log risk-ratio scale, and a
    statement of the scale dependence of effect modification (common practice, no source).

With fewer than two estimable strata every test is NaN with a note; nothing raises.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats
from statsmodels.stats.contingency_tables import StratifiedTable
from statsmodels.stats.meta_analysis import combine_effects

from .. import measures
from ..estimate import glm
from ..results import HETEROGENEITY_COLUMNS
from .design import confounder_matrix
from .gail_simon import gail_simon

__all__ = [
    "LR_MAX_ROWS",
    "cochran_q",
    "wald_equal",
    "interaction_lr",
    "breslow_day",
    "heterogeneity_table",
    "cell_counts",
]

LR_MAX_ROWS = 20_000  # rows up to which the confounder-adjusted interaction LR test is fitted
SCALE_NAMES = {"rd": "risk difference", "rr": "log risk ratio", "or": "log odds ratio",
               "md": "mean difference"}
ALPHA = 0.05  # threshold used only in the words of the "scale" row


def _row(test, statistic=np.nan, df=np.nan, p_value=np.nan, note=""):
    return {"test": test, "statistic": float(statistic), "df": float(df), "p_value": float(p_value),
            "note": note}


def cochran_q(theta, se):
    """Cochran's Q, its df, p-value and I^2 for finite (theta, se > 0) pairs (statsmodels).

    Returns ``(q, df, p, i2, k)``; NaNs when fewer than two pairs.
    """
    theta, se = np.asarray(theta, dtype=float), np.asarray(se, dtype=float)
    use = np.isfinite(theta) & np.isfinite(se) & (se > 0)
    k = int(use.sum())
    if k < 2:
        return np.nan, np.nan, np.nan, np.nan, k
    with warnings.catch_warnings():  # its random-effects extras may take sqrt of a negative; unused
        warnings.simplefilter("ignore", RuntimeWarning)
        res = combine_effects(theta[use], se[use] ** 2, method_re="chi2")
    q = float(res.q)
    df = k - 1
    p = float(stats.chi2.sf(q, df))
    i2 = float(max(0.0, (q - df) / q)) if q > 0 else 0.0
    return q, df, p, i2, k


def wald_equal(theta, cov):
    """Wald statistic, df and p-value for H0: all entries of ``theta`` equal, with covariance ``cov``."""
    theta = np.asarray(theta, dtype=float)
    k = len(theta)
    if k < 2:
        return np.nan, np.nan, np.nan
    c = np.hstack([-np.ones((k - 1, 1)), np.eye(k - 1)])
    d = c @ theta
    v = c @ np.asarray(cov, dtype=float) @ c.T
    try:
        stat = float(d @ np.linalg.solve(v, d))
    except np.linalg.LinAlgError:
        return np.nan, k - 1, np.nan
    return stat, k - 1, float(stats.chi2.sf(stat, k - 1))


def cell_counts(prep, groups: int | None = None):
    """Weighted counts per (stratum, exposure, outcome 0/1) for a binary outcome: shape (K, 2, 2).

    ``[k, a, y]`` with a = 1 exposed, y = 1 outcome. One ``np.bincount`` pass over the rows.
    """
    k = prep.n_strata if groups is None else groups
    code = prep.stratum * 4
    code += prep.a.astype(np.int64) * 2
    code += prep.y.astype(np.int64)
    return np.bincount(code, weights=prep.w, minlength=4 * k).reshape(k, 2, 2)


def _loglik(y, x, w, binary: bool, beta0=None):
    """Maximised log-likelihood of a logistic model (binary) or residual sum of squares (linear).

    Fitted with the project's Newton/IRLS routine (``stratagem.estimate.glm.fit``, tested equal to
    statsmodels GLM); statsmodels' GLM set-up (rank checks by SVD) costs more than the fit here.
    Raises ``FloatingPointError`` when a logistic fit does not converge (separation).
    """
    res = glm.fit(x, y, w, family="binomial" if binary else "gaussian", beta0=beta0)
    eta = x @ res.beta
    if not binary:
        r = y - eta
        return float(np.sum(w * r * r)), res.beta
    if not res.converged or res.separated:
        raise FloatingPointError("the logistic working model did not converge (separation?)")
    return float(np.sum(w * (y * eta - np.logaddexp(0.0, eta)))), res.beta


def _binary_lr_cells(cells):
    """LR test of exposure x stratum terms in a logistic model fitted on (stratum, exposure) cells."""
    k = cells.shape[0]
    s = cells[:, :, 1].ravel()  # events per (stratum, arm)
    n = cells.sum(axis=2).ravel()
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(n > 0, s / n, 0.0)
        ll_full = np.sum(np.where(s > 0, s * np.log(np.where(s > 0, p, 1.0)), 0.0)
                         + np.where(n - s > 0, (n - s) * np.log(np.where(n - s > 0, 1 - p, 1.0)), 0.0))
    strata = np.repeat(np.arange(k), 2)
    arm = np.tile([0.0, 1.0], k)
    x = np.column_stack([np.ones(2 * k), arm] + [(strata == j).astype(float) for j in range(1, k)])
    # two rows per cell (outcome 1 with weight s, outcome 0 with weight n - s)
    xx = np.vstack([x, x])
    yy = np.concatenate([np.ones(2 * k), np.zeros(2 * k)])
    ww = np.concatenate([s, n - s])
    keep = ww > 0
    ll_red, _ = _loglik(yy[keep], xx[keep], ww[keep], binary=True)
    return 2.0 * (ll_full - ll_red)


def _gaussian_lr_cells(prep, ok_strata):
    """ML LR statistic of the product terms in a linear model without confounders, from cell sums.

    The full model is saturated in (stratum, exposure): its residual sum of squares is the
    within-cell one. The reduced model is fitted on the 2K cell means weighted by the cell sizes;
    its residual sum of squares adds the weighted squared deviations of the cell means. One
    ``np.bincount`` pass per sum over the rows.
    """
    k_all = prep.n_strata
    code = prep.stratum * 2 + prep.a.astype(np.int64)
    n = np.bincount(code, weights=prep.w, minlength=2 * k_all).reshape(k_all, 2)[ok_strata].ravel()
    s1 = np.bincount(code, weights=prep.w * prep.y, minlength=2 * k_all).reshape(k_all, 2)[ok_strata].ravel()
    s2 = np.bincount(code, weights=prep.w * prep.y * prep.y,
                     minlength=2 * k_all).reshape(k_all, 2)[ok_strata].ravel()
    k = len(ok_strata)
    mean = s1 / n
    within = float(np.sum(s2 - s1 * mean))
    strata = np.repeat(np.arange(k), 2)
    arm = np.tile([0.0, 1.0], k)
    x = np.column_stack([np.ones(2 * k), arm] + [(strata == j).astype(float) for j in range(1, k)])
    rss_cells, _ = _loglik(mean, x, n, binary=False)
    return float(n.sum() * np.log((within + rss_cells) / within))


def _adjusted(spec) -> bool:
    """Whether the interaction LR test's working model holds the confounders."""
    return spec.method not in ("crude", "exact") and len(spec.confounders) > 0


def _breslow_day_applies(prep, spec) -> bool:
    return prep.binary and spec.measure == "or" and spec.method in ("mantel-haenszel", "crude")


def interaction_lr(prep, spec, ok_strata, cells=None):
    """Likelihood-ratio test of exposure-by-stratum terms; returns ``(statistic, df, p, note)``.

    ``cells`` may pass the (K, 2, 2) weighted counts of :func:`cell_counts` already computed.
    """
    ok_strata = np.asarray(ok_strata)
    k = len(ok_strata)
    df = k - 1
    adjusted = _adjusted(spec)
    scale = "odds-ratio scale (logistic model)" if prep.binary else "difference scale (linear model)"
    try:
        if not adjusted:
            if prep.binary:
                cells = cell_counts(prep) if cells is None else cells
                stat = _binary_lr_cells(cells[ok_strata])
            else:
                stat = _gaussian_lr_cells(prep, ok_strata)
            how = "no confounders, fitted on the stratum x exposure cells"
        else:
            # rows with weight per stratum (a bincount is cheaper than a row mask when over the limit)
            per = np.bincount(prep.stratum, weights=prep.w > 0, minlength=prep.n_strata)
            n_rows = int(per[ok_strata].sum())
            if n_rows > LR_MAX_ROWS:
                return (np.nan, df, np.nan,
                        f"not computed: {n_rows:,} rows is above {LR_MAX_ROWS:,}, where refitting the "
                        "working model with confounders on every analysis would be slow; see "
                        "interaction_wald")
            rows = np.isin(prep.stratum, ok_strata) & (prep.w > 0)
            remap = np.full(prep.n_strata, -1)
            remap[ok_strata] = np.arange(k)
            st = remap[prep.stratum[rows]]
            a = prep.a[rows]
            y = prep.y[rows]
            w = prep.w[rows]
            dummies = np.column_stack([(st == j).astype(float) for j in range(1, k)])
            conf = confounder_matrix(prep.confounders.loc[rows])
            x_red = np.column_stack([np.ones(len(y)), a, dummies, conf])
            x_full = np.column_stack([x_red, dummies * a[:, None]])
            ll_red, b_red = _loglik(y, x_red, w, prep.binary)
            ll_full, _ = _loglik(y, x_full, w, prep.binary, beta0=np.append(b_red, np.zeros(k - 1)))
            if prep.binary:
                stat = 2.0 * (ll_full - ll_red)
            else:  # ML likelihood ratio of nested linear models: N log(RSS_reduced / RSS_full)
                stat = float(w.sum() * np.log(ll_red / ll_full))
            how = "adjusted for the confounders"
    except Exception as exc:  # separation, singular design: report, never raise inside analyze()
        return np.nan, df, np.nan, f"working model could not be fitted ({type(exc).__name__}); {scale}"
    stat = max(float(stat), 0.0)
    return stat, df, float(stats.chi2.sf(stat, df)), f"{scale}, {how}"


def breslow_day(prep, spec, ok_strata, cells=None):
    """Breslow-Day test with Tarone's correction; returns ``(statistic, df, p, note)`` (statsmodels)."""
    k = len(ok_strata)
    df = k - 1
    if not _breslow_day_applies(prep, spec):
        return np.nan, np.nan, np.nan, "for measure='or' with method='mantel-haenszel' or 'crude' only"
    if k < 2:
        return np.nan, np.nan, np.nan, "fewer than two estimable strata"
    cells = (cell_counts(prep) if cells is None else cells)[np.asarray(ok_strata)]
    # StratifiedTable wants (2, 2, K): rows exposed / unexposed, columns outcome yes / no
    tables = np.stack([cells[:, 1, 1], cells[:, 1, 0], cells[:, 0, 1], cells[:, 0, 0]], axis=1)
    tables = tables.reshape(k, 2, 2).transpose(1, 2, 0)
    note = "2x2 tables of the strata"
    if (tables == 0).any():
        if spec.correction is None:
            return np.nan, df, np.nan, "a stratum has a zero cell; pass correction=0.5"
        tables = np.where((tables == 0).any(axis=(0, 1)), tables + spec.correction, tables)
        note += f", {spec.correction} added to tables with a zero cell"
    if spec.method == "mantel-haenszel" and spec.confounders:
        note += " (collapsed over the confounders)"
    res = StratifiedTable(tables).test_equal_odds(adjust=True)
    return float(res.statistic), df, float(res.pvalue), note


def _scale_row(prep, gm, ok_groups):
    """Q on the difference and ratio scales (binary outcome) and the scale-dependence statement."""
    if not prep.binary:
        return _row("scale", note="numeric outcome: effects are compared on the difference scale only")
    idx = np.asarray(ok_groups)
    out = {}
    for m in ("rd", "rr"):
        theta, se = measures.on_analysis_scale(m, gm.m1[idx], gm.m0[idx], gm.v11[idx], gm.v00[idx],
                                               gm.v10[idx])
        out[m] = cochran_q(theta, se)
    p_rd, p_rr = out["rd"][2], out["rr"][2]
    if not (np.isfinite(p_rd) and np.isfinite(p_rr)):
        return _row("scale", note="scale comparison needs two strata with risks strictly between 0 and 1")
    found = [name for name, p in (("difference", p_rd), ("ratio", p_rr)) if p < ALPHA]
    if not found:
        verdict = "no modification detected on either scale"
    elif len(found) == 1:
        verdict = f"modification detected on the {found[0]} scale only"
    else:
        verdict = "modification detected on both scales"
    note = (
        f"Cochran's Q p = {p_rd:.3g} on the risk-difference scale, p = {p_rr:.3g} on the ratio scale "
        f"(log risk ratio); {verdict} (at {ALPHA}). Modification depends on the scale: when the risk "
        "without exposure differs between strata, an effect constant on one scale must differ on the "
        "other, so absence on one scale implies presence on the other."
    )
    return _row("scale", note=note)


def heterogeneity_table(prep, spec, gm, strata: pd.DataFrame, theta_boot=None) -> pd.DataFrame:
    """All heterogeneity rows for one analysis (see the module docstring).

    ``strata`` is the per-stratum effects table (reported scale); ``theta_boot`` the bootstrap
    replicates of the stratum estimates on the analysis scale, shape (B, G) or (B, K), or None.
    """
    scale = SCALE_NAMES[spec.measure]
    if spec.method == "exact":
        note = "method='exact': no sampling variability, so no test; compare the stratum effects directly"
        return pd.DataFrame([_row(t, note=note) for t in
                             ("cochran_q", "i2", "interaction_wald", "interaction_lr", "breslow_day",
                              "gail_simon", "scale")], columns=HETEROGENEITY_COLUMNS)
    est = strata["estimate"].to_numpy(dtype=float)
    se = strata["se"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        theta = np.log(est) if spec.measure in measures.RATIO else est
    ok = (strata["status"].to_numpy() == "ok") & np.isfinite(theta) & np.isfinite(se) & (se > 0)
    ok_groups = np.flatnonzero(ok)
    k = len(ok_groups)
    if k < 2:
        note = ("fewer than two estimable strata: nothing to compare" if spec.strata
                else "no modifiers given: add strata to test effect modification")
        return pd.DataFrame([_row(t, note=note) for t in
                             ("cochran_q", "i2", "interaction_wald", "interaction_lr", "breslow_day",
                              "gail_simon", "scale")], columns=HETEROGENEITY_COLUMNS)
    rows = []
    q, df, p, i2, _ = cochran_q(theta[ok], se[ok])
    rows.append(_row("cochran_q", q, df, p, f"{k} strata, {scale} scale, inverse-variance weights"))
    rows.append(_row("i2", i2, np.nan, np.nan,
                     f"I² = {100 * i2:.0f}% of the variation between strata beyond chance"))

    cov = gm.extra.get("theta_cov") if isinstance(gm.extra, dict) else None
    if cov is not None:
        v = np.asarray(cov, dtype=float)[np.ix_(ok_groups, ok_groups)]
        how = "covariance reported by the estimator"
    elif theta_boot is not None:
        tb = np.asarray(theta_boot, dtype=float)[:, ok_groups]
        tb = tb[np.all(np.isfinite(tb), axis=1)]
        v = np.cov(tb, rowvar=False) if len(tb) > k else np.diag(se[ok] ** 2)
        how = "covariance of the bootstrap replicates"
    else:
        v = np.diag(se[ok] ** 2)
        how = "strata independent (disjoint samples), so it equals Cochran's Q"
    stat, wdf, wp = wald_equal(theta[ok], v)
    rows.append(_row("interaction_wald", stat, wdf, wp,
                     f"Wald test that all {k} stratum estimates are equal ({scale} scale; {how})"))

    # one pass over the rows, shared by the two tests below, when either reads the 2x2 cells
    needs_cells = prep.binary and (not _adjusted(spec) or _breslow_day_applies(prep, spec))
    cells = cell_counts(prep) if needs_cells else None
    lr, lrdf, lrp, lrnote = interaction_lr(prep, spec, ok_groups, cells)
    rows.append(_row("interaction_lr", lr, lrdf, lrp, lrnote))

    bd, bddf, bdp, bdnote = breslow_day(prep, spec, ok_groups, cells)
    rows.append(_row("breslow_day", bd, bddf, bdp, bdnote))

    gs = gail_simon(theta[ok], se[ok])
    rows.append(_row("gail_simon", gs.statistic, gs.k - 1, gs.p_value,
                     f"qualitative interaction (effects of opposite sign), {scale} scale; "
                     f"Q- = {gs.q_minus:.3g}, Q+ = {gs.q_plus:.3g}"))
    rows.append(_scale_row(prep, gm, ok_groups))
    return pd.DataFrame(rows, columns=HETEROGENEITY_COLUMNS)
