"""Populations with known potential outcomes: demo data, validation with known truth, teaching.

:func:`simulate` draws individuals with modifiers, baseline covariates that confound the exposure,
both potential outcomes ``y0`` and ``y1``, the true propensity, the exposure and the observed outcome.
For a binary outcome the four response types (doomed, causal, preventive, immune) are drawn with
given shares in every level (or combination of levels) of the modifiers, so the true conditional
average effect in a cell is ``share(causal) - share(preventive)``.

How confounding is made: the covariates combine into a standardised risk score ``L``. The propensity
is ``expit(logit(exposed_share) + 2.5 * confounding * L)``. A person's response type is chosen by a
uniform ``U = Phi(r * L + sqrt(1 - r^2) * Z)`` with ``r = 0.8 * confounding`` and ``Z`` standard
normal, placed on the cumulative shares in the order immune, causal, preventive, doomed; ``U`` is
uniform whatever ``L`` is, so the shares hold in every cell, while people with a high score are both
more often exposed and more often have an outcome without exposure. The crude estimate is then biased
and adjustment for the covariates removes the bias.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from .errors import SpecError

__all__ = ["simulate", "demo_data", "DEMO_DESCRIPTION"]

_ORDER = ("immune", "causal", "preventive", "doomed")  # low U -> immune, high U -> doomed
_TYPE_OUTCOMES = {"immune": (0, 0), "causal": (0, 1), "preventive": (1, 0), "doomed": (1, 1)}


def _check_shares(key, shares) -> dict:
    if isinstance(shares, Mapping):
        unknown = set(shares) - set(_TYPE_OUTCOMES)
        if unknown:
            raise SpecError(
                f"Unknown response type(s) {sorted(unknown)} for {key!r}; "
                f"use {sorted(_TYPE_OUTCOMES)}."
            )
        values = {t: float(shares.get(t, 0.0)) for t in _TYPE_OUTCOMES}
    else:
        try:
            d, c, p, i = (float(v) for v in shares)
        except (TypeError, ValueError):
            raise SpecError(
                f"Shares for {key!r} must be a mapping of response type to share, or four numbers "
                "(doomed, causal, preventive, immune)."
            ) from None
        values = {"doomed": d, "causal": c, "preventive": p, "immune": i}
    if any(v < 0 for v in values.values()) or abs(sum(values.values()) - 1) > 1e-9:
        raise SpecError(
            f"Shares for {key!r} must be non-negative and sum to 1; got {values}."
        )
    return values


def _draw_covariate(rng, name, rule, n):
    """One covariate column and its standardised score."""
    kind = rule[0]
    if kind == "normal":
        _, mean, sd = rule
        x = rng.normal(mean, sd, n)
        return np.round(x, 1), (x - mean) / sd
    if kind == "binary":
        p = float(rule[1])
        x = (rng.random(n) < p).astype(int)
        return x, (x - p) / np.sqrt(p * (1 - p))
    if kind == "poisson":
        lam = float(rule[1])
        x = rng.poisson(lam, n)
        return x, (x - lam) / np.sqrt(lam)
    if kind == "categorical":
        levels = list(rule[1])
        probs = np.array([rule[1][k] for k in levels], dtype=float)
        idx = rng.choice(len(levels), size=n, p=probs / probs.sum())
        scores = np.linspace(-1, 1, len(levels))
        z = scores[idx]
        return np.array(levels, dtype=object)[idx], (z - z.mean()) / (z.std() or 1.0)
    raise SpecError(
        f"Covariate {name!r}: rule must start with 'normal', 'binary', 'poisson' or 'categorical'; "
        f"got {kind!r}."
    )


def simulate(
    n: int = 2000,
    *,
    modifiers: Mapping[str, Mapping] | None = None,
    shares: Mapping | Sequence | None = None,
    by: Sequence[str] | None = None,
    covariates: Mapping[str, tuple] | None = None,
    confounding: float = 0.5,
    randomised: bool = False,
    exposed_share: float = 0.5,
    outcome: str = "binary",
    effects: Mapping | float | None = None,
    noise_sd: float = 10.0,
    exposure_name: str = "exposed",
    outcome_name: str = "outcome",
    seed: int = 0,
) -> pd.DataFrame:
    """Draw a population with known potential outcomes.

    Parameters
    ----------
    n : int
        Number of individuals.
    modifiers : mapping
        Modifier name -> mapping of level -> probability, e.g. ``{"sex": {"female": .5, "male": .5}}``.
    shares : mapping or 4 numbers
        Response-type shares (binary outcome). Either one set for everyone, given as
        ``{"doomed": .1, "causal": .3, "preventive": .05, "immune": .55}`` or as the four numbers in
        that order, or a mapping from a level (one ``by`` modifier) or a tuple of levels (several)
        to such a set.
    by : sequence of str
        The modifiers whose levels key ``shares``/``effects``; default: the first modifier.
    covariates : mapping
        Confounder name -> rule: ``("normal", mean, sd)``, ``("binary", p)``, ``("poisson", mean)``,
        or ``("categorical", {level: probability})``.
    confounding : float in [0, 1]
        Strength with which the covariates drive both the exposure and the outcome (0 = none).
    randomised : bool
        If True, exposure is a coin with probability ``exposed_share`` for everyone.
    exposed_share : float in (0, 1)
        Share exposed at an average covariate score.
    outcome : "binary" or "numeric"
        For ``"numeric"``, ``y0 = 50 + noise_sd * (r * L + sqrt(1-r^2) Z)`` and ``y1 = y0 + effect``,
        with ``effects`` a number or a mapping keyed like ``shares``.
    exposure_name, outcome_name : str
        Names of the exposure and observed-outcome columns.
    seed : int
        Seed of ``numpy.random.default_rng``; the same seed gives the same population.

    Returns
    -------
    DataFrame
        Modifiers, covariates, the exposure, the observed outcome, ``y0``, ``y1``, ``propensity``
        (true probability of exposure) and, for a binary outcome, ``response_type``.
    """
    if not isinstance(n, (int, np.integer)) or n < 1:
        raise SpecError(f"n must be a positive integer; got {n!r}.")
    if not 0 <= confounding <= 1:
        raise SpecError(f"confounding must be in [0, 1]; got {confounding!r}.")
    if not 0 < exposed_share < 1:
        raise SpecError(f"exposed_share must be in (0, 1); got {exposed_share!r}.")
    if outcome not in ("binary", "numeric"):
        raise SpecError(f"outcome must be 'binary' or 'numeric'; got {outcome!r}.")
    rng = np.random.default_rng(seed)
    modifiers = dict(modifiers or {})
    covariates = dict(covariates or {"risk": ("normal", 0.0, 1.0)})
    by = list(by) if by is not None else list(modifiers)[:1]
    for name in by:
        if name not in modifiers:
            raise SpecError(f"by names {name!r}, which is not among the modifiers {list(modifiers)}.")

    out = {}
    for name, levels in modifiers.items():
        keys = list(levels)
        probs = np.array([levels[k] for k in keys], dtype=float)
        idx = rng.choice(len(keys), size=n, p=probs / probs.sum())
        out[name] = np.array(keys, dtype=object)[idx]
    scores = []
    for name, rule in covariates.items():
        out[name], z = _draw_covariate(rng, name, rule, n)
        scores.append(z)
    score = np.sum(scores, axis=0) / np.sqrt(len(scores))
    score = (score - score.mean()) / (score.std() or 1.0)

    keys = _cell_keys(out, by, n)
    r = 0.8 * confounding
    latent = r * score + np.sqrt(1 - r * r) * rng.standard_normal(n)
    if outcome == "binary":
        u = stats.norm.cdf(latent)
        y0, y1, types = _binary_outcomes(keys, shares, by, u)
    else:
        effect = _per_cell(keys, effects if effects is not None else 0.0, by, float)
        y0 = 50.0 + noise_sd * latent
        y1 = y0 + effect
        types = None
    if randomised:
        propensity = np.full(n, float(exposed_share))
    else:
        logit0 = np.log(exposed_share / (1 - exposed_share))
        propensity = 1 / (1 + np.exp(-(logit0 + 2.5 * confounding * score)))
    a = (rng.random(n) < propensity).astype(int)
    frame = pd.DataFrame(out)
    frame[exposure_name] = a
    frame[outcome_name] = np.where(a == 1, y1, y0)
    frame["y0"] = y0
    frame["y1"] = y1
    frame["propensity"] = propensity
    if types is not None:
        frame["response_type"] = types
    for name in modifiers:
        frame[name] = pd.Categorical(frame[name], categories=list(modifiers[name]))
    return frame


def _cell_keys(columns: dict, by: list[str], n: int) -> list:
    if not by:
        return [None] * n
    if len(by) == 1:
        return list(columns[by[0]])
    return list(zip(*(columns[b] for b in by)))


def _per_cell(keys, value, by, convert):
    if not isinstance(value, Mapping):
        return np.full(len(keys), convert(value))
    missing = sorted({repr(k) for k in keys} - {repr(k) for k in value})
    if missing:
        raise SpecError(f"No value given for cell(s) {missing[:5]} of modifiers {by}; add them.")
    return np.array([convert(value[k]) for k in keys])


def _binary_outcomes(keys, shares, by, u):
    if shares is None:
        raise SpecError("A binary outcome needs shares= of the four response types.")
    if isinstance(shares, Mapping) and set(shares) <= set(_TYPE_OUTCOMES):
        table = {None: _check_shares("everyone", shares)}
        keys = [None] * len(keys)
    elif isinstance(shares, Mapping):
        table = {k: _check_shares(k, v) for k, v in shares.items()}
    else:
        table = {None: _check_shares("everyone", shares)}
        keys = [None] * len(keys)
    missing = sorted({repr(k) for k in keys} - {repr(k) for k in table})
    if missing:
        raise SpecError(f"No shares given for cell(s) {missing[:5]} of modifiers {by}; add them.")
    n = len(keys)
    types = np.empty(n, dtype=object)
    key_arr = np.empty(n, dtype=object)
    key_arr[:] = keys
    for key, sh in table.items():
        mask = np.array([k == key for k in keys]) if key is not None else np.ones(n, dtype=bool)
        cum = np.cumsum([sh[t] for t in _ORDER])
        idx = np.minimum(np.searchsorted(cum, u[mask], side="right"), len(_ORDER) - 1)
        types[mask] = np.array(_ORDER, dtype=object)[idx]
    y0 = np.array([_TYPE_OUTCOMES[t][0] for t in types])
    y1 = np.array([_TYPE_OUTCOMES[t][1] for t in types])
    return y0, y1, types


DEMO_DESCRIPTION = """\
An invented scenario (not real data). A health district offers people with type 2 diabetes a
programme of home visits by a community pharmacist. `visited` is 1 for those who took part. The
outcome `on_target` is 1 when their blood sugar (HbA1c) was within target a year later. Possible
modifiers: `sex`, `lives_alone`, `insulin`, and `age` (numeric). People already engaged with their
care (older, less deprived, more clinic visits in the past year, longer since diagnosis, some
districts) took part more often and also reached target more often without the programme, so the
crude comparison overstates the benefit; `age`, `deprivation` (1 least to 5 most deprived),
`clinic_visits`, `years_diagnosed` and `district` are the confounders. The true effect is larger for
people who live alone and smaller for those on insulin. `y0`, `y1`, `propensity` and
`response_type` are the simulation's hidden truth, there for checking estimators."""


