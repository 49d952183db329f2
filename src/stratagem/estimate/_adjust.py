"""Shared engine of the model-based estimators (standardization, IPW, AIPW).

Models are fitted **per stratum**: in each stratum of the modifiers, a propensity model (logistic
regression of the exposure on an intercept and the confounders) and an outcome model (logistic for a
binary outcome, linear for a numeric one, on an intercept, the confounders and the exposure). Because
every coefficient is the stratum's own, no stratum's effect is forced equal to another's, and the
modifiers need no terms of their own (they are constant within a stratum). The strata's fits are
batched: one Newton iteration updates every bootstrap replicate of a stratum at once.

The overall group (index K) is the effect in the whole sample: the n-weighted combination of the
strata's adjusted potential-outcome means (its influence function is each row's stratum influence
function plus the deviation of the stratum's mean from the overall mean), so the overall row agrees
with the strata. When a stratum cannot be estimated (too few rows, no exposed or no unexposed rows,
a positivity failure, a model that does not converge), the overall group combines the estimable
strata only, and a note names the strata left out and their rows: the overall effect then describes
the population of the estimable strata. (A pooled model borrowing strength across strata would have
to assume the left-out stratum's effect equal to the others', the very thing under study, and its
stratum indicator may itself separate.)

Positivity is checked before fitting a propensity model: a level of a categorical (or 0/1) confounder
whose rows in a stratum are all exposed or all unexposed makes the propensity model separate, and the
stratum is reported as not estimable with that level named. A fitted propensity model whose
propensities reach 0 or 1 (``|logit| > 30``) is reported the same way.

Rows are sorted by stratum once, so each stratum's rows are one contiguous block of a single design
matrix ``Z = [1, standardised confounders, exposure]``; the propensity model uses the same matrix with
the exposure column masked.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..frame import Prepared, _zero_one
from ..spec import Spec
from . import glm
from .base import OK, GroupMeans, arm_counts
from .design import _is_numeric as _numeric
from .design import _levels, confounder_design, independent_columns

__all__ = ["Layout", "Unit", "layout", "estimate", "boot_means", "weighted_quantile"]

GATHER_ROWS = 65_536  # rows gathered at once when sorting the design by stratum
SUB_CELLS = 4_000_000  # replicate-by-row cells handled at once inside a bootstrap block (32 MB)


@dataclass
class Layout:
    """Rows sorted by stratum and the shared design matrix."""

    order: np.ndarray
    bounds: np.ndarray
    Z: np.ndarray
    a: np.ndarray
    y: np.ndarray
    w: np.ndarray
    names: tuple
    notes: list
    masks: np.ndarray  # (K, p) outcome-model columns per stratum; propensity drops the last one
    binary: bool
    pairs: dict = field(default_factory=dict)  # stratum -> column products for batched fits

    def stratum_pairs(self, s: int):
        """Column products of stratum ``s``'s design (computed once, reused by every bootstrap
        block and both models); None when the whole table of them would be too large."""
        lo, hi = self.bounds[s], self.bounds[s + 1]
        p = self.Z.shape[1]
        if len(self.order) * p * (p + 1) // 2 * 8 > glm.PAIR_BYTES:
            return None
        if s not in self.pairs:
            self.pairs[s] = glm._pairs(self.Z[lo:hi])
        return self.pairs[s]


@dataclass
class Unit:
    """One fitted unit (a stratum) for B weight vectors."""

    Z: np.ndarray
    a: np.ndarray
    y: np.ndarray
    W: np.ndarray  # (B, n_u)
    mask: np.ndarray  # outcome-model columns
    binary: bool
    status: str = OK
    ok: np.ndarray | None = None  # (B,) per-replicate success
    ps: glm.GLMFit | None = None
    om: glm.GLMFit | None = None
    E: np.ndarray | None = None  # propensities (B, n_u)
    Q1: np.ndarray | None = None  # predicted outcome if exposed
    Q0: np.ndarray | None = None
    mu: np.ndarray | None = None  # outcome-model fitted values at the observed exposure
    sw: np.ndarray | None = None  # stabilised, possibly truncated weights
    free: np.ndarray | None = None  # rows whose weight was not truncated
    pairs: object = None  # column products of Z for batched fits (glm._pairs), if precomputed
    Wt: np.ndarray | None = None  # W transposed (n_u, B), C-contiguous, for batched fits
    notes: list = field(default_factory=list)

    @property
    def ps_mask(self) -> np.ndarray:
        m = self.mask.copy()
        m[-1] = False
        return m


def _wdot(W: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``W @ v`` for W (B, n), summed without BLAS (whose summation order follows its threads)."""
    return np.einsum("bn,n->b", W, v)


