"""Mantel-Haenszel effects: pooled over the cross-classification of confounder levels in each stratum.

Within every modifier stratum the rows are split into *cells*, one per observed combination of
confounder levels, and each cell's 2x2 table (exposure by outcome) is pooled with the
Mantel-Haenszel weights. The overall group pools every cell of every stratum (modifiers x
confounders), so it is adjusted for the modifiers as well.

Notation for cell ``i``: ``a`` exposed cases, ``b`` exposed non-cases, ``c`` unexposed cases, ``d``
unexposed non-cases, ``N1 = a + b``, ``N0 = c + d``, ``T = N1 + N0`` and the weight
``W = N1 N0 / T``. Only cells holding both arms contribute (every term below is 0 otherwise).

* Odds ratio (Mantel & Haenszel 1959, J Natl Cancer Inst 22:719): ``sum(a d / T) / sum(b c / T)``,
  computed with :class:`statsmodels.stats.contingency_tables.StratifiedTable`; standard error of the
  log odds ratio by Robins, Breslow & Greenland (1986, Biometrics 42:311), as statsmodels does it.
* Risk ratio (as in Greenland & Robins 1985, Biometrics 41:55-68):
  ``sum(a N0 / T) / sum(c N1 / T)``, with the Greenland & Robins (1985) variance of its log,
  ``sum(N1 N0 M1 / T^2 - a c / T) / (sum(a N0 / T) sum(c N1 / T))`` where ``M1 = a + c``.
* Risk difference (Greenland & Robins 1985): ``sum(W (a/N1 - c/N0)) / sum(W)``, with the Sato (1989,
  Biometrics 45:1323) variance ``(RD sum(P) + sum(Q)) / sum(W)^2``,
  ``P = (N1^2 c - N0^2 a + N1 N0 (N0 - N1) / 2) / T^2``, ``Q = (a (N0 - c) + c (N1 - a)) / (2 T)``.
  Both variances stay consistent when there are many sparse cells and when there are few large ones.
* Mean difference (numeric outcome): the same weights ``W``, ``sum(W (ybar1 - ybar0)) / sum(W)``.
  Its variance treats the weights as fixed: ``sum(W^2 (s1^2 / N1 + s0^2 / N0)) / sum(W)^2`` with
  ``s^2`` the cell's sample variance in that arm (n - 1 divisor), or, for an arm with a single row in
  the cell, that arm's pooled within-cell variance in the group. For a 0/1 outcome the point
  estimate equals the Mantel-Haenszel risk difference.

``mean_exposed`` / ``mean_unexposed`` are the risks (means) standardised to the Mantel-Haenszel
weights: ``m1 = sum(W a / N1) / sum(W)`` and ``m0 = sum(W c / N0) / sum(W)``. They satisfy
``m1 - m0 = RD_MH`` and ``m1 / m0 = RR_MH`` exactly (the Mantel-Haenszel risk ratio and difference
are comparisons of this one standard population); the odds ratio is not a function of them. Their
variances ``v11``, ``v00`` treat the weights as fixed (binomial within cells) and ``v10`` is 0; the
intervals of the effect come from ``theta``/``se`` above, not from these.

Confounders must be categorical. A numeric confounder with more than
:data:`LEVEL_THRESHOLD` distinct values is cut into :data:`CONFOUNDER_BINS` quantile bins (five
subclasses remove about 90% of the bias of one confounder; Cochran 1968, Biometrics 24:295), with a
note; other confounders are used level by level.

Zero cells: the pooled estimators do not need any single table to be free of zeros. Only when a
group's pooled ratio is undefined (a zero numerator or denominator sum) and ``correction`` is set,
``correction`` is added to every cell of each of that group's tables that has a zero cell.

Counting is one ``np.bincount`` over combined integer codes (cell, exposure, outcome); no per-row
Python. The bootstrap (:func:`mantel_haenszel.boot`) keeps the cells (and the confounder bins) of
the original data and recounts each replicate with a sparse indicator product.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse
from statsmodels.stats.contingency_tables import StratifiedTable

from ..frame import Prepared, _quantiles
from ..spec import Spec
from .base import OK, GroupMeans

__all__ = ["mantel_haenszel", "confounder_cells", "CONFOUNDER_BINS", "LEVEL_THRESHOLD"]

CONFOUNDER_BINS = 5  # quantile bins for a numeric confounder with many values (Cochran 1968)
LEVEL_THRESHOLD = 10  # a numeric confounder with more distinct values than this is binned
_MAX_DENSE = 1 << 22  # largest number of (stratum x confounder) codes counted without compressing


# -- cells ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Cells:
    """Each row's cell (a stratum x confounder-level combination) and each cell's stratum.

    ``cell`` is an int64 array (n,) with values in ``0 .. n_cells-1``; ``stratum_of`` (n_cells,)
    gives the stratum of every cell. Some cells may be empty.
    """

    cell: np.ndarray
    n_cells: int
    stratum_of: np.ndarray
    notes: tuple


def _is_numeric(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)


def _column_codes(s: pd.Series, name: str, w: np.ndarray | None = None) -> tuple[np.ndarray, int, str | None]:
    """Integer level codes (n,) of one confounder, the number of levels, and a note if binned.

    A numeric confounder with many values is cut at quantiles that weight each row by its frequency
    ``w`` (rows of weight 0 do not count), so a table of counts gets the cut points of its expanded
    rows (the modifiers' binning in :mod:`stratagem.frame` does the same).
    """
    if isinstance(s.dtype, pd.CategoricalDtype):
        return s.cat.codes.to_numpy().astype(np.int64), len(s.cat.categories), None
    codes, uniques = pd.factorize(s, sort=False)
    if _is_numeric(s):
        x = s.to_numpy(dtype=float)
        n_distinct = len(uniques) if w is None or np.all(w > 0) else len(np.unique(x[w > 0]))
    if _is_numeric(s) and n_distinct > LEVEL_THRESHOLD:
        edges = np.unique(_quantiles(x, w, np.linspace(0, 1, CONFOUNDER_BINS + 1)))
        inner = edges[1:-1]
        codes = np.searchsorted(inner, x, side="right").astype(np.int64)
        return codes, len(inner) + 1, binning_note(name, n_distinct, inner)
    return codes.astype(np.int64), max(len(uniques), 1), None


def binning_note(name: str, n_distinct: int, inner) -> str:
    """The note saying a numeric confounder was cut at ``inner`` cut points (shared with engines)."""
    shown = ", ".join(f"{e:.4g}" for e in inner)
    return (
        f"Confounder {name!r} is numeric with {n_distinct} distinct values: Mantel-Haenszel "
        f"needs levels, so it was cut into {len(inner) + 1} quantile bins (cut points {shown}). "
        "Residual confounding within bins is possible; pass a binned column to choose the cuts, "
        "or use method='standardization', 'ipw' or 'aipw'."
    )


def _compress(code: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    uniq, inv = np.unique(code, return_inverse=True)
    return inv.astype(np.int64).ravel(), uniq


def confounder_cells(prep: Prepared) -> Cells:
    """Cells of the cross-classification of modifier strata and confounder levels.

    Returns a :class:`Cells`; the codes are combined in mixed radix (one multiply-add per column),
    compressed with ``np.unique`` only when the radix space would be too large to count densely.
    """
    n = len(prep.a)
    code = np.zeros(n, dtype=np.int64)
    size = 1
    notes = []
    for name in prep.confounders.columns:
        codes, levels, note = _column_codes(prep.confounders[name], str(name), prep.w)
        if note:
            notes.append(note)
        if size * levels > _MAX_DENSE:
            code, uniq = _compress(code)
            size = len(uniq)
        code = code * levels + codes
        size *= levels
    k = prep.n_strata
    if size * k > max(_MAX_DENSE, 4 * n):
        code, uniq = _compress(code)
        size = len(uniq)
    cell = prep.stratum.astype(np.int64) * size + code
    n_cells = k * size
    stratum_of = np.repeat(np.arange(k, dtype=np.int64), size)
    if n_cells > max(_MAX_DENSE, 4 * n):
        cell, uniq = _compress(cell)
        n_cells, stratum_of = len(uniq), uniq // size
    return Cells(cell, int(n_cells), stratum_of, tuple(notes))


# -- counting ---------------------------------------------------------------------------------------
def _binary_tables(cells: Cells, prep: Prepared, w: np.ndarray | None) -> np.ndarray:
    """Cell tables, shape (C, 4) or (B, C, 4): columns (a, b, c, d) as in the module docstring.

    ``w`` None means the prepared row frequencies; a (B, n) array gives one table set per row.
    """
    code = cells.cell * 4 + (2 * (prep.a > 0) + (prep.y > 0)).astype(np.int64)
    size = 4 * cells.n_cells
    if w is None or w.ndim == 1:
        w = prep.w if w is None else w
        unit = w is prep.w and np.all(w == 1.0)
        counts = np.bincount(code, minlength=size) if unit else np.bincount(code, weights=w, minlength=size)
        raw = counts.astype(float).reshape(-1, 4)
    else:
        ind = sparse.csr_matrix((np.ones(len(code)), (np.arange(len(code)), code)), shape=(len(code), size))
        raw = np.asarray((ind.T @ w.T).T).reshape(w.shape[0], -1, 4)
    # raw columns: (unexposed non-case, unexposed case, exposed non-case, exposed case)
    return raw[..., [3, 2, 1, 0]]


def _numeric_sums(cells: Cells, prep: Prepared, w: np.ndarray | None):
    """Per cell and arm: total frequency, sum of y and sum of squares about the arm's cell mean.

    Each output has shape (C, 2) or (B, C, 2) with arm 0 unexposed and arm 1 exposed. The outcome
    is centred on its overall mean first, which leaves differences unchanged and limits rounding.
    """
    code = cells.cell * 2 + (prep.a > 0).astype(np.int64)
    size = 2 * cells.n_cells
    yc = prep.y - np.average(prep.y, weights=prep.w) if prep.w.sum() > 0 else prep.y
    if w is None or w.ndim == 1:
        w = prep.w if w is None else w
        sw = np.bincount(code, weights=w, minlength=size)
        sy = np.bincount(code, weights=w * yc, minlength=size)
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = np.where(sw > 0, sy / sw, 0.0)
        ss = np.bincount(code, weights=w * (yc - mean[code]) ** 2, minlength=size)  # two-pass
        return sw.reshape(-1, 2), sy.reshape(-1, 2), ss.reshape(-1, 2)
    rows = np.arange(len(code))
    out = []
    for values in (np.ones(len(code)), yc, yc * yc):
        ind = sparse.csr_matrix((values, (rows, code)), shape=(len(code), size))
        out.append(np.asarray((ind.T @ w.T).T).reshape(w.shape[0], -1, 2))
    sw, sy, syy = out
    with np.errstate(divide="ignore", invalid="ignore"):
        ss = np.maximum(syy - np.where(sw > 0, sy * sy / sw, 0.0), 0.0)
    return sw, sy, ss


class _Grouper:
    """Sums of per-cell terms by stratum, with the total over all cells appended (G = K + 1)."""

    def __init__(self, cells: Cells, k: int):
        self.k = k
        self.stratum_of = cells.stratum_of
        self._mt = None  # (K, C) sparse indicator, built on first 2-D use

    def __call__(self, term: np.ndarray) -> np.ndarray:
        if term.ndim == 1:
            per = np.bincount(self.stratum_of, weights=term, minlength=self.k)
            return np.append(per, per.sum())
        if self._mt is None:
            c = len(self.stratum_of)
            self._mt = sparse.csr_matrix((np.ones(c), (self.stratum_of, np.arange(c))), shape=(self.k, c))
        per = np.asarray(self._mt @ term.T).T  # (B, K)
        return np.concatenate([per, per.sum(axis=1, keepdims=True)], axis=1)


# -- pooling ----------------------------------------------------------------------------------------
def _binary_terms(tab: np.ndarray) -> dict:
    """Per-cell Mantel-Haenszel terms of tables (..., C, 4); cells without both arms give 0."""
    a, b, c, d = (tab[..., j] for j in range(4))
    n1, n0 = a + b, c + d
    t = n1 + n0
    both = (n1 > 0) & (n0 > 0)
    tt = np.where(both, t, 1.0)
    out = {
        "w": n1 * n0 / tt,
        "r1": a * n0 / tt,  # W * a / N1
        "r0": c * n1 / tt,  # W * c / N0
        "ad": a * d / tt,
        "bc": b * c / tt,
        "rr_num": n1 * n0 * (a + c) / tt**2 - a * c / tt,
        "sato_p": (n1 * n1 * c - n0 * n0 * a + n1 * n0 * (n0 - n1) / 2) / tt**2,
        "sato_q": (a * (n0 - c) + c * (n1 - a)) / (2 * tt),
        # fixed-weight binomial variances of the standardised risks (numerators)
        "v1": np.where(both, n0 * n0 * a * b / (tt * tt * np.where(n1 > 0, n1, 1.0)), 0.0),
        "v0": np.where(both, n1 * n1 * c * d / (tt * tt * np.where(n0 > 0, n0, 1.0)), 0.0),
    }
    return {k: np.where(both, v, 0.0) for k, v in out.items()}


def _zero_cell(tab: np.ndarray) -> np.ndarray:
    n1 = tab[..., 0] + tab[..., 1]
    n0 = tab[..., 2] + tab[..., 3]
    return (n1 > 0) & (n0 > 0) & (tab == 0).any(axis=-1)


def _undefined(measure: str, s: dict) -> np.ndarray:
    if measure == "rr":
        return (s["r1"] <= 0) | (s["r0"] <= 0)
    if measure == "or":
        return (s["ad"] <= 0) | (s["bc"] <= 0)
    return np.zeros_like(s["w"], dtype=bool)


def _pooled_binary(tab: np.ndarray, group, measure: str, correction: float | None):
    """Group sums of the per-cell terms; with ``correction``, groups whose ratio is undefined use
    tables with ``correction`` added to every cell of each table that has a zero cell.

    Returns ``(sums, corrected)`` where ``sums`` maps term -> (..., G) and ``corrected`` is a bool
    array (..., G) of the groups that were corrected.
    """
    sums = {k: group(v) for k, v in _binary_terms(tab).items()}
    bad = _undefined(measure, sums) & (sums["w"] > 0)
    if correction is None or measure not in ("rr", "or") or not bad.any():
        return sums, np.zeros_like(bad)
    fixed_tab = tab + correction * _zero_cell(tab)[..., None]
    fixed = {k: group(v) for k, v in _binary_terms(fixed_tab).items()}
    return {k: np.where(bad, fixed[k], sums[k]) for k in sums}, bad


def _estimates(measure: str, s: dict):
    """(m1, m0, theta) from group sums; theta on the analysis scale, NaN where undefined."""
    with np.errstate(divide="ignore", invalid="ignore"):
        sw = np.where(s["w"] > 0, s["w"], np.nan)
        m1, m0 = s["r1"] / sw, s["r0"] / sw
        if measure == "rd":
            theta = m1 - m0
        elif measure == "rr":
            ok = (s["r1"] > 0) & (s["r0"] > 0)
            theta = np.where(ok, np.log(np.where(ok, s["r1"], 1.0) / np.where(ok, s["r0"], 1.0)), np.nan)
        else:
            ok = (s["ad"] > 0) & (s["bc"] > 0)
            theta = np.where(ok, np.log(np.where(ok, s["ad"], 1.0) / np.where(ok, s["bc"], 1.0)), np.nan)
    return m1, m0, theta


def _binary_se(measure: str, s: dict, theta: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        if measure == "rd":
            var = (theta * s["sato_p"] + s["sato_q"]) / s["w"] ** 2  # Sato (1989)
        else:  # rr: Greenland & Robins (1985); or is replaced by statsmodels below
            var = s["rr_num"] / (s["r1"] * s["r0"])
    return np.sqrt(np.where(var >= 0, var, np.nan))


def _or_statsmodels(tab: np.ndarray, cells: Cells, k: int, corrected: np.ndarray, correction):
    """Log MH odds ratio and its RBG standard error per group, from statsmodels' StratifiedTable."""
    theta = np.full(k + 1, np.nan)
    se = np.full(k + 1, np.nan)
    n1 = tab[:, 0] + tab[:, 1]
    n0 = tab[:, 2] + tab[:, 3]
    both = (n1 > 0) & (n0 > 0)
    for g in range(k + 1):
        use = both if g == k else both & (cells.stratum_of == g)
        t = tab[use]
        if corrected[g]:
            t = t + correction * (t == 0).any(axis=1, keepdims=True)
        if len(t) == 0:
            continue
        st = StratifiedTable(t[:, [0, 1, 2, 3]].reshape(-1, 2, 2).transpose(1, 2, 0))
        ad, bc = np.sum(st._ad / st._n), np.sum(st._bc / st._n)
        if ad > 0 and bc > 0:
            theta[g] = np.log(st.oddsratio_pooled)
            se[g] = st.logodds_pooled_se
    return theta, se


# -- numeric outcome --------------------------------------------------------------------------------
def _pooled_numeric(sw, sy, ss, group):
    """(m1, m0, theta, v11, v00, usable) for the MH-weighted mean difference; shapes (..., G)."""
    n0, n1 = sw[..., 0], sw[..., 1]
    both = (n1 > 0) & (n0 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(both, n1 + n0, 1.0)
        w = np.where(both, n1 * n0 / t, 0.0)
        ybar = np.where(sw > 0, sy / np.where(sw > 0, sw, 1.0), 0.0)
        sum_w = group(w)
        r1, r0 = group(w * ybar[..., 1]), group(w * ybar[..., 0])
        out_v = []
        usable = np.ones_like(sum_w, dtype=bool)
        for arm, n_arm in ((1, n1), (0, n0)):
            many = both & (n_arm >= 2)
            s2 = np.where(many, ss[..., arm] / np.where(many, n_arm - 1, 1.0), 0.0)
            known = group(np.where(many, w * w * s2 / np.where(n_arm > 0, n_arm, 1.0), 0.0))
            single = group(np.where(both & ~many, w * w / np.where(n_arm > 0, n_arm, 1.0), 0.0))
            dof = group(np.where(sw[..., arm] > 0, sw[..., arm] - 1, 0.0))
            pooled = group(ss[..., arm]) / np.where(dof > 0, dof, np.nan)
            v = (known + np.where(single > 0, single * pooled, 0.0)) / sum_w**2
            usable &= np.isfinite(v) & (dof > 0)
            out_v.append(v)
        sw_ = np.where(sum_w > 0, sum_w, np.nan)
        m1, m0 = r1 / sw_, r0 / sw_
    return m1, m0, m1 - m0, out_v[0], out_v[1], usable, sum_w


# -- estimator --------------------------------------------------------------------------------------
def _status(measure, n1, n0, sum_w, sums, binary, usable) -> str:
    if n1 <= 0:
        return "no exposed rows in this stratum"
    if n0 <= 0:
        return "no unexposed rows in this stratum"
    if sum_w <= 0:
        return (
            "no confounder level combination here has both exposed and unexposed rows: the arms do "
            "not overlap on the confounders; use fewer or coarser confounders"
        )
    if not binary:
        return OK if usable else "fewer than 2 rows per arm in every confounder cell: no variance"
    if measure == "rr" and (sums["r1"] <= 0 or sums["r0"] <= 0):
        arm = "exposed" if sums["r1"] <= 0 else "unexposed"
        return f"zero events among the {arm} in every confounder cell: risk ratio undefined; pass correction=0.5"
    if measure == "or" and (sums["ad"] <= 0 or sums["bc"] <= 0):
        return "zero cells make the pooled odds ratio undefined; pass correction=0.5"
    return OK


def mantel_haenszel(prep: Prepared, spec: Spec) -> GroupMeans:
    """Mantel-Haenszel effect per stratum and overall, pooled over confounder level combinations.

    Parameters
    ----------
    prep : Prepared
        Rows from :func:`stratagem.frame.prepare`; ``prep.confounders`` are used as categorical
        (numeric ones with more than 10 values are cut into 5 quantile bins, with a note).
    spec : Spec
        Resolved Spec: ``measure`` in rd, rr, or (0/1 outcome) or md (numeric outcome);
        ``correction`` for ratios that are undefined because of zero cells.

    Returns
    -------
    GroupMeans
        ``theta``/``se`` on the analysis scale (log for rr and or): risk difference with the Sato
        (1989) variance, risk ratio with the Greenland & Robins (1985) variance, odds ratio with the
        Robins, Breslow & Greenland (1986) variance (statsmodels ``StratifiedTable``), or the
        MH-weighted mean difference. ``m1``/``m0`` are risks (means) standardised to the
        Mantel-Haenszel weights ``N1 N0 / T`` (see the module docstring).
    """
    cells = confounder_cells(prep)
    k = prep.n_strata
    group = _Grouper(cells, k)
    notes = list(cells.notes)
    if prep.binary and spec.measure != "md":
        tab = _binary_tables(cells, prep, None)
        n1, n0 = group(tab[:, 0] + tab[:, 1]), group(tab[:, 2] + tab[:, 3])  # rows per arm
        sums, corrected = _pooled_binary(tab, group, spec.measure, spec.correction)
        m1, m0, theta = _estimates(spec.measure, sums)
        if spec.measure == "or":
            theta, se = _or_statsmodels(tab, cells, k, corrected, spec.correction)
        else:
            se = _binary_se(spec.measure, sums, theta)
        with np.errstate(divide="ignore", invalid="ignore"):
            v11 = sums["v1"] / sums["w"] ** 2
            v00 = sums["v0"] / sums["w"] ** 2
        usable = np.ones(k + 1, dtype=bool)
        sum_w = sums["w"]
        if corrected.any():
            notes.append(
                f"{spec.correction} added to every cell of the confounder tables with a zero cell in "
                f"{int(corrected.sum())} group(s) whose pooled {spec.measure} was otherwise undefined."
            )
        both_rows = _rows_in_shared_cells(tab)
    else:
        sw, sy, ss = _numeric_sums(cells, prep, None)
        n1, n0 = group(sw[:, 1]), group(sw[:, 0])
        m1, m0, theta, v11, v00, usable, sum_w = _pooled_numeric(sw, sy, ss, group)
        shift = np.average(prep.y, weights=prep.w)
        m1, m0 = m1 + shift, m0 + shift
        with np.errstate(invalid="ignore"):
            se = np.sqrt(v11 + v00)
        sums = {}
        both_rows = np.where((sw[:, 0] > 0) & (sw[:, 1] > 0), sw.sum(axis=1), 0.0).sum()
    n = n1 + n0
    status = [
        _status(spec.measure, n1[g], n0[g], sum_w[g], {kk: v[g] for kk, v in sums.items()},
                prep.binary and spec.measure != "md", usable[g])
        for g in range(k + 1)
    ]
    unused = float(n[-1] - both_rows)
    if n[-1] > 0 and unused > 0:
        notes.append(
            f"{unused:,.0f} of {n[-1]:,.0f} rows ({unused / n[-1]:.1%}) are in confounder level "
            "combinations holding only one arm; they do not contribute to the Mantel-Haenszel estimate."
        )
    bad = np.array([s != OK for s in status])
    theta = np.where(bad, np.nan, theta)
    se = np.where(bad, np.nan, se)
    out = GroupMeans(n, n1, n0, m1, m0, v11, v00, np.zeros_like(m1), status, theta=theta, se=se, notes=notes)
    out.extra["mh_cells"] = int(cells.n_cells)
    return out


def _rows_in_shared_cells(tab: np.ndarray) -> float:
    n1 = tab[:, 0] + tab[:, 1]
    n0 = tab[:, 2] + tab[:, 3]
    return float(np.where((n1 > 0) & (n0 > 0), n1 + n0, 0.0).sum())


def _boot(prep: Prepared, spec: Spec, W: np.ndarray):
    """Replicates ``(m1, m0, theta)``, each (B, G), for replicate row frequencies ``W`` (B, n).

    The cells (and confounder bins) of the original data are kept; each replicate's tables are
    recounted with one sparse product and pooled with the same formulas as the point estimate (the
    odds ratio by its closed form ``sum(a d / T) / sum(b c / T)``, equal to statsmodels').
    """
    cells = confounder_cells(prep)
    cell, uniq = _compress(cells.cell)  # only occupied cells, to keep the product small
    cells = Cells(cell, len(uniq), cells.stratum_of[uniq], cells.notes)
    group = _Grouper(cells, prep.n_strata)
    if prep.binary and spec.measure != "md":
        tab = _binary_tables(cells, prep, W)
        sums, _ = _pooled_binary(tab, group, spec.measure, spec.correction)
        return _estimates(spec.measure, sums)
    sw, sy, ss = _numeric_sums(cells, prep, W)
    m1, m0, theta, *_ = _pooled_numeric(sw, sy, ss, group)
    shift = np.average(prep.y, weights=prep.w)
    return m1 + shift, m0 + shift, theta


mantel_haenszel.boot = _boot
