"""The effect-modification toolkit: tests of modification, multiplicity, E-values, response types.

One concept per module:

* :mod:`.heterogeneity` -- Cochran's Q, I², Wald and likelihood-ratio interaction tests, Breslow-Day,
  the scale-dependence statement;
* :mod:`.gail_simon` -- Gail & Simon (1985) test of qualitative interaction;
* :mod:`.multiplicity` -- Holm and Benjamini-Hochberg p-values, simultaneous intervals;
* :mod:`.evalue` -- VanderWeele & Ding (2017) E-values;
* :mod:`.reri` -- additive interaction of two binary factors (RERI, AP, SI);
* :mod:`.response_types` -- bounds on the doomed / causal / preventive / immune shares;
* :mod:`.effect_curve` -- DR-learner effect curve over a numeric modifier; :mod:`.curve_chart` draws it.

:func:`toolkit_fields` is the post-estimation step :func:`stratagem.analyze` runs on every call.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import measures
from .effect_curve import effect_curve
from .evalue import EValue, evalue
from .heterogeneity import heterogeneity_table
from .multiplicity import adjusted_p, bonferroni_intervals, maxt_intervals
from .reri import AdditiveInteraction, reri
from .response_types import bounds_frame, response_type_bounds

__all__ = [
    "AdditiveInteraction",
    "EValue",
    "effect_curve",
    "evalue",
    "reri",
    "response_type_bounds",
    "toolkit_fields",
    "STRATA_EXTRA_COLUMNS",
]

STRATA_EXTRA_COLUMNS = ["p_holm", "p_bh", "ci_low_simultaneous", "ci_high_simultaneous", "e_value",
                        "e_value_ci"]


def _replicate_theta(spec, extra: dict):
    """Bootstrap replicates of the estimates on the analysis scale, (B, G), or None.

    Estimators that estimate the measure directly (Mantel-Haenszel) provide them as
    ``extra["replicate_theta"]``; otherwise they follow from the replicates of (m1, m0).
    """
    theta_b = extra.get("replicate_theta")
    if theta_b is not None:
        return np.asarray(theta_b, dtype=float)
    reps = extra.get("replicates")
    if reps is None:
        return None
    theta_b, _ = measures.on_analysis_scale(spec.measure, reps[0], reps[1], 0.0, 0.0, 0.0)
    return theta_b


def _evalues(spec, estimate, ci_low, ci_high, baseline) -> tuple[float, float, str]:
    if spec.method == "exact" or spec.measure == "md":
        return math.nan, math.nan, ""
    if not np.isfinite(estimate):
        return math.nan, math.nan, ""
    b = float(baseline) if np.isfinite(baseline) and 0 < baseline < 1 else None
    if spec.measure == "rd" and b is None:
        return math.nan, math.nan, ""
    lo = float(ci_low) if np.isfinite(ci_low) else None
    hi = float(ci_high) if np.isfinite(ci_high) else None
    r = evalue(float(estimate), lo, hi, measure=spec.measure, baseline_risk=b)
    return r.estimate, r.ci, r.note


def _evalue_note(spec) -> str:
    if spec.method == "exact":
        return ""
    if spec.measure == "md":
        return "E-values are not given for a mean difference (they need a standardized effect size)."
    how = {
        "rr": "risk ratios",
        "or": "odds ratios (taken as risk ratios where the risk without exposure is below 15%, "
              "as sqrt(OR) above)",
        "rd": "risk differences converted to risk ratios with each row's risk without exposure "
              "(approximate)",
    }[spec.measure]
    return (f"E-values (VanderWeele & Ding 2017) from {how}: e_value for the estimate, e_value_ci for "
            "the interval limit closer to the null.")


def _appended(series: pd.Series, values: dict) -> pd.Series:
    """A new Series: ``series`` followed by ``values``, as setting them one by one would give."""
    if series.dtype != object or series.index.has_duplicates or any(k in series.index for k in values):
        out = series.copy()
        for k, v in values.items():
            out[k] = v
        return out
    return pd.Series([*series.tolist(), *values.values()], index=[*series.index, *values],
                     dtype=object, name=series.name)


def toolkit_fields(prep, spec, gm, fields) -> dict:
    """Post-estimation step of :func:`stratagem.analyze`: the toolkit's tables and columns.

    Parameters
    ----------
    prep : Prepared
        The prepared arrays.
    spec : Spec
        The resolved Spec.
    gm : GroupMeans
        The estimator's output.
    fields : dict
        Analysis fields built so far (``strata``, ``overall``, ``notes``, ``extra`` ...).

    Returns
    -------
    dict
        ``heterogeneity`` (DataFrame), ``strata`` (the same rows and columns, plus ``p_holm``,
        ``p_bh``, ``ci_low_simultaneous``, ``ci_high_simultaneous``, ``e_value``, ``e_value_ci``),
        ``overall`` (plus ``e_value``, ``e_value_ci``), ``response_types`` (bounds for a binary outcome
        unless the method gave exact shares) and ``notes`` (with what was done appended).

    Notes
    -----
    Cost: everything works on the per-stratum table except one weighted ``bincount`` over the rows
    (2x2 cells for Breslow-Day and the cell-level interaction LR test) and, for adjusted methods on
    tables of at most ``heterogeneity.LR_MAX_ROWS`` rows, two statsmodels fits of the working model.
    """
    strata = fields["strata"]
    overall = fields["overall"]
    notes = list(fields.get("notes", ()))
    extra = fields.get("extra") or {}
    ratio = spec.measure in measures.RATIO
    theta_boot = _replicate_theta(spec, extra)

    out = {"heterogeneity": heterogeneity_table(prep, spec, gm, strata, theta_boot)}

    # multiplicity over estimable strata
    status_ok = strata["status"].to_numpy() == "ok"
    p = np.where(status_ok, strata["p_value"].to_numpy(dtype=float), np.nan)
    added = {"p_holm": adjusted_p(p, "holm"), "p_bh": adjusted_p(p, "fdr_bh")}
    est = strata["estimate"].to_numpy(dtype=float)
    se = np.where(status_ok, strata["se"].to_numpy(dtype=float), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        theta = np.log(est) if ratio else est
    if spec.method == "exact":
        lo = hi = np.full(len(strata), np.nan)
    elif theta_boot is not None and len(strata):
        lo, hi, c = maxt_intervals(theta, se, theta_boot[:, : len(strata)], spec.level, ratio)
        if np.isfinite(c):
            notes.append(f"Simultaneous intervals: bootstrap max-|t|, critical value {c:.3g} "
                         f"over {int(np.isfinite(lo).sum())} strata.")
    else:
        lo, hi, m = bonferroni_intervals(theta, se, spec.level, ratio)
        if m > 1:
            notes.append(f"Simultaneous intervals: Bonferroni over {m} strata. Adjusted p-values: "
                         "p_holm (Holm), p_bh (Benjamini-Hochberg false discovery rate).")
    added["ci_low_simultaneous"] = lo
    added["ci_high_simultaneous"] = hi

    # E-values per stratum and overall
    ev = [_evalues(spec, e, l_, h, b) for e, l_, h, b in zip(
        est, strata["ci_low"].to_numpy(dtype=float), strata["ci_high"].to_numpy(dtype=float),
        strata["mean_unexposed"].to_numpy(dtype=float))]
    added["e_value"] = [v[0] for v in ev]
    added["e_value_ci"] = [v[1] for v in ev]
    e0, e1, _ = _evalues(spec, float(overall["estimate"]), float(overall["ci_low"]),
                         float(overall["ci_high"]), float(overall["mean_unexposed"]))
    # New tables built in one call each (adding columns or entries one at a time costs more than
    # the arithmetic here); the inputs are not changed.
    strata = pd.DataFrame({**{c: strata[c] for c in strata.columns}, **added}, index=strata.index)
    overall = _appended(overall, {"e_value": e0, "e_value_ci": e1})
    note = _evalue_note(spec)
    if note:
        notes.append(note)

    # response types: bounds unless the estimator gave exact shares
    if prep.binary and "response_types" not in fields:
        names = (list(strata["stratum"]) if spec.strata else []) + ["overall"]
        p1 = list(strata["mean_exposed"]) + [overall["mean_exposed"]]
        p0 = list(strata["mean_unexposed"]) + [overall["mean_unexposed"]]
        if not spec.strata:
            p1, p0 = p1[-1:], p0[-1:]
        frame, rt_notes = bounds_frame(names, p1, p0, [True] * len(names), spec.monotone)
        out["response_types"] = frame
        notes += rt_notes
        notes.append(
            "Response types: shares are not identified from data; bounds are computed from the "
            "estimated risks (Tian & Pearl 2000 bounds for the causal share)"
            + (", with point values under the assumed monotonicity (no preventive type)."
               if spec.monotone else ".")
        )

    out["strata"] = strata
    out["overall"] = overall
    out["notes"] = tuple(notes)
    return out
