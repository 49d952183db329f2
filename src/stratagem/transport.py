"""The average effect in another population: transport of stratum effects by standardisation.

When the modifiers are distributed differently in a target population (a region, a clinic's
patients, a future programme's intake), the average effect there is the average of the study's
stratum effects weighted by the target's stratum shares. This is post-stratification, or direct
standardisation, for transportability (Cole & Stuart 2010, Am J Epidemiol 172:107-115; Westreich et
al. 2017, Am J Epidemiol 186:1010-1014). It assumes that within each stratum the effect in the target
equals the effect in the study: the modifiers used capture every difference between the two
populations that changes the effect, and every stratum the target has was estimable in the study.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import measures
from .errors import ColumnNotFoundError, DataError, MissingValuesError, ModifierError, SpecError
from .frame import label_strata
from .results import MEASURE_NAMES, Analysis

__all__ = ["transport", "TransportResult", "TRANSPORT_COLUMNS"]

TRANSPORT_COLUMNS = [
    "population",
    "estimate",
    "se",
    "ci_low",
    "ci_high",
    "p_value",
    "mean_exposed",
    "mean_unexposed",
]

ASSUMPTION = (
    "Transport assumes the effect within each stratum is the same in the target as in the study "
    "(the modifiers capture every difference between the populations that changes the effect)."
)


@dataclass(frozen=True, eq=False)
class TransportResult:
    """The average effect in a target population, from :func:`transport`.

    Attributes
    ----------
    measure : str
        ``"rd"``, ``"rr"``, ``"or"`` or ``"md"``, as in the analysis.
    level : float
        Confidence level of the interval.
    estimate, ci_low, ci_high : float
        Transported effect and its Wald interval, on the reported scale (ratios as ratios).
    se : float
        Standard error on the analysis scale (log scale for ``rr``/``or``).
    p_value : float
        Two-sided Wald test of no effect in the target.
    mean_exposed, mean_unexposed : float
        Standardised potential-outcome means in the target (risks for a binary outcome); NaN for a
        difference measure whose stratum estimates are not differences of the stratum means.
    shares : pandas.DataFrame
        One row per study stratum: the modifier columns, ``stratum``, ``study_share``,
        ``target_share``, ``estimate`` (the stratum effect) and ``status``.
    study : pandas.Series
        The analysis's overall row, for showing beside the transported effect.
    n_target : float or None
        Size of the target sample (sum of its frequencies) when its shares carry sampling
        variance; None when the shares were taken as fixed.
    notes : tuple of str
        What was done (normalised shares, dropped rows) and the assumption transport rests on.
    """

    measure: str
    level: float
    estimate: float
    se: float
    ci_low: float
    ci_high: float
    p_value: float
    mean_exposed: float
    mean_unexposed: float
    shares: pd.DataFrame = field(repr=False)
    study: pd.Series = field(repr=False)
    n_target: float | None = None
    notes: tuple = ()

    def to_frame(self) -> pd.DataFrame:
        """Two rows, ``study`` (the analysis's overall effect) and ``target``, with the columns of
        :data:`TRANSPORT_COLUMNS`."""
        study = {"population": "study", **{c: self.study.get(c, np.nan) for c in TRANSPORT_COLUMNS[1:]}}
        target = {"population": "target", **{c: getattr(self, c) for c in TRANSPORT_COLUMNS[1:]}}
        return pd.DataFrame([study, target], columns=TRANSPORT_COLUMNS)

    def __repr__(self) -> str:
        return (
            f"<TransportResult {self.measure}: target {self.estimate:.4g} "
            f"({self.ci_low:.4g} to {self.ci_high:.4g}); study {self.study.get('estimate', np.nan):.4g}>"
        )

    def _repr_html_(self) -> str:
        frame = self.to_frame()
        shown = frame.assign(**{c: frame[c].map(lambda v: f"{v:.3f}") for c in TRANSPORT_COLUMNS[1:]})
        notes = "".join(f"<li>{html.escape(n)}</li>" for n in self.notes)
        title = html.escape(
            f"Effect in the target population: {MEASURE_NAMES.get(self.measure, self.measure)}, "
            f"{self.level:.0%} interval"
        )
        return (
            f"<div><p><strong>{title}</strong></p>"
            f"{shown.to_html(index=False, escape=True, border=0)}<ul>{notes}</ul></div>"
        )


def transport(
    analysis: Analysis,
    target,
    *,
    weights=None,
    level: float | None = None,
    sampled: bool = True,
) -> TransportResult:
    """Average effect in a target population whose modifiers are distributed differently.

    The effect in the target is the study's stratum effects averaged with the target's stratum
    shares ``p_k`` (post-stratification / direct standardisation for transportability: Cole &
    Stuart 2010, "Generalizing evidence from randomized clinical trials to target populations",
    Am J Epidemiol 172:107-115; Westreich, Edwards, Lesko, Stuart & Cole 2017, "Transportability of
    trial results using inverse odds of sampling weights", Am J Epidemiol 186:1010-1014, whose
    stratified form this is).

    * Difference measures (``rd``, ``md``): ``sum_k p_k d_k``.
    * Ratio measures (``rr``, ``or``): the potential-outcome means are standardised,
      ``M1 = sum_k p_k m1_k`` and ``M0 = sum_k p_k m0_k``, and the ratio is formed from them
      (``M1/M0``, or the odds ratio of ``M1`` and ``M0``); it is not an average of stratum ratios.

    The variance (delta method) adds two parts: the stratum estimates' sampling variance, with
    strata independent (``sum_k p_k^2 Var_k``), and, when the target is a sample of ``N``
    individuals, the multinomial variance of its shares, ``Cov(p) = (diag(p) - p p') / N``.
    The interval is a Wald interval on the analysis scale (log scale for ratios). For an analysis
    with bootstrap intervals the stratum covariances are those of its bootstrap replicates. For a
    ratio measure the variance comes from the covariance of the stratum means the estimator
    reports; with Mantel-Haenszel, whose stratum ratios have their own variance formula, a target
    made of one stratum can therefore show a slightly different se from that stratum's row.

    Parameters
    ----------
    analysis : Analysis
        A result of :func:`stratagem.analyze` with at least one modifier.
    target : pandas.DataFrame or mapping
        Either a table of the target population (one row per individual, or per group with
        ``weights``) holding the modifier columns, or a mapping from stratum to share. Keys may be
        the stratum labels of ``analysis.strata["stratum"]``, the level of a single modifier, or a
        tuple of levels in the modifiers' order. Shares are proportions (unitless); shares that do
        not sum to 1 are normalised (with a note); negative shares are refused.
    weights : str or array-like, optional
        For a DataFrame target: a column name, or one number per row, giving how many individuals
        each row stands for (frequencies). Default: one per row.
    level : float, optional
        Confidence level in (0, 1); default the analysis's level.
    sampled : bool
        For a DataFrame target: True (default) if it is a sample from the target population, so
        its shares carry multinomial sampling variance with ``N`` the sum of the frequencies; False
        if it is the whole population (shares known exactly). Mapping targets are taken as exact.

    Returns
    -------
    TransportResult
        Estimate, interval, the standardised means, the shares used, and the study's overall row.

    Raises
    ------
    SpecError
        No modifiers in the analysis, bad level, unknown, negative or all-zero shares.
    ModifierError
        A stratum with a positive target share was not estimable in the study (named, with the
        reason), a target level does not occur in the study, or a binned value lies outside the
        study's bins.
    ColumnNotFoundError, MissingValuesError, DataError
        Problems with the target table or its weights.

    Examples
    --------
    >>> import stratagem as sg
    >>> from stratagem.transport import transport
    >>> a = sg.analyze(sg.demo_data(), exposure="visited", outcome="on_target",
    ...                strata=("lives_alone",), method="crude")
    >>> r = transport(a, {"no": 0.5, "yes": 0.5})
    >>> r.to_frame()["population"].tolist()
    ['study', 'target']
    """
    if not isinstance(analysis, Analysis):
        raise SpecError(
            f"transport needs an Analysis from stratagem.analyze(); got {type(analysis).__name__}."
        )
    spec = analysis.spec
    if not spec.strata or len(analysis.strata) == 0:
        raise SpecError(
            "The analysis has no strata, so there is nothing to reweight. Run analyze() with "
            "strata=(...) naming the modifiers whose distribution differs in the target."
        )
    level = spec.level if level is None else level
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0 < level < 1:
        raise SpecError(f"The 'level' parameter must be a float in (0, 1); got {level!r}.")
    if not isinstance(sampled, bool):
        raise SpecError(f"The 'sampled' parameter must be True or False; got {sampled!r}.")

    strata = analysis.strata.reset_index(drop=True)
    notes: list[str] = []
    if isinstance(target, pd.DataFrame):
        p, n_target, more = _shares_from_frame(analysis, target, weights)
        notes += more
        if not sampled:
            n_target = None
    elif isinstance(target, Mapping):
        if weights is not None:
            raise SpecError(
                "weights= applies to a target table; a mapping already gives the shares. "
                "Remove weights=."
            )
        p, more = _shares_from_mapping(strata, spec.strata, target)
        notes += more
        n_target = None
    else:
        raise DataError(
            f"target must be a pandas DataFrame of the target population or a mapping of stratum "
            f"to share; got {type(target).__name__}."
        )
    _check_estimable(strata, p)
    notes.append(ASSUMPTION)

    if spec.measure in measures.RATIO:
        theta, se, m1, m0 = _ratio(analysis, strata, p, n_target)
    else:
        theta, se, m1, m0 = _difference(analysis, strata, p, n_target)
    est, lo, hi, pv = (float(v) for v in measures.wald(spec.measure, theta, se, level))
    n = strata["n"].to_numpy(dtype=float)
    table = strata[list(spec.strata) + ["stratum"]].assign(
        study_share=n / n.sum(),
        target_share=p,
        estimate=strata["estimate"].to_numpy(dtype=float),
        status=strata["status"].to_numpy(),
    )
    return TransportResult(
        measure=spec.measure,
        level=float(level),
        estimate=est,
        se=float(se),
        ci_low=lo,
        ci_high=hi,
        p_value=pv,
        mean_exposed=float(m1),
        mean_unexposed=float(m0),
        shares=table,
        study=analysis.overall.copy(),
        n_target=n_target,
        notes=tuple(notes),
    )


# -- target shares ---------------------------------------------------------------------------------
def _shares_from_mapping(strata: pd.DataFrame, modifiers, target: Mapping) -> tuple[np.ndarray, list]:
    """Shares over the study's strata from a mapping of stratum -> share."""
    labels = list(strata["stratum"])
    lookup = {lab: i for i, lab in enumerate(labels)}
    if len(modifiers) == 1:
        for i, level in enumerate(strata[modifiers[0]]):
            lookup.setdefault(str(level), i)
    for i, row in enumerate(strata[list(modifiers)].itertuples(index=False)):
        lookup.setdefault(tuple(str(v) for v in row), i)
    if not target:
        raise SpecError("The target mapping is empty; give a share for at least one stratum.")
    p = np.zeros(len(labels))
    seen: dict[int, object] = {}
    unknown = []
    for key, share in target.items():
        k = tuple(str(v) for v in key) if isinstance(key, tuple) else str(key)
        if k not in lookup:
            unknown.append(key)
            continue
        i = lookup[k]
        if i in seen:
            raise SpecError(
                f"Target keys {seen[i]!r} and {key!r} both name stratum {labels[i]!r}; give it once."
            )
        seen[i] = key
        if isinstance(share, bool) or not isinstance(share, (int, float, np.number)) or not math.isfinite(share):
            raise SpecError(f"The target share of {key!r} must be a finite number; got {share!r}.")
        if share < 0:
            raise SpecError(
                f"The target share of {key!r} is negative ({share!r}); shares must be >= 0."
            )
        p[i] = float(share)
    if unknown:
        shown = labels[:10] + (["..."] if len(labels) > 10 else [])
        raise ModifierError(
            f"Target key(s) {unknown} are not strata of the analysis. Use the labels of "
            f"analysis.strata['stratum']: {shown}."
        )
    total = p.sum()
    if total <= 0:
        raise SpecError("The target shares are all zero; give a positive share to at least one stratum.")
    notes = []
    if abs(total - 1) > 1e-9:
        notes.append(f"Target shares summed to {total:.6g}; they were divided by that sum.")
        p = p / total
    return p, notes


def _shares_from_frame(analysis: Analysis, target: pd.DataFrame, weights) -> tuple[np.ndarray, float, list]:
    """Shares over the study's strata from a target table, its size N, and notes."""
    spec = analysis.spec
    missing_cols = [c for c in spec.strata if c not in target.columns]
    if missing_cols:
        raise ColumnNotFoundError(
            f"The target table lacks modifier column(s) {missing_cols}; it needs every modifier of "
            f"the analysis ({list(spec.strata)}). Add them or rename its columns to match."
        )
    w = _target_weights(target, weights)
    notes = []
    incomplete = target[list(spec.strata)].isna().any(axis=1).to_numpy()
    if incomplete.any():
        counted = ", ".join(
            f"{c!r}: {int(target[c].isna().sum())}" for c in spec.strata if target[c].isna().any()
        )
        if spec.missing == "raise":
            raise MissingValuesError(
                f"The target table has missing modifier values ({counted}). Fill or remove those "
                "rows (the analysis was run with missing='raise')."
            )
        notes.append(
            f"{int(incomplete.sum())} target row(s) with missing modifier values dropped ({counted})."
        )
    keep = ~incomplete
    rows = target.loc[keep, list(spec.strata)]
    w = w[keep]
    if len(rows) == 0 or w.sum() <= 0:
        raise DataError("The target table has no complete rows with positive weight; check it.")
    edges = _edges(analysis)
    for name, e in edges.items():
        x = pd.to_numeric(rows[name], errors="coerce").to_numpy(dtype=float)
        outside = int(((x < e[0]) | (x > e[-1]) | np.isnan(x)).sum())
        if outside:
            raise ModifierError(
                f"{outside} target row(s) have {name!r} outside the study's bins ({e[0]:.4g} to "
                f"{e[-1]:.4g}): the study says nothing about the effect there. Remove those rows, "
                f"or re-run the analysis with bins={{{name!r}: [...]}} edges that cover the target."
            )
    labelled = label_strata(rows, spec, edges)
    study = pd.Index(analysis.strata["stratum"])
    codes = study.get_indexer(labelled["stratum"])  # -1 where the study has no such stratum
    if (codes < 0).any():
        absent = labelled.loc[codes < 0, "stratum"].value_counts()
        listed = ", ".join(f"{lab!r} ({cnt} rows)" for lab, cnt in absent.items())
        raise ModifierError(
            f"Target stratum/strata {listed} do not occur in the study, so their effect is unknown. "
            "Remove those rows from the target, or group levels so the study covers them."
        )
    totals = np.bincount(codes, weights=w, minlength=len(study))
    n_target = float(w.sum())
    return totals / n_target, n_target, notes


def _target_weights(target: pd.DataFrame, weights) -> np.ndarray:
    if weights is None:
        return np.ones(len(target))
    if isinstance(weights, str):
        if weights not in target.columns:
            raise ColumnNotFoundError(
                f"weights column {weights!r} is not in the target table; pass one of its columns."
            )
        values = target[weights]
        label = f"weights column {weights!r}"
    else:
        values = pd.Series(np.asarray(weights).ravel() if np.ndim(weights) else [weights])
        label = "weights"
        if len(values) != len(target):
            raise DataError(
                f"weights has {len(values)} values but the target table has {len(target)} rows; "
                "give one frequency per row."
            )
    try:
        w = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise DataError(f"{label} must hold numbers (frequencies); fix it.") from None
    if not np.all(np.isfinite(w)) or (w < 0).any():
        raise DataError(f"{label} must hold finite non-negative numbers (frequencies); fix it.")
    return w


def _edges(analysis: Analysis) -> dict:
    """Bin edges of the analysis's binned modifiers (kept in ``extra``; explicit bins otherwise)."""
    if "bin_edges" in analysis.extra:
        return dict(analysis.extra["bin_edges"])
    return {k: v for k, v in analysis.spec.bins.items() if isinstance(v, tuple)}


def _check_estimable(strata: pd.DataFrame, p: np.ndarray) -> None:
    bad = [
        (lab, st)
        for lab, st, share in zip(strata["stratum"], strata["status"], p)
        if share > 0 and st != "ok"
    ]
    if bad:
        listed = "; ".join(f"{lab!r}: {st}" for lab, st in bad)
        raise ModifierError(
            f"The target has people in strata the study could not estimate ({listed}). Their effect "
            "is unknown, so it cannot be transported: remove them from the target, or change the "
            "analysis (coarser strata, another measure) so they are estimable."
        )


# -- estimates -------------------------------------------------------------------------------------
def _share_cov(p: np.ndarray, n_target: float | None) -> np.ndarray:
    """Multinomial covariance of the target shares, (diag(p) - p p') / N; zero when exact."""
    if n_target is None:
        return np.zeros((len(p), len(p)))
    return (np.diag(p) - np.outer(p, p)) / n_target


def _difference(analysis: Analysis, strata: pd.DataFrame, p, n_target):
    """Share-weighted average of the stratum differences and its delta-method se."""
    use = p > 0
    d = np.where(use, strata["estimate"].to_numpy(dtype=float), 0.0)
    se = np.where(use, strata["se"].to_numpy(dtype=float), 0.0)
    theta = float(p @ d)
    var = float(np.sum(p**2 * se**2) + d @ _share_cov(p, n_target) @ d)
    m1, m0 = _standardised_means(strata, p)
    if not np.isclose(m1 - m0, theta, rtol=1e-9, atol=1e-12):
        m1 = m0 = np.nan  # stratum estimates are not differences of the means (e.g. Mantel-Haenszel)
    return theta, math.sqrt(max(var, 0.0)), m1, m0


def _standardised_means(strata: pd.DataFrame, p):
    use = p > 0
    m1 = np.where(use, strata["mean_exposed"].to_numpy(dtype=float), 0.0)
    m0 = np.where(use, strata["mean_unexposed"].to_numpy(dtype=float), 0.0)
    return float(p @ m1), float(p @ m0)


def _ratio(analysis: Analysis, strata: pd.DataFrame, p, n_target):
    """Ratio of the standardised potential-outcome means, with a delta-method se (log scale)."""
    measure = analysis.spec.measure
    use = p > 0
    m1 = np.where(use, strata["mean_exposed"].to_numpy(dtype=float), 0.0)
    m0 = np.where(use, strata["mean_unexposed"].to_numpy(dtype=float), 0.0)
    implied, _ = measures.on_analysis_scale(measure, m1, m0, 0.0, 0.0, 0.0)
    reported = np.log(strata["estimate"].to_numpy(dtype=float))
    if not np.allclose(implied[use], reported[use], rtol=1e-7, atol=1e-9):
        raise SpecError(
            f"The {analysis.spec.method!r} stratum {measure} estimates are not ratios of the stratum "
            "means, so the means cannot be standardised. Transport measure='rd' instead, or use "
            "method='standardization', 'ipw' or 'aipw'."
        )
    v11, v00, v10 = _stratum_covariance(analysis, len(strata))
    v11, v00, v10 = (np.where(use, v, 0.0) for v in (v11, v00, v10))
    c = _share_cov(p, n_target)
    M1, M0 = float(p @ m1), float(p @ m0)
    V11 = float(np.sum(p**2 * v11) + m1 @ c @ m1)
    V00 = float(np.sum(p**2 * v00) + m0 @ c @ m0)
    V10 = float(np.sum(p**2 * v10) + m1 @ c @ m0)
    theta, se = measures.on_analysis_scale(measure, M1, M0, V11, V00, V10)
    if not np.isfinite(theta):
        raise SpecError(
            f"The standardised means ({M1:.4g}, {M0:.4g}) leave the {measure} undefined in the "
            "target (a risk of 0 or 1); transport measure='rd' instead."
        )
    return float(theta), float(se), M1, M0


def _stratum_covariance(analysis: Analysis, k: int):
    """(v11, v00, v10) per stratum: from the bootstrap replicates if any, else the estimator's."""
    reps = analysis.extra.get("replicates")
    if reps is not None:
        b1, b0 = (np.asarray(r, dtype=float)[:, :k] for r in reps)
        out = np.zeros((3, k))
        for j in range(k):
            ok = np.isfinite(b1[:, j]) & np.isfinite(b0[:, j])
            if ok.sum() > 1:
                cov = np.cov(b1[ok, j], b0[ok, j])
                out[:, j] = cov[0, 0], cov[1, 1], cov[0, 1]
            else:
                out[:, j] = np.nan
        return out[0], out[1], out[2]
    cov = analysis.extra.get("covariance")
    if cov is None:
        raise SpecError(
            "This Analysis does not carry the covariances of its stratum means, needed for a ratio "
            "measure; re-run analyze() with this version of stratagem, or transport measure='rd'."
        )
    return tuple(np.asarray(cov[key], dtype=float)[:k] for key in ("v11", "v00", "v10"))
