"""The simulation lab's pure functions: draw a population with a known truth, compare estimators.

A :class:`LabSetup` says what to simulate (per level of one modifier, the shares of the four
response types; the strength of confounding; the sample size) and which adjusted method to check.
:func:`draw` makes one population with :func:`stratagem.simulate` and analyses it three times with
:func:`stratagem.analyze`: the true conditional effects (``method="exact"`` on the potential
outcomes ``y0``, ``y1``), the crude estimates and the adjusted estimates. :func:`compare` lays the
three side by side. :func:`repeat_draws` repeats the draw with random states ``seed, seed + 1, ...``
and returns, per method and stratum, the bias and the coverage of the intervals.

The widget :class:`stratagem.widgets.SimulationLab` calls exactly these functions, and shows the code
(:meth:`LabSetup.code`, :meth:`LabSetup.repeat_code`) that gives its numbers again.

The truth a draw is compared with is that draw's own conditional average effect (the mean of
``y1 - y0`` in the stratum, from ``method="exact"``), as in simulation studies of the sample average
effect; the shares set in the setup give its expectation ``causal - preventive``
(:meth:`LabSetup.set_effects`). Method: Morris, White & Crowther (2019), "Using simulation studies to
evaluate statistical methods", Statistics in Medicine 38:2074-2102 (bias, coverage and their Monte
Carlo standard errors, table 6).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .analysis import analyze
from .errors import SpecError
from .results import Analysis
from .simulate import simulate

__all__ = [
    "LabSetup",
    "LabDraw",
    "draw",
    "compare",
    "repeat_records",
    "summarise_draws",
    "repeat_draws",
    "TYPES",
    "ADJUSTED_METHODS",
    "DEFAULT_COVARIATES",
    "COMPARE_COLUMNS",
    "REPEAT_COLUMNS",
]

TYPES = ("doomed", "causal", "preventive", "immune")
ADJUSTED_METHODS = ("standardization", "ipw", "aipw")
DEFAULT_COVARIATES = {
    "age": ("normal", 60.0, 10.0),
    "frail": ("binary", 0.3),
    "visits": ("poisson", 3.0),
}
DEFAULT_SHARES = {
    "low": {"doomed": 0.30, "causal": 0.10, "preventive": 0.05, "immune": 0.55},
    "high": {"doomed": 0.30, "causal": 0.25, "preventive": 0.05, "immune": 0.40},
}
COMPARE_COLUMNS = ["stratum", "modifier_level", "role", "method", "n", "estimate", "se", "ci_low", "ci_high",
                   "status", "truth", "set_effect", "error", "covered"]
REPEAT_COLUMNS = ["role", "method", "stratum", "modifier_level", "draws", "failed", "mean_truth", "set_effect",
                  "bias", "bias_mcse", "rmse", "coverage", "coverage_mcse", "mean_width"]
_RESERVED = ("y0", "y1", "propensity", "response_type")
_TOLERANCE = 1e-6  # shares must sum to 1 within this


def _number(name: str, value, low: float, high: float, *, open_low=False, open_high=False) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        x = math.nan
    bad = (not math.isfinite(x) or isinstance(value, bool) or x < low or x > high
           or (open_low and x == low) or (open_high and x == high))
    if bad:
        lo, hi = ("(" if open_low else "["), (")" if open_high else "]")
        raise SpecError(f"The {name!r} parameter must be a number in {lo}{low}, {high}{hi}; got {value!r}.")
    return x


@dataclass(frozen=True)
class LabSetup:
    """What the lab simulates and which adjusted method it checks.

    Parameters
    ----------
    shares : mapping
        Level of the modifier -> shares of the four response types, a mapping with the keys
        ``doomed``, ``causal``, ``preventive``, ``immune`` (proportions, each in [0, 1], summing to
        1). The true effect (risk difference) in a level is ``causal - preventive``.
    weights : mapping or None
        Level -> probability of the level in the population; None gives every level the same.
    n : int
        Sample size of one draw (people), at least 50.
    confounding : float in [0, 1]
        How strongly the covariates drive both the exposure and the outcome
        (see :func:`stratagem.simulate`); 0 means none.
    method : {"standardization", "ipw", "aipw"}
        The adjusted method compared with the crude one.
    level : float in (0, 1)
        Confidence level of the intervals.
    modifier : str
        Name of the modifier column.
    covariates : mapping
        Confounders and how they are drawn (rules of :func:`stratagem.simulate`); all are adjusted
        for.
    exposure, outcome : str
        Names of the exposure and outcome columns.
    """

    shares: Mapping[str, Mapping[str, float]] = field(default_factory=lambda: DEFAULT_SHARES)
    weights: Mapping[str, float] | None = None
    n: int = 2000
    confounding: float = 0.5
    method: str = "aipw"
    level: float = 0.95
    modifier: str = "group"
    covariates: Mapping[str, tuple] = field(default_factory=lambda: DEFAULT_COVARIATES)
    exposure: str = "exposed"
    outcome: str = "outcome"

    def __post_init__(self):
        if not isinstance(self.shares, Mapping) or not self.shares:
            raise SpecError(
                "The 'shares' parameter must be a non-empty mapping of level -> shares of the four "
                f"response types, e.g. {{'low': {DEFAULT_SHARES['low']}}}; got {self.shares!r}."
            )
        clean = {}
        for level, values in self.shares.items():
            if not isinstance(level, str) or not level.strip():
                raise SpecError(f"Every level name in 'shares' must be a non-empty string; got {level!r}.")
            if not isinstance(values, Mapping) or set(values) != set(TYPES):
                raise SpecError(
                    f"The shares of level {level!r} must be a mapping with exactly the keys {list(TYPES)}; "
                    f"got {values!r}."
                )
            row = {t: _number(f"shares[{level!r}][{t!r}]", values[t], 0.0, 1.0) for t in TYPES}
            total = sum(row.values())
            if abs(total - 1.0) > _TOLERANCE:
                raise SpecError(
                    f"The shares of level {level!r} sum to {total:.4g}; they must sum to 1. "
                    "Lower one share or raise another (immune is often the one to adjust)."
                )
            clean[level] = row
        object.__setattr__(self, "shares", clean)
        if self.weights is None:
            weights = {level: 1.0 / len(clean) for level in clean}
        else:
            if not isinstance(self.weights, Mapping) or set(self.weights) != set(clean):
                raise SpecError(
                    f"The 'weights' parameter must give one probability for each level {list(clean)}; "
                    f"got {self.weights!r}."
                )
            weights = {k: _number(f"weights[{k!r}]", self.weights[k], 0.0, 1.0, open_low=True)
                       for k in clean}
        object.__setattr__(self, "weights", weights)
        if isinstance(self.n, bool) or not isinstance(self.n, (int, np.integer)) or self.n < 50:
            raise SpecError(f"The 'n' parameter must be an integer of at least 50 people; got {self.n!r}.")
        object.__setattr__(self, "n", int(self.n))
        object.__setattr__(self, "confounding", _number("confounding", self.confounding, 0.0, 1.0))
        if self.method not in ADJUSTED_METHODS:
            raise SpecError(f"The 'method' parameter must be one of {list(ADJUSTED_METHODS)}; got {self.method!r}.")
        object.__setattr__(self, "level", _number("level", self.level, 0.0, 1.0, open_low=True, open_high=True))
        object.__setattr__(self, "covariates", dict(self.covariates))
        names = [self.modifier, *self.covariates, self.exposure, self.outcome, *_RESERVED]
        for name in (self.modifier, self.exposure, self.outcome):
            if not isinstance(name, str) or not name.isidentifier():
                raise SpecError(f"Column names must be Python identifiers, e.g. 'group'; got {name!r}.")
        if len(set(names)) < len(names):
            raise SpecError(
                f"The modifier, covariate, exposure and outcome names must differ from each other and "
                f"from {list(_RESERVED)}; got {names[:-len(_RESERVED)]}."
            )

    # -- the truth as set ------------------------------------------------------------------------
    def set_effects(self) -> dict[str, float]:
        """Level -> ``causal - preventive`` (the expected risk difference), and ``"overall"``."""
        out = {k: v["causal"] - v["preventive"] for k, v in self.shares.items()}
        total = sum(self.weights.values())
        out["overall"] = sum(self.weights[k] * out[k] for k in self.shares) / total
        return out

    # -- the pure calls ----------------------------------------------------------------------------
    def simulate_args(self, seed: int = 0) -> dict:
        """Keyword arguments of :func:`stratagem.simulate` for one draw with random state ``seed``."""
        return {
            "n": self.n,
            "modifiers": {self.modifier: dict(self.weights)},
            "shares": {k: dict(v) for k, v in self.shares.items()},
            "covariates": {k: tuple(v) for k, v in self.covariates.items()},
            "confounding": self.confounding,
            "exposure_name": self.exposure,
            "outcome_name": self.outcome,
            "seed": int(seed),
        }

    def analyze_args(self) -> dict[str, dict]:
        """Role -> keyword arguments of :func:`stratagem.analyze`: ``truth``, ``crude``, ``adjusted``."""
        common = {"exposure": self.exposure, "outcome": self.outcome, "strata": (self.modifier,),
                  "level": self.level}
        return {
            "truth": {**common, "method": "exact", "potential_outcomes": ("y0", "y1")},
            "crude": {**common, "method": "crude"},
            "adjusted": {**common, "confounders": tuple(self.covariates), "method": self.method},
        }

    def code(self, seed: int = 0, data_name: str = "df") -> str:
        """Python source of the calls behind one draw: ``sg.simulate(...)`` then three ``sg.analyze(...)``."""
        sim = self.simulate_args(seed)
        lines = ["import stratagem as sg", "", f"{data_name} = sg.simulate("]
        for key, value in sim.items():
            if key == "shares":  # one level per line, for reading
                lines += ["    shares={", *(f"        {k!r}: {v!r}," for k, v in value.items()), "    },"]
            else:
                lines.append(f"    {key}={value!r},")
        lines.append(")")
        common = {k: v for k, v in self.analyze_args()["crude"].items() if k != "method"}
        lines.append("common = dict(" + ", ".join(f"{k}={v!r}" for k, v in common.items()) + ")")
        lines += [
            f'truth = sg.analyze({data_name}, **common, method="exact", potential_outcomes=("y0", "y1"))',
            f'crude = sg.analyze({data_name}, **common, method="crude")',
            f"adjusted = sg.analyze({data_name}, **common, confounders={tuple(self.covariates)!r}, "
            f"method={self.method!r})",
            "# truth.strata, crude.strata, adjusted.strata: estimate, ci_low, ci_high per stratum",
            "",
        ]
        return "\n".join(lines)

    def constructor(self) -> str:
        """Python source building this setup (``LabSetup(...)``, changed fields only)."""
        default = LabSetup()
        args = []
        for name in ("shares", "weights", "n", "confounding", "method", "level", "modifier",
                     "covariates", "exposure", "outcome"):
            value = getattr(self, name)
            if name == "weights" and len(set(value.values())) == 1:
                continue  # equal weights are the default
            if name == "shares":
                args += ["    shares={", *(f"        {k!r}: {v!r}," for k, v in value.items()), "    },"]
            elif value != getattr(default, name):
                args.append(f"    {name}={value!r},")
        return "\n".join(["setup = LabSetup(", *args, ")"])

    def repeat_code(self, draws: int, seed: int = 0) -> str:
        """Python source of the repeated draws: ``repeat_draws(setup, draws=..., seed=...)``."""
        return "\n".join([
            "from stratagem.simlab import LabSetup, repeat_draws",
            "",
            self.constructor(),
            f"runs = repeat_draws(setup, draws={int(draws)}, seed={int(seed)})",
            f"# draw k (k = 0 .. {int(draws) - 1}) is the one-draw code above with seed={int(seed)} + k",
            "runs  # bias and coverage per method and stratum",
            "",
        ])


@dataclass(frozen=True)
class LabDraw:
    """One population and its three analyses (see :func:`draw`)."""

    setup: LabSetup
    seed: int
    data: pd.DataFrame
    truth: Analysis
    crude: Analysis
    adjusted: Analysis


def draw(setup: LabSetup, seed: int = 0) -> LabDraw:
    """Simulate one population and analyse it three times.

    Parameters
    ----------
    setup : LabSetup
    seed : int
        Random state of :func:`stratagem.simulate`.

    Returns
    -------
    LabDraw
        ``data`` (the simulated table), ``truth`` (``method="exact"``), ``crude`` and ``adjusted``
        (:class:`~stratagem.results.Analysis` each). The same (setup, seed) gives the same numbers.
    """
    if not isinstance(setup, LabSetup):
        raise SpecError(f"draw() needs a LabSetup as its first argument; got {type(setup).__name__}.")
    data = simulate(**setup.simulate_args(seed))
    args = setup.analyze_args()
    return LabDraw(setup, int(seed), data, analyze(data, **args["truth"]), analyze(data, **args["crude"]),
                   analyze(data, **args["adjusted"]))


def _rows(analysis: Analysis, modifier: str) -> pd.DataFrame:
    strata = analysis.strata
    frame = pd.DataFrame({
        "stratum": strata["stratum"].astype(str).to_numpy(),
        "modifier_level": strata[modifier].astype(str).to_numpy(),
    })
    for col in ("n", "estimate", "se", "ci_low", "ci_high", "status"):
        frame[col] = strata[col].to_numpy()
    o = analysis.overall
    overall = {"stratum": "overall", "modifier_level": "overall", "n": o["n"], "estimate": o["estimate"],
               "se": o["se"], "ci_low": o["ci_low"], "ci_high": o["ci_high"], "status": o.get("status", "ok")}
    return pd.concat([frame, pd.DataFrame([overall])], ignore_index=True)


def compare(result: LabDraw) -> pd.DataFrame:
    """The three analyses of one draw side by side, one row per (stratum, role).

    Returns
    -------
    DataFrame
        Columns :data:`COMPARE_COLUMNS`: ``stratum`` (strata then ``"overall"``), ``modifier_level`` (the
        modifier's level), ``role`` (``truth``, ``crude``, ``adjusted``), ``method``, ``n``,
        ``estimate`` (risk difference), ``se``, ``ci_low``, ``ci_high``, ``status``, ``truth`` (the
        exact effect in this stratum of this draw), ``set_effect`` (``causal - preventive`` as set),
        ``error`` (estimate - truth) and ``covered`` (whether the interval holds the truth; missing
        for the truth rows and for rows without an estimate).
    """
    setup = result.setup
    truth = _rows(result.truth, setup.modifier)
    set_effects = setup.set_effects()
    parts = []
    for role, analysis in (("truth", result.truth), ("crude", result.crude), ("adjusted", result.adjusted)):
        rows = _rows(analysis, setup.modifier)
        rows.insert(2, "role", role)
        rows.insert(3, "method", analysis.spec.method)
        rows["truth"] = truth["estimate"].to_numpy(dtype=float)
        rows["set_effect"] = [set_effects.get(level, math.nan) for level in rows["modifier_level"]]
        est = pd.to_numeric(rows["estimate"], errors="coerce").to_numpy(dtype=float)
        rows["error"] = est - rows["truth"].to_numpy()
        lo = pd.to_numeric(rows["ci_low"], errors="coerce").to_numpy(dtype=float)
        hi = pd.to_numeric(rows["ci_high"], errors="coerce").to_numpy(dtype=float)
        tr = rows["truth"].to_numpy()
        known = np.isfinite(lo) & np.isfinite(hi) & np.isfinite(tr) & (role != "truth")
        rows["covered"] = pd.array([bool(c) if k else pd.NA for c, k in zip((lo <= tr) & (tr <= hi), known)],
                                   dtype="boolean")
        parts.append(rows)
    out = pd.concat(parts, ignore_index=True)
    return out[COMPARE_COLUMNS]


def repeat_records(
    setup: LabSetup,
    *,
    draws: int = 100,
    seed: int = 0,
    progress: Callable[[float], None] | None = None,
) -> pd.DataFrame:
    """:func:`compare` of ``draws`` draws with random states ``seed, seed + 1, ...``, stacked.

    Parameters
    ----------
    setup : LabSetup
    draws : int
        Number of draws (at least 1).
    seed : int
        Random state of the first draw; draw ``k`` uses ``seed + k``.
    progress : callable, optional
        Called with the fraction of draws done (0 to 1) after each draw; it may raise to stop.

    Returns
    -------
    DataFrame
        :data:`COMPARE_COLUMNS` plus ``draw`` (0 .. draws - 1) and ``seed``, truth rows left out.
    """
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 1:
        raise SpecError(f"The 'draws' parameter must be a positive integer, e.g. 200; got {draws!r}.")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise SpecError(f"The 'seed' parameter must be an integer (the random state); got {seed!r}.")
    parts = []
    for k in range(int(draws)):
        table = compare(draw(setup, int(seed) + k))
        table = table[table["role"] != "truth"]
        table.insert(0, "draw", k)
        table.insert(1, "seed", int(seed) + k)
        parts.append(table)
        if progress is not None:
            progress((k + 1) / draws)
    return pd.concat(parts, ignore_index=True)


def summarise_draws(records: pd.DataFrame) -> pd.DataFrame:
    """Bias and coverage per method and stratum from :func:`repeat_records`.

    Returns
    -------
    DataFrame
        Columns :data:`REPEAT_COLUMNS`, one row per (role, stratum), crude first, strata in their
        order then overall: ``draws`` (draws with an estimate), ``failed`` (draws without),
        ``mean_truth`` (mean exact effect), ``set_effect``, ``bias`` (mean of estimate - truth),
        ``bias_mcse`` (its Monte Carlo standard error, sd / sqrt(draws)), ``rmse``, ``coverage``
        (share of intervals holding the truth), ``coverage_mcse`` (sqrt(c (1 - c) / draws)) and
        ``mean_width`` (mean of ci_high - ci_low). Morris, White & Crowther (2019), table 6.
    """
    out = []
    order = list(dict.fromkeys(records["stratum"]))
    for role in ("crude", "adjusted"):
        part = records[records["role"] == role]
        if part.empty:
            continue
        for stratum in order:
            rows = part[part["stratum"] == stratum]
            err = pd.to_numeric(rows["error"], errors="coerce").to_numpy(dtype=float)
            ok = np.isfinite(err)
            k = int(ok.sum())
            covered = rows["covered"].to_numpy(dtype=float, na_value=np.nan)
            cov_ok = np.isfinite(covered)
            cov = float(covered[cov_ok].mean()) if cov_ok.any() else math.nan
            width = (pd.to_numeric(rows["ci_high"], errors="coerce") - pd.to_numeric(rows["ci_low"], errors="coerce"))
            out.append({
                "role": role,
                "method": str(rows["method"].iloc[0]),
                "stratum": stratum,
                "modifier_level": str(rows["modifier_level"].iloc[0]),
                "draws": k,
                "failed": int(len(rows) - k),
                "mean_truth": float(rows["truth"].mean()),
                "set_effect": float(rows["set_effect"].iloc[0]),
                "bias": float(err[ok].mean()) if k else math.nan,
                "bias_mcse": float(err[ok].std(ddof=1) / math.sqrt(k)) if k > 1 else math.nan,
                "rmse": float(math.sqrt(np.mean(err[ok] ** 2))) if k else math.nan,
                "coverage": cov,
                "coverage_mcse": float(math.sqrt(cov * (1 - cov) / cov_ok.sum())) if cov_ok.any() else math.nan,
                "mean_width": float(width.mean()) if width.notna().any() else math.nan,
            })
    return pd.DataFrame(out, columns=REPEAT_COLUMNS)


def repeat_draws(
    setup: LabSetup,
    *,
    draws: int = 100,
    seed: int = 0,
    progress: Callable[[float], None] | None = None,
) -> pd.DataFrame:
    """Repeat :func:`draw` and return bias and interval coverage per method and stratum.

    ``summarise_draws(repeat_records(setup, draws=draws, seed=seed))``: draw ``k`` uses random state
    ``seed + k``, so the first draw is ``draw(setup, seed)`` and the result is reproducible.

    Parameters
    ----------
    setup : LabSetup
    draws : int
        Number of draws; bias is known to about ``sd / sqrt(draws)`` and coverage to about
        ``sqrt(0.95 * 0.05 / draws)`` (0.015 for 200 draws).
    seed : int
        Random state of the first draw.
    progress : callable, optional
        Called with the fraction of draws done; it may raise to stop the work.

    Returns
    -------
    DataFrame
        Columns :data:`REPEAT_COLUMNS` (see :func:`summarise_draws`).

    Examples
    --------
    >>> from stratagem.simlab import LabSetup, repeat_draws
    >>> runs = repeat_draws(LabSetup(n=500), draws=3, seed=1)
    >>> list(runs["role"].unique())
    ['crude', 'adjusted']
    """
    return summarise_draws(repeat_records(setup, draws=draws, seed=seed, progress=progress))