def demo_data(n: int = 4000, seed: int = 2024) -> pd.DataFrame:
    """The embedded demo: an invented home-visit programme (see :data:`DEMO_DESCRIPTION`).

    Built with :func:`simulate`; fixed by default (``n=4000``, ``seed=2024``). Columns: sex,
    lives_alone, insulin, age, deprivation, clinic_visits, years_diagnosed, district, visited,
    on_target, y0, y1, propensity, response_type.
    """
    shares = {}
    for alone in ("no", "yes"):
        for insulin in ("no", "yes"):
            causal = 0.14 + (0.10 if alone == "yes" else 0.0) - (0.08 if insulin == "yes" else 0.0)
            doomed = 0.38 - (0.10 if insulin == "yes" else 0.0)
            preventive = 0.03
            shares[(alone, insulin)] = {
                "doomed": doomed,
                "causal": causal,
                "preventive": preventive,
                "immune": 1 - doomed - causal - preventive,
            }
    frame = simulate(
        n,
        modifiers={
            "sex": {"female": 0.52, "male": 0.48},
            "lives_alone": {"no": 0.7, "yes": 0.3},
            "insulin": {"no": 0.65, "yes": 0.35},
        },
        shares=shares,
        by=("lives_alone", "insulin"),
        covariates={
            "age": ("normal", 63.0, 11.0),
            # listed most to least deprived, so less deprivation means a higher engagement score
            "deprivation": ("categorical", {5: 0.2, 4: 0.2, 3: 0.2, 2: 0.2, 1: 0.2}),
            "clinic_visits": ("poisson", 3.0),
            "years_diagnosed": ("normal", 9.0, 5.0),
            "district": ("categorical", {"harbour": 0.3, "hills": 0.2, "market": 0.25, "riverside": 0.25}),
        },
        confounding=0.6,
        exposed_share=0.35,
        exposure_name="visited",
        outcome_name="on_target",
        seed=seed,
    )
    frame["deprivation"] = frame["deprivation"].astype(int)
    frame["age"] = frame["age"].clip(30, 95).round(0).astype(int)
    frame["years_diagnosed"] = frame["years_diagnosed"].clip(0, None).round(0).astype(int)
    return frame
