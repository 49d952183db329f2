"""E-values: how strong unmeasured confounding would have to be to explain an estimate away.

VanderWeele TJ, Ding P (2017). Sensitivity analysis in observational research: introducing the
E-value. *Annals of Internal Medicine* 167(4):268-274.

For a risk ratio ``RR >= 1`` the E-value is ``RR + sqrt(RR * (RR - 1))``; for ``RR < 1`` the same
formula is applied to ``1 / RR``. It is the minimum strength of association, on the risk-ratio scale,
that an unmeasured confounder would need with both the exposure and the outcome (conditional on the
measured covariates) to move the estimate to the null. For a confidence interval the E-value is that of
the limit closer to the null, or 1 when the interval contains the null.

Other measures are first converted to an (approximate) risk ratio, as the paper describes:

* odds ratio, rare outcome (baseline risk below 15 %): ``RR ~ OR``;
* odds ratio, common outcome: ``RR ~ sqrt(OR)``;
* risk difference: with the baseline risk ``p0`` (risk without exposure), ``RR = (p0 + RD) / p0``
  for the estimate and each limit. This treats ``p0`` as known, an approximation (the paper's
  appendix gives an exact treatment from the four cell counts, not implemented here);
* mean difference: not applicable (the paper's conversion needs a standardized effect size).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import SpecError

__all__ = ["EValue", "evalue", "evalue_rr", "RARE_OUTCOME"]

RARE_OUTCOME = 0.15  # baseline risk below which the odds ratio approximates the risk ratio (the paper)
_MEASURES = ("rr", "or", "rd", "md")


@dataclass(frozen=True)
class EValue:
    """Result of :func:`evalue`.

    Attributes
    ----------
    estimate : float
        E-value of the point estimate (>= 1; NaN when not applicable).
    ci : float
        E-value of the confidence limit closer to the null (1 when the interval holds the null;
        NaN when no interval was given or not applicable).
    rr : float
        The risk ratio (or approximation of it) the E-value was computed from.
    measure : str
        The measure given.
    note : str
        How the measure was converted, or why the E-value is not applicable.
    """

    estimate: float
    ci: float
    rr: float
    measure: str
    note: str


def evalue_rr(rr: float) -> float:
    """E-value of a risk ratio: ``RR* + sqrt(RR* (RR* - 1))`` with ``RR* = max(RR, 1/RR)``.

    Returns NaN for a non-positive or non-finite ``rr``. Formula: VanderWeele & Ding (2017), eq. in
    the main text.
    """
    if rr is None or not math.isfinite(rr) or rr <= 0:
        return math.nan
    r = rr if rr >= 1 else 1.0 / rr
    return r + math.sqrt(r * (r - 1.0))


def _check_number(name: str, value) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise SpecError(f"The {name!r} parameter must be a number or None; got {value!r}.") from None
    return float(value)


def evalue(
    estimate: float,
    ci_low: float | None = None,
    ci_high: float | None = None,
    measure: str = "rr",
    baseline_risk: float | None = None,
) -> EValue:
    """E-value of an effect estimate and of its confidence interval.

    Parameters
    ----------
    estimate : float
        Point estimate on the reported scale (a ratio for ``"rr"``/``"or"``, a difference of risks,
        proportions in [-1, 1], for ``"rd"``).
    ci_low, ci_high : float, optional
        Confidence limits on the same scale. The E-value of the interval uses the limit closer to the
        null.
    measure : {"rr", "or", "rd", "md"}
        The effect measure. ``"md"`` gives NaN with a note (not applicable).
    baseline_risk : float, optional
        Risk of the outcome without exposure (a proportion in (0, 1)). For ``"or"`` it decides the
        rare-outcome (< 0.15) or common-outcome conversion (rare is assumed when not given); for
        ``"rd"`` it is required to convert to a risk ratio.

    Returns
    -------
    EValue
        ``estimate``, ``ci``, ``rr`` (the risk ratio used), ``measure`` and ``note``.

    Notes
    -----
    VanderWeele & Ding (2017), *Ann Intern Med* 167:268. Example from the paper: a risk ratio of 3.9
    with interval 1.8 to 8.7 has E-values of about 7.2 (estimate) and 3.0 (lower limit).

    Examples
    --------
    >>> r = evalue(1.8, 1.2, 2.7)
    >>> round(r.estimate, 3), round(r.ci, 3)
    (3.0, 1.69)
    """
    if measure not in _MEASURES:
        raise SpecError(
            f"The 'measure' parameter must be one of {', '.join(map(repr, _MEASURES))}; got {measure!r}."
        )
    estimate = _check_number("estimate", estimate)
    ci_low = _check_number("ci_low", ci_low)
    ci_high = _check_number("ci_high", ci_high)
    baseline_risk = _check_number("baseline_risk", baseline_risk)
    if baseline_risk is not None and not 0 < baseline_risk < 1:
        raise SpecError(
            f"The 'baseline_risk' parameter must be a proportion in (0, 1); got {baseline_risk!r}."
        )
    if ci_low is not None and ci_high is not None and ci_low > ci_high:
        raise SpecError(f"ci_low ({ci_low}) is above ci_high ({ci_high}); pass the limits in order.")

    if measure == "md":
        return EValue(math.nan, math.nan, math.nan, measure,
                      "not applicable to a mean difference (needs a standardized effect size)")
    if measure == "rr":
        to_rr, note = (lambda v: v), "risk ratio"
    elif measure == "or":
        if baseline_risk is None or baseline_risk < RARE_OUTCOME:
            to_rr = lambda v: v  # noqa: E731
            note = "odds ratio taken as a risk ratio (rare outcome, baseline risk < 15%)"
            if baseline_risk is None:
                note += "; rare outcome assumed (no baseline_risk given)"
        else:
            to_rr = lambda v: math.sqrt(v) if v > 0 else math.nan  # noqa: E731
            note = "odds ratio converted to a risk ratio as sqrt(OR) (common outcome, baseline risk >= 15%)"
    else:  # rd
        if baseline_risk is None:
            return EValue(math.nan, math.nan, math.nan, measure,
                          "not applicable without baseline_risk (risk without exposure)")
        p0 = baseline_risk
        to_rr = lambda v: (p0 + v) / p0  # noqa: E731
        note = (f"risk difference converted to a risk ratio with baseline risk {p0:.4g} "
                "(treated as known; approximate)")

    rr = to_rr(estimate) if estimate is not None and math.isfinite(estimate) else math.nan
    e_est = evalue_rr(rr)
    e_ci = math.nan
    if ci_low is not None or ci_high is not None:
        lo = to_rr(ci_low) if ci_low is not None and math.isfinite(ci_low) else math.nan
        hi = to_rr(ci_high) if ci_high is not None and math.isfinite(ci_high) else math.nan
        if not math.isfinite(rr):
            e_ci = math.nan
        elif rr >= 1:
            # lower limit is the one closer to the null
            e_ci = math.nan if not math.isfinite(lo) and ci_low is None else (
                1.0 if lo <= 1 else evalue_rr(lo))
        else:
            e_ci = math.nan if not math.isfinite(hi) and ci_high is None else (
                1.0 if hi >= 1 else evalue_rr(hi))
    if rr == 1.0:
        e_est = 1.0
    return EValue(e_est, e_ci, rr, measure, note)
