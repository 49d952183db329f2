"""Planning: power and sample size to detect effect modification by a binary or k-level modifier.

The design: a modifier splits the population into k strata of given sizes (or shares of a total),
a share ``exposed_share`` of every stratum is exposed, and each stratum has a baseline risk (risk
without exposure) and an effect. The question is whether the effects differ between strata.

Each stratum's effect is estimated with the usual large-sample variance (common practice; e.g.
Rothman, Greenland & Lash, *Modern Epidemiology*, 3rd ed., ch. 14), for ``n1`` exposed and ``n0``
unexposed people with risks ``p1`` and ``p0``:

* additive scale (risk difference):        ``V = p1 (1 - p1) / n1 + p0 (1 - p0) / n0``
* multiplicative scale (log odds ratio):   ``V = 1 / (n1 p1 (1 - p1)) + 1 / (n0 p0 (1 - p0))``
* numeric outcome (mean difference, ``sd`` given):  ``V = sd^2 (1 / n1 + 1 / n0)``

The test of modification is the Wald test that all k effects are equal, ``Q = sum_k w_k (theta_k -
theta_bar)^2`` with ``w_k = 1 / V_k`` and ``theta_bar`` the ``w``-weighted mean (Cochran's Q with
known variances); under the design ``Q`` is non-central chi-square with ``k - 1`` degrees of freedom
and non-centrality ``lambda = sum_k w_k (theta_k - theta_bar)^2`` evaluated at the true effects. For
two strata this is the two-sided z test of ``theta_1 - theta_2`` with ``se^2 = V_1 + V_2`` (the
normal approximation used for interaction tests, e.g. Brookes et al. 2004, Health Technol Assess
8(29)). Variances are taken at the alternative (the design's risks).

Because every ``V_k`` is proportional to ``1 / N`` for fixed shares, ``lambda = N * lambda_1`` and
the sample size for a target power is ``N = lambda* / lambda_1`` with ``lambda*`` the non-centrality
that gives that power.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from .errors import SpecError

__all__ = [
    "power_modification",
    "sample_size_modification",
    "simulate_power",
    "SimulatedPower",
    "MAX_DRAWS",
    "ROWS_PER_BATCH",
]

SCALES = ("additive", "multiplicative")
MAX_DRAWS = 5000  # bound on simulate_power's repeated analyses
ROWS_PER_BATCH = 400_000  # simulated studies are stacked into tables of about this many rows


# -- validation ------------------------------------------------------------------------------------
def _is_number(v) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) and math.isfinite(v)


def _in_unit(v) -> bool:
    return _is_number(v) and 0 < v < 1


def _each(check):
    def inner(v):
        return _is_number(v) and check(v) or (
            isinstance(v, (Sequence, np.ndarray)) and not isinstance(v, str) and len(v) > 0
            and all(_is_number(x) and check(x) for x in v)
        )

    return inner


# One declarative table: parameter -> (check, what it must be). None passes where a default is used.
RULES: dict[str, tuple[Callable, str]] = {
    "alpha": (_in_unit, "a number in (0, 1), e.g. 0.05"),
    "power": (_in_unit, "a number in (0, 1), e.g. 0.8"),
    "exposed_share": (_in_unit, "a number in (0, 1): the share of each stratum that is exposed"),
    "risks_unexposed": (
        _each(lambda x: 0 < x < 1),
        "a risk in (0, 1), or one risk in (0, 1) per stratum",
    ),
    "shares": (_each(lambda x: 0 < x < 1), "one share in (0, 1) per stratum, summing to 1"),
    "sizes": (_each(lambda x: x > 0), "one positive number of people per stratum"),
    "n": (lambda v: _is_number(v) and v > 0, "a positive number of people in total"),
    "sd": (_each(lambda x: x > 0), "a positive standard deviation, or one per stratum"),
    "scale": (lambda v: v in SCALES, "'additive' (difference of risk differences) or "
              "'multiplicative' (ratio of odds ratios)"),
    "draws": (
        lambda v: isinstance(v, (int, np.integer)) and not isinstance(v, bool) and 10 <= v <= MAX_DRAWS,
        f"an integer from 10 to {MAX_DRAWS}",
    ),
    "seed": (lambda v: isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 0,
             "a non-negative integer"),
}


def _check(**values) -> None:
    for name, value in values.items():
        if value is None and name in ("shares", "sizes", "n", "sd", "risks_unexposed"):
            continue
        check, rule = RULES[name]
        if not check(value):
            shown = value.tolist() if isinstance(value, np.ndarray) else value
            bad = _first_bad(value, check)
            where = f" ({name}[{bad[0]}] = {bad[1]!r})" if bad else ""
            raise SpecError(f"The {name!r} parameter must be {rule}; got {shown!r}{where}.")


def _first_bad(value, check):
    if isinstance(value, (Sequence, np.ndarray)) and not isinstance(value, str):
        for i, x in enumerate(value):
            if not check(x):
                return i, (x.item() if isinstance(x, np.generic) else x)
    return None


@dataclass(frozen=True)
class _Design:
    theta: np.ndarray  # effect per stratum on the analysis scale (rd, log OR, md)
    unit_var: np.ndarray  # variance of each stratum's estimate times N (the total size)
    size: float  # N, the total
    shares: np.ndarray
    p0: np.ndarray | None
    p1: np.ndarray | None


def _design(effects, risks_unexposed, n, sizes, shares, exposed_share, scale, sd) -> _Design:
    """Check the inputs of a design and return per-stratum effects and variances."""
    _check(exposed_share=exposed_share, scale=scale, sizes=sizes, shares=shares, n=n, sd=sd)
    try:
        eff = np.asarray(effects, dtype=float).ravel()
    except (TypeError, ValueError):
        eff = np.array([])
    if eff.size < 2 or not np.all(np.isfinite(eff)):
        raise SpecError(
            f"The 'effects' parameter must give one finite effect per stratum (at least 2 strata); "
            f"got {effects!r}."
        )
    k = eff.size
    if sizes is not None and (shares is not None or n is not None):
        raise SpecError("Give either sizes= (people per stratum) or n= with shares=, not both.")
    if sizes is not None:
        sz = np.asarray(sizes, dtype=float).ravel()
        _same_length("sizes", sz, k)
        size, fractions = float(sz.sum()), sz / sz.sum()
    else:
        fractions = np.full(k, 1.0 / k) if shares is None else np.asarray(shares, dtype=float).ravel()
        _same_length("shares", fractions, k)
        if abs(fractions.sum() - 1) > 1e-6:
            raise SpecError(
                f"The 'shares' parameter must sum to 1; got {list(fractions)} (sum {fractions.sum():.6g})."
            )
        size = float(n) if n is not None else 1.0
    e = float(exposed_share)
    if sd is not None:
        if scale != "additive":
            raise SpecError("A numeric outcome (sd= given) is compared on the additive scale: "
                            "pass scale='additive'.")
        s = np.asarray(sd, dtype=float).ravel()
        s = np.full(k, s[0]) if s.size == 1 else s
        _same_length("sd", s, k)
        per_person = s**2 * (1 / e + 1 / (1 - e))
        return _Design(eff, per_person / fractions, size, fractions, None, None)
    if risks_unexposed is None:
        raise SpecError("A binary outcome needs risks_unexposed= (the risk without exposure, per "
                        "stratum or one for all); for a numeric outcome pass sd= instead.")
    _check(risks_unexposed=risks_unexposed)
    p0 = np.asarray(risks_unexposed, dtype=float).ravel()
    p0 = np.full(k, p0[0]) if p0.size == 1 else p0
    _same_length("risks_unexposed", p0, k)
    if scale == "additive":
        p1 = p0 + eff
        theta = eff
        what = "risks_unexposed[{i}] + effects[{i}]"
    else:
        if np.any(eff <= 0):
            i = int(np.argmax(eff <= 0))
            raise SpecError(
                f"On the multiplicative scale effects are odds ratios and must be > 0; "
                f"effects[{i}] = {float(eff[i])!r}."
            )
        odds = p0 / (1 - p0) * eff
        p1 = odds / (1 + odds)
        theta = np.log(eff)
        what = "the risk from risks_unexposed[{i}] and odds ratio effects[{i}]"
    outside = np.flatnonzero((p1 <= 0) | (p1 >= 1))
    if outside.size:
        i = int(outside[0])
        raise SpecError(
            f"The risk among the exposed in stratum {i + 1} ({what.format(i=i)} = {p1[i]:.4g}) "
            "must be in (0, 1); lower the effect or change the baseline risk."
        )
    if scale == "additive":
        per_person = p1 * (1 - p1) / e + p0 * (1 - p0) / (1 - e)
    else:
        per_person = 1 / (e * p1 * (1 - p1)) + 1 / ((1 - e) * p0 * (1 - p0))
    return _Design(theta, per_person / fractions, size, fractions, p0, p1)


def _same_length(name, arr, k) -> None:
    if arr.size != k:
        raise SpecError(
            f"The {name!r} parameter has {arr.size} value(s) but effects has {k}; give one per stratum."
        )


def _noncentrality_per_person(d: _Design) -> float:
    """lambda for a total of one person (lambda scales with N)."""
    w = 1.0 / d.unit_var
    bar = np.sum(w * d.theta) / np.sum(w)
    return float(np.sum(w * (d.theta - bar) ** 2))


def _power_from_lambda(lam: float, df: int, alpha: float) -> float:
    crit = stats.chi2.ppf(1 - alpha, df)
    return float(stats.ncx2.sf(crit, df, lam)) if lam > 0 else float(alpha)


# -- public functions ------------------------------------------------------------------------------
def power_modification(
    *,
    effects: Sequence[float],
    risks_unexposed: float | Sequence[float] | None = None,
    n: float | None = None,
    sizes: Sequence[float] | None = None,
    shares: Sequence[float] | None = None,
    exposed_share: float = 0.5,
    scale: str = "additive",
    sd: float | Sequence[float] | None = None,
    alpha: float = 0.05,
) -> float:
    """Power of the two-sided Wald test that the exposure's effect is the same in every stratum.

    Parameters
    ----------
    effects : sequence of float, one per stratum (k >= 2)
        The effect in each stratum: risk differences (``scale="additive"``), odds ratios
        (``scale="multiplicative"``), or mean differences in outcome units (``sd`` given).
    risks_unexposed : float or sequence of float in (0, 1)
        Risk of the outcome without exposure, one for all strata or one per stratum (binary outcome).
    n : float, optional
        Total number of people; split by ``shares`` (default: equal shares).
    sizes : sequence of float, optional
        People per stratum, instead of ``n`` and ``shares``.
    shares : sequence of float in (0, 1), optional
        Share of the total in each stratum; must sum to 1.
    exposed_share : float in (0, 1)
        Share of each stratum that is exposed (0.5 for a balanced two-arm design).
    scale : {"additive", "multiplicative"}
        Difference of risk differences, or ratio of odds ratios (tested on the log scale).
    sd : float or sequence, optional
        Standard deviation of a numeric outcome within arm and stratum (outcome units); if given,
        the effects are mean differences and ``risks_unexposed`` is not used.
    alpha : float in (0, 1)
        Two-sided significance level.

    Returns
    -------
    float
        Power, a probability in (0, 1), by the normal approximation described in the module
        docstring (non-central chi-square with k - 1 degrees of freedom; for k = 2 the z test).

    Examples
    --------
    >>> round(power_modification(effects=(0.15, 0.05), risks_unexposed=0.3, n=2000), 3)
    0.657
    """
    _check(alpha=alpha)
    if n is None and sizes is None:
        raise SpecError("Give the study size: n= (total people) or sizes= (people per stratum).")
    d = _design(effects, risks_unexposed, n, sizes, shares, exposed_share, scale, sd)
    lam = d.size * _noncentrality_per_person(d)
    return _power_from_lambda(lam, d.theta.size - 1, alpha)


def sample_size_modification(
    *,
    effects: Sequence[float],
    risks_unexposed: float | Sequence[float] | None = None,
    power: float = 0.8,
    shares: Sequence[float] | None = None,
    exposed_share: float = 0.5,
    scale: str = "additive",
    sd: float | Sequence[float] | None = None,
    alpha: float = 0.05,
) -> int:
    """Total number of people needed to detect effect modification with the given power.

    Same design parameters as :func:`power_modification` (``shares`` default to equal); ``power``
    is the target power in (0, 1). The answer is rounded up to a whole person; per-stratum sizes are
    ``shares * N``.

    Returns
    -------
    int
        Total sample size ``N`` (people, all strata and both arms).

    Raises
    ------
    SpecError
        Inputs outside their ranges (named), or effects that are all equal (no modification to
        detect).

    Examples
    --------
    >>> sample_size_modification(effects=(0.15, 0.05), risks_unexposed=0.3, power=0.8)
    2810
    """
    _check(alpha=alpha, power=power)
    d = _design(effects, risks_unexposed, None, None, shares, exposed_share, scale, sd)
    lam1 = _noncentrality_per_person(d)
    if lam1 <= 1e-300:
        raise SpecError(
            "The effects are equal on the chosen scale, so there is no modification to detect; "
            "give effects that differ between strata."
        )
    df = d.theta.size - 1
    if power <= alpha:
        return 1
    hi = 1.0
    while _power_from_lambda(hi, df, alpha) < power:
        hi *= 2
    lam = optimize.brentq(lambda x: _power_from_lambda(x, df, alpha) - power, 0.0, hi, xtol=1e-10)
    return int(math.ceil(lam / lam1 - 1e-9))


@dataclass(frozen=True)
class SimulatedPower:
    """Result of :func:`simulate_power`.

    Attributes
    ----------
    power : float
        Share of usable draws in which the test of modification rejected at ``alpha``.
    mc_se : float
        Monte Carlo standard error of ``power``, ``sqrt(power (1 - power) / usable draws)``.
    analytic : float
        :func:`power_modification` for the same design, for comparison.
    draws, usable, rejected : int
        Simulated studies, those in which every stratum was estimable, and rejections among them.
    """

    power: float
    mc_se: float
    analytic: float
    draws: int
    usable: int
    rejected: int

    def __repr__(self) -> str:
        return (
            f"<SimulatedPower {self.power:.3f} (MC se {self.mc_se:.3f}, {self.usable}/{self.draws} "
            f"usable draws); analytic {self.analytic:.3f}>"
        )


def simulate_power(
    *,
    effects: Sequence[float],
    risks_unexposed: float | Sequence[float] | None = None,
    n: int | None = None,
    sizes: Sequence[float] | None = None,
    shares: Sequence[float] | None = None,
    exposed_share: float = 0.5,
    scale: str = "additive",
    sd: float | Sequence[float] | None = None,
    alpha: float = 0.05,
    draws: int = 200,
    seed: int = 0,
    progress: Callable[[float], None] | None = None,
) -> SimulatedPower:
    """Check :func:`power_modification` by simulating the design and analysing each draw.

    Each draw is a randomised study made with :func:`stratagem.simulate` (the modifier level of
    each person drawn with the stratum shares, exposure a coin with ``exposed_share``, outcomes
    from response types giving the design's risks, or normal outcomes with ``sd``), analysed with
    :func:`stratagem.analyze` (``method="crude"``, measure ``rd``, ``or`` or ``md``); the stratum
    estimates and standard errors then go into the same Wald test of equal effects. Stratum sizes
    vary from draw to draw (multinomial), as they would in a real study. For speed, up to about
    :data:`ROWS_PER_BATCH` rows of independent studies are simulated and analysed together,
    stratified by (draw, subgroup): crude stratum estimates use only their own rows, so each
    draw's estimates equal those of analysing it alone.

    Parameters
    ----------
    effects, risks_unexposed, n, sizes, shares, exposed_share, scale, sd, alpha
        As for :func:`power_modification`. ``n`` (or the sum of ``sizes``) is rounded to a whole
        number of people.
    draws : int
        Number of simulated studies, 10 to :data:`MAX_DRAWS` (bounded to keep the run short; the
        Monte Carlo se is about ``0.5 / sqrt(draws)`` at most).
    seed : int
        Random state of the whole run; draw ``i`` uses a state derived from it.
    progress : callable, optional
        Called with the fraction of draws done.

    Returns
    -------
    SimulatedPower
    """
    _check(draws=draws, seed=seed, alpha=alpha)
    analytic = power_modification(
        effects=effects, risks_unexposed=risks_unexposed, n=n, sizes=sizes, shares=shares,
        exposed_share=exposed_share, scale=scale, sd=sd, alpha=alpha,
    )
    d = _design(effects, risks_unexposed, n, sizes, shares, exposed_share, scale, sd)
    from .analysis import analyze  # imported here: planning does not need the analysis stack
    from .simulate import simulate

    k = d.theta.size
    levels = [str(i + 1) for i in range(k)]
    total = int(round(d.size))
    kwargs = dict(
        modifiers={"subgroup": dict(zip(levels, d.shares.tolist()))},
        by=("subgroup",),
        confounding=0.0,
        randomised=True,
        exposed_share=float(exposed_share),
    )
    if sd is None:
        kwargs["shares"] = {lev: _types(p0, p1) for lev, p0, p1 in zip(levels, d.p0, d.p1)}
        measure = "rd" if scale == "additive" else "or"
    else:
        sds = np.broadcast_to(np.asarray(sd, dtype=float), (k,))
        if np.ptp(sds) > 0:
            raise SpecError("simulate_power draws one outcome sd for everyone; give a single sd.")
        kwargs.update(outcome="numeric", effects=dict(zip(levels, d.theta.tolist())),
                      noise_sd=float(sds[0]))
        measure = "md"
    per_batch = max(1, min(int(draws), ROWS_PER_BATCH // max(total, 1)))
    sizes_ = [per_batch] * (int(draws) // per_batch) + ([int(draws) % per_batch] if draws % per_batch else [])
    states = np.random.SeedSequence(seed).generate_state(len(sizes_))
    crit = stats.chi2.ppf(1 - alpha, k - 1)
    usable = rejected = done = 0
    for b, state in zip(sizes_, states):
        frame = _draw_batch(simulate, total, b, int(state), kwargs)
        a = analyze(frame, exposure="exposed", outcome="outcome", strata=("draw", "subgroup"),
                    method="crude", measure=measure, max_levels=max(b, k, 2))
        u, r = _count_rejections(a.strata, k, measure, crit)
        usable, rejected, done = usable + u, rejected + r, done + b
        if progress is not None:
            progress(done / draws)
    if usable == 0:
        raise SpecError(
            "No simulated study had every stratum estimable; the design is too small. Increase n."
        )
    power = rejected / usable
    return SimulatedPower(
        power=power,
        mc_se=math.sqrt(max(power * (1 - power), 1e-12) / usable),
        analytic=analytic,
        draws=int(draws),
        usable=usable,
        rejected=rejected,
    )


def _draw_batch(simulate, total: int, b: int, state: int, kwargs: dict):
    """``b`` independent studies of ``total`` people each, stacked, with a ``draw`` label column.

    People are drawn independently, so consecutive blocks of one population of ``b * total`` are
    ``b`` independent studies of the design.
    """
    frame = simulate(total * b, seed=state, **kwargs)
    width = len(str(b - 1))
    labels = np.array([str(i).zfill(width) for i in range(b)], dtype=object)
    frame["draw"] = np.repeat(labels, total)
    return frame


def _count_rejections(strata, k: int, measure: str, crit: float) -> tuple[int, int]:
    """Usable draws (all k subgroups present and estimable) and rejections of equal effects.

    One crude analysis stratified by (draw, subgroup) gives, for every draw, exactly the stratum
    estimates of analysing that draw alone: crude stratum estimates use only the stratum's rows.
    """
    ok = strata["status"].eq("ok").groupby(strata["draw"]).agg(["sum", "size"])
    good = ok.index[(ok["sum"] == k) & (ok["size"] == k)]
    rows = strata[strata["draw"].isin(good)]
    est = rows["estimate"].to_numpy(dtype=float).reshape(-1, k)
    theta = np.log(est) if measure == "or" else est
    w = 1.0 / rows["se"].to_numpy(dtype=float).reshape(-1, k) ** 2
    bar = np.sum(w * theta, axis=1, keepdims=True) / np.sum(w, axis=1, keepdims=True)
    q = np.sum(w * (theta - bar) ** 2, axis=1)
    return int(len(good)), int(np.sum(q > crit))


def _types(p0: float, p1: float) -> dict:
    """Response-type shares with risk p0 without exposure and p1 with it (no type is both causal
    and preventive: the smaller set of the two is empty)."""
    doomed = min(p0, p1)
    return {
        "doomed": doomed,
        "causal": max(p1 - p0, 0.0),
        "preventive": max(p0 - p1, 0.0),
        "immune": 1.0 - max(p0, p1),
    }