def _centre_scale(x: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted means and standard deviations (1 where 0) of the columns of ``x``, for conditioning
    only: the design uses ``(x - m) / s``. Two passes (the variance from centred values), each in
    blocks of rows that stay in cache; ``x`` is left as it is."""
    total = w.sum()
    m = glm.dot_cols(x, w) / total
    ss = np.zeros(x.shape[1])
    for lo in range(0, len(x), GATHER_ROWS):
        xc = x[lo : lo + GATHER_ROWS] - m
        xc *= xc
        ss += glm.dot_cols(xc, w[lo : lo + GATHER_ROWS])
    s = np.sqrt(ss / total)
    return m, np.where(s > 0, s, 1.0)


def layout(prep: Prepared) -> Layout:
    """Sort rows by stratum and build the design ``[1, confounders, exposure]`` once."""
    k = prep.n_strata
    # a stable sort of small integer codes is a radix sort in numpy (several times faster)
    order = np.argsort(prep.stratum.astype(np.int16 if k < 2**15 else np.int64), kind="stable")
    counts = np.bincount(prep.stratum, minlength=k)
    bounds = np.concatenate([[0], np.cumsum(counts)])
    w = prep.w[order]
    design = confounder_design(prep.confounders, w=prep.w)  # rows in the table's order
    n, p = design.matrix.shape
    names, notes = design.names, list(design.notes)
    x = design.matrix
    del design
    m, sd = _centre_scale(x, prep.w)
    Z = np.empty((n, p + 2))
    a = prep.a[order]
    for lo in range(0, n, GATHER_ROWS):  # rows sorted by stratum, a block at a time: each block of
        Zb = Z[lo : lo + GATHER_ROWS]  # Z is written whole (np.take: a faster gather), centred and
        Zb[:, 0] = 1.0  # scaled while in cache
        xb = np.take(x, order[lo : lo + GATHER_ROWS], axis=0)
        xb -= m
        xb /= sd
        Zb[:, 1 : p + 1] = xb
        Zb[:, -1] = a[lo : lo + GATHER_ROWS]
    del x
    masks = np.ones((k, p + 2), dtype=bool)
    dropped: dict[str, list[str]] = {}
    for s in range(k):
        lo, hi = bounds[s], bounds[s + 1]
        if hi - lo == 0 or p == 0:
            continue
        keep, _ = independent_columns(Z[lo:hi, 1 : p + 1], w[lo:hi])
        masks[s, 1 : p + 1] = keep
        for j in np.flatnonzero(~keep):
            dropped.setdefault(names[j], []).append(str(prep.labels["stratum"].iloc[s]))
    if k > 1:
        notes.extend(dropped_notes(dropped))
    return Layout(order, bounds, Z, a, prep.y[order], w, names, notes, masks, prep.binary)


def _status(u: Unit, need_ps: bool, need_om: bool, levels=None) -> str:
    w = u.W[0]
    n = w.sum()
    n1 = (w * u.a).sum()
    if n <= 0:
        return "no rows in this stratum"
    if n1 <= 0:
        return "no exposed rows in this stratum"
    if n - n1 <= 0:
        return "no unexposed rows in this stratum"
    rows = int((w > 0).sum())
    params = u.Z.shape[1] - (0 if need_om else 1)  # before any column is left out in this stratum
    if rows < params:
        return f"fewer rows ({rows}) than model parameters ({params})"
    if need_ps and levels is not None:
        why = _positivity(levels, w, u.a)
        if why:
            return why
    if need_om and u.binary:
        ys = u.y[w > 0]
        if ys.min() == ys.max():
            return "outcome is constant in this stratum (all 0 or all 1): the outcome model cannot be fitted"
    return OK


def _level_codes(confounders, order: np.ndarray) -> list:
    """``(name, labels, codes)`` of every categorical, bool or 0/1 confounder, rows sorted as the
    layout (codes index ``labels``; -1 never occurs, rows with missing values were dropped)."""
    out = []
    for col in confounders.columns:
        s = confounders[col]
        if _numeric(s):
            v = s.to_numpy(dtype=float)
            if not _zero_one(v):
                continue
            labels, codes = ["0", "1"], v.astype(np.int64)
        else:
            labels = _levels(s)
            if len(labels) < 2:
                continue
            codes = _codes_in(s, labels)
        out.append((str(col), [str(x) for x in labels], codes[order]))
    return out


def _codes_in(s: pd.Series, labels: list) -> np.ndarray:
    """Position of each value of ``s`` in ``labels`` (int64; -1 for a missing value).

    A categorical column is recoded through its own codes: building ``pd.Categorical(s,
    categories=labels)`` from a categorical whose unused categories are left out of ``labels``
    is deprecated by pandas (Pandas4Warning) and will raise in a future version.
    """
    if isinstance(s.dtype, pd.CategoricalDtype):
        lookup = pd.Index(labels).get_indexer(s.cat.categories)  # old code -> position or -1
        raw = s.cat.codes.to_numpy()
        return np.where(raw >= 0, lookup[raw], -1).astype(np.int64)
    return pd.Index(labels).get_indexer(s).astype(np.int64)



def dropped_notes(dropped: dict) -> list[str]:
    """Notes for confounder columns left out of some strata's models: ``{column: [stratum, ...]}``."""
    notes = []
    for name, where in dropped.items():
        shown = ", ".join(repr(x) for x in where[:4]) + (" ..." if len(where) > 4 else "")
        notes.append(
            f"Confounder column {name!r} is constant or collinear within stratum/strata {shown} "
            "and was left out of the models there."
        )
    return notes

def _positivity(levels, w: np.ndarray, a: np.ndarray) -> str:
    """The first confounder level whose rows (with weight) in this stratum are all exposed or all
    unexposed, described as a positivity failure; ``""`` if there is none."""
    for name, labels, codes in levels:
        k = len(labels)
        n1 = np.bincount(codes, weights=w * a, minlength=k)
        n_all = np.bincount(codes, weights=w, minlength=k)
        n0 = n_all - n1
        for j in range(k):
            if n_all[j] > 0 and (n1[j] <= 0 or n0[j] <= 0):
                arm, other = ("exposed", "unexposed") if n1[j] <= 0 else ("unexposed", "exposed")
                return (
                    f"positivity fails: confounder {name!r} = {labels[j]} has no {arm} rows in this "
                    f"stratum ({n_all[j]:g} rows, all {other}), so the propensity model separates; "
                    f"merge levels of {name!r}, or leave it out of the strata's models"
                )
    return ""


BOOT_TOL = 1e-5  # Newton converges quadratically: after a step this small the error is ~1e-10


def _fit(u: Unit, need_ps: bool, need_om: bool, start_ps=None, start_om=None, ps_required=True) -> None:
    """Fit the unit's models for all its weight vectors; fill E, Q1, Q0, mu and ok."""
    tol = 1e-10 if start_ps is None and start_om is None else BOOT_TOL
    B = u.W.shape[0]
    ok = np.ones(B, dtype=bool)
    n1 = _wdot(u.W, u.a)
    ok &= (n1 > 0) & (u.W.sum(axis=1) - n1 > 0)
    W = u.W if u.Wt is None else u.Wt.T  # a transposed view: the batched fits need no copy of it
    if need_ps:
        u.ps = glm.fit(u.Z, u.a, W, family="binomial", mask=u.ps_mask, beta0=start_ps, tol=tol,
                       pairs=u.pairs)
        u.E = glm.expit_inplace(glm.linear_predictor(u.Z, u.ps.beta))
        if ps_required:
            ok &= u.ps.converged
    if need_om:
        family = "binomial" if u.binary else "gaussian"
        u.om = glm.fit(u.Z, u.y, W, family=family, mask=u.mask, beta0=start_om, tol=tol, pairs=u.pairs)
        if B > 1:  # replicates: the predictions only (fitted values at the observed exposure serve
            # only the influence functions of the full sample)
            b0 = u.om.beta.copy()
            b0[:, -1] = 0.0
            eta0 = glm.linear_predictor(u.Z, b0)  # exposure set to 0
            eta1 = eta0 + u.om.beta[:, -1:]  # ... and to 1
            if u.binary:
                u.Q1, u.Q0 = glm.expit_inplace(eta1), glm.expit_inplace(eta0)
            else:
                u.Q1, u.Q0 = eta1, eta0
            ok &= u.om.converged
            u.ok = ok
            return
        eta = glm.linear_predictor(u.Z, u.om.beta)
        ba = u.om.beta[:, -1:]
        eta1 = eta + ba * (1.0 - u.a)
        eta0 = eta - ba * u.a
        if u.binary:
            u.Q1, u.Q0 = glm.logistic(eta1), glm.logistic(eta0)
            # fitted values at the observed exposure: only the influence functions (one weight
            # row) use them, so bootstrap blocks skip this pass
            u.mu = np.where(u.a == 1, u.Q1, u.Q0) if B == 1 else None
        else:
            u.mu, u.Q1, u.Q0 = eta, eta1, eta0
        ok &= u.om.converged
    u.ok = ok


PS_EXTREME = 9.357622968840175e-14  # expit(-30): a propensity this close to 0 or 1 is separation


def _fit_status(u: Unit, need_ps: bool, ps_required: bool, need_om: bool) -> str:
    if need_ps and ps_required and u.ps.converged[0]:
        e = u.E[0]
        if np.any(((e < PS_EXTREME) | (e > 1.0 - PS_EXTREME)) & (u.W[0] > 0)):
            return (
                "positivity fails: the confounders predict exposure (almost) perfectly here, so "
                "fitted propensities reach 0 or 1 (the propensity model separates)"
            )
    if need_ps and ps_required and not u.ps.converged[0]:
        why = (
            " (separation: the confounders predict exposure perfectly here, so positivity fails)"
            if u.ps.separated[0]
            else ""
        )
        return "propensity model did not converge" + why
    if need_om and not u.om.converged[0]:
        return "outcome model did not converge" + (" (separation)" if u.om.separated[0] else "")
    return OK


def weighted_quantile(values: np.ndarray, weights: np.ndarray, q: float) -> float:
    """Inverted-CDF quantile of ``values`` with frequency ``weights`` (for integer weights, equal to
    ``np.quantile(np.repeat(values, weights), q, method="inverted_cdf")``)."""
    keep = weights > 0
    v, w = values[keep], weights[keep]
    if v.size == 0:
        return np.nan
    idx = np.argsort(v, kind="stable")
    cum = np.cumsum(w[idx])
    pos = np.searchsorted(cum, q * cum[-1] - 1e-9 * cum[-1], side="left")
    return float(v[idx][min(pos, v.size - 1)])


def _weights(units: list[Unit], spec: Spec) -> None:
    """Stabilised inverse probability weights ``P(A=a | stratum) / P(A=a | L, stratum)`` per unit,
    truncated at ``spec.truncate`` percentiles of all rows' weights (each replicate separately)."""
    units = [u for u in units if u.E is not None]
    for u in units:
        N = u.W.sum(axis=1, keepdims=True)
        p1 = _wdot(u.W, u.a)[:, None] / np.where(N > 0, N, 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            u.sw = np.where(u.a == 1, p1 / u.E, (1 - p1) / (1 - u.E))
        u.free = np.ones_like(u.sw, dtype=bool)
    if spec.truncate is None:
        return
    used = [u for u in units if u.status == OK]
    if not used:
        return
    sw = np.concatenate([u.sw for u in used], axis=1)
    W = np.concatenate([u.W for u in used], axis=1)
    lo_q, hi_q = spec.truncate[0] / 100.0, spec.truncate[1] / 100.0
    for b in range(W.shape[0]):  # per replicate: a sort of that replicate's weights
        ok = np.isfinite(sw[b])
        lo = weighted_quantile(sw[b][ok], W[b][ok], lo_q)
        hi = weighted_quantile(sw[b][ok], W[b][ok], hi_q)
        for u in units:
            clipped = np.clip(u.sw[b], lo, hi)
            u.free[b] = clipped == u.sw[b]
            u.sw[b] = clipped


@dataclass
class Run:
    """Everything one estimator run produced (full sample, B = 1, or a bootstrap block)."""

    lay: Layout
    strata: list
    notes: list


def run(prep: Prepared, spec: Spec, W: np.ndarray | None, *, need_ps: bool, need_om: bool,
        ps_required: bool, start: Run | None = None) -> Run:
    """Fit every stratum for weight rows ``W`` (original row order)."""
    lay = start.lay if start is not None else _cached_layout(prep)
    # np.take gathers the columns of W several times faster than W[:, order]; the fits take the
    # replicate weights rows by models, transposed here once for all strata and both models
    Ws = lay.w[None, :] if W is None else np.take(W, lay.order, axis=1)
    Wst = np.ascontiguousarray(Ws.T) if Ws.shape[0] > 1 else None
    levels = _level_codes(prep.confounders, lay.order) if start is None and need_ps and ps_required else None

    def one(s: int) -> Unit:
        lo, hi = lay.bounds[s], lay.bounds[s + 1]
        u = Unit(lay.Z[lo:hi], lay.a[lo:hi], lay.y[lo:hi], Ws[:, lo:hi], lay.masks[s].copy(), lay.binary)
        if start is None:
            here = None if levels is None else [(nm, lab, c[lo:hi]) for nm, lab, c in levels]
            u.status = _status(u, need_ps and ps_required, need_om, here)
        else:
            u.status = start.strata[s].status
        if u.status == OK:
            if Ws.shape[0] > 1:
                u.pairs = lay.stratum_pairs(s)
                u.Wt = Wst[lo:hi]
            ref = start.strata[s] if start is not None else None
            _fit(u, need_ps, need_om, _beta(ref, "ps"), _beta(ref, "om"), ps_required)
            if start is None:
                u.status = _fit_status(u, need_ps, ps_required, need_om)
        return u

    # One thread: fitting strata on two worker threads was measured slower (1.8 s against 0.8 s
    # at a million rows) because the many short numpy calls of a Newton step contend for the GIL.
    units = [one(s) for s in range(prep.n_strata)]
    return Run(lay, units, list(lay.notes))


def _beta(ref: Unit | None, which: str):
    if ref is None:
        return None
    f = getattr(ref, which)
    return None if f is None else f.beta[0]


# -- results ------------------------------------------------------------------------------------

def _unsort(lay: Layout, values_sorted: np.ndarray) -> np.ndarray:
    out = np.empty_like(values_sorted)
    out[lay.order] = values_sorted
    return out


def _row_values(r: Run, attr: str) -> np.ndarray:
    """A per-row quantity of the strata's fits (first weight row), in the user's row order; NaN in
    strata without fits."""
    n = len(r.lay.order)
    out = np.full(n, np.nan)
    for s, u in enumerate(r.strata):
        v = getattr(u, attr)
        if v is not None:
            out[r.lay.bounds[s] : r.lay.bounds[s + 1]] = v[0]
    return _unsort(r.lay, out)


def estimate(prep: Prepared, spec: Spec, unit_means, *, need_ps: bool, need_om: bool,
             ps_required: bool, name: str) -> GroupMeans:
    """Full-sample estimate with influence-function covariances per group.

    ``unit_means(u, spec, want_if)`` returns ``(m1, m0, if1, if0)``: means of shape (B,) and, when
    ``want_if``, per-row influence functions of shape (n_u,) for the unit's first weight row.
    """
    r = run(prep, spec, None, need_ps=need_ps, need_om=need_om, ps_required=ps_required)
    if need_ps and ps_required:
        _weights(r.strata, spec)
    K = prep.n_strata
    G = K + 1
    m1, m0, v11, v00, v10 = (np.full(G, np.nan) for _ in range(5))
    status = [u.status for u in r.strata] + [OK]
    N = np.array([u.W[0].sum() for u in r.strata])
    ifs = []
    for s, u in enumerate(r.strata):
        if u.status != OK:
            ifs.append(None)
            continue
        a1, a0, f1, f0 = unit_means(u, spec, True)
        w = u.W[0]
        v = [np.sum(w * x * z) / N[s] ** 2 for x, z in ((f1, f1), (f0, f0), (f1, f0))]
        if not np.isfinite([a1[0], a0[0], *v]).all():
            u.status = status[s] = (
                "the fitted models give undefined potential-outcome means here (a propensity or "
                "prediction of exactly 0 or 1): positivity or separation problem"
            )
            ifs.append(None)
            continue
        m1[s], m0[s] = a1[0], a0[0]
        v11[s], v00[s], v10[s] = v
        ifs.append((f1, f0))
    notes = list(r.notes)
    used = [s for s in range(K) if status[s] == OK]
    if not used:
        status[K] = status[0] if K == 1 else "not estimable: no stratum could be estimated"
    else:
        tot = N[used].sum()
        m1[K] = np.sum(N[used] * m1[used]) / tot
        m0[K] = np.sum(N[used] * m0[used]) / tot
        acc = np.zeros(3)
        for s in used:
            f1, f0 = ifs[s]
            g1, g0 = f1 + m1[s] - m1[K], f0 + m0[s] - m0[K]
            w = r.strata[s].W[0]
            acc += (np.sum(w * g1 * g1), np.sum(w * g0 * g0), np.sum(w * g1 * g0))
        v11[K], v00[K], v10[K] = acc / tot**2
        if len(used) < K:
            notes.append(_left_out_note(name, prep, status, N, used))
    n, n1, n0 = arm_counts(prep)
    gm = GroupMeans(n, n1, n0, m1, m0, v11, v00, v10, status, notes=notes)
    if need_ps:
        gm.extra["propensity"] = _row_values(r, "E")
    if need_ps and ps_required:
        gm.extra["weights"] = _row_values(r, "sw")
    gm.extra["confounder_columns"] = tuple(r.lay.names)
    _remember(prep, spec, r)
    return gm


def _left_out_note(name: str, prep: Prepared, status: list, N: np.ndarray, used: list) -> str:
    K = prep.n_strata
    out = [s for s in range(K) if s not in set(used)]
    shown = "; ".join(f"{prep.labels['stratum'].iloc[s]!r} ({N[s]:g} rows: {status[s]})" for s in out[:3])
    more = f"; and {len(out) - 3} more" if len(out) > 3 else ""
    return (
        f"{name}: the overall effect combines the {len(used)} estimable strata only "
        f"({N[used].sum():g} of {N.sum():g} rows), so it describes their population; left out: "
        f"{shown}{more}."
    )


def boot_means(prep: Prepared, spec: Spec, W: np.ndarray, unit_means, *, need_ps: bool,
               need_om: bool, ps_required: bool, estimator) -> tuple[np.ndarray, np.ndarray]:
    """Bootstrap replicates ``(m1, m0)`` of shape (B, G) from replicate row frequencies ``W`` (B, n).

    Every stratum's models are refitted for all replicates at once (batched Newton, started from the
    full-sample fit: a chord step with the shared information, then Newton steps to ``BOOT_TOL``;
    see :func:`stratagem.estimate.glm._chord_start`), so each replicate is the full refit of the
    models on its frequencies. A replicate whose fit fails in a stratum gets NaN there (and overall).
    """
    start = _recall(prep, spec)
    if start is None:
        estimator(prep, spec)
        start = _recall(prep, spec)
    need_ps = need_ps and ps_required  # a propensity model only for the diagnostics is not refitted
    W = np.atleast_2d(np.asarray(W, dtype=float))
    B, n = W.shape
    K = prep.n_strata
    out1 = np.full((B, K + 1), np.nan)
    out0 = np.full((B, K + 1), np.nan)
    step = max(1, min(B, SUB_CELLS // max(n, 1)))
    for lo in range(0, B, step):
        hi = min(B, lo + step)
        r = run(prep, spec, W[lo:hi], need_ps=need_ps, need_om=need_om, ps_required=ps_required,
                start=start)
        if need_ps and ps_required:
            _weights(r.strata, spec)
        Ns = np.zeros((hi - lo, K))
        for s, u in enumerate(r.strata):
            if u.status != OK:
                continue
            Ns[:, s] = u.W.sum(axis=1)
            a1, a0, _, _ = unit_means(u, spec, False)
            out1[lo:hi, s] = np.where(u.ok, a1, np.nan)
            out0[lo:hi, s] = np.where(u.ok, a0, np.nan)
        used = [s for s in range(K) if r.strata[s].status == OK]
        if used:  # the estimable strata of the full sample, as the overall estimate
            tot = Ns[:, used].sum(axis=1)
            out1[lo:hi, K] = np.sum(Ns[:, used] * out1[lo:hi, used], axis=1) / tot
            out0[lo:hi, K] = np.sum(Ns[:, used] * out0[lo:hi, used], axis=1) / tot
    return out1, out0


# -- a small memory of the last full-sample runs, so bootstrap blocks reuse the layout and start values

_MEMORY: list = []


def _key(spec: Spec) -> tuple:
    return (spec.method, spec.measure, spec.truncate)


def _remember(prep: Prepared, spec: Spec, r: Run) -> None:
    _MEMORY[:] = [m for m in _MEMORY if not (m[0] is prep and m[1] == _key(spec))][-1:]
    _MEMORY.append((prep, _key(spec), r))


def _recall(prep: Prepared, spec: Spec) -> Run | None:
    for p, k, r in _MEMORY:
        if p is prep and k == _key(spec):
            return r
    return None


def _cached_layout(prep: Prepared) -> Layout:
    for p, _, r in _MEMORY:
        if p is prep:
            return r.lay
    return layout(prep)


def unit_n(u: Unit) -> np.ndarray:
    """Weighted rows of the unit per weight row, shape (B,)."""
    return u.W.sum(axis=1)
